"""Several sites end to end through the command line: fit --site (hierarchical and independent
pooling), check, map --site for every site, compare.

Three small simulated sites (22, 18 and 16 points; Matérn 3/2 fields with a nugget, log-normal
values in mg/kg, bayesgeo.data.demo.simulate_field), sampled with 2 chains x 150 draws (tune 150), so the
whole module is one short real run of every command; the numbers themselves are checked elsewhere
(tests/test_loo.py, tests/test_cli_check.py, tests/test_cli_compare.py, tests/test_hierarchical.py).
Here the checks are that the commands chain, exit as documented and write what they promise.
Measured: 48 s for the module (three sampler runs with their compilation, four maps, two
comparisons) with a 1-minute load average of about 8 on 2 vCPUs; 92 s under a load of about 15.
"""

from __future__ import annotations

import contextlib
import io
import json

import numpy as np
import pytest
import xarray as xr

from bayesgeo.cli import main
from bayesgeo.data.demo import simulate_field

SITES = {"upper-field": 22, "spoil-heap": 18, "ditch-bank": 16}
THRESHOLD = 25.0  # mg/kg, an invented level for the exceedance maps
COMMON = ["--x", "x", "--y", "y", "--value", "value", "--site", "site", "--units", "mg/kg", "--distance-units", "m",
          "--covariance", "matern32", "--transform", "log", "--chains", "2", "--draws", "150", "--tune", "150",
          "--seed", "11"]


def _write_sites(path) -> None:
    rng = np.random.default_rng(8)
    lines = ["x,y,site,value"]
    for k, (label, n) in enumerate(SITES.items()):
        xy = np.round(rng.random((n, 2)) * 120.0, 1) + [500.0 * k, 0.0]
        z = simulate_field(xy, covariance="matern32", practical_range=60.0, partial_sill=0.4, nugget=0.08,
                           mean=np.log(15.0) + 0.3 * k, rng=rng)
        lines += [f"{x:.1f},{y:.1f},{label},{v:.3f}" for (x, y), v in zip(xy, np.exp(z))]
    path.write_text("\n".join(lines) + "\n")


def _cli(argv) -> tuple[int, dict, str]:
    """Run one command in this process; (exit status, its one JSON object, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    lines = [ln for ln in out.getvalue().splitlines() if ln.strip()]
    assert len(lines) == 1, out.getvalue()[-2000:] + err.getvalue()[-2000:]
    return code, json.loads(lines[0]), err.getvalue()


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """Every command once, in the order a user would run them; results by step."""
    root = tmp_path_factory.mktemp("sites_e2e")
    data = root / "sites.csv"
    _write_sites(data)
    res = {"root": root}
    res["fit"] = _cli(["fit", str(data), *COMMON, "--out", str(root / "hier"), "--json"])
    res["fit_indep"] = _cli(["fit", str(data), *COMMON, "--pooling", "independent", "--out", str(root / "indep"),
                             "--json"])
    res["check"] = _cli(["check", str(root / "hier"), "--json", "--no-figures"])
    allow = ["--allow-unconverged"] if res["check"][1]["verdict"] == "fail" else []
    res["map"] = {}
    for k, site in enumerate(SITES):
        figures = [] if k == 0 else ["--no-figures"]  # figures for one site are enough here
        res["map"][site] = _cli(["map", str(root / "hier"), "--site", site, "--cell", "20", "--draws", "40",
                                 "--threshold", str(THRESHOLD), "--scheduler", "synchronous", "--json",
                                 *figures, *allow])
    res["compare"] = _cli(["compare", str(root / "hier"), str(root / "indep"), "--json"])
    res["compare_site"] = _cli(["compare", str(root / "hier"), str(root / "indep"), "--site", "ditch-bank", "--json"])
    return res


def test_fit_reports_sites_population_and_new_site(run):
    """fit --site writes the several-site outputs; its JSON holds every site, the population, the
    new-site predictive (hierarchical pooling) and the cautions deferring to regulation and
    licensed professionals; the independent fit has no population."""
    code, obj, _ = run["fit"]
    assert code in (0, 3)
    assert set(obj["sites"]) == set(SITES)
    assert {s: b["n"] for s, b in obj["sites"].items()} == SITES
    pop = obj["population"]["population_practical_range_median"]
    assert 0 < pop["q05"] <= pop["q50"] <= pop["q95"]
    for block in (obj["new_site"], *(b["parameters"] for b in obj["sites"].values())):
        assert 0 < block["practical_range"]["q05"] <= block["practical_range"]["q95"]
    assert obj["model"]["pooling"] == "hierarchical" and obj["model"]["n"] == sum(SITES.values())
    assert any("licensed professional" in c for c in obj["cautions"])
    for name in ("posterior.nc", "summary.csv", "summary.txt", "fit.json", "shrinkage.csv", "design.csv"):
        assert (run["root"] / "hier" / name).is_file()
    code_i, indep, _ = run["fit_indep"]
    assert code_i in (0, 3)
    assert indep["model"]["pooling"] == "independent" and not indep["population"] and not indep["new_site"]


def test_check_has_a_block_per_site(run):
    """check on the several-site fit: one whole-posterior verdict (the exit status follows it, 3 on
    fail) and a block per site plus the population; the whole verdict is never better than any
    block's (common practice: the worst part decides). R-hat is at least 1 up to estimation noise."""
    code, obj, _ = run["check"]
    assert code == (3 if obj["verdict"] == "fail" else 0)
    assert set(obj["sites"]) == set(SITES)
    assert obj["population"] is not None
    rank = {"pass": 0, "warn": 1, "fail": 2}
    for block in (*obj["sites"].values(), obj["population"]):
        assert {"verdict", "worst_rhat", "min_ess_bulk", "min_ess_tail", "problems"} <= set(block)
        assert rank[block["verdict"]] <= rank[obj["verdict"]]
        assert block["worst_rhat"] >= 1.0 - 1e-3 and block["min_ess_bulk"] > 0
    assert (run["root"] / "hier" / "diagnostics" / "diagnostics.json").is_file()


def test_map_writes_one_prediction_file_per_site(run):
    """map --site NAME writes predictions_<NAME>.nc (and maps_<NAME>/ with figures, GeoTIFFs and the GeoPackage)
    for every site; exceedance probabilities of the threshold lie in [0, 1] and the cautions name local
    regulation."""
    hier = run["root"] / "hier"
    for k, (site, (code, obj, _)) in enumerate(run["map"].items()):
        assert code == 0, obj
        assert obj["predictions"] == str(hier / f"predictions_{site}.nc")
        with xr.open_dataset(obj["predictions"], engine="netcdf4") as pred:
            p = pred["p_exceed"].values
            assert np.nanmin(p) >= 0.0 and np.nanmax(p) <= 1.0
        assert obj["threshold"] == [THRESHOLD] and obj["cells"] > 0
        assert any("regulat" in c for c in obj["cautions"])
        assert (hier / f"maps_{site}").is_dir() == (k == 0)
    first = hier / f"maps_{next(iter(SITES))}"  # a site's GIS files hold that site's samples only
    from pyogrio.raw import read

    meta, _, geom, _ = read(first / "map.gpkg", layer="samples")
    assert len(geom) == SITES[next(iter(SITES))] and (first / "mean.tif").is_file()


def test_compare_hierarchical_against_independent(run):
    """compare ranks the hierarchical and the independent fit of the same data by PSIS-LOO with a
    per-site breakdown adding up to each total; --site restricts to one site's points."""
    code, obj, _ = run["compare"]
    assert code == 0
    assert {r["pooling"] for r in obj["ranking"]} == {"hierarchical", "independent"}
    assert obj["n"] == sum(SITES.values())
    for r in obj["ranking"]:
        assert sum(b["elpd"][r["fit"]] for b in obj["by_site"].values()) == pytest.approx(r["elpd_loo"], abs=1e-8)
    code, one, _ = run["compare_site"]
    assert code == 0 and one["n"] == SITES["ditch-bank"] and one["site"] == "ditch-bank"
    for r in one["ranking"]:
        # equal up to arviz.loo's relative-efficiency factor (tests/test_cli_compare.py)
        assert r["elpd_loo"] == pytest.approx(obj["by_site"]["ditch-bank"]["elpd"][r["fit"]], abs=0.01)
