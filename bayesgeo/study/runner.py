"""Run a whole study: explore, fit (per family), check, variogram check, map, compare, report.

:func:`run_study` calls the stage functions of :mod:`bayesgeo.stages` in order, with keyword
arguments built from the settings of a :class:`~bayesgeo.study.settings.Study` (:func:`stage_calls`); the
commands ``bayesgeo explore``, ``fit``, ``check``, ``variogram-check``, ``map`` and ``compare`` call
the same functions, so a run and a sequence of commands give the same files and numbers. The
manifest records, for every stage, the equivalent command line, rendered from the same arguments
(:func:`stage_commands`). No argument parsing or printed output is involved in a run.

Run folder (assembled under a temporary name and renamed at the end, :func:`bayesgeo.common.outputs.new_folder`)::

    inputs/            copies of the study file and the data (and target points, area polygons)
    explore/           exploratory semivariogram, correlogram, directions, quick fits (explore.json);
                       several sites: one sub-folder per site
    fits/<family>/     posterior.nc, summary.csv/.txt, fit.json, diagnostics/, variogram_check.*,
                       predictions.nc, maps/
                       several sites: variogram_check_<site>.*, predictions_<site>.nc, maps_<site>/,
                       shrinkage.csv/.png, design.csv/.png (fit.json holds the population and new-site blocks)
    compare/           comparison.csv, pointwise.csv, loo_pit.png, comparison.json (several families)
    predictions.nc     the predictions of the selected fit (best by PSIS-LOO, or the only one);
                       several sites: predictions_<site>.nc
    figures/*.png      every figure of the run, prefixed by its stage
    tables/*.csv       every table of the run, prefixed by its stage
    report.html        the self-contained report (bayesgeo.report.writer)
    manifest.json      inputs with SHA-256, study text, versions, platform, seeds, command line,
                       times, stage verdicts and the SHA-256 of every output

A several-site study (``[data] site`` and ``[model] pooling`` hierarchical, independent or
complete) runs ``explore --site COL`` once (one sub-folder per site), ``fit --site COL
--pooling P`` once per family, ``check`` on the whole fit, then ``variogram-check --site NAME``
and ``map --site NAME`` for every site (each site's grid around its own points; an area goes to
the site it lies in, :func:`site_areas`).

Exit status of a run: 0 done; 3 a fit failed its convergence check (later stages skipped; the
report is written and marked NOT CONVERGED); 1 a stage failed unexpectedly (recorded in the
manifest and the report).
"""

from __future__ import annotations

import gc
import html
import shutil
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path

from bayesgeo.common.io import write_json
from bayesgeo.common.layout import (REPORT_FILE, REPORT_PDF_FILE, RUN_COMPARE, RUN_EXPLORE, RUN_FIGURES, RUN_INPUTS,
                                    RUN_TABLES, fit_folder_of)
from bayesgeo.common import outputs
from bayesgeo.common.outputs import claim, new_folder
from bayesgeo.study.manifest import MANIFEST_FILE, file_table, new_manifest, utc_now
from bayesgeo.study.settings import Study, areas_of, read_study, study_line
from bayesgeo.common.validate import InputError

__all__ = ["run_study", "stage_commands", "stage_calls", "study_sites", "site_areas", "EXIT_OK",
           "EXIT_STAGE_FAILED", "EXIT_NOT_CONVERGED", "REPORT_FILE"]

EXIT_OK = 0
EXIT_STAGE_FAILED = 1
EXIT_NOT_CONVERGED = 3

def _run_stage(call: tuple[Callable, dict]) -> tuple[int, dict]:
    """Run one stage of :func:`stage_calls`: its stage function with its keyword arguments. Returns
    (status, result)."""
    fn, kw = call
    with outputs.scope():
        return fn(**kw)


def _data_call(study: Study) -> dict:
    """The data keyword arguments every reading stage takes (:func:`bayesgeo.stages.fit.read_kwargs`)."""
    from bayesgeo.data.points import READ_KEYS

    d = study.settings["data"]
    used = list(study.settings["model"]["covariates"])  # the trend's: numeric ones, then categories
    cats = [c for c in used if c in d["categories"]]
    return {"data": d["path"], **{k: d[k] for k in READ_KEYS},
            "covariates": [c for c in used if c not in cats], "categories": cats,
            "baselines": [b for b in d["baselines"] if str(b).partition("=")[0].strip() in cats]}


def _data_argv(kw: dict) -> list[str]:
    """The data options of the call ``kw`` on a command line."""
    from bayesgeo.data.points import READ_KEYS

    argv = [str(kw["data"])]
    for key in READ_KEYS:  # each read setting is the option of its name (--distance-units, --to-crs, ...)
        if key not in ("covariates", "categories", "baselines", "coords", "duplicates") and kw[key]:
            argv += [f"--{key.replace('_', '-')}", kw[key]]
    argv += ["--coords", kw["coords"], "--duplicates", kw["duplicates"]]
    for key, option in (("covariates", "--covariate"), ("categories", "--category"), ("baselines", "--baseline")):
        for c in kw[key]:
            argv += [option, c]
    return argv


def _explore_call(study: Study, root: Path) -> dict:
    """Keyword arguments of :func:`bayesgeo.stages.explore.explore_folder` for the study's explore stage."""
    e = study.settings["explore"]
    return {**_data_call(study), "trend": e["trend"], "transform": e["transform"], "bins": e["bins"],
            "permutations": e["permutations"], "estimator": e["estimator"], "seed": e["seed"],
            "out": root / RUN_EXPLORE, "lag_limit": e["lag_limit"]}


def _explore_argv(kw: dict) -> list[str]:
    argv = ["explore", *_data_argv(kw), "--trend", str(kw["trend"]), "--transform", kw["transform"],
            "--bins", str(kw["bins"]), "--permutations", str(kw["permutations"]), "--estimator", kw["estimator"],
            "--seed", str(kw["seed"]), "--out", str(kw["out"])]
    if kw["lag_limit"] is not None:
        argv += ["--lag-limit", repr(kw["lag_limit"])]
    return argv


def _study_points(study: Study):
    """The study's point data, read as every stage reads them."""
    from bayesgeo.data.points import read_points, read_settings

    d = study.settings["data"]
    return read_points(d["path"], **read_settings(d))


def _coordinates(ds) -> dict:
    """The coordinates an analysis of ``ds`` uses: ``crs`` (WKT, "" when not stated), ``crs_name``,
    ``source_crs_name`` (after a projection), ``coords`` and ``distance_units``."""
    return {k: str(ds.attrs.get(k, "")) for k in ("crs", "crs_name", "source_crs_name", "coords", "distance_units")}


def study_sites(study: Study, ds=None) -> dict[str, "object"]:
    """Site label -> (n, 2) coordinates of that site's points, in file order (reads the study's data unless
    ``ds``, the data already read, is given)."""
    import numpy as np

    from bayesgeo.data.points import sites_of

    ds = _study_points(study) if ds is None else ds
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    labels = ds["site"].values if "site" in ds.coords else np.array([""] * len(xy))
    return {lb: xy[labels == lb] for lb in sites_of(ds)}


def _area_arg(area) -> str:
    return str(area) if isinstance(area, Path) else ",".join(repr(v) for v in area)


def site_areas(study: Study, sites: dict) -> dict[str, object]:
    """Site -> the ``[prediction] area`` averaged over at that site (a path or a rectangle).

    A table ``{site = area}`` names the site; an area given alone or in a list goes to the site
    whose bounding box (of its sample points) holds the area's centre.

    Raises
    ------
    InputError
        An unknown site, an area in no site's bounding box, or two areas for one site (``map``
        averages over one area per site); the message names the study file and line.
    """
    import numpy as np

    from bayesgeo.data.targets import area_from_option

    area = study.settings["prediction"]["area"]
    line = study_line(study.text, "prediction", "area")
    where = f"{study.path}, line {line}: [prediction] area" if line else f"{study.path}: [prediction] area"
    if isinstance(area, dict):
        unknown = [k for k in area if k not in sites]
        if unknown:
            raise InputError(f"{where}: unknown site(s) {', '.join(unknown)}; sites: {', '.join(sites)}")
        return dict(area)
    out: dict[str, object] = {}
    for a in areas_of(area):
        vertices, label = area_from_option(_area_arg(a))
        centre = np.asarray(vertices, float).mean(axis=0)
        inside = [lb for lb, xy in sites.items()
                  if np.all(centre >= xy.min(axis=0)) and np.all(centre <= xy.max(axis=0))]
        if not inside:
            raise InputError(f"{where}: the centre of {label} lies in no site's sampled bounding box; name the site "
                             "with a table, e.g. area = {site-name = [xmin, ymin, xmax, ymax]}")
        if inside[0] in out:
            raise InputError(f"{where}: two areas fall in site {inside[0]}; one area per site in this version")
        out[inside[0]] = a
    return out


def _map_call(study: Study, fdir: Path, site: str | None = None, area=None) -> dict:
    """Keyword arguments of :func:`bayesgeo.stages.maps.map_fit` for one map stage of ``study``."""
    pr = study.settings["prediction"]
    return {"folder": fdir, "site": site, "cell": pr["cell"], "margin": pr["margin"], "points": pr["points"],
            "thresholds": list(pr["thresholds"]), "area": None if area is None else _area_arg(area),
            "draws": pr["draws"], "nugget": pr["nugget"], "hull_mask": pr["hull_mask"], "scheduler": "synchronous",
            "seed": pr["seed"], "zones": pr["zones"], "zones_layer": pr["zones_layer"]}


def _map_argv(kw: dict) -> list[str]:
    """The ``bayesgeo map`` command line of the call ``kw`` (what the manifest records)."""
    argv = ["map", str(kw["folder"])]
    if kw["site"] is not None:
        argv += ["--site", kw["site"]]
    argv += ["--margin", repr(kw["margin"]), "--draws", str(kw["draws"]), "--nugget", kw["nugget"],
             "--seed", str(kw["seed"]), "--scheduler", kw["scheduler"]]
    if kw["cell"] is not None:
        argv += ["--cell", repr(kw["cell"])]
    if kw["points"] is not None:
        argv += ["--points", str(kw["points"])]
    for t in kw["thresholds"]:
        argv += ["--threshold", repr(t)]
    if kw["hull_mask"]:
        argv += ["--hull-mask"]
    if kw["area"] is not None:
        argv += ["--area", kw["area"]]
    if kw["zones"] is not None:
        argv += ["--zones", str(kw["zones"])]
    if kw["zones_layer"] is not None:
        argv += ["--zones-layer", kw["zones_layer"]]
    return argv


def _fit_call(study: Study, fam: str, fdir: Path) -> dict:
    """Keyword arguments of :func:`bayesgeo.stages.fit.fit_folder` for the fit of family ``fam``."""
    s = study.settings
    m, smp, pri = s["model"], s["sampler"], s["model.priors"]
    kw = {**_data_call(study), "out": fdir, "covariance": fam, "trend": m["trend"],
          "transform": None if m["transform"] == "none" else m["transform"], "draws": smp["draws"],
          "tune": smp["tune"], "chains": smp["chains"], "seed": smp["seed"], "sampler": smp["name"],
          "target_accept": smp["target_accept"], "max_draws": smp.get("max_draws"),
          "nu": m["nu"] if fam == "matern" else None, "nugget": m["nugget"], "range_below": pri["range_below"],
          "sd_above": pri["sd_above"], "nugget_above": pri["nugget_above"], "approx": m["approx"],
          "neighbours": m["neighbours"]}
    if m.get("anisotropy"):
        kw["anisotropy"] = True
    if study.several_sites:
        kw["pooling"] = m["pooling"]
    return kw


def _fit_argv(kw: dict) -> list[str]:
    """The ``bayesgeo fit`` command line of the call ``kw`` (what the manifest records)."""
    argv = ["fit", *_data_argv(kw)]
    argv += ["--covariance", kw["covariance"], "--trend", str(kw["trend"]), "--transform", kw["transform"] or "none",
             "--draws", str(kw["draws"]), "--tune", str(kw["tune"]), "--chains", str(kw["chains"]),
             "--seed", str(kw["seed"]), "--sampler", kw["sampler"]]
    if kw["target_accept"] is not None:
        argv += ["--target-accept", repr(kw["target_accept"])]
    if kw["max_draws"] is not None:
        argv += ["--max-draws", str(kw["max_draws"])]
    if kw["nu"] is not None:
        argv += ["--nu", repr(kw["nu"])]
    if not kw["nugget"]:
        argv += ["--no-nugget"]
    for key, opt in (("range_below", "--range-below"), ("sd_above", "--sd-above"), ("nugget_above", "--nugget-above")):
        if kw[key] is not None:
            argv += [opt, repr(kw[key][0]), repr(kw[key][1])]
    if "pooling" in kw:
        argv += ["--pooling", kw["pooling"]]
    argv += ["--out", str(kw["out"]), "--approx", kw["approx"]]
    if kw["neighbours"] is not None:
        argv += ["--neighbours", str(kw["neighbours"])]
    if kw.get("anisotropy"):
        argv += ["--anisotropy"]
    return argv


def _vgcheck_call(study: Study, fdir: Path, site: str | None = None) -> dict:
    """Keyword arguments of :func:`bayesgeo.stages.vgcheck.check_variogram` for one stage of ``study``."""
    s = study.settings
    return {"folder": fdir, "site": site, "replicates": s["check"]["replicates"], "bins": s["explore"]["bins"],
            "seed": s["check"]["seed"]}


def _vgcheck_argv(kw: dict) -> list[str]:
    """The ``bayesgeo variogram-check`` command line of the call ``kw``."""
    argv = ["variogram-check", str(kw["folder"])]
    if kw["site"] is not None:
        argv += ["--site", kw["site"]]
    return argv + ["--replicates", str(kw["replicates"]), "--bins", str(kw["bins"]), "--seed", str(kw["seed"])]


def stage_calls(study: Study, root: str | Path, *, sites=None) -> dict[str, tuple[Callable, dict]]:
    """Every stage of ``study`` writing under ``root``, in run order: ``name -> (stage function, keyword
    arguments)`` (:mod:`bayesgeo.stages`).

    Names: ``explore``, ``fit:<family>``, ``check:<family>``, ``variogram-check:<family>``,
    ``map:<family>``, and ``compare`` (several families). In a several-site study the variogram
    check and the map run once per site: ``variogram-check:<family>:<site>`` and
    ``map:<family>:<site>``. ``sites`` (from :func:`study_sites`) is read from the data when omitted.
    """
    from bayesgeo.stages.check import check_fit
    from bayesgeo.stages.compare import compare_folders
    from bayesgeo.stages.explore import explore_folder
    from bayesgeo.stages.fit import fit_folder
    from bayesgeo.stages.maps import map_fit
    from bayesgeo.stages.vgcheck import check_variogram

    root = Path(root)
    if study.several_sites:
        sites = study_sites(study) if sites is None else sites
        areas = site_areas(study, sites)
        per_site = [(site, f":{site}") for site in sites]
    else:
        found = areas_of(study.settings["prediction"]["area"])
        areas = {None: found[0]} if found else {}
        per_site = [(None, "")]
    calls: dict[str, tuple[Callable, dict]] = {"explore": (explore_folder, _explore_call(study, root))}
    for fam in study.families:
        fdir = fit_folder_of(root, fam)
        calls[f"fit:{fam}"] = (fit_folder, _fit_call(study, fam, fdir))
        calls[f"check:{fam}"] = (check_fit, {"folder": fdir})
        for site, tag in per_site:
            calls[f"variogram-check:{fam}{tag}"] = (check_variogram, _vgcheck_call(study, fdir, site))
        for site, tag in per_site:
            calls[f"map:{fam}{tag}"] = (map_fit, _map_call(study, fdir, site, areas.get(site)))
    if len(study.families) > 1:
        # several-site fits compare on all points, each conditioning on its own site (bayesgeo compare)
        calls["compare"] = (compare_folders, {"dirs": [fit_folder_of(root, f) for f in study.families],
                                              "out": root / RUN_COMPARE})
    return calls


def command_line(call: tuple[Callable, dict]) -> list[str]:
    """The ``bayesgeo`` command line (without ``bayesgeo``) equivalent to a stage call of :func:`stage_calls`."""
    fn, kw = call
    render = {
        "explore_folder": _explore_argv,
        "fit_folder": _fit_argv,
        "check_fit": lambda k: ["check", str(k["folder"])],
        "check_variogram": _vgcheck_argv,
        "map_fit": _map_argv,
        "compare_folders": lambda k: ["compare", *(str(d) for d in k["dirs"]), "--out", str(k["out"])],
    }
    return render[fn.__name__](kw)


def stage_commands(study: Study, root: str | Path, *, sites=None) -> dict[str, list[str]]:
    """The command line of every stage of ``study`` (:func:`stage_calls`, same names and order), rendered
    from the same keyword arguments the run passes. Useful to re-run one stage by hand."""
    return {name: command_line(call) for name, call in stage_calls(study, root, sites=sites).items()}


def _copy_outputs(root: Path, selected: str | None) -> None:
    """Top-level predictions (selected fit), figures/ and tables/ gathering every PNG and CSV."""
    if selected:
        for p in sorted(fit_folder_of(root, selected).glob("predictions*.nc")):
            shutil.copy2(p, root / p.name)
    (root / RUN_FIGURES).mkdir(exist_ok=True)
    (root / RUN_TABLES).mkdir(exist_ok=True)
    for ext, dest in (("png", RUN_FIGURES), ("csv", RUN_TABLES)):
        for p in sorted(root.rglob(f"*.{ext}")):
            rel = p.relative_to(root)
            if rel.parts[0] in (RUN_FIGURES, RUN_TABLES, RUN_INPUTS):
                continue
            shutil.copy2(p, root / dest / "__".join(rel.parts))


def run_study(study: Study | str | Path, *, out: str | Path | None = None, overwrite: bool | None = None,
              argv: Sequence[str] | None = None, log: Callable[[str], None] | None = None) -> dict:
    """Run every stage of a study into its run folder and write the report and the manifest.

    Parameters
    ----------
    study : Study or path
        A checked study (:func:`bayesgeo.study.settings.read_study`) or the path of a study file.
    out : path, optional
        Run folder (default: the study's ``[output] dir``).
    overwrite : bool, optional
        Replace an existing run folder (default: the study's ``[output] overwrite``).
    argv : sequence of str, optional
        Command line recorded in the manifest (default ``sys.argv``).
    log : callable, optional
        Receives one line per stage as it starts (progress display); None for silence.

    Returns
    -------
    dict
        ``status`` (0, 1 or 3, see the module docstring), ``out``, ``report``, ``manifest``
        (path), ``verdicts`` (stage -> verdict), ``selected`` (family whose predictions are at the
        top of the folder), ``message``.

    Raises
    ------
    InputError
        Bad study, data or settings (nothing is written), or an existing run folder without overwrite.
    """
    if not isinstance(study, Study):
        study = read_study(study)
    s = study.settings
    option = "--out" if out is not None else f"{study.path}: [output] dir"
    out = Path(out) if out is not None else study.out_dir
    overwrite = s["output"]["overwrite"] if overwrite is None else overwrite
    inputs = [study.path, s["data"]["path"]]
    for extra in (s["prediction"]["points"], s["prediction"]["zones"], *areas_of(s["prediction"]["area"])):
        if isinstance(extra, Path):
            inputs.append(extra)
    claim(out, overwrite=overwrite, inputs=inputs, option=option)
    points = _study_points(study)  # read once: the sites and the coordinates the manifest records
    sites = study_sites(study, points) if study.several_sites else {}
    manifest = new_manifest(study_path=study.path, study_text=study.text, settings=study.to_dict(), inputs=inputs,
                            argv=argv)
    if sites:
        manifest["sites"] = {label: int(len(xy)) for label, xy in sites.items()}
    manifest["coordinates"] = _coordinates(points)
    say = log or (lambda _msg: None)
    fams = study.families
    status, message, selected = EXIT_OK, "done", fams[0]
    with new_folder(out, overwrite=overwrite) as tmp:
        (tmp / RUN_INPUTS).mkdir()
        for k, p in enumerate(inputs):
            name = "study.toml" if k == 0 else p.name
            if not (tmp / RUN_INPUTS / name).exists():
                shutil.copy2(p, tmp / RUN_INPUTS / name)
        calls = stage_calls(study, tmp, sites=sites or None)
        cmds = {name: command_line(call) for name, call in calls.items()}
        order = list(cmds)  # explore, then per family: fit, check, variogram checks, maps; compare last
        n_stages = len(order) + 1
        stop = False
        for k, name in enumerate(order, 1):
            rec = {"stage": name, "command": ["bayesgeo", *[str(a).replace(str(tmp), str(out)) for a in cmds[name]]],
                   "started": utc_now()}
            if stop:
                rec.update(status="skipped", verdict="skipped")
                manifest["stages"].append(rec)
                continue
            say(f"[{k}/{n_stages}] {name.replace(':', ' ')}")
            t0 = time.perf_counter()
            try:
                rc, obj = _run_stage(calls[name])
            except InputError:
                if name == "explore" or name.startswith("fit:"):
                    raise  # bad data or settings: nothing is written
                rc, obj = EXIT_STAGE_FAILED, {"error": f"{sys.exc_info()[1]}"}
            except Exception as err:  # noqa: BLE001 - a failing stage is recorded, the report still written
                rc, obj = EXIT_STAGE_FAILED, {"error": " ".join(f"{type(err).__name__}: {err}".split())}
            gc.collect()  # close NetCDF handles a stage left to the garbage collector before the next opens the file
            rec.update(seconds=round(time.perf_counter() - t0, 3), status=rc)
            verdict = "done" if rc == 0 else ("NOT CONVERGED" if rc == EXIT_NOT_CONVERGED else "failed")
            if name.startswith("check:") and rc != EXIT_STAGE_FAILED:
                verdict = obj.get("verdict", verdict)
            if "error" in obj:
                rec["error"] = obj["error"]
            rec["verdict"] = verdict
            if name == "compare" and rc == 0 and obj.get("ranking"):
                selected = obj["ranking"][0]["fit"]  # the best-ranked family's predictions go to the top
            manifest["stages"].append(rec)
            manifest["verdicts"][name] = verdict
            if name.startswith(("fit:", "check:")) and rc == EXIT_NOT_CONVERGED:
                if not name.startswith("fit:"):
                    status, stop = EXIT_NOT_CONVERGED, True
                    message = (f"{name.split(':', 1)[1]}: the posterior failed its convergence check; later stages "
                               "skipped; the report is marked NOT CONVERGED")
            elif rc != 0:
                if name.startswith("fit:"):
                    status, stop = EXIT_STAGE_FAILED, True
                elif status == EXIT_OK:
                    status = EXIT_STAGE_FAILED
                message = f"stage {name} failed: {obj.get('error', 'see the report')}" if status != EXIT_NOT_CONVERGED \
                    else message
        _copy_outputs(tmp, selected)
        manifest["selected"] = selected
        manifest["status"] = status
        manifest["message"] = message
        say(f"[{n_stages}/{n_stages}] report")
        from bayesgeo.report.writer import write_report

        manifest["finished"] = utc_now()
        try:
            write_report(tmp, manifest, out_name=str(out))
            from bayesgeo.report.pdf import write_pdf

            pdf, why = write_pdf((tmp / REPORT_FILE).read_text(encoding="utf-8"), tmp / REPORT_PDF_FILE)
            manifest["report_pdf"] = REPORT_PDF_FILE if pdf else f"not written: {why}"
            if pdf is None:
                say(f"{REPORT_PDF_FILE} not written: {why}; {REPORT_FILE} is the report")
        except Exception as err:  # noqa: BLE001 - keep the run folder; say what went wrong where the report would be
            reason = " ".join(f"{type(err).__name__}: {err}".split())
            status, message = EXIT_STAGE_FAILED, f"the report could not be built ({reason})"
            manifest.update(status=status, message=message)
            manifest["verdicts"]["report"] = "failed"
            (tmp / REPORT_FILE).write_text(
                "<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>bayesgeo report: FAILED"
                "</title></head><body><h1>Report not built</h1><p>" + html.escape(message) + "</p><p>The stage "
                "outputs are in this folder; manifest.json lists them.</p></body></html>\n", encoding="utf-8")
        manifest["outputs"] = file_table(tmp, exclude=(MANIFEST_FILE,))
        write_json(tmp / MANIFEST_FILE, manifest)
    return {"status": status, "message": message, "out": str(out), "report": str(out / REPORT_FILE),
            "manifest": str(out / MANIFEST_FILE), "verdicts": dict(manifest["verdicts"]), "selected": selected}
