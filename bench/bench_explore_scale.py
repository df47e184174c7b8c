"""Benchmark: exploration at scale, the quick maximum-likelihood fits dense against nearest-neighbour.

Side by side in one run (uniform points in a 1 km square; values a stationary Gaussian field, exponential
covariance, practical range 250 m, partial sill 1, nugget 0.2, simulated with the nearest-neighbour model at
m = 60, ``--field sine`` for the earlier deterministic test surface sin(x/150) + cos(y/200) plus noise, whose
long ranges are not identified within the square):

1. the five quick ML fits (exponential, Matérn 3/2 and 5/2, Gaussian, spherical) at n = 2,930 (the size of
   the real data set of issue #21) with the dense profile likelihood (what ``explore`` ran up to 3,000
   points) and with the nearest-neighbour likelihood it now uses above 1,000 points (m = 15): times,
   ratio and the practical ranges of both;
2. the whole ``explore`` stage (semivariogram, correlogram with 99 permutations each, directional
   semivariograms, WLS and ML quick fits, figures and tables) at n = 20,000.

Usage: ``python bench/bench_explore_scale.py [--no-write]``; appends a table to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _common import publish, sampler_context  # noqa: E402

FAMILIES = ("exponential", "matern32", "matern52", "gaussian", "spherical")


def _points(n: int, field: str, seed: int = 1):
    from bayesgeo.data.points import points_dataset
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.nn_simulate import nn_simulate

    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 1000, (n, 2))
    if field == "sine":
        z = np.sin(xy[:, 0] / 150) + np.cos(xy[:, 1] / 200) + 0.3 * rng.standard_normal(n)
    else:
        cov = get_covariance("exponential")
        z = 3.0 + nn_simulate(xy, cov, 250.0 / cov.range_factor, 1.0, 0.2, neighbours=60, seed=seed)[0]
    return points_dataset(xy[:, 0], xy[:, 1], z, attrs={"distance_units": "m"}), xy, z


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--no-write", action="store_true", help="print only")
    ap.add_argument("--field", choices=("gp", "sine"), default="gp", help="the simulated values (module docstring)")
    args = ap.parse_args()
    from bayesgeo.explore.quickfit import fit_ml
    from bayesgeo.explore.quickfit_nn import QUICK_NEIGHBOURS, fit_ml_nn
    from bayesgeo.explore.variogram import semivariogram
    from bayesgeo.explore.wls import fit_wls
    from bayesgeo.stages.explore import explore_folder

    started, load0 = dt.datetime.now(dt.UTC), os.getloadavg()[0]
    ds, _, _ = _points(2930, args.field)
    fit_ml_nn(ds.isel(obs=slice(0, 200)), "exponential")  # compile
    rows = []
    td = tn = 0.0
    vg = semivariogram(ds)
    for fam in FAMILIES:
        w = fit_wls(vg, fam)  # both start from the WLS fit besides their defaults, as quick_fits runs them
        t0 = time.perf_counter()
        a = fit_ml(ds, fam, start=w)
        t1 = time.perf_counter()
        b = fit_ml_nn(ds, fam, start=w)
        t2 = time.perf_counter()
        td, tn = td + t1 - t0, tn + t2 - t1
        rows.append(f"| {fam} | {t1 - t0:.1f} s | {t2 - t1:.2f} s | {a['practical_range']:.0f} m | "
                    f"{b['practical_range']:.0f} m |")
    rows.append(f"| all five | {td:.1f} s | {tn:.2f} s | ratio {td / tn:.0f} | |")
    _, xy, z = _points(20000, args.field)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "pts.csv"
        path.write_text("x,y,value\n" + "".join(f"{a:.2f},{b:.2f},{v:.4f}\n" for (a, b), v in zip(xy, z)))
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            explore_folder(path, out=Path(tmp) / "out", permutations=99, seed=1, coords="xy")
        whole = time.perf_counter() - t0
    text = "\n".join([
        "", "## Exploration at scale: quick ML fits dense against nearest-neighbour (bench_explore_scale.py)", "",
        sampler_context(started, load0), "",
        f"Five quick ML fits at n = 2,930 (dense profile likelihood against the nearest-neighbour likelihood, "
        f"m = {QUICK_NEIGHBOURS}, GLS trend), same data, one after the other; values: "
        f"{'sin(x/150) + cos(y/200) + noise' if args.field == 'sine' else 'stationary exponential field, practical range 250 m, nugget 0.2 of a sill of 1.2'}:",
        "",
        "| family | dense | nearest-neighbour | dense practical range | nn practical range |", "|---|---|---|---|---|",
        *rows, "",
        f"The whole explore stage at n = 20,000 (99 permutations, all quick fits, figures and tables): "
        f"{whole:.1f} s.",
    ])
    publish(text, write=not args.no_write)


if __name__ == "__main__":
    main()
