"""Benchmark: one hierarchical model of 8 sites against 8 single-site fits run one after another.

8 sites x 100 points simulated (bayesgeo.demo.simulate_field, Matérn 3/2 with nugget) from a known
population of sites. Side by side in one run, same sampler settings:

* the hierarchical model (bayesgeo.hierarchical.fit_sites, one compile, one sampling run);
* 8 independent single-site fits (bayesgeo.posterior.fit), one after another.

Reported: wall time (with compilation), sampling time alone, the minimum bulk ESS over the per-site
practical range, partial sill and nugget (arviz, Vehtari et al. 2021), and minimum bulk ESS per
second of wall time. Prints a table and appends it, with date, machine and load, to bench/RESULTS.md.

Run: ``OPENBLAS_NUM_THREADS=1 python bench/bench_hierarchical.py [--sites 8] [--points 100]
[--draws 500] [--tune 500] [--chains 2] [--no-append]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import os
import platform
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
QUANTITIES = ("practical_range", "partial_sill", "nugget")


def _machine() -> str:
    import numba

    return (f"{platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
            f"numpy {np.__version__}, numba {numba.__version__}")


def simulate(sites: int, points: int, seed: int = 20261202):
    from bayesgeo.data import points_dataset
    from bayesgeo.demo import simulate_field

    rng = np.random.default_rng(seed)
    xs, ys, vs, ss = [], [], [], []
    for k in range(sites):
        xy = np.round(rng.random((points, 2)) * 300.0 + [1000.0 * k, 0.0], 2)
        prange = 120.0 * math.exp(0.3 * rng.standard_normal())
        psill = 0.5 * math.exp(0.25 * rng.standard_normal())
        v = simulate_field(xy, covariance="matern32", practical_range=prange, partial_sill=psill,
                           nugget=0.15 / 0.85 * psill, mean=3.0 + 0.3 * rng.standard_normal(), rng=rng)
        xs.append(xy[:, 0]), ys.append(xy[:, 1]), vs.append(v)
        ss += [f"site{k + 1}"] * points
    return points_dataset(np.concatenate(xs), np.concatenate(ys), np.concatenate(vs), site=np.array(ss),
                          attrs={"distance_units": "m", "value_units": "log(mg/kg)"})


def min_ess(post) -> float:
    import arviz as az

    ess = az.ess(post[list(QUANTITIES)], method="bulk")
    return float(min(float(ess[q].min()) for q in QUANTITIES))


def sampling_seconds(tree) -> float:
    """Sampling time without compilation, as recorded in the fit's settings (sampler.sampling_seconds)."""
    import json

    return float(json.loads(tree.attrs["settings"])["sampler"].get("sampling_seconds", float("nan")))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=int, default=8)
    ap.add_argument("--points", type=int, default=100)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--tune", type=int, default=500)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--no-append", action="store_true")
    args = ap.parse_args()

    from bayesgeo.hierarchical import fit_sites
    from bayesgeo.posterior import fit

    ds = simulate(args.sites, args.points)
    kw = dict(chains=args.chains, draws=args.draws, tune=args.tune, seed=args.seed)
    load_start = os.getloadavg()[0]

    t0 = time.perf_counter()
    hier = fit_sites(ds, pooling="hierarchical", **kw)
    hier_wall = time.perf_counter() - t0
    hier_sampling = sampling_seconds(hier)
    hier_ess = min_ess(hier["posterior"].to_dataset())
    print(f"hierarchical: {hier_wall:.1f} s wall, {hier_sampling:.1f} s sampling, min bulk ESS {hier_ess:.0f}", flush=True)

    t0 = time.perf_counter()
    ind_sampling, ind_ess = 0.0, []
    for label in dict.fromkeys(ds["site"].values):
        one = ds.isel(obs=np.flatnonzero(ds["site"].values == label)).drop_vars("site")
        tree = fit(one, **kw)
        ind_sampling += sampling_seconds(tree)
        ind_ess.append(min_ess(tree["posterior"].to_dataset()))
        print(f"  single-site fit {label}: min bulk ESS {ind_ess[-1]:.0f}", flush=True)
    ind_wall = time.perf_counter() - t0
    ind_min = float(min(ind_ess))
    print(f"{args.sites} single-site fits: {ind_wall:.1f} s wall, {ind_sampling:.1f} s sampling, min bulk ESS {ind_min:.0f}")

    load_end = os.getloadavg()[0]
    today = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    rows = [("hierarchical model (one fit)", hier_wall, hier_sampling, hier_ess),
            (f"{args.sites} single-site fits, one after another", ind_wall, ind_sampling, ind_min)]
    lines = [
        "",
        "## Hierarchical",
        "",
        f"{today}; {_machine()}; 1-minute load average {load_start:.1f} at the start, {load_end:.1f} at the end "
        "(above the CPU count means other jobs shared the machine and the times are inflated: read the ratios).",
        f"{args.sites} sites x {args.points} points simulated (Matérn 3/2 with nugget, population of sites); nutpie, "
        f"low-rank adaptation, {args.chains} chains x {args.draws} draws (tune {args.tune}), seed {args.seed}, one "
        "BLAS thread. Min bulk ESS over every site's practical range, partial sill and nugget (arviz). Wall time "
        "includes model compilation.",
        "",
        "| fit | wall (s) | sampling (s) | min bulk ESS | min ESS / wall s | min ESS / sampling s |",
        "| --- | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, wall, smp, ess in rows:
        lines.append(f"| {name} | {wall:.1f} | {smp:.1f} | {ess:.0f} | {ess / wall:.2f} | {ess / smp:.2f} |")
    lines.append("")
    lines.append(f"Ratio hierarchical / single-site fits: wall time {hier_wall / ind_wall:.2f}x, "
                 f"min ESS per wall second {(hier_ess / hier_wall) / (ind_min / ind_wall):.2f}x.")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.no_append:
        results = ROOT / "bench" / "RESULTS.md"
        if not results.exists():
            results.write_text("# Benchmark results\n")
        with results.open("a") as fh:
            fh.write(text)


if __name__ == "__main__":
    main()
