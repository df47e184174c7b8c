"""What the nearest-neighbour likelihood costs in information, and whether its intervals are honest.

For points uniform on a 1 km square at several densities (practical range 300 m, partial sill 1,
nugget 0.25 or 0), per family and m, bayesgeo.gp.nn_accuracy.nn_information on its default window
(exact closed forms, no simulation): the sd of log(scale), log(partial sill), log(nugget) that an
nn posterior reports (curvature H), the actual spread of the nn estimate (sandwich H^-1 J H^-1)
and the exact likelihood's (Fisher information); width ratio = sandwich / nn (> 1: nn intervals
too narrow), efficiency = (exact / sandwich)^2. Also: the pseudo-true parameters of the nn
likelihood (bayesgeo.gp.nn_accuracy.nn_pseudo_true) on the full data at n = 2,000, which the theory
says equal the truth; how the width ratio grows with the window at 20,000 points per km²; and the
time of the check at n = 20,000.

`OPENBLAS_NUM_THREADS=1 python bench/bench_nn_information.py [--no-write]`: prints and appends a section
"Nearest-neighbour likelihood: information and interval width" to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from _common import publish  # noqa: E402  (bench/ is on sys.path when run as a script)

from bayesgeo.gp.covariance import get_covariance  # noqa: E402
from bayesgeo.gp.nn_accuracy import WINDOW_POINTS, nn_blocks, nn_information, nn_pseudo_true  # noqa: E402

SIDE = 1000.0
RANGE = 300.0
DENSITIES = (1000, 2000, 5000, 20000)  # points per km^2 (= n on the 1 km square)
FAMILIES = ("exponential", "matern32", "matern52")
MS = (10, 20, 30, 40)


def _layout(n: int, seed: int) -> np.ndarray:
    return SIDE * np.random.default_rng(seed).random((n, 2))


def information_table(nugget: float, families=FAMILIES) -> list[dict]:
    rows = []
    for dens in DENSITIES:
        xy = _layout(dens, dens)
        for fam in families:
            scale = get_covariance(fam).scale_from_range(RANGE)
            for m in MS:
                t0 = time.perf_counter()
                r = nn_information(xy, fam, scale, 1.0, nugget, neighbours=m)
                rows.append({"density": dens, "family": fam, "m": m, "nugget": nugget, "seconds": time.perf_counter() - t0,
                             **{f"{p}_{k}": r[p][k] for p in r["parameters"]
                                for k in ("nn_sd", "nn_sampling_sd", "exact_sd", "width_ratio", "efficiency")}})
                print(f"density {dens}, {fam}, m={m}, nugget {nugget}: width ratio scale "
                      f"{r['scale']['width_ratio']:.3f}, sill {r['partial_sill']['width_ratio']:.3f}; "
                      f"efficiency scale {r['scale']['efficiency']:.3f} ({rows[-1]['seconds']:.1f} s)", flush=True)
    return rows


def pseudo_true_rows() -> list[dict]:
    xy = _layout(2000, 7)
    rows = []
    for fam in FAMILIES:
        scale = get_covariance(fam).scale_from_range(RANGE)
        t0 = time.perf_counter()
        r = nn_pseudo_true(nn_blocks(xy, neighbours=20), fam, scale, 1.0, 0.25)
        rows.append({"family": fam, **r["log_shift"], "evaluations": r["evaluations"], "seconds": time.perf_counter() - t0})
        print(f"pseudo-true {fam}: log shifts {r['log_shift']}", flush=True)
    return rows


def window_rows() -> list[dict]:
    xy = _layout(20000, 20000)
    rows = []
    for w in (500, 1000, 2000, 3000):
        t0 = time.perf_counter()
        r = nn_information(xy, "matern32", get_covariance("matern32").scale_from_range(RANGE), 1.0, 0.25,
                           neighbours=20, window_points=w)
        rows.append({"window": w, "diameter": r["window_diameter"], "seconds": time.perf_counter() - t0,
                     **{f"{p}_{k}": r[p][k] for p in r["parameters"] for k in ("width_ratio", "efficiency")}})
        print(f"window {w}: width ratio scale {r['scale']['width_ratio']:.3f}", flush=True)
    return rows


def check_time() -> float:
    xy = _layout(20000, 11)
    t0 = time.perf_counter()
    nn_information(xy, "matern32", get_covariance("matern32").scale_from_range(RANGE), 1.0, 0.25, neighbours=20)
    return time.perf_counter() - t0


def report(rows, pt_rows, win_rows, secs, load0) -> str:
    now = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    lines = ["", "## Nearest-neighbour likelihood: information and interval width", "",
             f"{now}; {platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, 1-minute load average "
             f"{load0:.1f} at the start and {os.getloadavg()[0]:.1f} at the end; `python bench/bench_nn_information.py`.", "",
             f"Points uniform on a {SIDE:.0f} m square (density = n per km²), practical range {RANGE:.0f} m, partial sill 1; "
             f"bayesgeo.gp.nn_accuracy.nn_information on the {WINDOW_POINTS:,} points nearest the centre (exact closed forms, no "
             "simulation), maximin ordering. sd = of the log parameter; 'nn' = what an nn posterior reports "
             "(curvature), 'sampling' = actual spread of the nn estimate over data sets (sandwich), 'exact' = the "
             "exact likelihood's (Fisher information). Width ratio = sampling / nn (> 1: nn intervals too narrow; "
             "the fit's caution limit is 1.10); efficiency = (exact / sampling)², the share of the exact "
             "information kept.", ""]
    for nug in sorted({r["nugget"] for r in rows}, reverse=True):
        lines += [f"Nugget {nug}:", "",
                  "| density (/km²) | family | m | sd log scale: nn / sampling / exact | width ratio scale | width ratio sill "
                  "| width ratio nugget | efficiency scale | efficiency sill |",
                  "| ---: | --- | ---: | --- | ---: | ---: | ---: | ---: | ---: |"]
        for r in (r for r in rows if r["nugget"] == nug):
            wn = f"{r['nugget_width_ratio']:.3f}" if "nugget_width_ratio" in r else "-"
            lines.append(f"| {r['density']:,} | {r['family']} | {r['m']} | {r['scale_nn_sd']:.3f} / "
                         f"{r['scale_nn_sampling_sd']:.3f} / {r['scale_exact_sd']:.3f} | {r['scale_width_ratio']:.3f} | "
                         f"{r['partial_sill_width_ratio']:.3f} | {wn} | {r['scale_efficiency']:.3f} | "
                         f"{r['partial_sill_efficiency']:.3f} |")
        lines.append("")
    lines += ["Pseudo-true values of the nn likelihood (m = 20, nugget 0.25) on all 2,000 points, log(found / true) "
              "(theory: 0, an unbiased estimating equation; the optimiser's tolerance is 1e-4):", "",
              "| family | scale | partial sill | nugget | evaluations | seconds |", "| --- | ---: | ---: | ---: | ---: | ---: |"]
    for r in pt_rows:
        lines.append(f"| {r['family']} | {r['scale']:+.1e} | {r['partial_sill']:+.1e} | {r['nugget']:+.1e} | "
                     f"{r['evaluations']} | {r['seconds']:.1f} |")
    lines += ["", "Width ratio against the window size, 20,000 points per km², Matérn 3/2, nugget 0.25, m = 20 "
              "(window diameter against the 300 m practical range):", "",
              "| window points | diameter (m) | width ratio scale | width ratio sill | efficiency scale | seconds |",
              "| ---: | ---: | ---: | ---: | ---: | ---: |"]
    for r in win_rows:
        lines.append(f"| {r['window']:,} | {r['diameter']:.0f} | {r['scale_width_ratio']:.3f} | "
                     f"{r['partial_sill_width_ratio']:.3f} | {r['scale_efficiency']:.3f} | {r['seconds']:.1f} |")
    lines += ["", f"Time of the check of a fit at n = 20,000 (Matérn 3/2, m = 20, {WINDOW_POINTS:,}-point window): {secs:.1f} s.", ""]
    return "\n".join(lines)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--no-write", action="store_true")
    args = p.parse_args()
    load0 = os.getloadavg()[0]
    # without a nugget the smooth Matérn 5/2 makes K too ill-conditioned at the higher densities
    rows = information_table(0.25) + information_table(0.0, families=("exponential", "matern32"))
    pt_rows = pseudo_true_rows()
    win_rows = window_rows()
    secs = check_time()
    text = report(rows, pt_rows, win_rows, secs, load0)
    publish(text, write=not args.no_write)


if __name__ == "__main__":
    main()
