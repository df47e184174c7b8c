"""Convergence diagnostics and verdict (bayesgeo.convergence.diagnostics)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesgeo.convergence.diagnostics import Thresholds, check_convergence
from bayesgeo.common.validate import InputError

az = pytest.importorskip("arviz")


def make_tree(post, stats=None, dims=None, coords=None):
    """A DataTree from numpy draws via ArviZ's converter (as pm.sample would give)."""
    groups = {"posterior": post}
    if stats is not None:
        groups["sample_stats"] = stats
    return az.from_dict(groups, dims=dims or {}, coords=coords or {})


def iid_parts(seed=0, chains=4, draws=1000):
    """Independent draws for range, sill, nugget and a 2-term beta, and healthy sampler stats."""
    rng = np.random.default_rng(seed)
    post = {
        "practical_range": rng.lognormal(np.log(250.0), 0.2, size=(chains, draws)),
        "partial_sill": rng.lognormal(0.0, 0.3, size=(chains, draws)),
        "nugget": rng.gamma(4.0, 0.05, size=(chains, draws)),
        "beta": rng.normal([1.0, 0.2], 0.1, size=(chains, draws, 2)),
    }
    ss = {
        "diverging": np.zeros((chains, draws), bool),
        "energy": rng.normal(size=(chains, draws)),
        "depth": rng.integers(1, 5, size=(chains, draws)).astype("uint64"),
        "maxdepth_reached": np.zeros((chains, draws), bool),
        "step_size": np.full((chains, draws), 0.4),
    }
    return post, ss


def tree_of(post, ss=None):
    return make_tree(post, ss, dims={"beta": ["term"]}, coords={"term": ["intercept", "depth_m"]})


def iid_tree(seed=0, chains=4, draws=1000, stats=True):
    post, ss = iid_parts(seed, chains, draws)
    return tree_of(post, ss if stats else None)


def test_independent_chains_pass():
    """Independent draws from the target are converged by construction: R-hat ~ 1 and ESS ~ N
    (Vehtari et al. 2021), so the verdict is PASS with no problems."""
    conv = check_convergence(iid_tree())
    assert conv.verdict == "pass", conv.problems
    assert conv.problems == []
    assert np.all(conv.parameters["rhat"].values < 1.01)
    assert np.all(conv.parameters["ess_bulk"].values > 2000)
    assert conv.divergences == 0 and conv.n_chains == 4 and conv.n_draws == 1000


def test_numbers_equal_arviz_exactly():
    """R-hat, bulk/tail ESS and MCSE equal az.rhat, az.ess(method="bulk"), az.ess(method="tail",
    prob=(0.05, 0.95)) and az.mcse(method="mean"/"quantile") on the same draws (ArviZ 1.x,
    Vehtari et al. 2021), element by element for the vector variable."""
    post, ss = iid_parts(seed=3, draws=400)
    post["practical_range"] = post["practical_range"] + np.linspace(0.0, 30.0, 400)
    tree = tree_of(post, ss)
    conv = check_convergence(tree)
    ps = conv.parameters
    ref = {
        "rhat": az.rhat(tree),
        "ess_bulk": az.ess(tree, method="bulk"),
        "ess_tail": az.ess(tree, method="tail", prob=(0.05, 0.95)),
        "mcse_mean": az.mcse(tree, method="mean"),
        "mcse_q05": az.mcse(tree, method="quantile", prob=0.05),
        "mcse_q95": az.mcse(tree, method="quantile", prob=0.95),
    }
    for col, dt in ref.items():
        ds = dt.to_dataset()
        for name in ("practical_range", "partial_sill", "nugget"):
            assert ps[col].sel(parameter=name).item() == pytest.approx(ds[name].item(), rel=1e-12), (col, name)
        for term in ("intercept", "depth_m"):
            ours = ps[col].sel(parameter=f"beta[{term}]").item()
            assert ours == pytest.approx(ds["beta"].sel(term=term).item(), rel=1e-12), (col, term)


def test_shifted_chain_fails_on_rhat():
    """One chain centred 1 sd away from the others: split R-hat well above 1.01 (Vehtari et al. 2021) -> FAIL."""
    post, ss = iid_parts(seed=1)
    post["practical_range"][2] += post["practical_range"].std()
    conv = check_convergence(tree_of(post, ss))
    assert conv.verdict == "fail"
    items = [p["item"] for p in conv.problems if p["level"] == "fail"]
    assert "rhat[practical_range]" in items
    assert all(not i.startswith("rhat[") or i == "rhat[practical_range]" for i in items)
    rhat_problem = next(p for p in conv.problems if p["item"] == "rhat[practical_range]")
    assert rhat_problem["check"] == "rhat"
    assert rhat_problem["threshold"] == 1.01 and "Vehtari" in rhat_problem["source"]
    assert "prior" in rhat_problem["advice"]


def test_stuck_chain_fails():
    """A chain that never moves (constant) has not explored the posterior (common practice) -> FAIL,
    naming the chain."""
    post, ss = iid_parts(seed=2)
    post["nugget"][3] = post["nugget"][3, 0]
    conv = check_convergence(tree_of(post, ss))
    assert conv.verdict == "fail"
    stuck = next(p for p in conv.problems if p["item"] == "nugget" and "did not move" in p["message"])
    assert stuck["value"] == [3]


def test_constant_everywhere_is_a_note_unless_nothing_moves():
    """A quantity fixed by design (constant in all chains) is noted, not failed; a sample in which
    nothing varies fails (common practice)."""
    post, ss = iid_parts(seed=4)
    post["nu"] = np.full((4, 1000), 1.5)
    conv = check_convergence(tree_of(post, ss))
    assert conv.verdict == "pass"
    assert any(n.startswith("nu:") for n in conv.notes)
    frozen = make_tree({"a": np.ones((4, 50)), "b": np.zeros((4, 50))})
    assert check_convergence(frozen).verdict == "fail"


def test_low_ess_warn_band_and_fail():
    """AR(1) phi = 0.99 chains (IAT = 199, so ESS ~ 4000/199 ~ 20): below 100 -> FAIL; the 100-400
    band warns (Vehtari et al. 2021: 400; the warn band is our stated choice)."""
    rng = np.random.default_rng(7)
    x = np.zeros((4, 1000))
    for t in range(1, 1000):
        x[:, t] = 0.99 * x[:, t - 1] + rng.normal(size=4)
    conv = check_convergence(make_tree({"scale": x}))
    assert conv.verdict == "fail"
    assert any(p["item"] == "ess_bulk[scale]" and p["level"] == "fail" for p in conv.problems)
    loose = check_convergence(make_tree({"scale": x}), thresholds={"ess_fail": 1.0, "rhat": 10.0})
    assert {p["item"]: p["level"] for p in loose.problems}["ess_bulk[scale]"] == "warn"


def test_divergences_warn_then_fail_and_are_located():
    """Divergences: any -> WARN (common practice), share above 1% -> FAIL (our stated choice); where they
    sit is reported: here they are put at the lowest nugget draws, so the shift is negative."""
    post, ss = iid_parts(seed=5)
    nug = post["nugget"]
    for n_div, verdict in ((10, "warn"), (80, "fail")):
        div = np.zeros(nug.shape, bool)
        div.flat[np.argsort(nug, axis=None)[:n_div]] = True
        conv = check_convergence(tree_of(post, {**ss, "diverging": div}))
        assert conv.divergences == n_div
        assert conv.divergence_share == pytest.approx(n_div / 4000)
        assert sum(conv.divergences_per_chain) == n_div
        assert conv.verdict == verdict
        loc = conv.divergence_location["nugget"]
        assert loc["divergent_mean"] < loc["other_mean"] and loc["shift_sd"] < -1.0
        problem = next(p for p in conv.problems if p["item"] == "divergences")
        assert "nugget" in problem["message"] and "target acceptance" in problem["advice"]


def test_bfmi_equals_arviz_and_warns():
    """E-BFMI per chain equals az.bfmi; a random-walk energy (E-BFMI << 0.3) warns (Betancourt 2016)."""
    post, ss = iid_parts(seed=6)
    ss["energy"] = np.cumsum(np.random.default_rng(6).normal(size=(4, 1000)), axis=1)
    tree = tree_of(post, ss)
    conv = check_convergence(tree)
    ref = az.bfmi(tree).to_dataset()["energy"].values
    np.testing.assert_allclose(conv.bfmi, ref, rtol=1e-12)
    assert all(v < 0.3 for v in conv.bfmi)
    assert conv.verdict == "warn"
    assert {p["item"] for p in conv.problems} == {f"bfmi[chain {c}]" for c in range(4)}


def test_tree_depth_with_pymc_names():
    """PyMC's own NUTS names (tree_depth, reached_max_treedepth) are read as well as nutpie's;
    saturation warns (common practice) and the share is per chain."""
    post, ss = iid_parts(seed=8)
    del ss["depth"], ss["maxdepth_reached"]
    sat = np.zeros((4, 1000), bool)
    sat[1, :50] = True
    ss["tree_depth"] = np.where(sat, 10, 3)
    ss["reached_max_treedepth"] = sat
    conv = check_convergence(tree_of(post, ss))
    assert conv.tree_depth["saturation_share"] == pytest.approx(50 / 4000)
    assert conv.tree_depth["saturation_share_per_chain"] == pytest.approx([0, 0.05, 0, 0])
    assert conv.tree_depth["statistic"] == "tree_depth"
    assert conv.verdict == "warn"
    assert conv.step_size == pytest.approx([0.4] * 4)


def test_missing_sample_stats_and_nonfinite_draws():
    """Without sampler statistics the verdict is at best WARN; non-finite draws FAIL (common practice)."""
    conv = check_convergence(iid_tree(stats=False))
    assert conv.verdict == "warn" and conv.problems[0]["item"] == "sample_stats"
    post, ss = iid_parts(seed=9)
    post["partial_sill"][0, 5] = np.nan
    conv = check_convergence(tree_of(post, ss))
    assert conv.verdict == "fail"
    assert any(p["item"] == "partial_sill" and p["value"] == 1 for p in conv.problems)


def test_json_keys_and_strict_json():
    """to_json has the keys D and the CLI rely on, every threshold carries its source, and it is strict JSON."""
    conv = check_convergence(iid_tree(seed=10, draws=300))
    out = conv.to_json()
    for key in ("verdict", "parameters", "divergences", "divergence_share", "bfmi", "tree_depth",
                "step_size", "thresholds", "problems", "caution"):
        assert key in out
    assert set(out["parameters"]["beta[intercept]"]) >= {"rhat", "ess_bulk", "ess_tail", "mcse_mean",
                                                           "mcse_q05", "mcse_q95", "iat"}
    assert out["thresholds"]["rhat"]["value"] == 1.01 and "Vehtari" in out["thresholds"]["rhat"]["source"]
    assert "Betancourt 2016" in out["thresholds"]["bfmi"]["source"]
    assert "licensed professional" in out["caution"]
    json.dumps(out, allow_nan=False)


def test_iat_column_is_geyer_iat():
    """The table's IAT is Geyer's initial monotone sequence estimate (see bayesgeo.convergence.autocorr)."""
    from bayesgeo.convergence.autocorr import integrated_autocorrelation_time

    tree = iid_tree(seed=11, draws=300)
    conv = check_convergence(tree, var_names=["nugget", "beta"])
    ref = integrated_autocorrelation_time(tree, var_names=["nugget", "beta"])
    np.testing.assert_allclose(conv.parameters["iat"].values, ref.values)
    assert list(conv.parameters["parameter"].values) == ["nugget", "beta[intercept]", "beta[depth_m]"]


def test_threshold_overrides_are_checked():
    """Unknown threshold names and bad values raise InputError naming the valid keys."""
    tree = iid_tree(seed=12, draws=200)
    assert isinstance(check_convergence(tree, thresholds={"ess": 100}).thresholds, Thresholds)
    with pytest.raises(InputError, match="unknown key.*valid: rhat"):
        check_convergence(tree, thresholds={"r_hat": 1.05})
    with pytest.raises(InputError, match="rhat: expected a number"):
        check_convergence(tree, thresholds={"rhat": "high"})


def test_funnel_with_nutpie_reports_divergences():
    """Neal's funnel (Neal 2003, Annals of Statistics 31, from memory: v ~ N(0, 3^2), x_i ~ N(0, sd exp(v/2))) defeats
    NUTS in its neck: sampled briefly with nutpie (fixed seed) it gives divergences, which are
    reported with the nutpie statistic names and located at low v (common practice)."""
    pm = pytest.importorskip("pymc")
    with pm.Model():
        v = pm.Normal("v", 0.0, 3.0)
        pm.Normal("x", 0.0, pm.math.exp(v / 2.0), shape=3)
        tree = pm.sample(draws=300, tune=200, chains=2, random_seed=5, progressbar=False,
                         compute_convergence_checks=False)
    conv = check_convergence(tree)
    assert conv.sampler == "nutpie"
    assert conv.divergences > 0
    assert conv.verdict in ("warn", "fail")
    assert any(p["item"] == "divergences" for p in conv.problems)
    assert conv.divergence_location["v"]["shift_sd"] < 0
    assert conv.tree_depth["statistic"] == "depth" and conv.tree_depth["max_depth"] == 10
    assert len(conv.bfmi) == 2 and len(conv.step_size) == 2


def test_same_draws_give_identical_output():
    """Same draws, same numbers (bayesgeo rule: reproducible outputs)."""
    tree = iid_tree(seed=13, draws=200)
    assert check_convergence(tree).to_json() == check_convergence(tree.copy(deep=True)).to_json()
