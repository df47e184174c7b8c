"""``bayesgeo explore`` through the command line: one JSON object, files, refusals, bad input."""

from __future__ import annotations

import csv
import json
import subprocess
import sys

import numpy as np
import pytest

from bayesgeo.cli import main
from bayesgeo.data.points import read_points
from bayesgeo.data.demo import simulate_field
from bayesgeo.explore.variogram import correlogram, semivariogram
from bayesgeo.explore.wls import fit_wls

FILES = ("semivariogram.png", "correlogram.png", "directional.png", "semivariogram.csv", "correlogram.csv",
         "directional.csv", "fits.csv")
FAST = ["--permutations", "19", "--covariance", "exponential", "spherical", "--bins", "10"]


def _rows(n, seed, site=None):
    rng = np.random.default_rng(seed)
    xy = np.round(rng.random((n, 2)) * 400.0, 1)
    z = simulate_field(xy, covariance="exponential", practical_range=150.0, partial_sill=1.0, nugget=0.2,
                       mean=3.0, rng=rng)
    head = ["easting", "northing", "conc"] + (["parcel"] if site else [])
    return [head] + [[f"{x:.1f}", f"{y:.1f}", f"{v:.4f}"] + ([site] if site else []) for (x, y), v in zip(xy, z)]


@pytest.fixture(scope="module")
def one_site(tmp_path_factory):
    """A simulated 80-point survey, explored once with --json (shared by several tests)."""
    import contextlib
    import io

    d = tmp_path_factory.mktemp("explore")
    data = d / "survey.csv"
    data.write_text("\n".join(",".join(r) for r in _rows(80, 3)) + "\n")
    out = d / "survey-explore"
    buf, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(buf), contextlib.redirect_stderr(err):
        code = main(["explore", str(data), "--value", "conc", "--units", "mg/kg", "--json", *FAST])
    return {"data": data, "out": out, "code": code, "stdout": buf.getvalue(), "stderr": err.getvalue()}


def test_cli_json_is_one_object_with_the_documented_keys(one_site):
    """--json prints exactly one JSON object (strict JSON: NaN as null) and nothing else on stdout;
    the keys are those the command documents; cautions defer to local regulation and licensed
    professional judgement (common practice for contamination outputs)."""
    assert one_site["code"] == 0
    lines = one_site["stdout"].splitlines()
    assert len(lines) == 1
    obj = json.loads(lines[0], parse_constant=lambda c: pytest.fail(f"non-strict JSON constant {c}"))
    assert obj["n"] == 80
    sv = obj["semivariogram"]
    for key in ("lag", "semivariance", "pairs", "envelope_low", "envelope_high"):
        assert len(sv[key]) == 10
    cg = obj["correlogram"]
    for key in ("lag", "correlation", "envelope_low", "envelope_high"):
        assert len(cg[key]) == 11  # lag-0 bin first
    assert cg["lag"][0] == 0 and cg["correlation"][0] == 1
    for method in ("wls", "ml"):
        assert set(obj["fits"][method]) == {"exponential", "spherical"}
        for f in obj["fits"][method].values():
            assert f["nugget"] >= 0 and f["partial_sill"] > 0 and f["practical_range"] > 0
    text = " ".join(obj["cautions"])
    assert "local regulation" in text and "licensed professional" in text and "screening" in text
    assert obj["site"] is None and "sites" not in obj


def test_cli_writes_figures_tables_and_json(one_site):
    """Default folder <data stem>-explore holds PNG figures (PNG signature, PNG specification
    sec. 5.2), CSV tables with one row per bin / family, and explore.json equal to stdout."""
    out = one_site["out"]
    for name in FILES:
        assert (out / name).is_file(), name
    for name in FILES[:3]:
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with (out / "semivariogram.csv").open() as fh:
        assert len(list(csv.DictReader(fh))) == 10
    with (out / "fits.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    assert {(r["method"], r["family"]) for r in rows} == {(m, f) for m in ("wls", "ml")
                                                           for f in ("exponential", "spherical")}
    assert json.loads((out / "explore.json").read_text()) == json.loads(one_site["stdout"])


def test_cli_numbers_equal_the_python_api(one_site):
    """The command is a thin shell: its semivariogram, correlogram and WLS fit equal the Python
    API's on the same data, options and seed (determinism)."""
    obj = json.loads(one_site["stdout"])
    ds = read_points(one_site["data"], value="conc", units="mg/kg")
    vg = semivariogram(ds, bins=10, permutations=19, seed=1)
    cg = correlogram(ds, bins=10, permutations=19, seed=1)
    np.testing.assert_allclose(obj["semivariogram"]["semivariance"], vg["semivariance"].values, rtol=1e-12)
    np.testing.assert_allclose(obj["semivariogram"]["envelope_high"], vg["envelope_high"].values, rtol=1e-12)
    np.testing.assert_allclose(obj["correlogram"]["correlation"], cg["correlation"].values, rtol=1e-12)
    w = fit_wls(vg, "exponential")
    assert obj["fits"]["wls"]["exponential"]["practical_range"] == pytest.approx(w["practical_range"], rel=1e-12)


def test_cli_refuses_existing_out_then_overwrites_identically(one_site, capsys):
    """An existing --out is refused without --overwrite (exit 2, one line, no traceback); with
    --overwrite the same data, options and seed give the same numbers."""
    args = ["explore", str(one_site["data"]), "--value", "conc", "--units", "mg/kg", *FAST]
    code = main([*args, "--json"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "already exists" in err and "--overwrite" in err and "Traceback" not in err
    code = main([*args, "--json", "--overwrite"])
    again = json.loads(capsys.readouterr().out)
    assert code == 0
    assert again == json.loads(one_site["stdout"])


def test_cli_several_sites_get_sub_folders(tmp_path, capsys):
    """With --site: one sub-folder per site, JSON "sites" keyed by label, top-level statistics of
    the first site in file order, and a fits.csv of all sites at the top; the human summary
    (no --json) prints a table per site, where the files went and the cautions."""
    rows = _rows(40, 5, site="north yard") + _rows(35, 6, site="mill/pond")[1:]
    data = tmp_path / "two.csv"
    data.write_text("\n".join(",".join(r) for r in rows) + "\n")
    out = tmp_path / "res"
    code = main(["explore", str(data), "--value", "conc", "--site", "parcel", "--out", str(out), *FAST])
    printed = capsys.readouterr().out
    assert code == 0
    assert "site north yard: 40 points" in printed and "site mill/pond: 35 points" in printed
    assert f"to {out}/" in printed and "caution:" in printed and "licensed professional" in printed
    obj = json.loads((out / "explore.json").read_text())
    assert obj["site"] == "north yard" and obj["n"] == 40 and obj["n_total"] == 75
    assert set(obj["sites"]) == {"north yard", "mill/pond"}
    assert obj["sites"]["mill/pond"]["n"] == 35
    assert obj["semivariogram"] == obj["sites"]["north yard"]["semivariogram"]
    from bayesgeo.common.sitenames import site_file_name

    for sub in (site_file_name("north yard"), site_file_name("mill/pond")):  # safe part + hash of the label
        assert sub.startswith(("north_yard+", "mill_pond+"))
        for name in FILES:
            assert (out / sub / name).is_file()
    with (out / "fits.csv").open() as fh:
        assert {r["site"] for r in csv.DictReader(fh)} == {"north yard", "mill/pond"}


def test_cli_bad_input_one_line_exit_2(tmp_path, capsys):
    """Through the CLI: exit status 2, one line on stderr, no traceback."""
    code = main(["explore", str(tmp_path / "missing.csv"), "--json"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "missing.csv: file not found" in err and "Traceback" not in err


def test_cli_subprocess_no_traceback(tmp_path, write_csv, grid_rows):
    """Bad input through the real command line: one line on stderr, exit status 2, no Python traceback (behaviour check)."""
    grid_rows[5][1] = "abc"
    path = write_csv(grid_rows)
    proc = subprocess.run([sys.executable, "-m", "bayesgeo.cli", "explore", str(path), "--value", "conc"],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.strip().endswith("row 6, column 'y': 'abc' is not a number")
    assert "Traceback" not in proc.stderr


def test_cli_bad_trend_order_is_one_line(tmp_path, write_csv, grid_rows, capsys):
    """A trend order outside 0-3 is refused before any work, naming the option."""
    path = write_csv(grid_rows)
    code = main(["explore", str(path), "--value", "conc", "--trend", "5", "--json"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--trend" in err
    assert not (tmp_path / "points-explore").exists()


def test_semivariogram_figure_draws_the_fitted_curves(one_site):
    """The figure's fitted curve is the exponential semivariogram written out here,
    gamma(h) = tau2 + sigma2 (1 - exp(-h / phi)) (Diggle and Ribeiro 2007, sec. 3.4), with the
    fitted WLS numbers; one curve per family; axes name their units; the envelope is drawn."""
    from bayesgeo.explore.figures import correlogram_figure, semivariogram_figure
    from bayesgeo.explore.quickfit import quick_fits

    ds = read_points(one_site["data"], value="conc", units="mg/kg")
    vg = semivariogram(ds, bins=10, permutations=19, seed=1)
    fits = quick_fits(ds, vg, ["exponential", "gaussian"])
    ax = semivariogram_figure(vg, fits).axes[0]
    assert len(ax.lines) == 2
    h, g = ax.lines[0].get_data()
    f = fits.sel({"method": "wls", "family": "exponential"})
    ref = float(f["nugget"]) + float(f["partial_sill"]) * (1.0 - np.exp(-h / float(f["scale"])))
    np.testing.assert_allclose(g, ref, rtol=1e-12)
    assert "(mg/kg)" in ax.get_ylabel() and "coordinate units" in ax.get_xlabel()
    assert len(ax.collections) >= 2  # permutation band and the points
    cax = correlogram_figure(correlogram(ds, bins=10, permutations=19, seed=1)).axes[0]
    assert "correlation" in cax.get_ylabel() and cax.get_ylim() == (-1.05, 1.05)


def test_cli_log_transform_equals_api_on_log_values(tmp_path, capsys):
    """--transform log analyses log(values): the semivariogram equals the API's on
    data.apply_transform(ds, "log") (concentrations are modelled on the log scale: common practice)."""
    from bayesgeo.data.points import apply_transform

    rows = _rows(60, 5)
    for r in rows[1:]:
        r[2] = f"{np.exp(float(r[2])):.4f}"
    data = tmp_path / "pos.csv"
    data.write_text("\n".join(",".join(r) for r in rows) + "\n")
    code = main(["explore", str(data), "--value", "conc", "--transform", "log", "--json", *FAST])
    obj = json.loads(capsys.readouterr().out)
    assert code == 0 and obj["settings"]["transform"] == "log"
    vg = semivariogram(apply_transform(read_points(data, value="conc"), "log"), bins=10, permutations=19, seed=1)
    np.testing.assert_allclose(obj["semivariogram"]["semivariance"], vg["semivariance"].values, rtol=1e-12)
    assert obj["value_units"].startswith("log(")


@pytest.mark.parametrize("option, value, pattern", [
    ("--bins", "0", r"argument --bins: expected an integer from 2 to 1000, got 0"),
    ("--bins", "99999999999999999999", r"argument --bins: expected an integer from 2 to 1000"),
    ("--lag-limit", "-5", r"argument --lag-limit: expected a finite number > 0, got '-5'"),
    ("--lag-limit", "inf", r"argument --lag-limit: expected a finite number > 0, got 'inf'"),
    ("--permutations", "-1", r"argument --permutations: expected an integer from 0 to 100000, got -1"),
    ("--seed", str(2**70), r"argument --seed: expected an integer from 0 to 9223372036854775807"),
    ("--trend", "5", r"argument --trend: expected an integer from 0 to 3, got 5"),
])
def test_option_values_bounded(tmp_path, capsys, option, value, pattern):
    """Numeric options are checked where they enter (bayesgeo.common.validate): exit 2, one line naming the
    option, the data untouched, no output folder."""
    from _cli_helpers import assert_refused

    data = tmp_path / "survey.csv"
    data.write_text("\n".join(",".join(r) for r in _rows(30, 3)) + "\n")
    assert_refused(capsys, ["explore", data, option, value, "--out", tmp_path / "o"], "explore", pattern,
                   inputs=[data], absent=[tmp_path / "o"])


def test_large_input_note_on_stderr_and_in_json(tmp_path, capsys, monkeypatch):
    """Above the comfortable size explore announces its plan before starting, on stderr (one note naming the
    expected time and that the maximum-likelihood quick fits use the nearest-neighbour likelihood, then one line
    per long step); with --json the same plan is the ``workload`` field of the one JSON object and stderr stays
    empty. The ML columns are filled (no longer skipped above 3,000 points). The comfortable size is lowered
    to 3,000 here so that the test stays small."""
    from bayesgeo.fitting import workload

    monkeypatch.setattr(workload, "EXPLORE_COMFORTABLE_POINTS", 3000)
    data = tmp_path / "survey.csv"
    data.write_text("\n".join(",".join(r) for r in _rows(3200, 7)) + "\n")
    base = ["explore", str(data), "--permutations", "0", "--covariance", "exponential", "--bins", "6"]
    assert main([*base, "--out", str(tmp_path / "a")]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert err[0].startswith("bayesgeo explore: note: ") and "nearest-neighbour likelihood" in err[0]
    assert err[1] == "bayesgeo explore: semivariogram (0 permutations) ..."
    assert main([*base, "--out", str(tmp_path / "b"), "--json"]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    obj = json.loads(out)
    assert obj["workload"]["points"] == 3200 and "nearest-neighbour likelihood" in obj["workload"]["message"]
    assert np.isfinite(obj["fits"]["ml"]["exponential"]["practical_range"])
    assert obj["workload"]["estimated_seconds"][0] <= obj["workload"]["estimated_seconds"][1]


def test_explore_json_names_the_quick_fit_likelihood(tmp_path, capsys, monkeypatch):
    """explore.json says which likelihood the ML quick fits used: dense up to NN_ML_POINTS points, the
    nearest-neighbour one above (here the limit lowered to 50 so that a 120-point survey crosses it)."""
    from bayesgeo.explore import quickfit_nn

    data = tmp_path / "survey.csv"
    data.write_text("\n".join(",".join(r) for r in _rows(120, 5)) + "\n")
    base = ["explore", str(data), "--permutations", "0", "--covariance", "exponential", "--bins", "6", "--json"]
    assert main([*base, "--out", str(tmp_path / "a")]) == 0
    assert "nearest-neighbour" not in json.loads(capsys.readouterr().out)["fit_methods"]["ml"]
    monkeypatch.setattr(quickfit_nn, "NN_ML_POINTS", 50)
    assert main([*base, "--out", str(tmp_path / "b")]) == 0
    obj = json.loads(capsys.readouterr().out)
    assert "nearest-neighbour likelihood (m = 15; 120 points" in obj["fit_methods"]["ml"]
    assert np.isfinite(obj["fits"]["ml"]["exponential"]["loglik"])
