"""Tests of bayesgeo.fitting.sampling: reproducibility with a seed, option checks, both samplers."""

from __future__ import annotations

import numpy as np
import pytest

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.fitting.model import build_model
from bayesgeo.fitting.sampling import compile_model, sample
from bayesgeo.common.validate import InputError


@pytest.fixture(scope="module")
def tiny_model():
    rng = np.random.default_rng(21)
    xy = 100 * rng.random((30, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=40.0, partial_sill=1.0, nugget=0.2, rng=rng)
    ds = points_dataset(xy[:, 0], xy[:, 1], z, attrs={"distance_units": "m", "coords": "xy"})
    return compile_model(build_model(ds, covariance="exponential")[0])


def test_same_seed_same_draws_other_seed_other_draws(tiny_model):
    """Same model, settings and seed give bit-identical draws; another seed gives other draws
    (the reproducibility rule of the project; FACTS.md records nutpie's integer-seed behaviour).
    The model is compiled once and sampled three times."""
    kw = dict(chains=2, draws=60, tune=60)
    a = sample(tiny_model, seed=7, **kw)
    b = sample(tiny_model, seed=7, **kw)
    c = sample(tiny_model, seed=8, **kw)
    for name in ("practical_range_z", "variance_coords_z", "sd_z", "nugget_sd_z"):
        np.testing.assert_array_equal(a["posterior"][name].values, b["posterior"][name].values)
    assert not np.array_equal(a["posterior"]["sd_z"].values, c["posterior"]["sd_z"].values)
    assert a.attrs["seed"] == 7 and a.attrs["sampler"] == "nutpie" and a.attrs["adaptation"] == "low_rank"
    assert a["posterior"].sizes["chain"] == 2 and a["posterior"].sizes["draw"] == 60


def test_missing_seed_is_drawn_and_recorded(tiny_model):
    """Without a seed a fresh one is drawn and recorded, so the run can be repeated exactly."""
    a = sample(tiny_model, chains=1, draws=30, tune=30)
    b = sample(tiny_model, chains=1, draws=30, tune=30, seed=a.attrs["seed"])
    np.testing.assert_array_equal(a["posterior"]["sd_z"].values, b["posterior"]["sd_z"].values)


@pytest.mark.parametrize("kw, match", [
    ({"sampler": "gibbs"}, "^sampler"),
    ({"target_accept": 1.0}, "--target-accept"),
    ({"chains": 0}, "--chains"),
    ({"draws": 2.5}, "--draws"),
    ({"seed": -3}, "--seed"),
])
def test_bad_options_are_refused(tiny_model, kw, match):
    """Bad sampler options raise InputError naming the option, before any sampling."""
    with pytest.raises(InputError, match=match):
        sample(tiny_model, **kw)


@pytest.mark.slow
def test_pymc_sampler_is_reproducible_too(tiny_model):
    """PyMC's own NUTS (sampler='pymc') also gives identical draws with the same seed."""
    kw = dict(sampler="pymc", chains=2, draws=50, tune=50, seed=3, cores=1)
    a, b = sample(tiny_model, **kw), sample(tiny_model, **kw)
    np.testing.assert_array_equal(a["posterior"]["sd_z"].values, b["posterior"]["sd_z"].values)
    assert a.attrs["sampler"] == "pymc"
