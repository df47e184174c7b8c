"""Benchmark of the anisotropic dense likelihood against the isotropic one (bayesgeo.gp.dense_aniso), side by side.

One value-and-gradient evaluation (what each leapfrog step of the sampler costs) at n = 500 and 2,000
random points, Matérn 3/2 with a nugget, alternating the two kernels in one process so that machine load
affects both alike; the median of the repeats and the ratio are reported. The same for the nearest-neighbour
likelihood (m = 20) at n = 2,000 and 20,000.

Usage: ``python bench/bench_anisotropy.py [--no-write]``; appends a table to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _common import publish, sampler_context  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--no-write", action="store_true", help="print only")
    args = ap.parse_args()
    from scipy.spatial.distance import cdist

    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import loglik_and_grad
    from bayesgeo.gp.dense_aniso import aniso_loglik_and_grad

    started, load0 = dt.datetime.now(dt.UTC), os.getloadavg()[0]
    cov = get_covariance("matern32")
    rows = []
    for n, reps in ((500, 21), (2000, 5)):
        rng = np.random.default_rng(n)
        xy = rng.uniform(0, 1, (n, 2))
        r = rng.standard_normal(n)
        dist = cdist(xy, xy)
        iso, ani = [], []
        loglik_and_grad(r, dist, cov, 0.2, 1.0, 0.1)
        aniso_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, [0.5, 0.3])  # compile
        for _ in range(reps):
            t0 = time.perf_counter()
            loglik_and_grad(r, dist, cov, 0.2, 1.0, 0.1)
            t1 = time.perf_counter()
            aniso_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, [0.5, 0.3])
            t2 = time.perf_counter()
            iso.append(t1 - t0)
            ani.append(t2 - t1)
        a, b = float(np.median(iso)), float(np.median(ani))
        rows.append(f"| dense | {n:,} | {1000 * a:.1f} ms | {1000 * b:.1f} ms | {b / a:.2f} |")
    from bayesgeo.gp.nn import maximin_order, nearest_previous, nn_loglik_and_grad
    from bayesgeo.gp.nn_aniso import nn_aniso_loglik_and_grad

    for n, reps in ((2000, 21), (20000, 5)):
        rng = np.random.default_rng(n)
        xy = rng.uniform(0, 1, (n, 2))
        r = rng.standard_normal(n)
        nbr = nearest_previous(xy, maximin_order(xy), neighbours=20)
        iso, ani = [], []
        nn_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, nbr=nbr)
        nn_aniso_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, [0.5, 0.3], nbr=nbr)
        for _ in range(reps):
            t0 = time.perf_counter()
            nn_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, nbr=nbr)
            t1 = time.perf_counter()
            nn_aniso_loglik_and_grad(r, xy, cov, 0.2, 1.0, 0.1, [0.5, 0.3], nbr=nbr)
            t2 = time.perf_counter()
            iso.append(t1 - t0)
            ani.append(t2 - t1)
        a, b = float(np.median(iso)), float(np.median(ani))
        rows.append(f"| nearest-neighbour, m = 20 | {n:,} | {1000 * a:.1f} ms | {1000 * b:.1f} ms | {b / a:.2f} |")
    publish("\n".join(["", "## Anisotropic dense likelihood against the isotropic one (bench_anisotropy.py)", "",
                       sampler_context(started, load0), "",
                       "One value and gradient (one leapfrog step), Matérn 3/2 with nugget, medians of alternating "
                       "repeats.", "", "| likelihood | n | isotropic | anisotropic | ratio |", "|---|---|---|---|---|",
                       *rows]),
            write=not args.no_write)


if __name__ == "__main__":
    main()
