"""Site-level sampling coordinates of the several-site (hierarchical) model, side by side.

Arms (private switch ``_variance`` of ``bayesgeo.fitting.hierarchical.build_site_model``; ``total_c`` and
``total_cb`` exist only at commit afa4104, where they were measured, and were removed after):

* ``sill`` (the model as documented): log partial sill of each site ~ Normal(2 log S, s_v), logit
  nugget fraction ~ Normal(mu_f, s_f), both non-centred.
* ``total``: the population on the log *total* sill (partial sill + nugget) in place of the partial
  sill, i.e. the single-site "share" coordinates (log total variance, split) put in the population;
  non-centred. A different prior (S becomes the population median total sd).
* ``total_c``: as ``total`` with the well-identified log total variance centred (Papaspiliopoulos,
  Roberts and Sköld 2007: centre what the data identify), the rest non-centred.
* ``total_cb``: as ``total_c`` with the trend coefficients centred too.

Each arm builds the model, samples it with ``bayesgeo.fitting.sampling.sample`` at one fixed target acceptance
(0.9, no rerun, 4 chains x (1000 + 1000), nutpie low-rank, the recipe's seed) and reports divergences,
the smallest bulk ESS over the site-level variables (practical range, sd, nugget sd, total variance,
spatial share) and over the population variables, the largest R-hat, sampling seconds, and where the
divergent draws sit (mean percentile of each population variable among all draws).

Data: those of bench_hier_convergence.py (the demo parcels and simulated several-site sets).

`OPENBLAS_NUM_THREADS=1 python bench/bench_hier_coordinates.py [--count 8] [--arms sill,total] [--table LOG]`
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from _common import publish, sampler_context  # noqa: E402

HYPER = ("range_site_sd", "sill_site_sd", "total_site_sd", "nugget_site_sd", "population_range_z",
         "population_sd_z", "population_total_sd_z", "nugget_logit_mu")


def run(ds, recipe: dict, arm: str, target_accept: float = 0.9) -> dict:
    import arviz as az

    from bayesgeo.fitting.hierarchical import build_site_model
    from bayesgeo.fitting.sampling import sample

    model, _ = build_site_model(ds, covariance=recipe["family"], transform=recipe.get("transform"), _variance=arm)
    t0 = time.perf_counter()
    raw = sample(model, target_accept=target_accept, seed=recipe["seed"])
    seconds = time.perf_counter() - t0
    post, stats = raw["posterior"].to_dataset(), raw["sample_stats"].to_dataset()
    post["total_z"] = post["sd_z"] ** 2 + post["nugget_sd_z"] ** 2
    post["share_z"] = post["sd_z"] ** 2 / post["total_z"]
    site = ["practical_range_z", "sd_z", "nugget_sd_z", "total_z", "share_z"]
    hyper = [v for v in HYPER if v in post]
    ess, rhat = az.ess(post[site + hyper], method="bulk"), az.rhat(post[site + hyper])
    div = stats["diverging"].values.astype(bool)
    where = {}
    if div.any():  # mean percentile of the divergent draws among all draws
        for h in hyper:
            x = post[h].values
            where[h] = float(np.mean(x[div][:, None] > x.ravel()[None, :]))
    return {**{k: recipe[k] for k in ("data", "family", "sites", "n")}, "arm": arm, "target_accept": target_accept,
            "seconds": seconds, "divergences": int(div.sum()),
            "min_ess_site": float(min(ess[v].min() for v in site)),
            "min_ess_hyper": float(min(ess[v].min() for v in hyper)),
            "max_rhat": float(max(rhat[v].max() for v in site + hyper)), "where": where}


def table(records: list[dict], header: str) -> str:
    arms = list(dict.fromkeys(r["arm"] for r in records))
    by = {(r["data"], r["arm"]): r for r in records}
    data = list(dict.fromkeys(r["data"] for r in records))
    lines = [header, "", "| data | " + " | ".join(f"{a}: divergences, min site ESS, min population ESS, max R-hat, s"
                                                  for a in arms) + " |",
             "| --- |" + " --- |" * len(arms)]
    for d in data:
        cells = []
        for a in arms:
            r = by.get((d, a))
            cells.append("-" if r is None else f"{r['divergences']}, {r['min_ess_site']:.0f}, "
                         f"{r['min_ess_hyper']:.0f}, {r['max_rhat']:.3f}, {r['seconds']:.0f}")
        lines.append(f"| {d} | " + " | ".join(cells) + " |")
    lines.append("")
    for a in arms:
        rs = [r for r in records if r["arm"] == a]
        lines.append(f"- {a}: {len(rs)} fits, divergences {sum(r['divergences'] for r in rs)} in "
                     f"{sum(r['divergences'] > 0 for r in rs)} fits, median min site ESS "
                     f"{np.median([r['min_ess_site'] for r in rs]):.0f}, median min population ESS "
                     f"{np.median([r['min_ess_hyper'] for r in rs]):.0f}, max R-hat "
                     f"{max(r['max_rhat'] for r in rs):.3f}, sampling {sum(r['seconds'] for r in rs):.0f} s.")
    return "\n".join(lines)


def main(argv=None) -> int:
    import bench_hier_convergence as data_sets

    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count", type=int, default=8, help="simulated data sets (default 8)")
    ap.add_argument("--arms", default="sill,total", help="comma-separated arms (default sill,total)")
    ap.add_argument("--log", default=str(ROOT / "bench" / "hier_coordinates_fits.jsonl"))
    ap.add_argument("--table", metavar="LOG", help="only print the table of an existing log")
    ap.add_argument("--no-write", action="store_true", help="do not append to bench/RESULTS.md")
    args = ap.parse_args(argv)
    started, load0 = dt.datetime.now(dt.timezone.utc), os.getloadavg()[0]
    if args.table:
        records = [json.loads(line) for line in open(args.table)]
    else:
        records = []
        for job in [data_sets.demo] + [lambda k=k: data_sets.simulated(k) for k in range(args.count)]:
            ds, recipe = job()
            for arm in args.arms.split(","):
                rec = run(ds, recipe, arm)
                records.append(rec)
                with open(args.log, "a") as fh:
                    fh.write(json.dumps(rec) + "\n")
                print(f"{rec['data']:14s} {arm:9s} divergences={rec['divergences']} "
                      f"ess_site={rec['min_ess_site']:.0f} ess_pop={rec['min_ess_hyper']:.0f} "
                      f"t={rec['seconds']:.0f}s", flush=True)
    header = ("## Several-site model: site-level sampling coordinates, side by side\n\n"
              + (f"{sampler_context(started, load0)}. " if not args.table else
                 f"Table of {Path(args.table).name} (`python bench/bench_hier_coordinates.py --table ...`). ")
              + "Every arm at target acceptance 0.9 without rerun, 4 chains x (1000 + 1000), nutpie low-rank; ESS "
              "is bulk ESS from 4,000 draws; site ESS over practical range, sd, nugget sd, total variance and "
              "spatial share of every site; population ESS over the population medians and between-site sds.")
    publish(table(records, header), write=not args.no_write)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
