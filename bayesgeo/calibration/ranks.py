"""Rank statistics of simulation-based calibration: ranks of the truth, their uniformity and interval coverage.

Talts, Betancourt, Simpson, Vehtari and Gelman (2018). Validating Bayesian inference algorithms with
simulation-based calibration. arXiv:1804.06788.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

__all__ = ["binomial_bounds", "rank_uniformity", "rank_of", "sbc_summary"]


def binomial_bounds(n: int, p: float, *, level: float = 0.001) -> tuple[int, int]:
    """Central ``1 - level`` interval of Binomial(n, p): counts outside it have two-sided tail
    probability below ``level`` (scipy.stats.binom quantiles)."""
    from scipy.stats import binom

    return int(binom.ppf(level / 2, n, p)), int(binom.isf(level / 2, n, p))


def rank_uniformity(ranks, ranks_of: int, *, bins: int | None = None) -> dict:
    """Chi-square test of uniform ranks on 0..L in ``bins`` equal bins (Talts et al. 2018, sec. 4).

    ``bins`` defaults to the largest divisor of L + 1 not above max(2, N / 5) (about five
    expected counts per bin, the usual rule for the chi-square approximation, common practice).
    Returns counts, the per-bin band (binomial 0.5%-99.5% quantiles of each bin's count) and
    ``statistic``/``pvalue`` of ``scipy.stats.chisquare``.
    """
    from scipy.stats import binom, chisquare

    ranks = np.asarray(ranks, dtype=int)
    ranks = ranks[ranks >= 0]
    n, span = len(ranks), ranks_of + 1
    if bins is None:
        target = max(2, n // 5)
        bins = max(b for b in range(1, span + 1) if span % b == 0 and b <= target)
    counts = np.bincount(ranks * bins // span, minlength=bins)
    res = chisquare(counts) if n and bins > 1 else None
    return {"bins": int(bins), "counts": counts.tolist(), "n": int(n),
            "band": [int(binom.ppf(0.005, n, 1 / bins)), int(binom.ppf(0.995, n, 1 / bins))],
            "statistic": None if res is None else float(res.statistic),
            "pvalue": None if res is None else float(res.pvalue)}


def rank_of(truth: float, draws, ranks_of: int) -> int:
    """Rank of ``truth`` among ``ranks_of`` (L) draws thinned evenly from ``draws`` (chain, draw).

    The rank is the number of thinned draws below the truth, 0..L (Talts et al. 2018, Algorithm 1);
    thinning spaces the kept draws evenly within each chain to weaken autocorrelation, which
    would otherwise bend the histogram.
    """
    arr = np.atleast_2d(np.asarray(draws, dtype=float))
    if arr.size < ranks_of:
        raise ValueError(f"need at least L = {ranks_of} draws, got {arr.size}")
    return int(np.sum(_thin(arr, ranks_of) < truth))


def _thin(arr: np.ndarray, count: int) -> np.ndarray:
    """``count`` draws evenly spaced within each chain (chains share them as equally as possible)."""
    chains, draws = arr.shape
    per = [count // chains + (1 if c < count % chains else 0) for c in range(chains)]
    return np.concatenate([arr[c, np.linspace(0, draws - 1, k).round().astype(int)] for c, k in enumerate(per)])


def sbc_summary(result: xr.Dataset, *, level: float = 0.001) -> dict:
    """Rank uniformity and interval coverage of an SBC result, with binomial bounds.

    Coverage of the central ``a`` interval over N replicates is Binomial(N, a) for a calibrated
    model; a count outside the central ``1 - level`` interval of that binomial (default 0.1%,
    two-sided) fails. Returns a JSON-able dictionary with per-quantity ``uniformity`` (from
    :func:`rank_uniformity`), ``coverage`` ``{level: {count, bounds, ok}}``, the same among
    converged fits, the failed replicates, how often each convergence check failed
    (``failed_checks``, when the result records it) and an overall ``ok``.
    """
    n = result.sizes["replicate"]
    verdict = result["verdict"].values
    good = verdict != "fail"
    out = {"model": result.attrs.get("model"), "replicates": int(n), "ranks_of": int(result.attrs["ranks_of"]),
           "failed_fits": [int(i) for i in np.flatnonzero(~good)],
           "failed_policy": "failed fits are kept in ranks and coverage and flagged; 'coverage_converged' "
                            "leaves them out", "level": level, "quantities": {}}
    if "failed_checks" in result:  # how often each check failed, over the unconverged fits
        counts: dict[str, int] = {}
        for text in result["failed_checks"].values:
            for item in filter(None, str(text).split(",")):
                counts[item] = counts.get(item, 0) + 1
        out["failed_checks"] = dict(sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])))
    if "draws" in result:  # chains continued while R-hat or ESS failed (bayesgeo.fitting.looks)
        kept = np.asarray(result["draws"].values, dtype=int)
        out["draws_kept"] = {str(k): int(v) for k, v in zip(*np.unique(kept, return_counts=True))}
    ok_all = True
    for q in result["quantity"].values:
        ranks = result["rank"].sel(quantity=q).values
        entry = {"uniformity": rank_uniformity(ranks, out["ranks_of"]), "coverage": {}, "coverage_converged": {}}
        for k, a in enumerate(result["level"].values):
            hits = result["covered"].sel(quantity=q).values[:, k]
            lo, hi = binomial_bounds(n, float(a), level=level)
            ok = lo <= int(hits.sum()) <= hi
            ok_all &= ok
            entry["coverage"][f"{a:g}"] = {"count": int(hits.sum()), "of": int(n), "bounds": [lo, hi], "ok": bool(ok)}
            m = int(good.sum())
            if m:
                lo2, hi2 = binomial_bounds(m, float(a), level=level)
                c2 = int(hits[good].sum())
                entry["coverage_converged"][f"{a:g}"] = {"count": c2, "of": m, "bounds": [lo2, hi2],
                                                         "ok": bool(lo2 <= c2 <= hi2)}
        p = entry["uniformity"]["pvalue"]
        entry["uniform_ok"] = bool(p is None or p >= level)
        ok_all &= entry["uniform_ok"]
        out["quantities"][str(q)] = entry
    out["ok"] = bool(ok_all)
    return out
