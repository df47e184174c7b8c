"""The compare stage: rank fits of the same data by PSIS-LOO.

Exact Gaussian leave-one-out densities per draw (or a stored ``log_likelihood`` group), in data units,
so that fits with and without a log transform compare fairly; fits of different data are refused.
Several-site fits compare like single-site ones (each point conditions on its own site), with a
``pooling`` column and, when every fit is a several-site fit, elpd by site. With ``out`` the folder
(written atomically) receives ``comparison.csv``, ``pointwise.csv``, ``by_site.csv`` (several-site
fits), ``loo_pit.png`` and ``comparison.json``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

from bayesgeo.common.layout import COMPARISON_FILE
from bayesgeo.common.validate import InputError

__all__ = ["compare_folders", "build_result"]


def _names(dirs) -> list[str]:
    """Fit names: the folder names, made unique with their parent when two share a name."""
    paths = [Path(d) for d in dirs]
    names = [p.name or str(p) for p in paths]
    if len(set(names)) < len(names):
        names = [str(p) for p in paths]
    return names


def _verdicts(name, fit) -> list[str]:
    verdict = fit.stored_verdict
    if verdict == "fail":
        return [f"NOT CONVERGED: {name} failed its convergence check; its elpd is not to be trusted"]
    if verdict is None:
        return [f"{name}: convergence not checked (run 'bayesgeo check' on it)"]
    return []


def _refuse_non_finite(res, folders: dict) -> None:
    """A fit whose elpd, its se or p_loo is NaN or infinite is never ranked: exit 2 naming the fit folder."""
    import math

    for k, name in enumerate(res["fit"].values):
        for var in ("elpd_loo", "se", "p_loo"):
            value = float(res[var].values[k])
            if not math.isfinite(value):
                raise InputError(f"{folders.get(str(name), name)}: {var} = {value} (leave-one-out densities not "
                                 "finite for some points); the fits cannot be ranked: check this fit ('bayesgeo "
                                 "check') and its data")


def build_result(dirs, *, bar=None, store: bool = False, site: str | None = None,
                 progress=None) -> tuple[dict, object, dict]:
    """Open the fits, compare them and compute their LOO-PIT: (JSON object, ranking Dataset, PITs).

    ``progress`` is a bar factory for the long nearest-neighbour leave-one-out of nn fits
    (:func:`bayesgeo.checks.modelcheck.compare_fits`); ``None`` shows none.
    """
    from bayesgeo.checks.modelcheck import compare_fits, open_fit

    if len(dirs) < 2:
        raise InputError(f"dirs: give at least two fit folders (got {len(dirs)})")
    names = _names(dirs)
    if len(set(names)) < len(names):
        raise InputError("dirs: the same fit folder is given twice")
    trees = {}
    cautions = []
    for name, d in zip(names, dirs):
        fit = open_fit(d, sites=True)
        trees[name] = fit.tree
        cautions += _verdicts(name, fit)
        if bar is not None:
            bar.update(1)
    res = compare_fits(trees, site=site, progress=progress)
    _refuse_non_finite(res, dict(zip(names, dirs)))
    if store:
        from bayesgeo.checks.modelcheck import store_log_likelihood

        for name, d in zip(names, dirs):
            if "log_likelihood" not in trees[name].children:
                store_log_likelihood(d)
    if bar is not None:
        bar.update(len(trees))
    pits = {str(name): res["loo_pit"].sel(fit=name) for name in res["fit"].values}
    ranking = []
    for k, name in enumerate(res["fit"].values):
        row = res.isel(fit=k)
        ranking.append({
            "fit": str(name), "path": str(dirs[names.index(str(name))]), "covariance": str(row["covariance"].values),
            "transform": str(row["transform"].values), "pooling": str(row["pooling"].values), "elpd_loo": float(row["elpd_loo"]), "se": float(row["se"]),
            "elpd_diff": float(row["elpd_diff"]), "dse": float(row["dse"]), "p_loo": float(row["p_loo"]),
            "weight": float(row["weight"]), "pareto_k_high": int(row["pareto_k_high"]),
            "pareto_k_max": float(row["pareto_k_max"]),
        })
    obj = {
        "ranking": ranking,
        "n": int(res.attrs["n"]),
        "k_threshold": res.attrs["k_threshold"],
        "k_threshold_source": res.attrs["k_threshold_source"],
        "site": site,
        "method": res.attrs["method"],
        "units": res.attrs["units"],
        "cautions": cautions + list(res.attrs["cautions"]),
    }
    if "elpd_site" in res:
        obj["by_site"] = {
            str(s): {"n": int(res["n_site"].sel(site=s)),
                     "elpd": {str(f): float(res["elpd_site"].sel(fit=f, site=s)) for f in res["fit"].values},
                     "se": {str(f): float(res["se_site"].sel(fit=f, site=s)) for f in res["fit"].values}}
            for s in res["site"].values}
    return obj, res, pits


def compare_folders(dirs: Sequence, *, site: str | None = None, out=None, overwrite: bool = False,
                    store: bool = False, progress: Callable | None = None) -> tuple[int, dict]:
    """Rank the fits in ``dirs`` by PSIS-LOO and, with ``out``, write the ranking folder.

    Parameters
    ----------
    dirs : sequence of path
        Two or more fit folders of the same data.
    site : str, optional
        With several-site fits: compare on this site's points only.
    out : path, optional
        Folder for the tables, the LOO-PIT figure and ``comparison.json`` (refused if present unless
        ``overwrite``); nothing is written without it.
    store : bool
        Also store the leave-one-out ``log_likelihood`` group in each fit that lacks one.
    progress : callable, optional
        Bar factory ``progress(total=, desc=)``; None for none.

    Returns
    -------
    (0, result)
        ``ranking`` (one row per fit, best first), ``n``, the Pareto-k threshold and its source,
        ``method``, ``units``, ``by_site`` (several-site fits), ``cautions``, and with ``out`` the files.
    """
    from bayesgeo.common.io import to_jsonable, write_json
    from bayesgeo.common.outputs import claim, new_folder

    out = Path(out) if out else None
    if out is not None:
        claim(out, overwrite=overwrite, inputs=list(dirs))
    bar = progress(total=2 * len(dirs), desc="compare") if progress else None
    obj, res, pits = build_result(dirs, bar=bar, store=store, site=site, progress=progress)
    if bar is not None:
        bar.close()
    if out is not None:
        from bayesgeo.checks.figures import loo_pit_figure
        from bayesgeo.explore.figures import save_figure

        with new_folder(out, overwrite=overwrite) as tmp:
            table = res[["rank", "covariance", "pooling", "transform", "elpd_loo", "se", "elpd_diff", "dse", "p_loo",
                         "weight", "pareto_k_high", "pareto_k_max"]].to_dataframe()
            table.to_csv(tmp / "comparison.csv", float_format="%.10g")
            point = res[["elpd_i", "pareto_k"]].to_dataframe()
            point.to_csv(tmp / "pointwise.csv", float_format="%.10g")
            save_figure(loo_pit_figure(pits), tmp / "loo_pit.png")
            files = ["comparison.csv", "pointwise.csv", "loo_pit.png", COMPARISON_FILE]
            if "elpd_site" in res:
                res[["elpd_site", "se_site", "n_site"]].to_dataframe().to_csv(tmp / "by_site.csv", float_format="%.10g")
                files.insert(2, "by_site.csv")
            obj["out"] = str(out)
            obj["files"] = files
            write_json(tmp / COMPARISON_FILE, to_jsonable(obj))
    return 0, obj
