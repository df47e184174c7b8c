"""Numerical constants and sampler defaults, defined once for every module that uses them."""

from __future__ import annotations

import math

__all__ = ["JITTER", "LOG_2PI", "EARTH_RADIUS_KM", "CHAINS", "DRAWS", "TUNE"]

#: Relative jitter on the diagonal of every data covariance matrix (times the partial sill), the same
#: in the likelihoods, kriging and simulation so that they describe one model.
JITTER = 1e-6
#: log(2 pi), the constant of every Gaussian log density.
LOG_2PI = math.log(2.0 * math.pi)
#: Mean Earth radius in km (IUGG value, Moritz 2000, Geodetic Reference System 1980).
EARTH_RADIUS_KM = 6371.0088

#: Chains, kept draws per chain and tuning iterations per chain of a fit when the user gives none.
CHAINS = 4
DRAWS = 1000
TUNE = 1000
