"""Benchmark: empirical semivariogram with 199 permutations at n = 1,000, 5,000 and 20,000 points.

Side by side in one run: the bayesgeo pair kernel (one pass over the pairs i < j, all 200 value
columns per pair, no n x n matrix) against a NumPy/SciPy baseline at n = 1,000 (scipy pdist of
the locations, then pdist of each value column and np.bincount per column). Both give the same
numbers (checked here). Prints a table and appends it, with date and machine, to bench/RESULTS.md
under "Exploratory pair statistics". CPU heavy (about a minute and a half on 2 vCPUs): run it
alone, with `make bench` or `python bench/bench_explore.py`.
"""

from __future__ import annotations

import datetime as dt
import os
import platform
import sys
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numba  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from scipy.spatial.distance import pdist  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bayesgeo.data.points import points_dataset  # noqa: E402
from bayesgeo.explore.variogram import FewPairsWarning, lag_bins, semivariogram  # noqa: E402

PERMUTATIONS = 199
BINS = 15
SIZES = (1_000, 5_000, 20_000)
SEED = 1


def _data(n: int) -> xr.Dataset:
    rng = np.random.default_rng(n)
    side = 1000.0
    return points_dataset(side * rng.random(n), side * rng.random(n), rng.lognormal(2.0, 0.7, n),
                          attrs={"coords": "xy", "distance_units": "m"})


def _ours(ds):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FewPairsWarning)
        t0 = time.perf_counter()
        sv = semivariogram(ds, bins=BINS, permutations=PERMUTATIONS, seed=SEED)
        return time.perf_counter() - t0, sv


def _baseline(ds, edges):
    """pdist of locations, then per value column pdist + bincount (the same permutations)."""
    t0 = time.perf_counter()
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    z = ds["value"].values - ds["value"].values.mean()
    d = pdist(xy)
    keep = d <= edges[-1] * (1 + 1e-12)
    k = np.minimum((d[keep] / (edges[1] - edges[0])).astype(int), BINS - 1)
    n_pairs = np.bincount(k, minlength=BINS)
    rng = np.random.default_rng(SEED)
    cols = [z] + [z[rng.permutation(z.size)] for _ in range(PERMUTATIONS)]
    gam = np.empty((BINS, len(cols)))
    for c, v in enumerate(cols):
        dz2 = pdist(v[:, None], "sqeuclidean")[keep]
        gam[:, c] = np.bincount(k, weights=dz2, minlength=BINS) / (2.0 * n_pairs)
    low = np.quantile(gam[:, 1:], 0.025, axis=1)
    return time.perf_counter() - t0, gam[:, 0], low


def _machine() -> str:
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return (f"{platform.system()} {platform.machine()}, {os.cpu_count()} CPUs ({cpu}), Python "
            f"{platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}, "
            f"{numba.get_num_threads()} kernel threads")


def main() -> None:
    _ours(_data(200))  # compile (or load the cached kernel) before timing
    load_start = os.getloadavg()[0]
    rows = []
    base_time = None
    for n in SIZES:
        ds = _data(n)
        seconds, sv = _ours(ds)
        pairs = int(sv["pairs"].sum())
        row = {"n": n, "pairs": pairs, "ours": seconds, "baseline": None}
        if n == 1_000:
            base_time, gam, low = _baseline(ds, lag_bins(ds, bins=BINS))
            np.testing.assert_allclose(sv["semivariance"].values, gam, rtol=1e-9)
            np.testing.assert_allclose(sv["envelope_low"].values, low, rtol=1e-9)
            row["baseline"] = base_time
        rows.append(row)
        print(f"n = {n:>6,}: {seconds:8.2f} s", flush=True)

    load_end = os.getloadavg()[0]
    today = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    lines = [
        "",
        "## Exploratory pair statistics",
        "",
        f"{today}; {_machine()}; 1-minute load average {load_start:.1f} at the start, {load_end:.1f} at the end "
        "(above the CPU count means other jobs shared the machine and the times are inflated).",
        f"Classical semivariogram, {BINS} bins to half the largest distance, {PERMUTATIONS} permutations "
        "(200 value columns per pair), uniform random points; kernel compile excluded. Baseline: scipy "
        "pdist + np.bincount per column (same numbers, checked).",
        "",
        "| n | pairs within max lag | bayesgeo kernel (s) | pair-columns per second | pdist baseline (s) | baseline / kernel |",
        "| ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        rate = r["pairs"] * (PERMUTATIONS + 1) / r["ours"]
        base = "" if r["baseline"] is None else f"{r['baseline']:.2f}"
        ratio = "" if r["baseline"] is None else f"{r['baseline'] / r['ours']:.1f}x"
        lines.append(f"| {r['n']:,} | {r['pairs']:,} | {r['ours']:.2f} | {rate:.3g} | {base} | {ratio} |")
    text = "\n".join(lines) + "\n"
    print(text)
    results = ROOT / "bench" / "RESULTS.md"
    if not results.exists():
        results.write_text("# Benchmark results\n")
    with results.open("a") as fh:
        fh.write(text)


if __name__ == "__main__":
    main()
