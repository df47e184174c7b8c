"""Left-censored configurations of simulation-based calibration (SBC).

A censored configuration checks the data augmentation of non-detects
(:func:`bayesgeo.fitting.model.censored_latent`) the way SBC checks everything else: draw the truth
from the prior, simulate values, report every value below a fixed reporting limit L as "below L" and
fit. The limit is fixed before any replicate is drawn (the median over pilot data sets, simulated from
the same prior predictive with a seed stream of their own, of each set's ``share`` quantile), so the
censoring is the ordinary mechanism "reported as below L when y < L" and the censored likelihood the
model uses is exact for it; the ranks stay uniform when the model and sampler are right (Talts et al.
2018). Which values fall below L differs between replicates, so each replicate's model is built (and
compiled) anew, with the template's standardisation constants and resolved priors held fixed
(:func:`bayesgeo.fitting.model.model_inputs`'s private ``_standardise``) so that the prior is the same
in every replicate.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import xarray as xr

__all__ = ["censoring_limit", "censor", "censored_template"]

#: Pilot data sets pooled for the reporting limit.
PILOT = 200


def censoring_limit(simulate: Callable[[int], np.ndarray], share: float, pilot: int = PILOT) -> float:
    """The standardised reporting limit below which a typical data set of the prior predictive has ``share`` of
    its values: the median over pilot data sets of each set's ``share`` quantile (a quantile of the values
    pooled over the sets would censor few values of most sets, the pooled spread being that of the widest).

    Parameters
    ----------
    simulate : callable
        ``simulate(i)`` returns the standardised values of pilot data set ``i`` (truth from the prior,
        noise from a seed stream not used by the replicates).
    share : float
        Target share of non-detects, in (0, 1).
    pilot : int
        Number of pilot data sets pooled.

    Returns
    -------
    float
        The limit, in standardised units.
    """
    if not 0.0 < share < 1.0:
        raise ValueError(f"share must be in (0, 1), got {share!r}")
    return float(np.median([np.quantile(np.asarray(simulate(i), dtype=float), share) for i in range(pilot)]))


def censor(y: np.ndarray, limit: float) -> tuple[np.ndarray, np.ndarray]:
    """Report the values below ``limit`` as non-detects: (values with the limit in their place, mask)."""
    y = np.asarray(y, dtype=float)
    mask = y < limit
    return np.where(mask, limit, y), mask


def censored_template(template: xr.Dataset, y: np.ndarray, mask: np.ndarray, value_mean: float,
                      value_sd: float) -> xr.Dataset:
    """The template's layout holding one replicate's values (data units ``mean + sd * y``) and its non-detects.

    The model built from it with ``_standardise=(value_mean, value_sd)`` sees exactly ``y`` as its
    standardised values and the non-detects in ``mask`` at their limit.
    """
    out = template.copy()
    out["value"] = ("obs", value_mean + value_sd * np.asarray(y, dtype=float), dict(template["value"].attrs))
    out["censored"] = ("obs", np.asarray(mask, dtype=bool), {"long_name": "reported below the reporting limit"})
    return out
