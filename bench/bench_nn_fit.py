"""End to end at large n: `bayesgeo fit --approx nn`, `check` and `map` on one simulated data set.

Simulates n points (default 20,000) uniform on a 1 km square from an exact Gaussian process
(Matérn 3/2, practical range 300 m, partial sill 1, nugget 0.25, mean 5; one dense Cholesky,
which is fine for simulation only), writes them to a CSV and runs the three commands as a user
would, timing each: fit with 4 chains x (500 tuning + 500 draws) and the nearest-neighbour
likelihood, the convergence check, and nearest-neighbour kriging maps on a grid.

`python bench/bench_nn_fit.py [--n 20000] [--work DIR]`: prints and appends a section
"Nearest-neighbour fit, end to end" to bench/RESULTS.md (unless --no-write).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from _common import publish  # noqa: E402  (bench/ is on sys.path when run as a script)

from bayesgeo.data.demo import simulate_field  # noqa: E402

SIDE = 1000.0  # m, invented survey square
TRUTH = {"practical_range": 300.0, "partial_sill": 1.0, "nugget": 0.25, "mean": 5.0}


def simulate_csv(path: Path, n: int, seed: int) -> float:
    """Write the simulated data set; returns the seconds it took."""
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    xy = np.round(SIDE * rng.random((n, 2)), 2)
    z = simulate_field(xy, covariance="matern32", practical_range=TRUTH["practical_range"],
                       partial_sill=TRUTH["partial_sill"], nugget=TRUTH["nugget"], mean=TRUTH["mean"], rng=rng)
    with open(path, "w") as fh:
        fh.write("x,y,value\n")
        for (a, b), v in zip(xy, z):
            fh.write(f"{a:.2f},{b:.2f},{v:.6f}\n")
    return time.perf_counter() - t0


def run(cmd: list[str]) -> tuple[dict, float, int]:
    """Run one bayesgeo command with --json; returns (its JSON, wall seconds, exit status)."""
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-m", "bayesgeo", *cmd, "--json"], capture_output=True, text=True)
    wall = time.perf_counter() - t0
    try:
        out = json.loads(proc.stdout)
    except json.JSONDecodeError:
        out = {"stderr": proc.stderr[-2000:]}
    return out, wall, proc.returncode


def _q(block: dict, name: str) -> str:
    """'5% / 50% / 95%' of one parameter block of the fit JSON."""
    p = block.get(name, {})
    keys = [k for k in ("q05", "q50", "q95") if k in p]
    return " / ".join(f"{p[k]:.3g}" for k in keys) if keys else json.dumps(p)[:60]


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, default=20000)
    p.add_argument("--chains", type=int, default=4)
    p.add_argument("--tune", type=int, default=500)
    p.add_argument("--draws", type=int, default=500)
    p.add_argument("--map-draws", type=int, default=100)
    p.add_argument("--cell", type=float, default=10.0, help="map cell side, m (default 10: 100 x 100 cells)")
    p.add_argument("--seed", type=int, default=20)
    p.add_argument("--work", type=Path, default=None, help="working folder (default: a temporary one)")
    p.add_argument("--no-write", action="store_true")
    args = p.parse_args()
    work = args.work or Path(tempfile.mkdtemp(prefix="bench-nn-fit-"))
    work.mkdir(parents=True, exist_ok=True)
    load0 = os.getloadavg()[0]
    start = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")

    data = work / "survey.csv"
    sim_s = simulate_csv(data, args.n, args.seed)
    print(f"simulated n = {args.n} in {sim_s:.0f} s", flush=True)
    fit, fit_s, fit_rc = run(["fit", str(data), "--value", "value", "--covariance", "matern32", "--approx", "nn",
                              "--chains", str(args.chains), "--tune", str(args.tune), "--draws", str(args.draws),
                              "--seed", str(args.seed), "--distance-units", "m", "--out", str(work / "fit"),
                              "--overwrite"])
    print(f"fit: exit {fit_rc}, {fit_s:.0f} s", flush=True)
    chk, chk_s, chk_rc = run(["check", str(work / "fit")])
    print(f"check: exit {chk_rc}, {chk_s:.0f} s", flush=True)
    mp, map_s, map_rc = run(["map", str(work / "fit"), "--cell", str(args.cell), "--draws", str(args.map_draws),
                             "--threshold", "6", "--allow-unconverged", "--overwrite"])
    print(f"map: exit {map_rc}, {map_s:.0f} s", flush=True)
    load1 = os.getloadavg()[0]
    (work / "bench.json").write_text(json.dumps({"fit": fit, "check": chk, "map": mp, "fit_s": fit_s,
                                                 "check_s": chk_s, "map_s": map_s}, indent=1, default=str))

    params = fit.get("parameters", fit)
    sampler = fit.get("sampler", {})
    diag = fit.get("diagnostics", {})
    ess = [v.get("ess_bulk", np.nan) for v in diag.get("parameters", {}).values()]
    rhat = [v.get("rhat", np.nan) for v in diag.get("parameters", {}).values()]
    depth = diag.get("tree_depth", {}).get("mean_depth_per_chain", [])
    fails = sorted({q["message"] for q in diag.get("problems", []) if q.get("level") == "fail"})
    lines = ["", "## Nearest-neighbour fit, end to end", "",
             f"{start}; {platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, 1-minute load average "
             f"{load0:.1f} at the start and {load1:.1f} at the end; `python bench/bench_nn_fit.py "
             f"{' '.join(sys.argv[1:])}`.", "",
             f"n = {args.n:,} points uniform on a 1 km square, exact Matérn 3/2 field (practical range "
             f"{TRUTH['practical_range']:.0f} m, partial sill {TRUTH['partial_sill']}, nugget {TRUTH['nugget']}, "
             f"mean {TRUTH['mean']}), simulated in {sim_s:.0f} s. Commands as a user runs them "
             f"(`bayesgeo fit --approx nn` with the default m, {args.chains} chains x ({args.tune} tuning + "
             f"{args.draws} draws), nutpie; `bayesgeo check`; `bayesgeo map --cell {args.cell:g} --draws "
             f"{args.map_draws}`):", "",
             "| stage | exit | wall (s) |", "| --- | ---: | ---: |",
             f"| fit | {fit_rc} | {fit_s:.0f} |", f"| check | {chk_rc} | {chk_s:.0f} |",
             f"| map | {map_rc} | {map_s:.0f} |", f"| total | | {fit_s + chk_s + map_s:.0f} |", "",
             f"Posterior 5% / 50% / 95%: practical range {_q(params, 'practical_range')} m, partial sill "
             f"{_q(params, 'partial_sill')}, nugget {_q(params, 'nugget')}.", "",
             f"Sampler: {sampler.get('seconds', float('nan')):.0f} s inside the fit command, of which sampling "
             f"{sampler.get('sampling_seconds', float('nan')):.0f} s; mean tree depth per chain "
             f"{', '.join(f'{d:.2f}' for d in depth)}; divergences {diag.get('divergences')}; min bulk ESS "
             f"{np.nanmin(ess) if ess else float('nan'):.0f}, max R-hat {np.nanmax(rhat) if rhat else float('nan'):.3f}; "
             f"check verdict: {chk.get('verdict')}" + (f" ({len(fails)} failed checks, e.g. {'; '.join(fails[:4])})" if fails else "") + ".", ""]
    text = "\n".join(lines)
    publish(text, write=not args.no_write)


if __name__ == "__main__":
    main()
