"""``bayesgeo check DIR``: exit codes, JSON output, diagnostics folder (bayesgeo.cli.check)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesgeo.cli import main
from conftest import write_fit_folder

az = pytest.importorskip("arviz")


def write_fit(folder, *, seed=0, shift=0.0, shift_vars=("practical_range",), chains=4, draws=500):
    """A fit folder with posterior.nc as the sampler would save it (nutpie statistic names)."""
    rng = np.random.default_rng(seed)
    post = {
        "practical_range": rng.lognormal(np.log(250.0), 0.2, size=(chains, draws)),
        "nugget": rng.gamma(4.0, 0.05, size=(chains, draws)),
        "beta": rng.normal(1.0, 0.1, size=(chains, draws, 2)),
    }
    for name in shift_vars:
        post[name][1] += shift
    ss = {
        "diverging": np.zeros((chains, draws), bool),
        "energy": rng.normal(size=(chains, draws)),
        "depth": rng.integers(1, 5, size=(chains, draws)).astype("uint64"),
        "maxdepth_reached": np.zeros((chains, draws), bool),
        "step_size": np.full((chains, draws), 0.4),
    }
    tree = az.from_dict({"posterior": post, "sample_stats": ss}, dims={"beta": ["term"]},
                        coords={"term": ["intercept", "depth_m"]})
    write_fit_folder(tree, folder)
    return folder


def run_json(capsys, argv):
    code = main(argv)
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert len(lines) == 1, out  # exactly one JSON object on stdout, nothing else
    return code, json.loads(lines[0])


def test_pass_exits_0_with_json_keys(tmp_path, capsys):
    """Converged draws (independent, Vehtari et al. 2021 thresholds met): exit 0, one JSON object with
    the documented keys; diagnostics.json written beside the posterior holds the same verdict."""
    fit = write_fit(tmp_path / "fit")
    code, out = run_json(capsys, ["check", str(fit), "--json", "--no-figures"])
    assert code == 0
    assert out["verdict"] == "pass"
    for key in ("parameters", "divergences", "divergence_share", "bfmi", "tree_depth", "step_size",
                "thresholds", "problems", "caution", "figures", "diagnostics"):
        assert key in out
    assert set(out["parameters"]) == {"practical_range", "nugget", "beta[intercept]", "beta[depth_m]"}
    assert set(out["parameters"]["nugget"]) >= {"rhat", "ess_bulk", "ess_tail", "mcse_mean", "mcse_q05",
                                                "mcse_q95", "iat"}
    saved = json.loads((fit / "diagnostics" / "diagnostics.json").read_text())
    assert saved["verdict"] == "pass" and saved["parameters"] == out["parameters"]


def test_fail_exits_3(tmp_path, capsys):
    """A chain shifted by 3 posterior sd: R-hat >> 1.01 (Vehtari et al. 2021) -> FAIL, exit status 3."""
    fit = write_fit(tmp_path / "fit", shift=150.0)
    code, out = run_json(capsys, ["check", str(fit), "--json", "--no-figures"])
    assert code == 3
    assert out["verdict"] == "fail"
    assert any(p["item"] == "rhat[practical_range]" for p in out["problems"])


def test_human_output_table_and_verdict(tmp_path, capsys):
    """Without --json: a table with the documented columns, the verdict and the caution."""
    fit = write_fit(tmp_path / "fit", shift=150.0, shift_vars=("practical_range", "nugget"))
    assert main(["check", str(fit), "--no-figures"]) == 3
    out = capsys.readouterr().out
    header = next(ln for ln in out.splitlines() if "parameter" in ln and "rhat" in ln)
    assert header.split() == ["parameter", "rhat", "ess_bulk", "ess_tail", "mcse_mean", "iat"]
    assert "verdict: FAIL" in out
    fails = [ln for ln in out.splitlines() if ln.lstrip().startswith("[FAIL]")]
    rhat_lines = [ln for ln in fails if "R-hat" in ln]
    assert len(rhat_lines) == 1  # one line per check, listing every parameter, not one per parameter
    assert "practical_range: R-hat" in rhat_lines[0] and "nugget: R-hat" in rhat_lines[0]
    assert "advice:" in out and "licensed professional" in out


def test_bad_input_exits_2_with_one_line(tmp_path, capsys):
    """Missing folder, missing posterior.nc, unreadable posterior.nc: one-line error, exit 2."""
    cases = [tmp_path / "nowhere", tmp_path / "empty"]
    (tmp_path / "empty").mkdir()
    broken = tmp_path / "broken"
    broken.mkdir()
    (broken / "posterior.nc").write_text("not a netcdf file\n")
    cases.append(broken)
    for folder in cases:
        assert main(["check", str(folder), "--json"]) == 2
        captured = capsys.readouterr()
        assert captured.out == ""
        lines = captured.err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("bayesgeo check: error:"), captured.err
    assert main(["check", str(write_fit(tmp_path / "fit")), "--var", "range", "--json"]) == 2
    assert "'range' not found" in capsys.readouterr().err


def test_figures_written_and_earlier_check_kept(tmp_path, capsys):
    """Figures and JSON land in DIR/diagnostics/; a rerun keeps them (verdict still printed) unless
    --overwrite, which replaces only what bayesgeo wrote: a figure the user put there stops it
    (output rules, docs/outputs.md)."""
    fit = write_fit(tmp_path / "fit", draws=200)
    code, out = run_json(capsys, ["check", str(fit), "--json", "--lag-limit", "30"])
    assert code == 0 and out["figure_error"] is None
    names = sorted(p.name for p in (fit / "diagnostics").iterdir())
    assert names == ["acf.png", "diagnostics.json", "pair.png", "rank.png", "trace.png"]
    assert sorted(out["figures"]) == sorted(str(fit / "diagnostics" / n) for n in names if n.endswith(".png"))
    for n in names:
        assert (fit / "diagnostics" / n).stat().st_size > 0
    assert (fit / "posterior.nc").exists()

    first = (fit / "diagnostics" / "diagnostics.json").read_bytes()
    code, again = run_json(capsys, ["check", str(fit), "--json"])
    assert code == 0 and again["kept"] == str(fit / "diagnostics") and again["diagnostics"] is None
    assert again["verdict"] == out["verdict"]
    assert (fit / "diagnostics" / "diagnostics.json").read_bytes() == first

    code, _ = run_json(capsys, ["check", str(fit), "--json", "--overwrite", "--no-figures"])
    assert code == 0 and sorted(p.name for p in (fit / "diagnostics").iterdir()) == ["diagnostics.json"]

    (fit / "diagnostics" / "annotated.png").write_bytes(b"mine")
    assert main(["check", str(fit), "--overwrite"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bayesgeo did not write" in err[0] and "annotated.png" in err[0]
    assert (fit / "diagnostics" / "annotated.png").read_bytes() == b"mine"


# --- several-site fits --------------------------------------------------------------------------


def write_site_fit(folder, *, pooling="hierarchical", bad_site=None, seed=0):
    """A several-site fit folder (tests/test_loo.py: make_site_fit, 4 chains x 300 independent
    draws, so it converges) with nutpie-named sampler statistics; ``bad_site`` shifts one chain of
    that site's practical range so its chains disagree."""
    import xarray as xr

    from test_loo import make_site_fit, simulated_sites

    tree = make_site_fit(simulated_sites(), pooling=pooling, chains=4, ndraw=300, seed=seed)
    rng = np.random.default_rng(seed)
    shape = (4, 300)
    ss = xr.Dataset({"diverging": (("chain", "draw"), np.zeros(shape, bool)),
                     "energy": (("chain", "draw"), rng.normal(size=shape)),
                     "depth": (("chain", "draw"), rng.integers(1, 5, size=shape).astype("uint64")),
                     "maxdepth_reached": (("chain", "draw"), np.zeros(shape, bool)),
                     "step_size": (("chain", "draw"), np.full(shape, 0.4))},
                    coords={"chain": np.arange(4), "draw": np.arange(300)})
    tree["sample_stats"] = xr.DataTree(ss)
    if bad_site is not None:
        post = tree["posterior"].to_dataset()
        k = list(post["site"].values).index(bad_site)
        for v in ("practical_range_z", "practical_range"):
            x = post[v].values.copy()
            x[0, :, k] *= 3.0
            post[v] = (post[v].dims, x, post[v].attrs)
        tree["posterior"] = xr.DataTree(post)
    write_fit_folder(tree, folder)
    return folder


def test_several_site_fit_has_site_and_population_blocks(tmp_path, capsys):
    """A several-site fit: diagnostics.json keeps the whole-posterior verdict and adds one block per
    site and one for the population. Each site's worst R-hat and smallest bulk / tail ESS equal the
    extremes of arviz.rhat / arviz.ess (method "bulk", and "tail" with the 5% and 95% quantiles as
    bayesgeo.convergence.diagnostics documents) over that site's elements alone,
    computed here independently (reference: ArviZ 1.x, Vehtari et al. 2021 rank-normalised R-hat
    and ESS). A converged fit passes everywhere."""
    folder = write_site_fit(tmp_path / "fit")
    code, res = run_json(capsys, ["check", str(folder), "--json", "--no-figures"])
    assert code == 0 and res["verdict"] == "pass"
    assert set(res["sites"]) == {"s0", "s1", "s2"}
    assert res["population"]["verdict"] == "pass" and res["population"]["parameters"] > 0
    assert "whole posterior" in res["site_note"]
    on_disk = json.loads((folder / "diagnostics" / "diagnostics.json").read_text())
    assert on_disk["sites"] == res["sites"]
    post = az.from_netcdf(folder / "posterior.nc")["posterior"].to_dataset()
    site_vars = [v for v in post.data_vars if "site" in post[v].dims]
    for site, block in res["sites"].items():
        assert block["verdict"] == "pass" and block["problems"] == []
        one = post[site_vars].sel(site=site)
        rhat = az.rhat(one)
        bulk, tail = az.ess(one, method="bulk"), az.ess(one, method="tail", prob=(0.05, 0.95))
        varying = [v for v in site_vars if float(one[v].std()) > 0]
        assert block["worst_rhat"] == pytest.approx(max(float(rhat[v].max()) for v in varying), rel=1e-9)
        assert block["min_ess_bulk"] == pytest.approx(min(float(bulk[v].min()) for v in varying), rel=1e-9)
        assert block["min_ess_tail"] == pytest.approx(min(float(tail[v].min()) for v in varying), rel=1e-9)
        assert block["worst_rhat_parameter"].endswith(f"[{site}]") or f"[{site}," in block["worst_rhat_parameter"]


def test_one_unmixed_site_fails_its_own_block(tmp_path, capsys):
    """One site whose chains disagree on the practical range fails its own block (R-hat >= 1.01,
    Vehtari et al. 2021) and the whole-posterior verdict (exit 3); the other sites and the
    population still pass, and the human report shows one row per site."""
    folder = write_site_fit(tmp_path / "bad", bad_site="s1")
    code, res = run_json(capsys, ["check", str(folder), "--json", "--no-figures"])
    assert code == 3 and res["verdict"] == "fail"
    verdicts = {k: b["verdict"] for k, b in res["sites"].items()}
    assert verdicts == {"s0": "pass", "s1": "fail", "s2": "pass"}
    assert res["population"]["verdict"] == "pass"
    assert res["sites"]["s1"]["worst_rhat"] >= 1.01
    assert any("practical_range" in m and "R-hat" in m for m in res["sites"]["s1"]["problems"])
    code = main(["check", str(folder), "--no-figures"])
    out = capsys.readouterr().out
    assert code == 3
    assert "per site:" in out and "site s1" in out and "population" in out
    assert "verdict: FAIL (whole posterior)" in out


def test_independent_fit_has_no_population_block(tmp_path, capsys):
    """Independent pooling has no parameter without a site index: population is null."""
    folder = write_site_fit(tmp_path / "ind", pooling="independent")
    code, res = run_json(capsys, ["check", str(folder), "--json", "--no-figures"])
    assert code == 0 and res["population"] is None
    assert set(res["sites"]) == {"s0", "s1", "s2"}


def test_lag_limit_bounded(tmp_path, capsys):
    """--lag-limit of the autocorrelation figure is an integer from 1 to 1,000,000: a huge value is
    refused where it enters with one line (exit 2), the folder untouched."""
    from _cli_helpers import assert_refused

    (tmp_path / "fit").mkdir()
    assert_refused(capsys, ["check", tmp_path / "fit", "--lag-limit", "99999999999999999999"], "check",
                   r"argument --lag-limit: expected an integer from 1 to 1000000", inputs=[tmp_path / "fit"],
                   absent=[tmp_path / "fit" / "diagnostics"])
