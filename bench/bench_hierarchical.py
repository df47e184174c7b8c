"""Benchmark: the hierarchical model (several parametrisations and adaptations) against single-site fits.

Sites x points simulated (bayesgeo.data.demo.simulate_field, Matérn 3/2 with nugget) from a known
population of sites. Side by side in one run, same data, seed and sampler settings:

* the hierarchical model (bayesgeo.fitting.hierarchical.fit_sites, one compile, one sampling run) in each
  variant given by ``--variants`` as ``PARAMETRISATION:ADAPTATION[:TUNE]`` (for example
  ``noncentred:low_rank centred:low_rank auto:diag:1000``);
* (unless ``--no-single``) one single-site fit per site (bayesgeo.fitting.posterior.fit), one after another.

Reported per fit: wall time (with compilation), sampling time alone, mean leapfrog steps per draw and
mean step size after tuning (nutpie's ``n_steps`` and ``step_size``), divergences, the minimum bulk
ESS over the per-site practical range, partial sill and nugget (arviz, Vehtari et al. 2021), the
minimum bulk ESS of the between-site sds, and minimum bulk ESS per second of sampling. Prints a
table and appends it, with date, machine and load, to bench/RESULTS.md.

Run: ``OPENBLAS_NUM_THREADS=1 python bench/bench_hierarchical.py [--sites 8] [--points 100]
[--draws 500] [--tune 500] [--chains 2] [--variants ...] [--no-single] [--title T] [--no-append]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import platform
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
QUANTITIES = ("practical_range", "partial_sill", "nugget")
SPREADS = ("range_site_sd", "sill_site_sd", "nugget_site_sd")


def _machine() -> str:
    import numba

    return (f"{platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
            f"numpy {np.__version__}, numba {numba.__version__}")


def simulate(sites: int, points: int, seed: int = 20261202):
    from bayesgeo.data.points import points_dataset
    from bayesgeo.data.demo import simulate_field

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


def min_ess(post, names=QUANTITIES) -> float:
    import arviz as az

    names = [q for q in names if q in post]
    if not names:
        return float("nan")
    ess = az.ess(post[names], method="bulk")
    return float(min(float(ess[q].min()) for q in names))


def sampling_seconds(tree) -> float:
    """Sampling time without compilation, as recorded in the fit's settings (sampler.sampling_seconds)."""
    return float(json.loads(tree.attrs["settings"])["sampler"].get("sampling_seconds", float("nan")))


def step_stats(tree) -> tuple[float, float, int, float]:
    """Mean leapfrog steps per draw, mean step size, divergences and the number of draws (after tuning)."""
    st = tree["sample_stats"]
    steps = float(st["n_steps"].mean()) if "n_steps" in st else float("nan")
    size = float(st["step_size"].mean()) if "step_size" in st else float("nan")
    div = int(st["diverging"].sum()) if "diverging" in st else 0
    return steps, size, div, float(st["diverging"].size) if "diverging" in st else float("nan")


def _variant(text: str, tune: int) -> tuple[str, str, int]:
    parts = text.split(":")
    return parts[0], parts[1] if len(parts) > 1 else "low_rank", int(parts[2]) if len(parts) > 2 else tune


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=int, default=8)
    ap.add_argument("--points", type=int, default=100)
    ap.add_argument("--draws", type=int, default=500)
    ap.add_argument("--tune", type=int, default=500)
    ap.add_argument("--chains", type=int, default=2)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--variants", nargs="+", default=["noncentred:low_rank", "auto:low_rank"])
    ap.add_argument("--no-single", action="store_true")
    ap.add_argument("--title", default="Hierarchical")
    ap.add_argument("--no-append", action="store_true")
    args = ap.parse_args()

    from bayesgeo.fitting.hierarchical import fit_sites
    from bayesgeo.fitting.posterior import fit

    ds = simulate(args.sites, args.points)
    load_start = os.getloadavg()[0]
    rows = []
    for text in args.variants:
        param, adapt, tune = _variant(text, args.tune)
        t0 = time.perf_counter()
        tree = fit_sites(ds, pooling="hierarchical", chains=args.chains, draws=args.draws, tune=tune,
                         seed=args.seed, parametrisation=param, adaptation=adapt)
        wall = time.perf_counter() - t0
        post = tree["posterior"].to_dataset()
        steps, size, div, _ = step_stats(tree)
        row = (f"hierarchical, {param}, {adapt}, tune {tune}", wall, sampling_seconds(tree), steps, size, div,
               min_ess(post), min_ess(post, SPREADS))
        rows.append(row)
        print(row, flush=True)
    if not args.no_single:
        t0 = time.perf_counter()
        smp, ess, steps, sizes, div = 0.0, [], [], [], 0
        for label in dict.fromkeys(ds["site"].values):
            one = ds.isel(obs=np.flatnonzero(ds["site"].values == label)).drop_vars("site")
            tree = fit(one, chains=args.chains, draws=args.draws, tune=args.tune, seed=args.seed)
            smp += sampling_seconds(tree)
            ess.append(min_ess(tree["posterior"].to_dataset()))
            st, sz, dv, _ = step_stats(tree)
            steps.append(st), sizes.append(sz)
            div += dv
            print(f"  single-site fit {label}: min bulk ESS {ess[-1]:.0f}, {st:.1f} steps/draw", flush=True)
        rows.append((f"{args.sites} single-site fits, one after another (low_rank, tune {args.tune})",
                     time.perf_counter() - t0, smp, float(np.mean(steps)), float(np.mean(sizes)), div,
                     float(min(ess)), float("nan")))

    load_end = os.getloadavg()[0]
    today = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    lines = [
        "",
        f"## {args.title}",
        "",
        f"{today}; {_machine()}; 1-minute load average {load_start:.1f} at the start, {load_end:.1f} at the end "
        "(above the CPU count means other jobs shared the machine and the times are inflated: read the ratios).",
        f"{args.sites} sites x {args.points} points simulated (Matérn 3/2 with nugget, population of sites); nutpie, "
        f"{args.chains} chains x {args.draws} draws, seed {args.seed}, one BLAS thread, target_accept 0.9 "
        "(hierarchical) / 0.8 (single-site). Steps = mean leapfrog steps per draw after tuning; ESS = min bulk "
        "ESS over every site's practical range, partial sill and nugget (arviz); spread ESS = min bulk ESS of the "
        "between-site sds. Wall time includes model compilation.",
        "",
        "| fit | wall (s) | sampling (s) | steps / draw | step size | divergences | min ESS | spread ESS "
        "| min ESS / sampling s |",
        "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for name, wall, smp, st, sz, dv, ess, sess in rows:
        sess_txt = "" if math.isnan(sess) else f"{sess:.0f}"
        lines.append(f"| {name} | {wall:.1f} | {smp:.1f} | {st:.1f} | {sz:.3f} | {dv} | {ess:.0f} | {sess_txt} "
                     f"| {ess / smp:.2f} |")
    lines.append("")
    base = rows[0]
    for row in rows[1:]:
        lines.append(f"Ratio {row[0]} / {base[0]}: sampling time {row[2] / base[2]:.2f}x, steps per draw "
                     f"{row[3] / base[3]:.2f}x, min ESS per sampling second {(row[6] / row[2]) / (base[6] / base[2]):.2f}x.")
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
