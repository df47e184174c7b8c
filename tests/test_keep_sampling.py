"""Tests of bayesgeo.fitting.keep_sampling: refitting with longer chains until the check passes."""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.fitting.keep_sampling import fit_until_converged
from bayesgeo.fitting.posterior import fit_report
from bayesgeo.common.validate import InputError


def _data(n=30, seed=3):
    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * 100.0
    z = simulate_field(xy, covariance="matern32", practical_range=40.0, partial_sill=1.0, nugget=0.2, mean=1.0, rng=rng)
    return points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": "sim", "distance_units": "m"})


def test_attempts_double_and_stop_at_the_attempt_limit():
    """With a threshold no sample can meet (R-hat < 0.5; R-hat >= 1 by construction, Vehtari et al.
    2021), every attempt fails: tuning and draws double from one attempt to the next, the seeds
    differ and derive from the user's seed (same seed, same attempts), and the run stops at
    max_attempts, all recorded in the fit's settings and in fit.json's report."""
    kw = dict(budget_minutes=30.0, seed=7, chains=2, draws=50, tune=50, max_attempts=2, covariance="matern32",
              thresholds={"rhat": 0.5}, max_draws=50)  # no continued chains: each attempt keeps its draws
    tree, conv = fit_until_converged(_data(), **kw)
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert conv.verdict == "fail" and smp["stopped"] == "attempts"
    att = smp["attempts"]
    assert [(a["tune"], a["draws"]) for a in att] == [(50, 50), (100, 100)]
    assert att[0]["seed"] == 7 and att[1]["seed"] != 7
    assert tree["posterior"].sizes["draw"] == 100  # the last attempt is the result
    assert fit_report(tree)["sampler"]["attempts"] == att
    again, _ = fit_until_converged(_data(), **kw)
    assert [a["seed"] for a in json.loads(again.attrs["settings"])["sampler"]["attempts"]] == [a["seed"] for a in att]


def test_continued_chains_scale_with_the_attempt():
    """max_draws is the first attempt's longest chain; later attempts scale it with their draws, and the
    draws recorded per attempt are those kept (after the chains were continued)."""
    tree, _ = fit_until_converged(_data(), budget_minutes=30.0, seed=7, chains=2, draws=50, tune=50,
                                  max_attempts=2, covariance="matern32", thresholds={"rhat": 0.5}, max_draws=100)
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert smp["max_draws"] == 200  # 2 x 100 in the second attempt
    # 2 x 50 draws cannot give ESS >= 400 (Vehtari et al. 2021): both attempts continue to their longest chain
    assert [(a["tune"], a["draws"]) for a in smp["attempts"]] == [(50, 100), (100, 200)]


def test_budget_stops_before_an_attempt_that_would_not_fit():
    """A budget shorter than twice the first attempt stops after it ('budget'), whatever the verdict."""
    tree, conv = fit_until_converged(_data(), budget_minutes=1e-3, seed=1, chains=2, draws=50, tune=50,
                                     covariance="matern32", thresholds={"rhat": 0.5})
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert smp["stopped"] == "budget" and len(smp["attempts"]) == 1


def test_a_converged_first_attempt_is_kept():
    """When the first attempt passes the (default) check nothing more is run."""
    tree, conv = fit_until_converged(_data(n=25), budget_minutes=10.0, seed=2, chains=2, draws=300, tune=300,
                                     covariance="matern32", thresholds={"rhat": 10.0, "ess_fail": 0.0, "ess": 0.0,
                                                                         "divergence_fail_share": 1.0})
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert conv.verdict != "fail" and smp["stopped"] == "converged" and len(smp["attempts"]) == 1


@pytest.mark.parametrize("minutes", [0, -1, "soon"])
def test_bad_budget_is_refused(minutes):
    """A budget that is not a positive number is refused naming the option."""
    with pytest.raises(InputError, match="^keep_sampling"):
        fit_until_converged(_data(n=10), budget_minutes=minutes)
