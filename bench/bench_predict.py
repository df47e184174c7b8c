"""Benchmark of Bayesian kriging maps: time, scaling and peak memory (bayesgeo.predict.prediction).

The posterior draws are synthetic (stated in the output): 200 parameter sets scattered around the
truth of a simulated Matérn 3/2 field at n = 500 points (range, sills and mean jittered by about
10%), because sampling a real fit at n = 500 would dominate the run and the cost of prediction
does not depend on where the draws come from.

Measured, side by side in one run:

1. the full job, 250,000 cells (500 x 500 grid) x 200 draws, in a fresh subprocess so that its
   peak resident memory (``resource.getrusage`` ru_maxrss) is its own; target < 2 GB; with
   ``--timeout`` it is stopped and reported as incomplete, with the chunks done, their time and
   the memory so far (the progress of every chunk is logged);
2. time per 10,000 cells at 10,000 cells, threads against the synchronous scheduler, 50 draws;
3. against a general-purpose reference: scikit-learn's GaussianProcessRegressor (fixed kernel,
   ``optimizer=None``) refitted per draw, mean and sd at 10,000 cells for 20 draws, against our
   per-draw moments for the same draws and cells (the mixture summaries excluded from both).

Usage: ``python bench/bench_predict.py [--quick]``; appends a table to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

N_OBS = 500
SIDE = 1000.0


def _problem(draws: int, seed: int = 1):
    from bayesgeo.gp.kriging import make_basis
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng(seed)
    xy = rng.random((N_OBS, 2)) * SIDE
    z = simulate_field(xy, covariance="matern32", practical_range=250.0, partial_sill=1.0, nugget=0.15,
                       mean=2.0, rng=rng)
    f = get_covariance("matern32").range_factor
    jit = lambda: np.exp(0.1 * rng.standard_normal(draws))  # noqa: E731
    t0 = time.perf_counter()
    basis = make_basis(xy, z, np.ones((N_OBS, 1)), covariance="matern32", scale=250.0 / f * jit(),
                       partial_sill=1.0 * jit(), nugget=0.15 * jit(),
                       beta=(2.0 + 0.1 * rng.standard_normal(draws))[:, None])
    return basis, time.perf_counter() - t0


def _grid(cells_side: int):
    from bayesgeo.data.targets import grid_targets

    return grid_targets(np.array([[0.0, 0.0], [SIDE, SIDE]]), cells=cells_side)


class _Log:
    """Progress sink: one line per finished chunk (chunks, seconds, peak RSS in MB) in a file."""

    def __init__(self, path: str, total: int, t0: float):
        self.fh, self.total, self.t0, self.done = open(path, "w"), total, t0, 0
        self.c0 = time.process_time()

    def update(self, k: int = 1) -> None:
        self.done += k
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
        self.fh.write(json.dumps({"done": self.done, "total": self.total, "seconds": time.perf_counter() - self.t0,
                                  "cpu_s": time.process_time() - self.c0, "peak_rss_mb": rss}) + "\n")
        self.fh.flush()


def child(cells_side: int, draws: int, scheduler: str, log: str | None = None) -> None:
    """Run one prediction and print a JSON line with times and peak memory."""
    from bayesgeo.predict.prediction import predict_targets

    basis, t_basis = _problem(draws)
    grid = _grid(cells_side)
    t0, c0 = time.perf_counter(), time.process_time()
    bar = _Log(log, -(-int(grid["inside"].size) // 4096), t0) if log else None
    out = predict_targets(basis, grid, thresholds=[2.5, 3.5], scheduler=scheduler, progress=bar)
    t_pred, c_pred = time.perf_counter() - t0, time.process_time() - c0
    assert np.isfinite(out["mean"].values).all()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB -> MB on Linux
    print(json.dumps({"cells": int(grid["inside"].size), "draws": draws, "scheduler": scheduler,
                      "basis_s": t_basis, "predict_s": t_pred, "cpu_s": c_pred, "peak_rss_mb": rss}))


def _run_child(cells_side: int, draws: int, scheduler: str, timeout: float | None = None,
               log: str | None = None) -> dict:
    cmd = [sys.executable, __file__, "--child", str(cells_side), str(draws), scheduler, *([log] if log else [])]
    if log:
        Path(log).unlink(missing_ok=True)
    try:
        res = subprocess.run(cmd, capture_output=True, text=True, check=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        lines = Path(log).read_text().splitlines() if log and Path(log).exists() else []
        last = json.loads(lines[-1]) if lines else {"done": 0, "total": 1, "seconds": float("nan"),
                                                    "cpu_s": float("nan"), "peak_rss_mb": float("nan")}
        return {"cells": cells_side**2, "draws": draws, "scheduler": scheduler, "incomplete": True, **last}
    return json.loads(res.stdout.strip().splitlines()[-1])


def _sklearn_vs_ours(draws: int = 20, cells_side: int = 100) -> tuple[float, float, float]:
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

    from bayesgeo.gp.kriging import JITTER, draw_moments
    from bayesgeo.predict.prediction import _flat_xy

    basis, _ = _problem(draws)
    xy = _flat_xy(_grid(cells_side))
    draw_moments(basis, xy[:16], np.ones((16, 1)))  # load the compiled kernel before timing
    t0 = time.perf_counter()
    mean, var = draw_moments(basis, xy, np.ones((len(xy), 1)), include_nugget=True)
    t_ours = time.perf_counter() - t0
    t0 = time.perf_counter()
    worst = 0.0
    for k in range(draws):
        kern = ConstantKernel(basis.partial_sill[k], "fixed") * Matern(
            length_scale=np.sqrt(3.0) * basis.scale[k], nu=1.5, length_scale_bounds="fixed"
        ) + WhiteKernel(basis.nugget[k], "fixed")
        gpr = GaussianProcessRegressor(kern, optimizer=None, alpha=JITTER * basis.partial_sill[k])
        gpr.fit(basis.xy, basis.values - basis.beta[k, 0])
        m, s = gpr.predict(xy, return_std=True)
        worst = max(worst, float(np.max(np.abs(m + basis.beta[k, 0] - mean[k]))),
                    float(np.max(np.abs(s - np.sqrt(var[k])))))
    return t_ours, time.perf_counter() - t0, worst


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="small sizes (smoke test of this script)")
    ap.add_argument("--child", nargs="+", metavar="ARG")
    ap.add_argument("--timeout", type=float, default=None, help="stop the full job after this many seconds and "
                    "report the chunks done (marked incomplete)")
    args = ap.parse_args()
    if args.child:
        child(int(args.child[0]), int(args.child[1]), args.child[2], *(args.child[3:4]))
        return
    load0 = os.getloadavg()[0]
    stamp = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    big_side, draws = (60, 20) if args.quick else (500, 200)
    small = 40 if args.quick else 100
    big = _run_child(big_side, draws, "threads", timeout=args.timeout, log="/tmp/bayesgeo_bench_predict_progress.jsonl")
    print(big, flush=True)
    rows = []
    small_draws = draws if args.quick else 50
    for side, sched in ((small, "threads"), (small, "synchronous")):
        r = _run_child(side, small_draws, sched)
        rows.append(r)
        print(r, flush=True)
    t_ours, t_sk, worst = _sklearn_vs_ours(draws=4 if args.quick else 20, cells_side=40 if args.quick else 100)
    print({"ours_s": t_ours, "sklearn_s": t_sk, "max_abs_diff": worst}, flush=True)
    load1 = os.getloadavg()[0]

    lines = [
        "", "## Prediction", "",
        f"{stamp}; {platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
        f"numpy {np.__version__}, one BLAS thread per task; 1-minute load average {load0:.1f} at the start, "
        f"{load1:.1f} at the end (other jobs shared the machine: read ratios rather than absolute times)."
        + (" QUICK smoke run, not the reference sizes." if args.quick else ""),
        f"Synthetic posterior: {draws} draws (50 in the 10,000-cell rows) scattered ~10% around the truth of a simulated Matérn 3/2 field, "
        f"n = {N_OBS} data points; thresholds 2.5 and 3.5; nugget included; chunks of 4,096 cells.",
        "",
        "| cells | draws | scheduler | factorise draws (s) | predict, wall (s) | predict, CPU (s) | wall s per 10,000 cells "
        "| CPU s per 10,000 cells | peak RSS (MB) |",
        "| ---: | ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        lines.append(f"| {r['cells']:,} | {r['draws']} | {r['scheduler']} | {r['basis_s']:.2f} | {r['predict_s']:.1f} | "
                     f"{r['cpu_s']:.1f} | {1e4 * r['predict_s'] / r['cells']:.2f} | {1e4 * r['cpu_s'] / r['cells']:.2f} | "
                     f"{r['peak_rss_mb']:.0f} |")
    ratio = rows[1]["predict_s"] / rows[0]["predict_s"]
    lines += [
        "",
        f"Local threads (2 workers) against the synchronous scheduler at {rows[0]['cells']:,} cells: "
        f"speed-up {ratio:.2f}x.",
        f"Per-draw Gaussian moments at {40 * 40 if args.quick else 10_000:,} cells x {4 if args.quick else 20} draws: "
        f"bayesgeo {t_ours:.2f} s, scikit-learn GaussianProcessRegressor refitted per draw {t_sk:.2f} s "
        f"(ratio {t_sk / t_ours:.1f}x); largest difference in mean or sd {worst:.1e}.",
    ]
    if big.get("incomplete"):
        frac = big["done"] / big["total"]
        lines.append(
            f"Full job ({big['cells']:,} cells x {big['draws']} draws): NOT COMPLETED within the {args.timeout:.0f} s "
            f"allowed; {big['done']} of {big['total']} chunks of 4,096 cells done in {big['seconds']:.0f} s "
            f"using {big['cpu_s']:.0f} CPU s (extrapolated: {big['seconds'] / max(frac, 1e-9):.0f} s wall at this load, "
            f"{big['cpu_s'] / max(frac, 1e-9):.0f} CPU s in all, i.e. about {big['cpu_s'] / max(frac, 1e-9) / 2:.0f} s "
            f"on two otherwise idle cores); peak resident memory so far {big['peak_rss_mb']:.0f} MB (memory does not grow "
            "with the chunks done; target < 2,048 MB).")
    else:
        lines.append(
            f"Full job: {big['cells']:,} cells x {big['draws']} draws: factorising the draws {big['basis_s']:.1f} s, "
            f"prediction {big['predict_s']:.0f} s wall, {big['cpu_s']:.0f} CPU s "
            f"({1e4 * big['predict_s'] / big['cells']:.1f} s per 10,000 cells), "
            f"peak resident memory {big['peak_rss_mb']:.0f} MB (target < 2,048 MB).")
    text = "\n".join(lines) + "\n"
    print(text)
    with open(HERE / "RESULTS.md", "a", encoding="utf-8") as fh:
        fh.write(text)


if __name__ == "__main__":
    main()
