"""Convergence of the several-site (hierarchical) model with the default settings, before and after
chains that continue while R-hat or ESS is too poor (bayesgeo.fitting.looks).

Data: the demo parcels (bayesgeo.data.demo.demo_data, the three parcels of the demo study, log values) and
simulated several-site data sets on invented sites: 3-5 sites of 30-80 points each, Matérn 3/2 or
exponential with a nugget share of 0.1-0.5, site ranges and sills drawn around a population value
(as in bench_hierarchical.py). Each is fitted once with `bayesgeo.fitting.hierarchical.fit_sites` defaults
(4 chains x (1000 tuning + 1000 draws), nutpie low-rank, target acceptance 0.9 with a rerun at 0.95 when
the kept draws hold divergences, looks at 1000, 2000 and 4000 draws). "Before" is the first look: the very draws a fit without continued chains keeps (same
seed, same chains, bayesgeo.fitting.looks), so before and after come from one run. Reported per fit: verdict,
largest R-hat, smallest bulk ESS and divergences at the first and the last look, draws kept, sampling
seconds.

`OPENBLAS_NUM_THREADS=1 python bench/bench_hier_convergence.py [--count 6] [--no-demo] [--no-write]`
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from _common import publish, sampler_context  # noqa: E402


def simulated(k: int, seed: int = 1616):
    """Recipe ``k``: a several-site data set on invented sites (values in invented log mg/kg)."""
    from bayesgeo.data.points import points_dataset
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng([seed, k])
    sites = int(rng.integers(3, 6))
    family = ("matern32", "exponential")[k % 2]
    share = float(rng.uniform(0.1, 0.5))
    xs, ys, vs, ss = [], [], [], []
    for s in range(sites):
        n = int(rng.integers(30, 81))
        xy = np.round(rng.random((n, 2)) * 300.0 + [1000.0 * s, 0.0], 2)
        prange = 120.0 * math.exp(0.3 * rng.standard_normal())
        total = 0.6 * math.exp(0.25 * rng.standard_normal())
        v = simulate_field(xy, covariance=family, practical_range=prange, partial_sill=total * (1 - share),
                           nugget=total * share, mean=3.0 + 0.3 * rng.standard_normal(), rng=rng)
        xs.append(xy[:, 0]), ys.append(xy[:, 1]), vs.append(v)
        ss += [f"site{s + 1}"] * n
    ds = points_dataset(np.concatenate(xs), np.concatenate(ys), np.concatenate(vs), site=np.array(ss),
                        attrs={"distance_units": "m", "value_units": "log(mg/kg)", "source": f"sim{k}"})
    return ds, {"data": f"simulated {k}", "family": family, "sites": sites, "n": int(ds.sizes["obs"]),
                "nugget_share": share, "seed": int(rng.integers(2**31 - 1))}


def demo():
    """The three parcels of the demo study (log of the invented arsenic values)."""
    from bayesgeo.cli.demo import DEMO_PARCELS
    from bayesgeo.data.demo import demo_data

    ds = demo_data()
    keep = np.isin(ds["site"].values.astype(str), DEMO_PARCELS)
    ds = ds.isel(obs=np.flatnonzero(keep))
    return ds, {"data": "demo parcels", "family": "matern32", "sites": len(DEMO_PARCELS), "n": int(ds.sizes["obs"]),
                "nugget_share": float("nan"), "seed": 20261202, "transform": "log"}


def fit_one(ds, recipe: dict) -> dict:
    from bayesgeo.fitting.hierarchical import fit_sites

    t0 = time.perf_counter()
    tree = fit_sites(ds, covariance=recipe["family"], transform=recipe.get("transform"), seed=recipe["seed"])
    smp = json.loads(tree.attrs["settings"])["sampler"]
    first, last = smp["looks"][0], smp["looks"][-1]
    return {**recipe, "wall_seconds": time.perf_counter() - t0, "sampling_seconds": smp["sampling_seconds"],
            "draws_kept": smp["draws"], "looks": [{k: v for k, v in lk.items() if k != "short"} for lk in smp["looks"]],
            "target_accept": smp["target_accept"], "rerun": smp.get("rerun"),
            "before": {k: first[k] for k in ("verdict", "max_rhat", "min_ess_bulk", "divergences")},
            "after": {k: last[k] for k in ("verdict", "max_rhat", "min_ess_bulk", "divergences")}}


def table(records: list[dict], header: str) -> str:
    lines = [header, "", "| data | family | sites | n | first look (1000 draws): verdict, max R-hat, min bulk ESS, "
             "divergences | last look: verdict, max R-hat, min bulk ESS, divergences | draws kept | sampling s | "
             "rerun: first run's target acceptance and divergences |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in records:
        b, a = r["before"], r["after"]
        lines.append(f"| {r['data']} | {r['family']} | {r['sites']} | {r['n']} | {b['verdict']}, {b['max_rhat']:.3f}, "
                     f"{b['min_ess_bulk']:.0f}, {b['divergences']} | {a['verdict']}, {a['max_rhat']:.3f}, "
                     f"{a['min_ess_bulk']:.0f}, {a['divergences']} | {r['draws_kept']} | {r['sampling_seconds']:.0f} | "
                     + (f"{r['rerun']['target_accept']:g}: {r['rerun']['divergences']} |" if r.get("rerun") else "- |"))
    ok0 = sum(r["before"]["verdict"] != "fail" for r in records)
    ok1 = sum(r["after"]["verdict"] != "fail" for r in records)
    lines += ["", f"Exit 0 (pass or warn): {ok0} of {len(records)} at the first look, {ok1} of {len(records)} "
              "with the chains continued."]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count", type=int, default=6, help="simulated data sets (default 6)")
    ap.add_argument("--no-demo", action="store_true", help="leave out the demo parcels")
    ap.add_argument("--log", default=str(ROOT / "bench" / "hier_convergence_fits.jsonl"))
    ap.add_argument("--no-write", action="store_true", help="do not append to bench/RESULTS.md")
    args = ap.parse_args(argv)
    started, load0 = dt.datetime.now(dt.timezone.utc), os.getloadavg()[0]
    jobs = ([] if args.no_demo else [demo]) + [lambda k=k: simulated(k) for k in range(args.count)]
    records = []
    for job in jobs:
        ds, recipe = job()
        rec = fit_one(ds, recipe)
        records.append(rec)
        with open(args.log, "a") as fh:
            fh.write(json.dumps(rec) + "\n")
        print(f"{rec['data']:14s} {rec['family']:11s} sites={rec['sites']} n={rec['n']:3d} "
              f"before={rec['before']['verdict']} after={rec['after']['verdict']} draws={rec['draws_kept']} "
              f"t={rec['sampling_seconds']:.0f}s", flush=True)
    header = (f"## Several-site model: convergence with the default settings, chains continued\n\n"
              f"{sampler_context(started, load0)}. `fit_sites` defaults: 4 chains x (1000 + 1000), target acceptance 0.9 "
              "and a rerun at 0.95 when the kept draws hold divergences (the looks columns are the kept run's), "
              "looks at 1000, 2000, 4000 draws; the first look is what a fit without continued chains keeps.")
    publish(table(records, header), write=not args.no_write)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
