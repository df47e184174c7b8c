"""Tests of the `bayesgeo compare` and `bayesgeo variogram-check` commands.

Fit folders hold a posterior.nc built from chosen draws in the layout of bayesgeo.fitting.posterior.fit
(tests/test_loo.py: make_fit), so no sampling is needed.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from bayesgeo.cli import main
from conftest import write_fit_folder
from test_loo import make_fit, simulated


def _save(tree, folder):
    return write_fit_folder(tree, folder)


@pytest.fixture(scope="module")
def fits(tmp_path_factory):
    root = tmp_path_factory.mktemp("fits")
    ds = simulated(40, seed=31)
    other = simulated(40, seed=32)
    return {
        "m32": _save(make_fit(ds, ndraw=100, seed=1), root / "m32"),
        "exp": _save(make_fit(ds, covariance="exponential", ndraw=100, seed=2), root / "exp"),
        "other": _save(make_fit(other, ndraw=100, seed=3), root / "other"),
    }


def _json(capsys):
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert len(lines) == 1, out  # exactly one JSON object on stdout
    return json.loads(lines[0])


def test_compare_json_keys_and_files(fits, tmp_path, capsys):
    """--json prints one object with the ranking keys of the brief (elpd from arviz.loo/compare,
    Pareto k threshold 0.7 from Vehtari et al. 2024) and --out writes the tables, the LOO-PIT figure
    and comparison.json; a second run into the same folder is refused (exit 2) without --overwrite."""
    out = tmp_path / "cmp"
    code = main(["compare", str(fits["m32"]), str(fits["exp"]), "--json", "--out", str(out)])
    assert code == 0
    obj = _json(capsys)
    assert {r["fit"] for r in obj["ranking"]} == {"m32", "exp"}
    for row in obj["ranking"]:
        assert {"fit", "covariance", "elpd_loo", "se", "elpd_diff", "dse", "p_loo", "pareto_k_high"} <= set(row)
        assert isinstance(row["pareto_k_high"], int)
    assert obj["ranking"][0]["elpd_diff"] == 0.0
    assert obj["ranking"][0]["elpd_loo"] >= obj["ranking"][1]["elpd_loo"]
    assert obj["k_threshold"] == 0.7
    assert any("licensed professional" in c for c in obj["cautions"])
    for name in ("comparison.csv", "pointwise.csv", "loo_pit.png", "comparison.json"):
        assert (out / name).is_file()
    assert json.loads((out / "comparison.json").read_text())["ranking"] == obj["ranking"]
    assert main(["compare", str(fits["m32"]), str(fits["exp"]), "--json", "--out", str(out)]) == 2
    assert "already exists" in capsys.readouterr().err


def test_compare_refuses_fits_of_different_data(fits, capsys):
    """Fits of different data exit 2 with a one-line message naming the fit."""
    code = main(["compare", str(fits["m32"]), str(fits["other"]), "--json"])
    assert code == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    err = captured.err.strip()
    assert "\n" not in err and "not fitted to the same data" in err and "other" in err


def test_compare_needs_two_existing_fits(fits, tmp_path, capsys):
    """One fit, or a folder without posterior.nc, is bad input (exit 2)."""
    assert main(["compare", str(fits["m32"])]) == 2
    assert "at least two" in capsys.readouterr().err
    assert main(["compare", str(fits["m32"]), str(tmp_path / "nowhere")]) == 2
    assert "nowhere" in capsys.readouterr().err


def test_compare_human_table(fits, capsys):
    """Without --json a table and the cautions are printed."""
    assert main(["compare", str(fits["m32"]), str(fits["exp"])]) == 0
    out = capsys.readouterr().out
    assert "elpd_loo" in out and "caution:" in out


def test_variogram_check_json_files_and_overwrite(fits, tmp_path, capsys):
    """--json prints the keys of the brief, the figure and CSV are written into the fit folder, the
    same seed gives the same replicate band, and existing outputs are refused without --overwrite."""
    import shutil

    folder = tmp_path / "fit"
    shutil.copytree(fits["m32"], folder)
    args = ["variogram-check", str(folder), "--replicates", "30", "--bins", "6", "--seed", "4", "--json"]
    assert main(args) == 0
    obj = _json(capsys)
    for key in ("lag", "observed", "pairs", "replicate_q05", "replicate_q95", "model_q05", "model_q50",
                "model_q95", "outside_band", "cautions"):
        assert key in obj
    assert len(obj["lag"]) == 6 and isinstance(obj["outside_band"], int)
    assert (folder / "variogram_check.png").is_file() and (folder / "variogram_check.csv").is_file()
    header = (folder / "variogram_check.csv").read_text().splitlines()[0].split(",")
    assert header[:3] == ["bin", "lag", "bin_lower"] and "p_value" in header
    assert main(args) == 2
    assert "already exists" in capsys.readouterr().err
    assert main([*args, "--overwrite"]) == 0
    again = _json(capsys)
    np.testing.assert_allclose(again["replicate_q05"], obj["replicate_q05"])


def test_variogram_check_human_output_and_bad_option(fits, tmp_path, capsys):
    """The human table lists every bin; --replicates 0 is refused with exit 2."""
    import shutil

    folder = tmp_path / "fit"
    shutil.copytree(fits["exp"], folder)
    assert main(["variogram-check", str(folder), "--replicates", "0"]) == 2
    assert "--replicates" in capsys.readouterr().err
    assert main(["variogram-check", str(folder), "--replicates", "10", "--bins", "5"]) == 0
    out = capsys.readouterr().out
    assert "p_value" in out and "caution:" in out


def test_unconverged_fits_are_flagged(tmp_path, capsys):
    """A stored convergence verdict "fail" (bayesgeo.fitting.posterior.with_diagnostics layout) puts a
    NOT CONVERGED caution first in both commands' JSON."""
    ds = simulated(30, seed=33)
    bad = make_fit(ds, ndraw=60, seed=4)
    bad.attrs["diagnostics"] = json.dumps({"verdict": "fail"})
    a = _save(bad, tmp_path / "bad")
    b = _save(make_fit(ds, covariance="exponential", ndraw=60, seed=5), tmp_path / "ok")
    assert main(["compare", str(a), str(b), "--json"]) == 0
    cautions = _json(capsys)["cautions"]
    assert cautions[0].startswith("NOT CONVERGED: bad")
    assert main(["variogram-check", str(a), "--replicates", "5", "--bins", "4", "--json"]) == 0
    assert _json(capsys)["cautions"][0].startswith("NOT CONVERGED")


def test_store_writes_the_group_once(tmp_path, capsys):
    """--store adds the exact LOO log_likelihood group to each fit file; a later comparison reads it
    and gives the same elpd (arviz.loo on stored and recomputed densities), and
    store_log_likelihood refuses to replace an existing group without overwrite."""
    import xarray as xr

    from bayesgeo.checks.modelcheck import store_log_likelihood
    from bayesgeo.common.validate import InputError

    ds = simulated(30, seed=34)
    a = _save(make_fit(ds, ndraw=60, seed=6), tmp_path / "a")
    b = _save(make_fit(ds, covariance="exponential", ndraw=60, seed=7), tmp_path / "b")
    assert main(["compare", str(a), str(b), "--json", "--store"]) == 0
    first = _json(capsys)
    with xr.open_datatree(a / "posterior.nc", engine="netcdf4") as t:
        assert "log_likelihood" in t.children and "posterior" in t.children
        assert t["log_likelihood"]["value"].shape == (2, 60, 30)
    assert main(["compare", str(a), str(b), "--json"]) == 0
    second = _json(capsys)
    assert [r["elpd_loo"] for r in second["ranking"]] == pytest.approx([r["elpd_loo"] for r in first["ranking"]])
    with pytest.raises(InputError, match="already holds"):
        store_log_likelihood(a)
    store_log_likelihood(a, overwrite=True)


# --- several-site fits --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def site_fits(tmp_path_factory):
    """Several-site fit folders of one simulated 3-site data set (hierarchical, independent,
    complete pooling), one of other data and one of the same points with other site labels, and a
    single-site fit of the same points (tests/test_loo.py: make_site_fit, make_fit)."""
    from test_loo import make_site_fit, simulated_sites

    root = tmp_path_factory.mktemp("site_fits")
    ds = simulated_sites((12, 14, 10), seed=41)
    relabelled = ds.assign_coords(site=("obs", np.where(ds["site"].values == "s2", "s1", ds["site"].values)))
    return {
        "hier": _save(make_site_fit(ds, pooling="hierarchical", ndraw=100, seed=1), root / "hier"),
        "indep": _save(make_site_fit(ds, pooling="independent", ndraw=100, seed=2), root / "indep"),
        "complete": _save(make_site_fit(ds, pooling="complete", ndraw=100, seed=3), root / "complete"),
        "other": _save(make_site_fit(simulated_sites((12, 14, 10), seed=42), ndraw=100, seed=4), root / "other"),
        "relabelled": _save(make_site_fit(relabelled, ndraw=100, seed=5), root / "relabelled"),
        "single": _save(make_fit(ds.drop_vars("site"), ndraw=100, seed=6), root / "single"),
    }


def test_compare_site_fits_by_site_and_one_site(site_fits, tmp_path, capsys):
    """Several-site fits with three poolings: the ranking gains a pooling column and by_site, whose
    per-site elpd add up to each fit's elpd_loo (elpd_loo = sum_i elpd_i, Vehtari, Gelman and
    Gabry 2017, eq. 4) with se_site = sqrt(n_s var(elpd_i)) (the ArviZ formula of se). With
    --site s1 each fit's elpd_loo equals its s1 entry of by_site: sites are independent given the
    parameters, so a point's exact leave-one-out density does not depend on the other sites
    (bayesgeo.checks.loo module docstring). Equal up to 1e-3, not bit for bit: arviz.loo sets the Pareto
    tail length from a relative efficiency r_eff averaged over the posterior variables present,
    and the one-site fit holds fewer of them (differences seen: about 3e-5)."""
    dirs = [str(site_fits[k]) for k in ("hier", "indep", "complete")]
    out = tmp_path / "cmp"
    assert main(["compare", *dirs, "--json", "--out", str(out)]) == 0
    obj = _json(capsys)
    assert {r["fit"]: r["pooling"] for r in obj["ranking"]} == {
        "hier": "hierarchical", "indep": "independent", "complete": "complete"}
    assert obj["n"] == 36 and obj["site"] is None
    assert set(obj["by_site"]) == {"s0", "s1", "s2"}
    assert [b["n"] for b in obj["by_site"].values()] == [12, 14, 10]
    for r in obj["ranking"]:
        total = sum(b["elpd"][r["fit"]] for b in obj["by_site"].values())
        assert total == pytest.approx(r["elpd_loo"], abs=1e-9)
    assert (out / "by_site.csv").is_file()
    point = np.genfromtxt(out / "pointwise.csv", delimiter=",", names=True, dtype=None, encoding="utf-8")
    hier = point[point["fit"] == "hier"]["elpd_i"]
    s1 = hier[12:26]  # s1 holds rows 13-26 of the data (tests/test_loo.py: simulated_sites)
    assert obj["by_site"]["s1"]["se"]["hier"] == pytest.approx(math.sqrt(14 * np.var(s1, ddof=1)), rel=1e-9)

    assert main(["compare", *dirs[:2], "--site", "s1", "--json"]) == 0
    one = _json(capsys)
    assert one["n"] == 14 and one["site"] == "s1" and "by_site" not in one
    for r in one["ranking"]:
        assert r["elpd_loo"] == pytest.approx(obj["by_site"]["s1"]["elpd"][r["fit"]], abs=1e-3)
        assert r["se"] == pytest.approx(obj["by_site"]["s1"]["se"][r["fit"]], rel=1e-3)
        assert r["pooling"] in ("hierarchical", "independent")
    assert main(["compare", *dirs[:2], "--site", "s1"]) == 0
    text = capsys.readouterr().out
    assert "at site s1" in text and "licensed professional" in text


@pytest.mark.parametrize("other, words", [("other", "the locations differ"),
                                          ("relabelled", "site labels of the points differ")])
def test_compare_refuses_site_fits_of_different_data(site_fits, capsys, other, words):
    """Several-site fits of other data, or of the same points grouped into other sites, are
    refused with exit 2 and one line naming the fit and the reason."""
    assert main(["compare", str(site_fits["hier"]), str(site_fits[other]), "--json"]) == 2
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert captured.out == "" and "\n" not in err
    assert other in err and words in err


def test_compare_single_site_fit_beside_site_fit(site_fits, capsys):
    """A single-site fit of the same points compares with a several-site fit (with a caution);
    --site with the single-site fit, or an unknown site, is refused with one line (exit 2)."""
    assert main(["compare", str(site_fits["hier"]), str(site_fits["single"]), "--json"]) == 0
    obj = _json(capsys)
    assert {r["fit"]: r["pooling"] for r in obj["ranking"]} == {"hier": "hierarchical", "single": "single-site"}
    assert "by_site" not in obj
    assert any("one field for all points" in c for c in obj["cautions"])
    assert main(["compare", str(site_fits["hier"]), str(site_fits["single"]), "--site", "s0"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "single-site fit" in err
    assert main(["compare", str(site_fits["hier"]), str(site_fits["indep"]), "--site", "nowhere"]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "nowhere" in err and "s0, s1, s2" in err


@pytest.mark.parametrize("option, value, pattern", [
    ("--replicates", "99999999999999999999", r"argument --replicates: expected an integer from 1 to 100000"),
    ("--bins", "1", r"argument --bins: expected an integer from 2 to 1000, got 1"),
    ("--lag-limit", "nan", r"argument --lag-limit: expected a finite number > 0, got 'nan'"),
    ("--seed", "-3", r"argument --seed: expected an integer from 0 to"),
])
def test_variogram_check_options_bounded(tmp_path, capsys, option, value, pattern):
    """variogram-check's numeric options are checked where they enter: exit 2, one line, no files."""
    from _cli_helpers import assert_refused

    (tmp_path / "fit").mkdir()
    assert_refused(capsys, ["variogram-check", tmp_path / "fit", option, value], "variogram-check", pattern,
                   inputs=[tmp_path / "fit"], absent=[tmp_path / "fit" / "variogram_check.png"])


def test_non_finite_elpd_is_never_ranked(fits, tmp_path, capsys, monkeypatch):
    """A NaN elpd (leave-one-out densities that overflowed although the draws are finite; simulated
    here by patching the comparison) stops compare with exit 2 and a line naming the fit folder and
    the variable, instead of a ranking with elpd = nan and exit 0; nothing is written to --out."""
    import bayesgeo.checks.modelcheck as mc

    real = mc.compare_fits

    def nan_elpd(trees, **kw):
        res = real(trees, **kw)
        v = res["elpd_loo"].values.copy()
        v[res["fit"].values.tolist().index("exp")] = np.nan
        return res.assign(elpd_loo=("fit", v))

    monkeypatch.setattr(mc, "compare_fits", nan_elpd)
    from _cli_helpers import assert_refused

    assert_refused(capsys, ["compare", fits["m32"], fits["exp"], "--out", tmp_path / "cmp", "--json"], "compare",
                   rf"^bayesgeo compare: error: {fits['exp']}: elpd_loo = nan", inputs=[fits["m32"], fits["exp"]],
                   absent=[tmp_path / "cmp"])


def test_non_finite_replicate_band_stops_variogram_check(fits, tmp_path, capsys, monkeypatch):
    """NaN replicate quantiles in a bin with pairs stop variogram-check with exit 2 naming the fit
    folder and the variable; no figure or table is written."""
    import shutil

    import bayesgeo.checks.ppcheck as pp

    real = pp.variogram_check

    def nan_band(tree, **kw):
        vc = real(tree, **kw)
        v = vc["replicate_q95"].values.copy()
        v[np.flatnonzero(vc["pairs"].values > 0)[0]] = np.inf
        return vc.assign(replicate_q95=(vc["replicate_q95"].dims, v))

    monkeypatch.setattr(pp, "variogram_check", nan_band)
    folder = tmp_path / "fit"
    shutil.copytree(fits["exp"], folder)
    from _cli_helpers import assert_refused

    assert_refused(capsys, ["variogram-check", folder, "--replicates", "5", "--bins", "4"], "variogram-check",
                   rf"{folder}: replicate_q95 is NaN or infinite in 1 lag bin\(s\) with pairs", inputs=[folder],
                   absent=[folder / "variogram_check.png", folder / "variogram_check.csv"])


def test_variogram_check_without_pairs_refused(fits, tmp_path, capsys):
    """A --lag-limit below the smallest distance between points leaves every lag bin empty: refused with
    exit 2 and one line naming --lag-limit, instead of a table of NaN with exit 0; nothing written."""
    import shutil

    from _cli_helpers import assert_refused

    folder = tmp_path / "fit"
    shutil.copytree(fits["exp"], folder)
    assert_refused(capsys, ["variogram-check", folder, "--lag-limit", "1e-9", "--replicates", "5"], "variogram-check",
                   r"--lag-limit: no pair of points lies within 1e-09 .*use a larger --lag-limit", inputs=[folder],
                   absent=[folder / "variogram_check.png", folder / "variogram_check.csv"])
