"""Non-detects: what the left-censored model costs, and what substituting half the limit does instead.

Two parts, side by side in one run:

* ``cost``: the same simulated data set (exponential covariance, practical range 40 in a 100 x 100
  square, nugget 0.2 of a unit partial sill, mean 5) fitted with 0%, 25% and 50% of its values censored
  at the matching quantile, at each n; reported: sampling seconds, smallest bulk ESS of the covariance
  parameters, ESS per second, and both as ratios to the uncensored fit of the same data.
* ``adaptation``: censored fits (25% and 50%) of a few data sets with nutpie's low-rank mass-matrix
  adaptation (the default) and the diagonal one, side by side: fit seconds, min bulk ESS, ESS/s.
* ``coverage``: replicate data sets (fresh seeds) censored at the 40% quantile; each is fitted twice,
  with the non-detects modelled as censored and with half the limit substituted (the common shortcut
  Helsel 2012, ch. 1, warns against); reported: how often the central 90% interval covers the true
  practical range, partial sill and mean, and the median relative error of the posterior medians.
  Coverage over R replicates is Binomial(R, 0.9) when calibrated.

Every fit: nutpie, 2 chains x (500 + 500), default target acceptance, seed from the replicate.

`OPENBLAS_NUM_THREADS=1 python bench/bench_nondetects.py [--part cost|coverage|adaptation|both] [--sizes 200,1000]
[--replicates 20] [--no-write]`
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from _common import publish, sampler_context  # noqa: E402

TRUTH = {"practical_range": 40.0, "partial_sill": 1.0, "nugget": 0.2, "mean": 5.0}


def simulate(n: int, seed: int):
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 100, (n, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=TRUTH["practical_range"],
                       partial_sill=TRUTH["partial_sill"], nugget=TRUTH["nugget"], mean=TRUTH["mean"], rng=rng)
    return xy, z


def dataset(xy, z, share: float, how: str):
    from bayesgeo.data.points import points_dataset

    limit = np.quantile(z, share) if share > 0 else -np.inf
    cens = z < limit
    if how == "censored":
        value = np.where(cens, limit, z)
        return points_dataset(xy[:, 0], xy[:, 1], value, censored=cens if cens.any() else None,
                              attrs={"coords": "xy"})
    return points_dataset(xy[:, 0], xy[:, 1], np.where(cens, 0.5 * limit, z), attrs={"coords": "xy"})


def fit(ds, seed: int, adaptation: str = "low_rank") -> dict:
    import arviz as az

    from bayesgeo.fitting.posterior import fit as fit_one

    t0 = time.perf_counter()
    tree = fit_one(ds, covariance="exponential", chains=2, draws=500, tune=500, seed=seed, max_draws=500,
                   adaptation=adaptation)
    seconds = time.perf_counter() - t0
    post = tree["posterior"].to_dataset()
    names = [v for v in ("practical_range_z", "sd_z", "nugget_sd_z") if v in post]
    ess_ds = az.ess(post[names], method="bulk")
    ess = float(min(float(ess_ds[v].min()) for v in names))
    q = {k: np.quantile(post[k].values, [0.05, 0.5, 0.95]) for k in ("practical_range", "partial_sill")}
    q["mean"] = np.quantile(post["beta"].sel(term="1").values, [0.05, 0.5, 0.95])
    return {"seconds": seconds, "ess": ess, "q": q}


def part_cost(sizes, write: bool) -> None:
    rows = []
    for n in sizes:
        xy, z = simulate(n, seed=100 + n)
        base = None
        for share in (0.0, 0.25, 0.5):
            r = fit(dataset(xy, z, share, "censored"), seed=7)
            base = base or r
            rows.append((n, share, r["seconds"], r["ess"], r["ess"] / r["seconds"],
                         r["seconds"] / base["seconds"], (r["ess"] / r["seconds"]) / (base["ess"] / base["seconds"])))
            print(rows[-1], flush=True)
    lines = ["| n | non-detects | fit seconds | min bulk ESS | ESS/s | time ratio | ESS/s ratio |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    lines += [f"| {n} | {100 * s:.0f}% | {t:.1f} | {e:.0f} | {r:.1f} | {tr:.2f} | {er:.2f} |"
              for n, s, t, e, r, tr, er in rows]
    publish("\n".join(lines) + "\n", write=write)


def part_adaptation(write: bool) -> None:
    lines = ["| n | data seed | non-detects | adaptation | fit seconds | min bulk ESS | ESS/s |",
             "| --- | --- | --- | --- | --- | --- | --- |"]
    for n, seed in ((200, 300), (200, 301), (300, 302), (400, 500)):
        xy, z = simulate(n, seed=seed)
        for share in (0.25, 0.5):
            for adaptation in ("low_rank", "diag"):
                r = fit(dataset(xy, z, share, "censored"), seed=7, adaptation=adaptation)
                lines.append(f"| {n} | {seed} | {100 * share:.0f}% | {adaptation} | {r['seconds']:.1f} | {r['ess']:.0f} | "
                             f"{r['ess'] / r['seconds']:.2f} |")
                print(lines[-1], flush=True)
    publish("\n".join(lines) + "\n", write=write)


def part_coverage(replicates: int, write: bool) -> None:
    hits = {how: {k: 0 for k in TRUTH if k != "nugget"} for how in ("censored", "half-limit")}
    errors = {how: {k: [] for k in TRUTH if k != "nugget"} for how in hits}
    for r in range(replicates):
        xy, z = simulate(60, seed=1000 + r)
        for how in hits:
            res = fit(dataset(xy, z, 0.4, how), seed=r)
            for k in hits[how]:
                lo, mid, hi = res["q"][k]
                hits[how][k] += int(lo <= TRUTH[k] <= hi)
                errors[how][k].append(mid / TRUTH[k] - 1.0)
        print(r, hits, flush=True)
    from scipy.stats import binom

    lo, hi = int(binom.ppf(0.005, replicates, 0.9)), int(binom.isf(0.005, replicates, 0.9))
    lines = [f"Coverage of the central 90% intervals over {replicates} replicates (n = 60, 40% censored at one limit; "
             f"99% binomial band {lo}-{hi}) and median relative error of the posterior median:",
             "| treatment | practical range | partial sill | mean |", "| --- | --- | --- | --- |"]
    for how in hits:
        cells = [f"{hits[how][k]}/{replicates} ({100 * np.median(errors[how][k]):+.0f}%)"
                 for k in ("practical_range", "partial_sill", "mean")]
        lines.append(f"| {how} | " + " | ".join(cells) + " |")
    publish("\n".join(lines) + "\n", write=write)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--part", choices=("cost", "coverage", "adaptation", "both"), default="both")
    ap.add_argument("--sizes", default="200,1000")
    ap.add_argument("--replicates", type=int, default=20)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args()
    write = not args.no_write
    started, load0 = dt.datetime.now(dt.timezone.utc), os.getloadavg()[0]
    publish("\n## Non-detects: cost and coverage (bench_nondetects.py)\n", write=write)
    if args.part in ("cost", "both"):
        part_cost([int(s) for s in args.sizes.split(",")], write)
    if args.part == "adaptation":
        part_adaptation(write)
    if args.part in ("coverage", "both"):
        part_coverage(args.replicates, write)
    publish(sampler_context(started, load0) + "\n", write=write)


if __name__ == "__main__":
    main()
