"""Tests of `bayesgeo run` / run_study: stage commands, exit statuses, JSON output, reproducibility."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from bayesgeo.cli import _build_parser, main
from bayesgeo.study.runner import run_study, stage_commands
from bayesgeo.study.settings import read_study
from bayesgeo.common.validate import InputError

from _study_helpers import write_tiny_study


def test_stage_commands_parse(tmp_path):
    """Every stage command built from a study is accepted by that command's own parser (argparse is the
    reference), carries the study's seed and settings, and compares families only when there are several."""
    study = read_study(write_tiny_study(tmp_path, families=("exponential", "matern32")))
    cmds = stage_commands(study, tmp_path / "run")
    assert list(cmds) == ["explore", "fit:exponential", "check:exponential", "variogram-check:exponential",
                          "map:exponential", "fit:matern32", "check:matern32", "variogram-check:matern32",
                          "map:matern32", "compare"]
    parser = _build_parser()
    for name, argv in cmds.items():
        args = parser.parse_args(argv)
        assert args.command == name.split(":")[0]
    fit = parser.parse_args(cmds["fit:matern32"])
    assert (fit.seed, fit.draws, fit.chains, fit.transform, fit.no_nugget) == (11, 600, 2, "log", True)
    mp = parser.parse_args(cmds["map:exponential"])
    assert mp.threshold == [15.0] and mp.area == "50.0,50.0,150.0,150.0" and mp.cell == 25.0
    single = read_study(write_tiny_study(tmp_path, name="one.toml"))
    assert "compare" not in stage_commands(single, tmp_path / "r2")


def test_stage_calls_are_the_recorded_commands(tmp_path):
    """A study runs every stage through a stage function (bayesgeo.stages); the command the
    manifest records for each (stage_commands) parses (argparse is the reference) to the same settings as the
    keyword arguments of the call, so re-running the recorded command redoes the stage."""
    from bayesgeo.study.runner import stage_calls
    from bayesgeo.stages.check import check_fit
    from bayesgeo.stages.compare import compare_folders
    from bayesgeo.stages.explore import explore_folder
    from bayesgeo.stages.fit import fit_folder
    from bayesgeo.stages.maps import map_draws as _draws
    from bayesgeo.stages.maps import map_fit
    from bayesgeo.stages.vgcheck import check_variogram

    study = read_study(write_tiny_study(tmp_path, families=("exponential", "matern32")))
    cmds, calls = stage_commands(study, tmp_path / "run"), stage_calls(study, tmp_path / "run")
    assert list(calls) == list(cmds)  # every stage runs through its stage function
    parser = _build_parser()
    for name, (fn, kw) in calls.items():
        if name == "explore":
            a = parser.parse_args(cmds[name])
            assert fn is explore_folder
            assert (a.data, a.out, a.trend, a.transform, a.bins, a.permutations, a.estimator, a.seed, a.lag_limit) == (
                str(kw["data"]), str(kw["out"]), kw["trend"], kw["transform"], kw["bins"], kw["permutations"],
                kw["estimator"], kw["seed"], kw["lag_limit"])
            continue
        if name.startswith("fit:"):
            a = parser.parse_args(cmds[name])
            assert fn is fit_folder
            assert (a.data, a.out, a.covariance, a.seed, a.draws, a.chains, a.tune, a.no_nugget, a.approx) == (
                str(kw["data"]), str(kw["out"]), kw["covariance"], kw["seed"], kw["draws"], kw["chains"], kw["tune"],
                not kw["nugget"], kw["approx"])
            assert (None if a.transform == "none" else a.transform) == kw["transform"]
            assert a.covariate == kw["covariates"] and a.value == kw["value"]
            continue
        if name == "compare":
            a = parser.parse_args(cmds[name])
            assert fn is compare_folders and a.dirs == [str(d) for d in kw["dirs"]] and a.out == str(kw["out"])
            continue
        if name.startswith("check:"):
            assert fn is check_fit and parser.parse_args(cmds[name]).dir == str(kw["folder"])
            continue
        if name.startswith("variogram-check:"):
            assert fn is check_variogram
            a = parser.parse_args(cmds[name])
            assert (a.dir, a.site, a.replicates, a.bins, a.seed) == (str(kw["folder"]), kw["site"], kw["replicates"],
                                                                     kw["bins"], kw["seed"])
            continue
        assert fn is map_fit
        a = parser.parse_args(cmds[name])
        assert (a.dir, a.site, a.cell, a.margin, a.threshold, a.area, _draws(a.draws), a.nugget, a.hull_mask,
                a.seed, a.scheduler) == (str(kw["folder"]), kw["site"], kw["cell"], kw["margin"], kw["thresholds"],
                                         kw["area"], _draws(kw["draws"]), kw["nugget"], kw["hull_mask"], kw["seed"],
                                         kw["scheduler"])


def test_bad_study_and_existing_output_exit_2(tmp_path, capsys):
    """Bad input exits 2 with one line naming the study file's line (issue 8 requirement); an existing run
    folder is refused before any work."""
    path = write_tiny_study(tmp_path)
    path.write_text(path.read_text().replace("chains = 2", "chains = \"two\""))
    assert main(["run", str(path), "--json"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "line 19: [sampler] chains: expected an integer" in err[0]
    good = write_tiny_study(tmp_path, name="good.toml")
    (tmp_path / "exists").mkdir()
    assert main(["run", str(good), "--out", str(tmp_path / "exists")]) == 2
    assert "already exists" in capsys.readouterr().err


@pytest.mark.parametrize("out_dir", [".", "data"])
def test_study_output_never_swallows_its_inputs(tmp_path, capsys, out_dir):
    """A study file whose [output] dir is its own folder (or the data's) with overwrite = true is
    refused before any work, naming the study file's setting; the study file and data stay
    byte-identical (output rules, docs/outputs.md)."""
    path = write_tiny_study(tmp_path)
    data = next(p for p in tmp_path.iterdir() if p.suffix == ".csv")
    target = "." if out_dir == "." else data.name
    path.write_text(path.read_text() + f'\n[output]\ndir = "{target}"\noverwrite = true\n')
    before = {p.name: p.read_bytes() for p in tmp_path.iterdir()}
    assert main(["run", str(path), "--json"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "[output] dir" in err[0] and ("contains the input" in err[0] or "is the input" in err[0])
    assert {p.name: p.read_bytes() for p in tmp_path.iterdir()} == before


def test_failed_check_control_flow(tmp_path, monkeypatch):
    """With the stage commands replaced by stand-ins (a fit and check that report non-convergence, exit 3 as
    documented for `bayesgeo check`), the run stops: exit 3, later stages and families skipped, the report
    and manifest still written, the report marked NOT CONVERGED. No sampling: the real path is the slow test below."""
    import bayesgeo.study.runner as pl

    calls = []

    def fake(argv):
        calls.append(argv[0])
        if argv[0] == "explore":
            return 0, {}
        if argv[0] == "fit":
            return 3, {}
        if argv[0] == "check":
            return 3, {"verdict": "fail"}
        raise AssertionError(f"stage {argv[0]} should have been skipped")

    monkeypatch.setattr(pl, "_run_stage", lambda call: fake(pl.command_line(call)))
    path = write_tiny_study(tmp_path, families=("exponential", "matern32"))
    res = run_study(path, out=tmp_path / "run")
    assert calls == ["explore", "fit", "check"]
    assert res["status"] == 3 and res["verdicts"] == {"explore": "done", "fit:exponential": "NOT CONVERGED",
                                                      "check:exponential": "fail"}
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert [s["stage"] for s in manifest["stages"] if s["verdict"] == "skipped"] == [
        "variogram-check:exponential", "map:exponential", "fit:matern32", "check:matern32",
        "variogram-check:matern32", "map:matern32", "compare"]
    text = (tmp_path / "run" / "report.html").read_text()
    assert "NOT CONVERGED" in text.split("<nav>")[0] and "not available" in text
    assert (tmp_path / "run" / "inputs" / "tiny.csv").read_bytes() == (tmp_path / "tiny.csv").read_bytes()


def test_stage_error_is_recorded(tmp_path, monkeypatch):
    """An unexpected error in a later stage is recorded (exit 1, verdict failed, error text) and the run goes on."""
    import bayesgeo.study.runner as pl

    def fake(argv):
        if argv[0] == "map":
            raise RuntimeError("boom")
        return (0, {"verdict": "pass"}) if argv[0] == "check" else (0, {})

    monkeypatch.setattr(pl, "_run_stage", lambda call: fake(pl.command_line(call)))
    res = run_study(write_tiny_study(tmp_path), out=tmp_path / "run")
    assert res["status"] == 1 and res["verdicts"]["map:exponential"] == "failed"
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    rec = [s for s in manifest["stages"] if s["stage"] == "map:exponential"][0]
    assert rec["error"] == "RuntimeError: boom"
    assert "INCOMPLETE" in (tmp_path / "run" / "report.html").read_text()


@pytest.mark.slow
def test_not_converged_stops_with_exit_3(tmp_path, capsys):
    """Too few draws fail the convergence check (bulk ESS > 400 needed, Vehtari et al. 2021): exit 3,
    later stages skipped, the report still written and marked NOT CONVERGED; --json prints one object."""
    path = write_tiny_study(tmp_path, n=30, draws=20, tune=30)
    status = main(["run", str(path), "--json", "--out", str(tmp_path / "run")])
    out = capsys.readouterr().out.strip().splitlines()
    assert status == 3
    assert len(out) == 1
    res = json.loads(out[0])
    assert res["status"] == 3 and res["verdicts"]["check:exponential"] == "fail"
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    skipped = [s["stage"] for s in manifest["stages"] if s["verdict"] == "skipped"]
    assert skipped == ["variogram-check:exponential", "map:exponential"]
    text = (tmp_path / "run" / "report.html").read_text()
    assert "NOT CONVERGED" in text.split("<nav>")[0]
    assert "report.html" in manifest["outputs"] and "manifest.json" not in manifest["outputs"]


@pytest.mark.slow
def test_same_study_twice_gives_identical_numbers(tmp_path):
    """Same data, settings and seeds give bit-identical posterior draws and predictions (issue 8; nutpie
    with an integer seed is deterministic, FACTS.md [run])."""
    path = write_tiny_study(tmp_path, draws=300, tune=300)
    a = run_study(path, out=tmp_path / "a")
    b = run_study(path, out=tmp_path / "b")
    assert a["verdicts"] == b["verdicts"]
    for res in (a, b):
        assert res["verdicts"]["fit:exponential"] in ("done", "NOT CONVERGED")
    pa = xr.open_datatree(tmp_path / "a" / "fits" / "exponential" / "posterior.nc", engine="netcdf4")
    pb = xr.open_datatree(tmp_path / "b" / "fits" / "exponential" / "posterior.nc", engine="netcdf4")
    for name in ("practical_range", "partial_sill", "beta"):
        np.testing.assert_array_equal(pa["posterior"][name].values, pb["posterior"][name].values)
    if (tmp_path / "a" / "predictions.nc").is_file():
        with xr.open_dataset(tmp_path / "a" / "predictions.nc") as qa, xr.open_dataset(tmp_path / "b" / "predictions.nc") as qb:
            for name in ("mean", "sd", "p_exceed"):
                np.testing.assert_array_equal(qa[name].values, qb[name].values)
    ma = json.loads((tmp_path / "a" / "manifest.json").read_text())
    mb = json.loads((tmp_path / "b" / "manifest.json").read_text())
    assert ma["inputs"] == mb["inputs"]
    for rel in ("explore/semivariogram.csv", "explore/correlogram.csv", "tables/fits__exponential__summary.csv"):
        assert ma["outputs"][rel]["sha256"] == mb["outputs"][rel]["sha256"], rel


# --- several sites ------------------------------------------------------------------------------


def test_site_stage_commands(tmp_path):
    """A several-site study runs the commands one would type (docs/study_file.md): explore and fit with
    --site COL (fit with the study's pooling), one check of the whole fit, then variogram-check and map with
    --site NAME per site; each command is accepted by its own parser (argparse is the reference) and an area
    goes to the site whose sampled bounding box holds its centre."""
    from bayesgeo.study.runner import site_areas, study_sites

    from _study_helpers import write_sites_study

    path = write_sites_study(tmp_path, families=("matern32", "exponential"), pooling="independent",
                             extra="area = [[20.0, 20.0, 60.0, 60.0], [1100.0, 50.0, 1150.0, 90.0]]\n")
    study = read_study(path)
    cmds = stage_commands(study, tmp_path / "run")
    per_fam = ["fit:{f}", "check:{f}", "variogram-check:{f}:a-yard", "variogram-check:{f}:b-pit", "map:{f}:a-yard",
               "map:{f}:b-pit"]
    assert list(cmds) == ["explore", *[k.format(f="matern32") for k in per_fam],
                          *[k.format(f="exponential") for k in per_fam], "compare"]
    parser = _build_parser()
    for name, argv in cmds.items():
        args = parser.parse_args(argv)
        assert args.command == name.split(":")[0]
        if name.startswith(("variogram-check:", "map:")):
            assert args.site == name.split(":")[2]
        if name.startswith(("explore", "fit:")):
            assert args.site == "parcel"
    fit = parser.parse_args(cmds["fit:exponential"])
    assert (fit.pooling, fit.seed, fit.chains, fit.draws, fit.transform) == ("independent", 7, 2, 100, "log")
    assert parser.parse_args(cmds["map:matern32:a-yard"]).area == "20.0,20.0,60.0,60.0"
    assert parser.parse_args(cmds["map:matern32:b-pit"]).area == "1100.0,50.0,1150.0,90.0"
    assert parser.parse_args(cmds["map:matern32:b-pit"]).cell == 40.0
    sites = study_sites(study)
    assert list(sites) == ["a-yard", "b-pit"] and sites["a-yard"].shape == (30, 2)
    assert site_areas(study, sites) == {"a-yard": [20.0, 20.0, 60.0, 60.0], "b-pit": [1100.0, 50.0, 1150.0, 90.0]}


def test_site_areas_refusals(tmp_path):
    """Areas that cannot be placed are refused before any work, naming the study file's line: a centre in no
    site, two areas in one site, an unknown site in a table."""
    from _study_helpers import write_sites_study

    for area, msg in (("[500.0, 500.0, 600.0, 600.0]", "lies in no site"),
                      ("[[20.0, 20.0, 60.0, 60.0], [30.0, 30.0, 40.0, 40.0]]", "two areas fall in site a-yard"),
                      ("{c-dump = [0.0, 0.0, 1.0, 1.0]}", "unknown site\\(s\\) c-dump; sites: a-yard, b-pit")):
        path = write_sites_study(tmp_path, extra=f"area = {area}\n")
        with pytest.raises(InputError, match=rf"line 33: \[prediction\] area: .*{msg}"):
            run_study(path, out=tmp_path / "never")
        assert not (tmp_path / "never").exists()


def test_site_run_control_flow(tmp_path, monkeypatch):
    """With stand-in stage commands (no sampling), a several-site run calls the stages in order, records one
    verdict per site stage, and a failed convergence check stops it with exit 3 (as for one site); the report
    is still written with the several-site section and marked NOT CONVERGED."""
    import bayesgeo.study.runner as pl

    from _study_helpers import write_sites_study

    calls = []

    def ok(argv):
        calls.append([a for a in argv if a in ("explore", "fit", "check", "variogram-check", "map", "a-yard", "b-pit")])
        return (0, {"verdict": "warn"}) if argv[0] == "check" else (0, {})

    monkeypatch.setattr(pl, "_run_stage", lambda call: ok(pl.command_line(call)))
    res = run_study(write_sites_study(tmp_path), out=tmp_path / "run")
    assert calls == [["explore"], ["fit"], ["check"], ["variogram-check", "a-yard"], ["variogram-check", "b-pit"],
                     ["map", "a-yard"], ["map", "b-pit"]]
    assert res["status"] == 0 and res["verdicts"]["check:matern32"] == "warn"
    assert res["verdicts"]["map:matern32:b-pit"] == "done"
    text = (tmp_path / "run" / "report.html").read_text()
    assert "<section id=\"sites\">" in text and "Site a-yard" in text and "licensed professional" in text

    def fail(argv):
        return {"explore": (0, {}), "fit": (3, {}), "check": (3, {"verdict": "fail"})}[argv[0]]

    monkeypatch.setattr(pl, "_run_stage", lambda call: fail(pl.command_line(call)))
    res = run_study(write_sites_study(tmp_path), out=tmp_path / "run2")
    assert res["status"] == 3
    manifest = json.loads((tmp_path / "run2" / "manifest.json").read_text())
    assert [s["stage"] for s in manifest["stages"] if s["verdict"] == "skipped"] == [
        "variogram-check:matern32:a-yard", "variogram-check:matern32:b-pit", "map:matern32:a-yard",
        "map:matern32:b-pit"]
    assert "NOT CONVERGED" in (tmp_path / "run2" / "report.html").read_text().split("<nav>")[0]


@pytest.mark.slow
def test_site_study_twice_gives_identical_numbers(tmp_path, tmp_path_factory):
    """A several-site study run twice (same data, settings, seeds) gives bit-identical posterior draws, per-site
    predictions, shrinkage and design tables (issue 8; nutpie with an integer seed is deterministic, FACTS.md
    [run]); the first run completes every stage (2 sites x 30 points, complete pooling, 2 chains x 1000 draws)."""
    from _study_helpers import SITE_RUN, sites_run, write_sites_study

    root_a, a = sites_run(tmp_path_factory)
    assert a["status"] == 0, a
    assert set(a["verdicts"]) >= {"map:matern32:a-yard", "map:matern32:b-pit", "variogram-check:matern32:b-pit"}
    b = run_study(write_sites_study(tmp_path, **SITE_RUN), out=tmp_path / "b")
    assert a["verdicts"] == b["verdicts"]
    root_b = tmp_path / "b"
    with xr.open_datatree(root_a / "fits" / "matern32" / "posterior.nc", engine="netcdf4") as pa, \
            xr.open_datatree(root_b / "fits" / "matern32" / "posterior.nc", engine="netcdf4") as pb:
        for name in ("practical_range", "partial_sill", "nugget", "beta"):
            np.testing.assert_array_equal(pa["posterior"][name].values, pb["posterior"][name].values)
    for site in ("a-yard", "b-pit"):
        with xr.open_dataset(root_a / f"predictions_{site}.nc") as qa, xr.open_dataset(root_b / f"predictions_{site}.nc") as qb:
            for name in ("mean", "sd", "p_exceed"):
                np.testing.assert_array_equal(qa[name].values, qb[name].values)
    ma = json.loads((root_a / "manifest.json").read_text())
    mb = json.loads((root_b / "manifest.json").read_text())
    for rel in ("fits/matern32/shrinkage.csv", "fits/matern32/design.csv", "fits/matern32/variogram_check_a-yard.csv",
                "explore/fits.csv"):
        assert ma["outputs"][rel]["sha256"] == mb["outputs"][rel]["sha256"], rel
