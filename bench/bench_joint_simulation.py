"""Benchmark of joint conditional simulation on map grids (bayesgeo.gp.joint), side by side in one run.

Synthetic posterior draws as in bench_predict.py (parameter sets jittered by about 10% around the truth of a
simulated Matérn 3/2 field). Measured in one process, one after the other:

1. the map's per-cell prediction (``predict_targets``) and one joint field per draw by conditioning by kriging
   (``kriged_simulations``, counting the cells above a threshold) on the same grid and draws: their ratio is
   the extra cost of the default ``map`` with a threshold; dense fit (n = 500) and nearest-neighbour fit
   (n = 5,000, m = 30), 10,000 cells (100 x 100), 100 draws;
2. at 2,000 targets (the most the exact method takes), conditioning by kriging against the exact joint
   Cholesky (``conditional_simulations``), 20 draws, dense fit n = 500;
3. conditioning by kriging on 250,000 cells x 20 draws (dense n = 500): time per draw at the size of the
   largest maps.

Usage: ``python bench/bench_joint_simulation.py [--no-write]``; appends a table to bench/RESULTS.md.
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

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from _common import publish, sampler_context  # noqa: E402

SIDE = 1000.0


def _basis(n: int, draws: int, neighbours: int, seed: int = 1):
    from bayesgeo.data.demo import simulate_field
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.kriging import make_basis

    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * SIDE
    z = simulate_field(xy, covariance="matern32", practical_range=250.0, partial_sill=1.0, nugget=0.15, mean=2.0,
                       rng=rng) if n <= 2000 else 2.0 + rng.standard_normal(n)
    f = get_covariance("matern32").range_factor
    jit = lambda: np.exp(0.1 * rng.standard_normal(draws))  # noqa: E731
    return make_basis(xy, z, np.ones((n, 1)), covariance="matern32", scale=250.0 / f * jit(), partial_sill=jit(),
                      nugget=0.15 * jit(), beta=(2.0 + 0.1 * rng.standard_normal(draws))[:, None],
                      neighbours=neighbours)


def _grid(side: int):
    from bayesgeo.data.targets import grid_targets

    return grid_targets(np.array([[0.0, 0.0], [SIDE, SIDE]]), cells=side)


def _cells(grid):
    xx, yy = np.meshgrid(grid["x"].values, grid["y"].values)
    return np.column_stack([xx.ravel(), yy.ravel()])


def _timed(fn):
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--no-write", action="store_true", help="print only; do not append to bench/RESULTS.md")
    args = ap.parse_args()
    from bayesgeo.gp.joint import conditional_simulations, kriged_simulations
    from bayesgeo.predict.prediction import predict_targets

    started, load0 = dt.datetime.now(dt.UTC), os.getloadavg()[0]
    count = lambda f: (f > 2.0).sum(axis=1)  # noqa: E731
    rows = []
    grid = _grid(100)
    xt = _cells(grid)
    ones = np.ones((len(xt), 1))
    kriged_simulations(_basis(200, 2, 0), xt[:50], ones[:50], n_sim=1, seed=0, reduce=count)  # compile
    for label, n, m in (("dense", 500, 0), ("nearest-neighbour", 5000, 30)):
        basis = _basis(n, 100, m)
        t_map = _timed(lambda: predict_targets(basis, grid, thresholds=[np.exp(2.0)]))
        t_sim = _timed(lambda: kriged_simulations(basis, xt, ones, n_sim=1, seed=0, reduce=count))
        rows.append(f"| map and one joint field per draw, {label} fit, n = {n:,} | 10,000 cells x 100 draws | "
                    f"{t_map:.1f} s map, {t_sim:.1f} s simulation | {t_sim / t_map:.2f} |")
    basis = _basis(500, 20, 0)
    pick = np.random.default_rng(3).choice(len(xt), 2000, replace=False)
    t_exact = _timed(lambda: conditional_simulations(basis, xt[pick], ones[pick], n_sim=1, seed=0))
    t_krig = _timed(lambda: kriged_simulations(basis, xt[pick], ones[pick], n_sim=1, seed=0, reduce=count))
    rows.append(f"| exact joint Cholesky against conditioning by kriging, dense n = 500 | 2,000 targets x 20 draws | "
                f"{t_exact:.1f} s exact, {t_krig:.1f} s by kriging | {t_krig / t_exact:.2f} |")
    big = _cells(_grid(500))
    t_big = _timed(lambda: kriged_simulations(basis, big, np.ones((len(big), 1)), n_sim=1, seed=0, reduce=count))
    rows.append(f"| conditioning by kriging, dense n = 500 | 250,000 cells x 20 draws | {t_big:.1f} s "
                f"({t_big / 20:.2f} s per draw) | |")
    text = "\n".join([
        "", "## Joint conditional simulation on map grids (bench_joint_simulation.py)", "",
        sampler_context(started, load0), "",
        "Synthetic draws around a simulated Matérn 3/2 field (bench_predict.py's set-up). Conditioning by kriging:",
        "an unconditional nearest-neighbour draw (m = 30) at data and cells, corrected by the fit's kriging",
        "(bayesgeo.gp.joint.kriged_simulations), reduced to the cells above a threshold per field.", "",
        "| what | size | time | ratio |", "|---|---|---|---|", *rows,
    ])
    publish(text, write=not args.no_write)


if __name__ == "__main__":
    main()
