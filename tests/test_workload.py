"""Tests of the workload plans (bayesgeo.fitting.workload): estimates against measured runs, messages."""

from __future__ import annotations

import numpy as np
import pytest

import bayesgeo.fitting.workload as wl
from bayesgeo.data.points import points_dataset


@pytest.fixture(autouse=True)
def two_cores(monkeypatch):
    """The measurements below were made on the project's 2-core machine."""
    monkeypatch.setattr(wl, "_cores", lambda: 2)


def test_fit_estimates_bracket_measured_runs():
    """The estimated range contains the wall times measured in bench/RESULTS.md: the n = 20,000 nn fit
    (4 chains x (500 + 500), fit command 1,651 s, "Full fit at n = 20,000", 2026-12-02) and the n = 1,000
    dense fit (4 chains x (500 + 1,000), 682 s, m-sweep comparison)."""
    lo, hi = wl.fit_plan({"": 20_000}, chains=4, draws=500, tune=500)["estimated_seconds"]
    assert lo <= 1651 <= hi
    lo, hi = wl.fit_plan({"": 1_000}, approx="dense", chains=4, draws=1000, tune=500)["estimated_seconds"]
    assert lo <= 682 <= hi


def test_fit_messages():
    """Small fits say nothing; above the comfortable size the time is announced; above 2,000 points the
    nn likelihood is named (bayesgeo.gp.engines.DENSE_LIMIT); a forced dense fit there is told nn is made for it."""
    assert wl.fit_plan({"": 300})["message"] is None
    assert wl.fit_plan({"": 300})["likelihood"] == {"": "dense"}
    big = wl.fit_plan({"": 50_000})
    assert big["likelihood"] == {"": "nn"} and "m = 20 is used" in big["message"]
    assert big["message"].startswith("50,000 points: expect roughly ")
    forced = wl.fit_plan({"": 5_000}, approx="dense")["message"]
    assert "--approx nn (or auto) is made for this size" in forced
    sites = wl.fit_plan({"a": 900, "b": 2_500}, fits=2)
    assert sites["likelihood"] == {"a": "dense", "b": "nn"} and "2 fits (pooled and independent)" in sites["message"]


def test_fit_plan_names_the_longest_run_when_chains_continue():
    """The chains may continue to max_draws (default 4 x draws, bayesgeo.fitting.looks): the plan gives the time
    of that longest run, which grows with the draws as the estimate itself does (same formula), and the
    message names --max-draws; with max_draws equal to draws it says nothing of it."""
    base = wl.fit_plan({"": 50_000}, chains=4, draws=1000, tune=1000)
    off = wl.fit_plan({"": 50_000}, chains=4, draws=1000, tune=1000, max_draws=1000)
    central = sum(base["estimated_seconds"]) / 2.5  # lo = c / 2, hi = 2 c
    assert base["longest_seconds"] > central and off["longest_seconds"] == pytest.approx(central, rel=0.01)
    five = wl.fit_plan({"": 50_000}, chains=4, draws=1000, tune=1000, max_draws=5000)["longest_seconds"]
    assert (five - central) == pytest.approx(4000 / 3000 * (base["longest_seconds"] - central), rel=0.01)
    assert "continue to 4,000 draws" in base["message"] and "--max-draws" in base["message"]
    assert "continue to" not in off["message"]


def test_explore_pair_count_matches_the_benchmark():
    """With the default largest lag the plan's pair count for 20,000 uniform points is within 3% of
    the 149,666,921 pairs counted by the kernel in bench/RESULTS.md ("Exploratory pair statistics",
    uniform random points, half the largest distance)."""
    rng = np.random.default_rng(3)
    xy = rng.random((20_000, 2)) * 1000.0
    ds = points_dataset(xy[:, 0], xy[:, 1], np.zeros(20_000))
    plan = wl.explore_plan(ds, permutations=199)
    assert plan["pairs"] == pytest.approx(149_666_921, rel=0.03)
    assert plan["points"] == plan["comfortable_points"] == 20_000
    assert plan["message"] is None  # at the limit: nothing to announce (the ML fits use the nn likelihood)
    over = wl.explore_plan(points_dataset(*(rng.random((25_000, 2)) * 1000.0).T, np.zeros(25_000)), permutations=199)
    assert "--permutations 0 (no envelopes or p-values; saves about" in over["message"]
    assert "nearest-neighbour likelihood (m = 15) above 1,000 points" in over["message"]


def test_explore_lag_limit_and_small_data():
    """A largest lag covering a quarter of a unit square's side keeps about pi/16 - ... of the pairs
    (for points uniform on the unit square, P(d < r) = pi r^2 - 8 r^3 / 3 + r^4 / 2, Ghosh 1951 /
    common geometric-probability result), and small data are not announced."""
    rng = np.random.default_rng(4)
    xy = rng.random((4_000, 2))
    ds = points_dataset(xy[:, 0], xy[:, 1], np.zeros(4_000))
    r = 0.25
    share = np.pi * r**2 - 8 * r**3 / 3 + r**4 / 2
    plan = wl.explore_plan(ds, permutations=0, lag_limit=r)
    assert plan["pairs"] / (4_000 * 3_999 / 2) == pytest.approx(share, rel=0.05)
    small = points_dataset(xy[:500, 0], xy[:500, 1], np.zeros(500))
    assert wl.explore_plan(small)["message"] is None


def test_format_duration():
    """Durations read as seconds below 90 s, minutes below 90 min, hours above (our own display rule)."""
    assert wl.format_duration(40) == "40 s" and wl.format_duration(720) == "12 min"
    assert wl.format_duration(3 * 3600) == "3.0 h"
