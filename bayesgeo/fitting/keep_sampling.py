"""Keep sampling a single-site fit until its convergence check passes or a time budget runs out.

When a fit fails :func:`bayesgeo.convergence.diagnostics.check_convergence`, the remedy the check advises
first is more tuning and more draws. :func:`fit_until_converged` does that for the user: it fits
again with fresh chains (a seed derived from the user's seed, so the run can be repeated) and
twice the tuning and draws of the attempt before, until the verdict is no longer ``fail``, the
time budget would be exceeded by the next attempt (estimated as twice the last one), or
``max_attempts`` attempts were made. Every attempt (seed, tuning, draws, verdict, largest R-hat,
smallest ESS, divergences, seconds) is recorded in the fit's ``settings`` (``sampler.attempts``)
and shown by ``fit.json``. The result is the last attempt; earlier attempts are not pooled
(they ran with other tuning lengths).

Command line: ``bayesgeo fit ... --keep-sampling MINUTES``.
"""

from __future__ import annotations

import json
import time

import numpy as np
import xarray as xr

from bayesgeo.convergence.diagnostics import Convergence, check_convergence
from bayesgeo.fitting.looks import longest_chain
from bayesgeo.fitting.posterior import fit
from bayesgeo.fitting.sampling import new_seed
from bayesgeo.common.validate import InputError
from bayesgeo.common.defaults import DRAWS, TUNE

__all__ = ["fit_until_converged"]


def _attempt_seed(seed: int, attempt: int) -> int:
    """The user's seed for the first attempt, then seeds derived from it (reproducible)."""
    if attempt == 0:
        return int(seed)
    return int(np.random.SeedSequence([int(seed), attempt]).generate_state(1)[0] % (2**31 - 1))


def fit_until_converged(ds: xr.Dataset, *, budget_minutes: float, seed: int | None = None, draws: int = DRAWS,
                        tune: int = TUNE, max_attempts: int = 5, thresholds=None,
                        **fit_kwargs) -> tuple[xr.DataTree, Convergence]:
    """Fit, check, and fit again with fresh chains and doubled tuning and draws while the check fails.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data of one site.
    budget_minutes : float
        Wall-clock minutes for all attempts together (positive). A further attempt starts only if
        the time spent plus twice the last attempt's time fits in the budget.
    seed : int, optional
        Seed of the first attempt (a fresh one when omitted); later attempts derive theirs from it.
    draws, tune : int
        Draws and tuning iterations per chain of the first attempt.
    max_attempts : int
        Upper limit on the number of attempts.
    thresholds
        Passed to :func:`bayesgeo.convergence.diagnostics.check_convergence`.
    **fit_kwargs
        Every other setting of :func:`bayesgeo.fitting.posterior.fit`.

    Returns
    -------
    tree : xarray.DataTree
        The last attempt's fit; ``settings["sampler"]`` holds ``attempts`` (list of dicts) and
        ``stopped`` (``"converged"``, ``"budget"`` or ``"attempts"``).
    conv : Convergence
        The last attempt's check.
    """
    try:
        budget = float(budget_minutes) * 60.0
    except (TypeError, ValueError):
        budget = float("nan")
    if not (np.isfinite(budget) and budget > 0):
        raise InputError(f"keep_sampling: expected a positive number of minutes, got {budget_minutes!r}")
    seed = new_seed() if seed is None else int(seed)
    longest = longest_chain(draws, fit_kwargs.pop("max_draws", None))
    start = time.perf_counter()
    attempts: list[dict] = []
    k = 0
    while True:
        t0 = time.perf_counter()
        factor = 2**k
        tree = fit(ds, seed=_attempt_seed(seed, k), draws=draws * factor, tune=tune * factor,
                   max_draws=longest * factor, **fit_kwargs)
        conv = check_convergence(tree, thresholds=thresholds)
        table = conv.parameters
        seconds = time.perf_counter() - t0
        attempts.append({"attempt": k + 1, "seed": _attempt_seed(seed, k), "tune": tune * factor,
                         "draws": int(tree["posterior"].sizes["draw"]), "verdict": conv.verdict,
                         "rhat_max": float(np.nanmax(table["rhat"].values)),
                         "ess_bulk_min": float(np.nanmin(table["ess_bulk"].values)),
                         "divergences": int(conv.divergences), "seconds": seconds})
        elapsed = time.perf_counter() - start
        if conv.verdict != "fail":
            stopped = "converged"
            break
        if k + 1 >= max_attempts:
            stopped = "attempts"
            break
        if elapsed + 2.0 * seconds > budget:
            stopped = "budget"
            break
        k += 1
    settings = json.loads(tree.attrs["settings"])
    settings["sampler"].update(attempts=attempts, stopped=stopped, budget_minutes=float(budget_minutes))
    tree.attrs["settings"] = json.dumps(settings)
    return tree, conv
