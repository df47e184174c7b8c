"""Tests of bayesgeo.fitting.priors: the PC priors, their defaults and the prior predictive semivariogram."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from bayesgeo.fitting.priors import (
    Priors,
    default_priors,
    pc_range_logpdf,
    pc_range_rate,
    pc_sd_logpdf,
    pc_sd_rate,
    plot_prior_semivariogram,
    prior_draws,
    prior_semivariogram,
    resolve_priors,
)
from bayesgeo.common.validate import InputError


@pytest.mark.parametrize("r0, a1", [(50.0, 0.05), (3.0, 0.5), (1200.0, 0.01)])
def test_pc_range_density_integrates_to_one_and_meets_its_tail(r0, a1):
    """PC prior of the range in d = 2 (Fuglstad, Simpson, Lindgren and Rue 2019, JASA 114; formula
    from memory, as in FACTS.md): pi(rho) = lambda rho^-2 exp(-lambda / rho), lambda = -ln(a1) r0,
    integrates to 1 and gives P(rho < r0) = a1. Integrals by scipy.integrate.quad."""
    dens = lambda r: math.exp(float(pc_range_logpdf(r, r0, a1)))  # noqa: E731
    lam = pc_range_rate(r0, a1)
    # in log(rho), where the heavy rho^-2 tail decays like exp(-log rho): mass beyond exp(40) lambda ~ 4e-18
    total = integrate.quad(lambda s: dens(math.exp(s)) * math.exp(s), math.log(lam) - 8, math.log(lam) + 40, limit=200)[0]
    assert total == pytest.approx(1.0, abs=1e-6)
    below = integrate.quad(dens, 0, r0, limit=200)[0]
    assert below == pytest.approx(a1, rel=1e-6)


def test_pc_range_density_is_inverse_gamma_one():
    """The same density is scipy.stats.invgamma(a=1, scale=lambda) (reference library)."""
    r = np.array([0.5, 3.0, 40.0, 700.0])
    ref = stats.invgamma(a=1.0, scale=pc_range_rate(50.0, 0.05)).logpdf(r)
    np.testing.assert_allclose(pc_range_logpdf(r, 50.0, 0.05), ref, rtol=1e-12)


@pytest.mark.parametrize("s0, a2", [(1.0, 0.05), (0.3, 0.01), (12.0, 0.5)])
def test_pc_sd_density_integrates_to_one_and_meets_its_tail(s0, a2):
    """PC prior of a standard deviation: Exponential(lambda), lambda = -ln(a2) / s0 (Simpson et al.
    2017, Statistical Science 32; Fuglstad et al. 2019), so P(sigma > s0) = a2; it equals
    scipy.stats.expon(scale=1/lambda) (reference library)."""
    dens = lambda s: math.exp(float(pc_sd_logpdf(s, s0, a2)))  # noqa: E731
    assert integrate.quad(dens, 0, np.inf)[0] == pytest.approx(1.0, abs=1e-8)
    assert integrate.quad(dens, s0, np.inf)[0] == pytest.approx(a2, rel=1e-7)
    s = np.array([0.0, 0.1, 2.0, 9.0])
    np.testing.assert_allclose(pc_sd_logpdf(s, s0, a2), stats.expon(scale=1 / pc_sd_rate(s0, a2)).logpdf(s))


def test_prior_draws_reproduce_tail_probabilities():
    """Draws from the priors give P(range < r0) ~ a1 and P(sigma > s0) ~ a2 (binomial tolerance,
    4 sd with 40,000 draws)."""
    pri = Priors(range=(100.0, 0.1), sd=(2.0, 0.2), nugget=(1.0, 0.05), beta_sd=2.5)
    d = prior_draws(pri, draws=40_000, seed=11)
    for share, p in ((np.mean(d["practical_range"] < 100.0), 0.1), (np.mean(d["sd"] > 2.0), 0.2),
                     (np.mean(d["nugget_sd"] > 1.0), 0.05)):
        assert abs(share - p) < 4 * math.sqrt(p * (1 - p) / 40_000)


def test_defaults_and_overrides():
    """Documented defaults: r0 = 5% of the extent, s0 = t0 = 2 x sd, tails 0.05, beta sd 2.5; user
    settings override one prior at a time (dict or Priors)."""
    d = default_priors(extent=800.0, value_sd=0.5)
    assert d.range == (40.0, 0.05) and d.sd == (1.0, 0.05) and d.nugget == (1.0, 0.05) and d.beta_sd == 2.5
    r = resolve_priors({"range": (120, 0.1)}, extent=800.0, value_sd=0.5)
    assert r.range == (120.0, 0.1) and r.sd == d.sd
    r = resolve_priors(Priors(sd=(3.0, 0.01), beta_sd=10.0), extent=800.0, value_sd=0.5)
    assert r.sd == (3.0, 0.01) and r.range == d.range and r.beta_sd == 10.0
    assert Priors.from_dict(r.to_dict()) == r


@pytest.mark.parametrize("priors, match", [
    ({"range": (-1.0, 0.05)}, r"priors\[.range.\]: R0"),
    ({"range": (10.0, 1.0)}, r"priors\[.range.\]: the probability"),
    ({"sd": (1.0, 0.0)}, r"priors\[.sd.\]: the probability"),
    ({"nugget": ("a", 0.1)}, r"priors\[.nugget.\]"),
    ({"ranges": (1, 0.1)}, "unknown key"),
])
def test_bad_priors_are_refused(priors, match):
    """Bad prior settings raise InputError naming the option (common practice: fail early)."""
    with pytest.raises(InputError, match=match):
        resolve_priors(priors, extent=100.0, value_sd=1.0)


def test_prior_semivariogram_band():
    """Prior predictive band: 0 at lag 0, ordered, non-decreasing for a monotone correlation, and far
    beyond every plausible range the band of gamma = sigma^2 (no nugget) has the quantiles of the
    square of an Exponential(lambda2) variable: (-ln(1 - p) / lambda2)^2 (scipy.stats.expon.ppf)."""
    pri = Priors(range=(10.0, 0.05), sd=(1.5, 0.05), nugget=(0.5, 0.05), beta_sd=2.5)
    lags = np.array([0.0, 5.0, 20.0, 80.0, 1e7])
    band = prior_semivariogram(pri, lags, covariance="exponential", nugget=False, draws=200_000, seed=3)
    assert np.all(band["low"].values[0] == 0.0)
    assert np.all(band["low"] <= band["median"]) and np.all(band["median"] <= band["high"])
    assert np.all(np.diff(band["median"].values) >= 0)
    ref = stats.expon(scale=1 / pc_sd_rate(1.5, 0.05)).ppf([0.05, 0.5, 0.95]) ** 2
    got = [band[k].values[-1] for k in ("low", "median", "high")]
    np.testing.assert_allclose(got, ref, rtol=0.05)  # Monte Carlo error of these quantiles is about 2%
    with_nugget = prior_semivariogram(pri, lags, covariance="exponential", nugget=True, draws=40_000, seed=3)
    assert np.all(with_nugget["median"].values[1:] > band["median"].values[1:])


def test_prior_figure(tmp_path):
    """The prior-check figure draws the band and an empirical semivariogram (smoke test of the plot)."""
    import xarray as xr

    pri = default_priors(extent=500.0, value_sd=1.0)
    band = prior_semivariogram(pri, np.linspace(0, 250, 26), covariance="matern32", draws=500)
    emp = xr.Dataset({"semivariance": ("bin", [0.3, 0.6, 0.9])}, coords={"lag": ("bin", [20.0, 60.0, 120.0])})
    fig = plot_prior_semivariogram(band, emp, distance_units="m", value_units="mg/kg")
    fig.savefig(tmp_path / "prior.png")
    assert (tmp_path / "prior.png").stat().st_size > 0
    assert len(fig.axes[0].lines) == 2
