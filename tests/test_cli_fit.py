"""Tests of ``bayesgeo fit``: JSON output, files, exit codes, refusals. One small fit is shared."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from bayesgeo.cli import EXIT_INPUT, EXIT_NOT_CONVERGED, main
from bayesgeo.data.demo import simulate_field


def _csv(path, n=40, seed=5, site=None, zero_rows=()):
    rng = np.random.default_rng(seed)
    xy = np.column_stack([431_000 + 250 * rng.random(n), 5_622_000 + 250 * rng.random(n)])
    v = np.exp(simulate_field(xy, covariance="matern32", practical_range=120.0, partial_sill=0.4, nugget=0.08,
                              mean=3.0, rng=rng))
    v[list(zero_rows)] = 0.0
    lines = ["easting,northing,parcel,arsenic_mg_kg"]
    for i in range(n):
        lab = site[i] if site is not None else "plot-a"
        lines.append(f"{xy[i, 0]:.1f},{xy[i, 1]:.1f},{lab},{v[i]:.3f}")
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture(scope="module")
def cli_run(tmp_path_factory):
    """One `bayesgeo fit --json` run (n = 40, 2 chains x 150 draws) on a one-site CSV."""
    tmp = tmp_path_factory.mktemp("cli_fit")
    data = _csv(tmp / "points.csv")
    out = tmp / "fit-out"
    argv = [str(data), "--value", "arsenic_mg_kg", "--site", "parcel", "--covariance", "matern32",
            "--transform", "log", "--draws", "150", "--tune", "150", "--chains", "2", "--seed", "4",
            "--range-below", "30", "0.05", "--out", str(out), "--json"]
    return data, out, argv


def test_json_output_keys_and_files(cli_run, capsys):
    """--json prints exactly one JSON object with the documented keys in data units; the exit code is 0,
    or 3 exactly when the diagnostics verdict is fail (the CLI contract in bayesgeo.cli)."""
    data, out, argv = cli_run
    code = main(["fit", *argv])
    stdout = capsys.readouterr().out
    assert stdout.count("\n") == 1
    rep = json.loads(stdout)
    for name in ("practical_range", "partial_sill", "nugget", "total_sill", "scale"):
        assert {"mean", "sd", "q05", "q50", "q95"} <= set(rep["parameters"][name])
        p = rep["parameters"][name]
        assert p["q05"] <= p["q50"] <= p["q95"]
    assert {"name", "chains", "draws", "tune", "seed", "seconds"} <= set(rep["sampler"])
    assert rep["sampler"]["seed"] == 4 and rep["sampler"]["chains"] == 2 and rep["sampler"]["name"] == "nutpie"
    assert "verdict" in rep["diagnostics"] and rep["cautions"]
    assert rep["workload"]["points"] == 40 and rep["workload"]["message"] is None  # small: nothing announced
    assert code == (EXIT_NOT_CONVERGED if rep["diagnostics"]["verdict"] == "fail" else 0)
    assert rep["model"]["priors"]["range"] == [30.0, 0.05]
    assert rep["parameters"]["practical_range"]["units"] == "coordinate units"
    assert sorted(p.name for p in out.iterdir()) == [".bayesgeo-output.json", "fit.json", "posterior.nc", "prior_check.png",
                                                     "summary.csv", "summary.txt"]


def test_existing_output_is_refused_without_overwrite(cli_run, capsys):
    """An existing output folder is refused (exit 2, one line on stderr) before any sampling."""
    data, out, argv = cli_run
    if not out.exists():
        out.mkdir()
    before = sorted(p.name for p in out.iterdir())
    code = main(["fit", *argv])
    err = capsys.readouterr()
    assert code == EXIT_INPUT and err.out == ""
    assert "already exists" in err.err and "--overwrite" in err.err and err.err.count("\n") == 1
    assert sorted(p.name for p in out.iterdir()) == before


def test_log_transform_refuses_zeros(tmp_path, capsys):
    """--transform log with zero values: exit 2 and a line naming the rows and the column."""
    data = _csv(tmp_path / "z.csv", zero_rows=(3, 8))
    code = main(["fit", str(data), "--value", "arsenic_mg_kg", "--covariance", "exponential",
                 "--transform", "log", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == EXIT_INPUT
    assert "rows 5, 10" in err and "'arsenic_mg_kg'" in err
    assert not (tmp_path / "o").exists()


def test_several_sites_go_to_the_several_site_model(tmp_path, capsys):
    """Data with several sites go to the several-site model (docs/hierarchical.md); options it does
    not take are refused there with exit 2 before any sampling: --nugget-above, and bad values of the
    per-site nearest-neighbour likelihood (--approx nn --neighbours 0)."""
    data = _csv(tmp_path / "s.csv", n=40, site=["p1"] * 20 + ["p2"] * 20)
    base = ["fit", str(data), "--value", "arsenic_mg_kg", "--site", "parcel", "--covariance", "matern32"]
    code = main([*base, "--approx", "nn", "--neighbours", "0", "--out", str(tmp_path / "o")])
    assert code == EXIT_INPUT and "--neighbours" in capsys.readouterr().err
    code = main([*base, "--nugget-above", "0.5", "0.05", "--out", str(tmp_path / "o2")])
    assert code == EXIT_INPUT and "--nugget-above" in capsys.readouterr().err
    assert not (tmp_path / "o").exists() and not (tmp_path / "o2").exists()


def test_bad_prior_is_refused(tmp_path, capsys):
    """A prior probability outside (0, 1) is refused with exit 2, naming the option."""
    data = _csv(tmp_path / "p.csv")
    code = main(["fit", str(data), "--value", "arsenic_mg_kg", "--covariance", "matern32",
                 "--sd-above", "1.0", "1.5", "--out", str(tmp_path / "o")])
    assert code == EXIT_INPUT and "--sd-above" in capsys.readouterr().err


@pytest.mark.slow
def test_human_output_and_overwrite(cli_run, tmp_path, capsys):
    """Without --json: a table with the parameters and the verdict on stdout; --overwrite replaces an
    earlier bayesgeo output in one piece, and refuses, before sampling, a folder holding a file
    bayesgeo did not write (bayesgeo.common.outputs, docs/outputs.md)."""
    from bayesgeo.common.outputs import new_folder

    data, _, argv = cli_run
    out = tmp_path / "o"
    with new_folder(out) as tmp:
        (tmp / "old.txt").write_text("old")
    argv = [a for a in argv if a != "--json"]
    argv[argv.index("--out") + 1] = str(out)
    (out / "mine.txt").write_text("mine")
    assert main(["fit", *argv, "--overwrite"]) == 2
    assert "mine.txt" in capsys.readouterr().err and (out / "mine.txt").read_text() == "mine"
    (out / "mine.txt").unlink()
    code = main(["fit", *argv, "--overwrite"])
    stdout = capsys.readouterr().out
    assert code in (0, EXIT_NOT_CONVERGED)
    assert "practical_range" in stdout and "diagnostics:" in stdout and "licensed professional" in stdout
    assert not (out / "old.txt").exists() and (out / "posterior.nc").exists()


@pytest.mark.parametrize("option, value, pattern", [
    ("--chains", "99999999999999999999", r"argument --chains: expected an integer from 1 to 64, got 99999999999999999999"),
    ("--chains", "0", r"argument --chains: expected an integer from 1 to 64, got 0"),
    ("--seed", str(2**70), r"argument --seed: expected an integer from 0 to 9223372036854775807"),
    ("--seed", "-1", r"argument --seed: expected an integer from 0 to"),
    ("--draws", "0", r"argument --draws: expected an integer from 1 to 1000000, got 0"),
    ("--draws", "1e3", r"argument --draws: expected an integer from 1 to 1000000, got '1e3'"),
    ("--tune", "-1", r"argument --tune: expected an integer from 0 to 1000000, got -1"),
    ("--neighbours", "100000", r"argument --neighbours: expected an integer from 1 to 200, got 100000"),
    ("--trend", "4", r"argument --trend: expected an integer from 0 to 3, got 4"),
    ("--trend", "-1", r"argument --trend: expected an integer from 0 to 3, got -1"),
    ("--target-accept", "1", r"argument --target-accept: expected a number in \(0, 1\), got '1'"),
    ("--target-accept", "nan", r"argument --target-accept: expected a number in \(0, 1\), got 'nan'"),
    ("--nu", "inf", r"argument --nu: expected a number in \(0, 50\], got 'inf'"),
    ("--nu", "-2", r"argument --nu: expected a number in \(0, 50\], got '-2'"),
])
def test_option_values_bounded(tmp_path, capsys, option, value, pattern):
    """Every numeric option is checked where it enters (argparse type, bayesgeo.common.validate): a value
    that overflowed (OverflowError) or failed mid-run is refused with exit 2, one line naming the
    option, the value and the accepted range; the data file is untouched and no output appears.
    Bounds: seeds are stored as signed 64-bit integers (numpy.random.default_rng takes any
    non-negative integer, nutpie below 2**64); target_accept is a probability (Hoffman and Gelman
    2014, the dual-averaging target delta in (0, 1))."""
    from _cli_helpers import assert_refused

    data = _csv(tmp_path / "d.csv")
    argv = ["fit", data, "--covariance", "matern", "--value", "arsenic_mg_kg", option, value, "--out", tmp_path / "o"]
    assert_refused(capsys, argv, "fit", pattern, inputs=[data], absent=[tmp_path / "o"])


@pytest.mark.parametrize("option, values, pattern", [
    ("--range-below", ("100", "1"), r"argument --range-below: the probability \(second number\): expected a number in \(0, 1\), got '1'"),
    ("--range-below", ("-5", "0.05"), r"argument --range-below: the value \(first number\): expected a finite number > 0, got '-5'"),
    ("--sd-above", ("inf", "0.05"), r"argument --sd-above: the value \(first number\): expected a finite number > 0, got 'inf'"),
    ("--nugget-above", ("1", "nan"), r"argument --nugget-above: the probability \(second number\)"),
    ("--sd-above", ("x", "0.05"), r"argument --sd-above: the value \(first number\): expected a finite number > 0, got 'x'"),
])
def test_prior_pairs_checked(tmp_path, capsys, option, values, pattern):
    """PC-prior statements P(value < or > V) = A need V > 0 finite and A in (0, 1) (Fuglstad et al. 2019,
    JASA 114: the rates -ln(A) V and -ln(A) / V are finite and positive only then)."""
    from _cli_helpers import assert_refused

    data = _csv(tmp_path / "d.csv")
    argv = ["fit", data, "--covariance", "matern32", "--value", "arsenic_mg_kg", option, *values, "--out", tmp_path / "o"]
    assert_refused(capsys, argv, "fit", pattern, inputs=[data], absent=[tmp_path / "o"])


@pytest.mark.parametrize("command, old, new, extra", [
    ("fit", "--prior-range", "--range-below", ("30", "0.05")),
    ("fit", "--prior-sd", "--sd-above", ("1", "0.05")),
    ("fit", "--prior-nugget", "--nugget-above", ("1", "0.05")),
    ("fit", "--min-points", "--small-sites", ("pool",)),
    ("explore", "--max-lag", "--lag-limit", ("100",)),
])
def test_renamed_option_names_the_new_one(tmp_path, capsys, command, old, new, extra):
    """An option of an earlier version stops with a usage error (exit 2, one line after the usage)
    naming the new option, before anything is read or written (common practice for renamed options)."""
    from _cli_helpers import assert_refused

    data = _csv(tmp_path / "d.csv")
    argv = [command, data, "--value", "arsenic_mg_kg", old, *extra, "--out", tmp_path / "o"]
    assert_refused(capsys, argv, command, rf"{old} was renamed {new}", inputs=[data], absent=[tmp_path / "o"])


def test_large_input_announced_before_sampling(tmp_path, capsys, monkeypatch):
    """Above the comfortable size (bayesgeo.fitting.workload: 1,000 points per site; above 2,000 the
    nearest-neighbour likelihood) the fit says on stderr, before any sampling, what will happen and
    the expected scale of time; with --json nothing extra reaches stdout or stderr. Sampling is
    replaced by an interruption here so the test takes seconds."""
    import bayesgeo.fitting.posterior as post

    def interrupted(*a, **kw):
        raise KeyboardInterrupt

    monkeypatch.setattr(post, "fit", interrupted)
    data = _csv(tmp_path / "big.csv", n=2500)
    argv = ["fit", str(data), "--value", "arsenic_mg_kg", "--covariance", "exponential", "--duplicates", "mean",
            "--out", str(tmp_path / "o")]
    assert main(argv) == 130
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert out == ""
    assert re.match(r"bayesgeo fit: note: 2,\d{3} points: expect roughly \d+ min to \d+ min on ", lines[0])
    assert "nearest-neighbour (Vecchia) likelihood with m = 20 is used" in lines[0]
    assert lines[1].startswith("bayesgeo fit: compiling the model")
    assert main([*argv, "--json"]) == 130
    out, err = capsys.readouterr()
    assert out == "" and "note:" not in err


def test_dense_fit_beyond_memory_refused(tmp_path, capsys, monkeypatch):
    """A dense likelihood whose n x n matrices (8 bytes per entry, one work matrix per chain plus the
    distances; bayesgeo.fitting.workload.dense_memory_bytes) exceed the machine's memory is refused before
    anything starts, with one line naming --approx and the way out (nn), instead of a MemoryError
    traceback after minutes. The machine's memory is set to 1 MB here so the test stays small."""
    import bayesgeo.fitting.workload as wl
    from _cli_helpers import assert_refused

    monkeypatch.setattr(wl, "physical_memory_bytes", lambda: 1e6)
    data = _csv(tmp_path / "d.csv", n=300)
    argv = ["fit", data, "--value", "arsenic_mg_kg", "--covariance", "exponential", "--approx", "dense",
            "--duplicates", "mean", "--out", tmp_path / "o"]
    assert_refused(capsys, argv, "fit", r"--approx: the dense likelihood of \d+ points with 4 chains needs "
                   r"about \d MB of memory; this machine has 1 MB: use the nearest-neighbour likelihood, 'nn' "
                   r"\(or 'auto'\)",
                   inputs=[data], absent=[tmp_path / "o"])


def test_neighbours_with_dense_refused(tmp_path, capsys):
    """--neighbours with --approx dense would be silently ignored; it is refused with one line, as the
    study file refuses [model] neighbours with approx = 'dense' (docs/study_file.md)."""
    from _cli_helpers import assert_refused

    data = _csv(tmp_path / "d.csv")
    argv = ["fit", data, "--value", "arsenic_mg_kg", "--covariance", "exponential", "--approx", "dense",
            "--neighbours", "5", "--out", tmp_path / "o"]
    assert_refused(capsys, argv, "fit", r"--neighbours: applies to the nearest-neighbour likelihood",
                   inputs=[data], absent=[tmp_path / "o"])


def test_keep_sampling_records_its_attempts(tmp_path, capsys):
    """--keep-sampling MINUTES: fit.json and the JSON output list every attempt (tuning, draws, seed,
    verdict) and why the run stopped; with several sites the option is refused naming it."""
    data = _csv(tmp_path / "points.csv", n=30)
    out = tmp_path / "fit-out"
    code = main(["fit", str(data), "--value", "arsenic_mg_kg", "--covariance", "matern32", "--draws", "100",
                 "--tune", "100", "--chains", "2", "--seed", "3", "--keep-sampling", "5", "--out", str(out), "--json"])
    report = json.loads(capsys.readouterr().out)
    att = report["sampler"]["attempts"]
    assert att[0]["tune"] == 100 and att[0]["seed"] == 3 and report["sampler"]["stopped"] in ("converged", "budget",
                                                                                                 "attempts")
    assert json.loads((out / "fit.json").read_text())["sampler"]["attempts"] == att
    assert code == (EXIT_NOT_CONVERGED if att[-1]["verdict"] == "fail" else 0)
    sites = _csv(tmp_path / "sites.csv", n=30, site=np.array(["a"] * 15 + ["b"] * 15))
    code = main(["fit", str(sites), "--value", "arsenic_mg_kg", "--site", "parcel", "--covariance", "matern32",
                 "--keep-sampling", "5", "--out", str(tmp_path / "s")])
    assert code == EXIT_INPUT and "--keep-sampling" in capsys.readouterr().err


def test_max_draws_continues_the_chains_and_reports_the_looks(tmp_path, capsys):
    """--max-draws: 2 x 60 draws cannot reach the ESS of 400 the check asks for (Vehtari et al. 2021), so
    the chains continue to 120 and then 180 draws; the JSON output, fit.json and summary.txt report the
    looks. --max-draws below --draws is refused in one line before any sampling (exit 2)."""
    data = _csv(tmp_path / "points.csv", n=25)
    out = tmp_path / "fit-out"
    argv = ["fit", str(data), "--value", "arsenic_mg_kg", "--covariance", "exponential", "--draws", "60",
            "--tune", "100", "--chains", "2", "--seed", "3"]
    code = main(argv + ["--max-draws", "180", "--out", str(out), "--json"])
    report = json.loads(capsys.readouterr().out)
    smp = report["sampler"]
    assert [lk["draws"] for lk in smp["looks"]] == [60, 120, 180] and smp["draws"] == 180 and smp["max_draws"] == 180
    assert json.loads((out / "fit.json").read_text())["sampler"]["looks"] == smp["looks"]
    assert "chains continued while R-hat or ESS was too poor (up to 180 draws)" in (out / "summary.txt").read_text()
    assert code in (0, EXIT_NOT_CONVERGED)
    code = main(argv + ["--max-draws", "30", "--out", str(tmp_path / "b")])
    err = capsys.readouterr().err
    assert code == EXIT_INPUT and "--max-draws: expected at least --draws (60), got 30" in err
    assert err.count("\n") == 1 and not (tmp_path / "b").exists()
