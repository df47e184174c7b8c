"""Tests of bayesgeo.fitting.looks: chains that continue while R-hat or ESS is too poor.

Check values come from outside the project: nutpie's per-chain random streams (the first k draws of
a longer run are the draws of a run of k, checked here by running nutpie itself), ArviZ's R-hat and
ESS (Vehtari et al. 2021, Bayesian Analysis 16: R-hat < 1.01 and ESS >= 400 with 4 chains) and the
behaviour of i.i.d. normal draws, whose rank-normalised R-hat is close to 1 and whose ESS is close to
the number of draws (Vehtari et al. 2021, sec. 4).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.fitting.looks import convergence_look, default_max_draws
from bayesgeo.fitting.model import build_model
from bayesgeo.fitting.posterior import fit
from bayesgeo.fitting.sampling import chain_lengths, compile_model, first_draws, sample
from bayesgeo.common.validate import InputError


def _data(n=30, seed=21):
    rng = np.random.default_rng(seed)
    xy = 100 * rng.random((n, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=40.0, partial_sill=1.0, nugget=0.2, rng=rng)
    return points_dataset(xy[:, 0], xy[:, 1], z, attrs={"distance_units": "m", "coords": "xy", "source": "sim"})


@pytest.fixture(scope="module")
def tiny_model():
    return compile_model(build_model(_data(), covariance="exponential")[0])


def test_chain_lengths_double_up_to_the_longest():
    """Looks at draws, doubling, and the longest chain last (never past it); one look when equal."""
    assert chain_lengths(1000, 4000) == [1000, 2000, 4000]
    assert chain_lengths(1000, 3000) == [1000, 2000, 3000]
    assert chain_lengths(1000, 1000) == [1000]
    assert chain_lengths(100, 150) == [100, 150]
    assert default_max_draws(1000) == 4000


def test_first_draws_of_a_longer_run_are_the_draws_of_a_short_run(tiny_model):
    """nutpie's chains draw from their own streams: the first 60 draws of a run of 180 equal a run of
    60 with the same seed, bit for bit (checked on nutpie itself: the reason a fit that continues its
    chains is reproducible). A look that always asks for more runs to the longest chain."""
    short = sample(tiny_model, chains=2, draws=60, tune=60, seed=5)
    long = sample(tiny_model, chains=2, draws=60, tune=60, seed=5, max_draws=180,
                  look=lambda tree: {"extend": True})
    assert long["posterior"].sizes["draw"] == 180 and long.attrs["draws"] == 180
    assert [lk["draws"] for lk in long.attrs["looks"]] == [60, 120, 180]
    for name in ("practical_range_z", "sd_z", "nugget_sd_z"):
        np.testing.assert_array_equal(long["posterior"][name].values[:, :60], short["posterior"][name].values)
    np.testing.assert_array_equal(long["sample_stats"]["diverging"].values[:, :60],
                                  short["sample_stats"]["diverging"].values)


def test_sampling_stops_at_the_first_look_that_asks_for_no_more(tiny_model):
    """A look satisfied at 120 draws keeps exactly 120 (the first 120 of the chains, the same as a run of
    120), records both looks, and the same seed repeats it exactly."""
    seen = []

    def look(tree):
        k = tree["posterior"].sizes["draw"]
        assert np.isfinite(tree["posterior"]["sd_z"].values).all()  # every look sees complete draws
        seen.append(k)
        return {"extend": k < 120, "k": k}

    a = sample(tiny_model, chains=2, draws=60, tune=60, seed=9, max_draws=480, look=look)
    assert seen == [60, 120]
    assert a["posterior"].sizes["draw"] == 120 and a.attrs["max_draws"] == 480
    assert a.attrs["looks"] == [{"draws": 60, "extend": True, "k": 60}, {"draws": 120, "extend": False, "k": 120}]
    ref = sample(tiny_model, chains=2, draws=120, tune=60, seed=9)
    np.testing.assert_array_equal(a["posterior"]["sd_z"].values, ref["posterior"]["sd_z"].values)
    b = sample(tiny_model, chains=2, draws=60, tune=60, seed=9, max_draws=480, look=look)
    np.testing.assert_array_equal(a["posterior"]["sd_z"].values, b["posterior"]["sd_z"].values)


def test_max_draws_below_draws_or_without_a_look_draws_exactly(tiny_model):
    """No look, or max_draws <= draws: exactly ``draws`` per chain and no looks recorded."""
    a = sample(tiny_model, chains=2, draws=40, tune=40, seed=3, max_draws=40, look=lambda t: {"extend": True})
    b = sample(tiny_model, chains=2, draws=40, tune=40, seed=3, max_draws=400)
    for t in (a, b):
        assert t["posterior"].sizes["draw"] == 40 and "looks" not in t.attrs
    with pytest.raises(InputError, match="--max-draws"):
        sample(tiny_model, chains=2, draws=40, tune=40, max_draws=0, look=lambda t: {"extend": True})


def _tree(draws: np.ndarray, diverging: np.ndarray | None = None) -> xr.DataTree:
    post = xr.Dataset({"a": (("chain", "draw"), draws)})
    div = np.zeros(draws.shape, bool) if diverging is None else diverging
    stats = xr.Dataset({"diverging": (("chain", "draw"), div)})
    return xr.DataTree.from_dict({"/posterior": post, "/sample_stats": stats})


def test_convergence_look_asks_for_more_only_for_rhat_and_ess():
    """Chains stuck at different levels (means 0, 0, 0, 3) give an R-hat far above 1.01 (Vehtari et al.
    2021) and the look asks for more; 4 x 1000 i.i.d. normal draws have R-hat ~ 1 and ESS ~ 4000 (same
    source), so it does not; 4 x 50 i.i.d. draws have ESS <= 200 < 400 and it does (too few draws)."""
    rng = np.random.default_rng(0)
    look = convergence_look(lambda t: t)
    stuck = rng.normal(size=(4, 1000)) + np.array([0, 0, 0, 3.0])[:, None]
    r = look(_tree(stuck))
    assert r["extend"] and r["verdict"] == "fail" and any(s.startswith("rhat[") for s in r["short"])
    assert r["max_rhat"] > 1.1
    fine = look(_tree(rng.normal(size=(4, 1000))))
    assert not fine["extend"] and fine["short"] == [] and fine["verdict"] == "pass"
    assert fine["max_rhat"] < 1.01 and fine["min_ess_bulk"] > 3000
    few = look(_tree(rng.normal(size=(4, 50))))
    assert few["extend"] and all(s.startswith("ess_") for s in few["short"])


def test_divergences_alone_never_ask_for_more():
    """Divergent transitions are not cured by longer chains (common practice, Betancourt 2017): with
    well-mixed draws and 5% divergent transitions the verdict fails but the look asks for no more."""
    rng = np.random.default_rng(1)
    div = np.zeros((4, 1000), bool)
    div[:, ::20] = True
    tree = _tree(rng.normal(size=(4, 1000)), div)
    r = convergence_look(lambda t: t)(tree)
    assert r["verdict"] == "fail" and r["divergences"] == 200 and not r["extend"]


def test_first_draws_keeps_groups_and_attrs():
    tree = _tree(np.arange(12.0).reshape(2, 6))
    tree.attrs["x"] = 1
    out = first_draws(tree, 4)
    assert out["posterior"].sizes["draw"] == 4 and out["sample_stats"].sizes["draw"] == 4 and out.attrs == {"x": 1}
    np.testing.assert_array_equal(out["posterior"]["a"].values, [[0, 1, 2, 3], [6, 7, 8, 9]])


def test_fit_continues_short_chains_and_records_the_looks():
    """A fit of 4 x 50 draws cannot reach the ESS of 400 that the check asks for (Vehtari et al. 2021),
    so its chains continue to 100 (max_draws); both looks are in the fit's settings. With max_draws
    equal to draws the fit keeps 50 draws and records no looks."""
    ds = _data()
    tree = fit(ds, covariance="exponential", draws=50, tune=100, seed=4, max_draws=100)
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert smp["draws"] == 100 and smp["max_draws"] == 100 and tree["posterior"].sizes["draw"] == 100
    assert [lk["draws"] for lk in smp["looks"]] == [50, 100]
    assert smp["looks"][0]["extend"] and smp["looks"][0]["min_ess_bulk"] < 400
    once = fit(ds, covariance="exponential", draws=50, tune=100, seed=4, max_draws=50)
    smp1 = json.loads(once.attrs["settings"])["sampler"]
    assert smp1["draws"] == 50 and "looks" not in smp1
    np.testing.assert_array_equal(once["posterior"]["practical_range"].values,
                                  tree["posterior"]["practical_range"].values[:, :50])


def test_divergent_default_fit_is_sampled_again_at_0_9(monkeypatch):
    """A fit left at the default target acceptance whose kept draws hold divergent transitions is
    sampled once more at 0.9 with the same seed (bayesgeo.fitting.looks.rerun_if_divergent); the first run is
    recorded and the summary says so. With no divergences, or with a target acceptance the user chose,
    there is no rerun. (Divergences are forced here by a stand-in sampler so that the decision rule
    itself is tested; the effect of 0.9 on real fits is measured in bench/bench_convergence.py.)"""
    import xarray as xr

    import bayesgeo.fitting.posterior as posterior
    from bayesgeo.fitting.looks import rerun_if_divergent

    calls = []

    def fake_run(accept, divergent):
        calls.append(accept)
        div = np.zeros((2, 10), dtype=bool)
        div[0, :3] = divergent
        tree = xr.DataTree.from_dict({"/posterior": xr.Dataset({"x": (("chain", "draw"), np.zeros((2, 10)))}),
                                      "/sample_stats": xr.Dataset({"diverging": (("chain", "draw"), div)})})
        tree.attrs.update(target_accept=accept, seconds=1.5)
        return tree

    out = rerun_if_divergent(fake_run(0.8, True), lambda a: fake_run(a, False))
    assert calls == [0.8, 0.9] and out.attrs["target_accept"] == 0.9
    assert out.attrs["rerun"] == {"target_accept": 0.8, "divergences": 3, "draws": 10, "seconds": 1.5}
    assert out.attrs["seconds"] == 3.0
    calls.clear()
    assert "rerun" not in rerun_if_divergent(fake_run(0.8, False), lambda a: fake_run(a, False)).attrs
    assert "rerun" not in rerun_if_divergent(fake_run(0.9, True), lambda a: fake_run(a, False)).attrs
    assert calls == [0.8, 0.9]  # only the two first runs: no rerun asked

    # through fit: the stand-in sampler diverges at 0.8 only
    seen = []

    def fake_sample(model, *, target_accept, seed, **kw):
        seen.append((target_accept, seed))
        tree = fake_run(target_accept, target_accept < 0.9)
        tree.attrs.update(sampler="nutpie", seed=seed, chains=2, draws=10, tune=10, adaptation="low_rank",
                          sampling_seconds=1.0)
        post = tree["posterior"].to_dataset().drop_vars("x")
        for name in ("practical_range_z", "sd_z", "nugget_sd_z"):
            post[name] = (("chain", "draw"), np.full((2, 10), 0.5))
        tree["posterior"] = xr.DataTree(post)
        return tree

    import bayesgeo.fitting.sampling as sampling

    monkeypatch.setattr(sampling, "sample", fake_sample)
    monkeypatch.setattr(sampling, "compile_model", lambda model: model)
    ds = _data()
    tree = posterior.fit(ds, covariance="exponential", seed=5)
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert seen == [(0.8, 5), (0.9, 5)] and smp["target_accept"] == 0.9 and smp["rerun"]["divergences"] == 3
    assert "divergent transitions at target acceptance 0.8: sampled again at 0.9" in posterior.summary_text(
        posterior.fit_report(tree))
    seen.clear()
    posterior.fit(ds, covariance="exponential", seed=5, target_accept=0.8)
    assert seen == [(0.8, 5)]
