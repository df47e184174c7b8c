"""What a run will cost: comfortable input sizes and rough time estimates, said before starting.

``bayesgeo fit`` and ``bayesgeo explore`` call :func:`fit_plan` / :func:`explore_plan` once the data
are read. Above the comfortable sizes below (or when the estimate exceeds
:data:`NOTICE_SECONDS`) the plan carries a one-paragraph ``message`` saying what will happen: the
likelihood used (or the one that should be), the expected scale of the time, and the options that
shorten it. The command prints it on stderr (``bayesgeo fit: note: ...``) and puts the plan in its
JSON object (``"workload"``), never as extra lines on stdout.

The constants come from measurements on this project's 2-core machine (``bench/RESULTS.md``,
``docs/large_data.md``, the facts file of the project) and are rough on purpose: the estimate gives
a scale (minutes or hours), shown as a range from half to twice the central value, not a promise.

* Dense likelihood: one log-density + gradient takes about 42 ms at n = 1,000 and grows like n³
  (248 ms at 2,000 with nutpie; quiet machine).
* Nearest-neighbour likelihood (m = 20): about 12 ms per 1,000 points per gradient (the n = 20,000
  benchmark: 1,615 s of sampling for 4 x 1,000 iterations at about 3 leapfrog steps each on 1.75
  cores), growing like m² (m = 40 cost 3.8 times m = 20).
* NUTS with low-rank adaptation took about 4 leapfrog steps per iteration on these models; chains
  run in parallel on the machine's cores; compiling the model takes about half a minute.
* Exploration: the pair kernel visits every pair of a site once per statistic (semivariogram,
  correlogram, directional semivariograms: three passes), about 4 x 10^-8 s per pair on the loaded
  machine (n = 30,000: 19 s for a semivariogram without permutations, 5 December 2026), and then
  accumulates about 5 x 10^8 pair-columns per second: the semivariogram and the correlogram take
  (permutations + 1) columns per pair within the largest lag, the directional semivariograms four.
  With the default largest lag (half the largest distance) about 0.37 n² pairs fall within it
  (uniform layouts; n = 1,000 to 20,000 in the benchmark).
"""

from __future__ import annotations

import os
from collections.abc import Mapping

import numpy as np
from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE

__all__ = ["FIT_COMFORTABLE_POINTS", "EXPLORE_COMFORTABLE_POINTS", "NOTICE_SECONDS", "fit_plan", "explore_plan",
           "gradient_seconds", "dense_memory_bytes", "physical_memory_bytes", "format_duration", "format_bytes"]

#: Points per site up to which a default fit (dense likelihood, 4 chains x 2,000 iterations) takes
#: about ten minutes on two cores; beyond, fits take longer and above ``DENSE_LIMIT`` (2,000) the
#: nearest-neighbour likelihood is used.
FIT_COMFORTABLE_POINTS = 1_000
#: Points per site up to which exploration with the default 99 permutations takes about a minute.
EXPLORE_COMFORTABLE_POINTS = 20_000
#: Estimated run times above this (seconds) are announced even below the comfortable sizes.
NOTICE_SECONDS = 600.0

_DENSE_GRADIENT_1000 = 0.042   # s per log-density + gradient at n = 1,000 (dense, quiet machine)
_NN_GRADIENT_PER_1000 = 0.012  # s per 1,000 points per gradient (nn, m = 20)
_STEPS_PER_ITERATION = 4.0
_COMPILE_SECONDS = 30.0
_PAIR_COLUMNS_PER_SECOND = 5e8
_SECONDS_PER_PAIR_PASS = 4e-8  # every pair, once per statistic (three statistics)
_PAIR_SHARE = 0.37             # pairs within half the largest distance / n^2 (uniform layouts)


def gradient_seconds(n: int, approx: str, neighbours: int = 20) -> float:
    """Rough seconds per log-density + gradient of one site block of ``n`` points."""
    if approx == "nn":
        return _NN_GRADIENT_PER_1000 * n / 1000.0 * (max(neighbours, 1) / 20.0) ** 2
    return _DENSE_GRADIENT_1000 * (n / 1000.0) ** 3


def dense_memory_bytes(n: int, chains: int) -> float:
    """Rough memory of the dense likelihood of ``n`` points: the distance matrix, a copy, and one n x n
    work matrix per chain (chains run in threads), 8 bytes per entry."""
    return 8.0 * n * n * (2 + chains)


def physical_memory_bytes() -> float | None:
    """The machine's physical memory (None where the system does not say)."""
    try:
        return float(os.sysconf("SC_PAGE_SIZE")) * float(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):  # pragma: no cover - not POSIX
        return None


def format_bytes(size: float) -> str:
    """``"350 MB"``, ``"16 GB"``."""
    return f"{size / 1e6:.0f} MB" if size < 1e9 else f"{size / 1e9:.0f} GB"


def format_duration(seconds: float) -> str:
    """``"40 s"``, ``"12 min"``, ``"3.5 h"``."""
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


def fit_plan(sizes: Mapping[str, int], *, approx: str = "auto", neighbours: int | None = None, chains: int = CHAINS,
             draws: int = DRAWS, tune: int = TUNE, fits: int = 1, max_draws: int | None = None) -> dict:
    """What a fit of sites of ``sizes`` points will do and roughly how long it will take.

    Parameters
    ----------
    sizes : mapping of str to int
        Points per site (one entry for single-site data).
    approx, neighbours, chains, draws, tune
        The fit's options (``approx="auto"``: dense up to :data:`bayesgeo.gp.engines.DENSE_LIMIT` points
        per site, nearest-neighbour beyond).
    fits : int
        Model fits the command runs (2 for a pooled several-site fit: the pooled one and the
        independent one for the shrinkage table).
    max_draws : int, optional
        Longest chain when the chains continue while R-hat or ESS is too poor (default
        ``4 * draws``, :func:`bayesgeo.fitting.looks.longest_chain`; equal to ``draws``: never).

    Returns
    -------
    dict
        ``points`` (total), ``largest_site``, ``likelihood`` (per site: "dense" or "nn"),
        ``estimated_seconds`` ([low, high], a factor 2 either side of the central value),
        ``dense_memory_bytes`` (rough memory of the dense likelihood terms, :func:`dense_memory_bytes`),
        ``comfortable_points``, ``longest_seconds`` (the central estimate if every chain runs to
        ``max_draws``) and ``message`` (None when the run is within the comfortable size).
    """
    from bayesgeo.fitting.looks import longest_chain
    from bayesgeo.gp.engines import DENSE_LIMIT, resolve
    from bayesgeo.gp.nn import DEFAULT_NEIGHBOURS

    m = DEFAULT_NEIGHBOURS if neighbours is None else int(neighbours)
    lik = {s: resolve(approx, n) for s, n in sizes.items()}
    grad = sum(gradient_seconds(n, lik[s], min(m, max(n - 1, 1))) for s, n in sizes.items())
    longest = longest_chain(draws, max_draws)

    def seconds(kept: int) -> float:
        return fits * (chains * (kept + tune) * _STEPS_PER_ITERATION * grad / min(chains, _cores()) + _COMPILE_SECONDS)

    central = seconds(draws)
    total, largest = int(sum(sizes.values())), int(max(sizes.values()))
    memory = sum(dense_memory_bytes(n, chains) for s, n in sizes.items() if lik[s] == "dense")
    plan = {"points": total, "largest_site": largest, "likelihood": dict(lik),
            "estimated_seconds": [round(central / 2, 1), round(central * 2, 1)], "dense_memory_bytes": memory,
            "comfortable_points": FIT_COMFORTABLE_POINTS, "longest_seconds": round(seconds(longest), 1),
            "message": None}
    notes = []
    dense_big = [s for s, n in sizes.items() if lik[s] == "dense" and n > DENSE_LIMIT]
    nn_sites = [s for s in sizes if lik[s] == "nn"]
    where = "" if list(sizes) == [""] else " per site"
    if dense_big:
        notes.append(f"the exact dense likelihood on {largest:,} points{where} (above {DENSE_LIMIT:,}) costs about "
                     f"{format_duration(gradient_seconds(largest, 'dense'))} per gradient and n² memory; "
                     "--approx nn (or auto) is made for this size (docs/large_data.md)")
    if nn_sites and approx == "auto":
        notes.append(f"{'site(s) ' + ', '.join(nn_sites) + ' have' if where else 'the data have'} more than "
                     f"{DENSE_LIMIT:,} points, so the nearest-neighbour (Vecchia) likelihood with m = {m} is used "
                     "(an approximation, checked after the fit: docs/large_data.md)")
    elif nn_sites:
        notes.append(f"the nearest-neighbour (Vecchia) likelihood with m = {m} is used (checked after the fit)")
    if largest > FIT_COMFORTABLE_POINTS or central > NOTICE_SECONDS or dense_big:
        lo, hi = plan["estimated_seconds"]
        shorter = "fewer --draws/--tune" + (" or --chains" if chains > _cores() else "")
        runs = f"{fits} fits (pooled and independent) of " if fits > 1 else ""
        msg = (f"{total:,} points{f' at {len(sizes)} sites' if where else ''}: expect roughly {format_duration(lo)} "
               f"to {format_duration(hi)} on {_cores()} core(s) for {runs}{chains} chains x {draws + tune:,} "
               "iterations" + (f", about {format_duration(plan['longest_seconds'])} if the chains must continue to "
                               f"{longest:,} draws (R-hat or ESS too poor; --max-draws)" if longest > draws else ""))
        plan["message"] = "; ".join([msg, *notes]) + f"; {shorter} shorten it, at the cost of precision"
    elif notes:
        plan["message"] = "; ".join(notes)
    return plan


def _pair_share(xy: np.ndarray, lag_limit: float | None, metric: str, rng: np.random.Generator) -> float:
    """Share of the n² / 2 pairs within ``lag_limit`` (default: half the largest distance), from a subsample."""
    from bayesgeo.common.geometry import distance_matrix

    if lag_limit is None:
        return _PAIR_SHARE * 2.0
    k = min(len(xy), 1500)
    sub = xy[rng.choice(len(xy), size=k, replace=False)] if k < len(xy) else xy
    d = distance_matrix(sub, metric)
    iu = np.triu_indices(k, 1)
    return float(np.mean(d[iu] <= lag_limit)) if iu[0].size else 0.0


def explore_plan(ds, *, permutations: int = 99, lag_limit: float | None = None, families: int = 4) -> dict:
    """What exploring ``ds`` will cost, per site and in total.

    Returns
    -------
    dict
        ``points``, ``largest_site``, ``pairs`` (estimated pairs within the largest lag, all sites),
        ``estimated_seconds`` ([low, high]), ``comfortable_points`` and ``message`` (None when within
        the comfortable size and estimated under :data:`NOTICE_SECONDS`).
    """
    from bayesgeo.data.points import sites_of
    from bayesgeo.common.geometry import metric_of
    from bayesgeo.explore.quickfit_nn import NN_ML_POINTS, QUICK_NEIGHBOURS

    rng = np.random.default_rng(0)
    metric = metric_of(ds)
    labels = sites_of(ds)
    xy_all = np.column_stack([ds["x"].values, ds["y"].values])
    pairs, visited, sizes = 0.0, 0.0, {}
    for label in labels:
        xy = xy_all if label == "" else xy_all[ds["site"].values == label]
        n = len(xy)
        sizes[label] = n
        visited += n * (n - 1) / 2.0
        pairs += _pair_share(xy, lag_limit, metric, rng) * n * (n - 1) / 2.0
    columns = pairs * (2 * (permutations + 1) + 4)
    central = 3 * visited * _SECONDS_PER_PAIR_PASS + columns / _PAIR_COLUMNS_PER_SECOND
    total, largest = int(sum(sizes.values())), int(max(sizes.values()))
    plan = {"points": total, "largest_site": largest, "pairs": int(pairs),
            "estimated_seconds": [round(central / 2, 1), round(central * 2, 1)],
            "comfortable_points": EXPLORE_COMFORTABLE_POINTS, "message": None}
    notes = []
    if largest > EXPLORE_COMFORTABLE_POINTS or central > NOTICE_SECONDS:
        lo, hi = plan["estimated_seconds"]
        notes.append(f"{total:,} points, about {pairs:.2g} pairs within the largest lag: expect roughly "
                     f"{format_duration(lo)} to {format_duration(hi)}; time grows with the square of the points")
        tips = []
        share = columns / _PAIR_COLUMNS_PER_SECOND / central if central > 0 else 0.0
        if permutations > 0 and share > 0.25:
            tips.append(f"--permutations 0 (no envelopes or p-values; saves about {100 * share:.0f}% of the time)")
        tips.append("--only-site, or a subset of the rows (every pair is visited: half the points, a quarter "
                    "of the time)")
        notes.append("to shorten it: " + ", ".join(tips))
    if largest > NN_ML_POINTS and families and notes:
        notes.append(f"the maximum-likelihood quick fits use the nearest-neighbour likelihood (m = {QUICK_NEIGHBOURS}) "
                     f"above {NN_ML_POINTS:,} points per site")
    if notes:
        plan["message"] = "; ".join(notes)
    return plan
