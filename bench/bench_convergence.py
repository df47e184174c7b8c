"""Convergence with the default settings: share of ordinary data sets whose fit passes the check.

Simulates data sets on an invented 1 km survey square (uniform random locations) spanning the five
closed-form families (exponential, Matérn 3/2, Matérn 5/2, Gaussian, spherical), n = 50-500,
nugget share 0-0.7 of the total sill (one set in five without nugget) and practical range from about
two sampling spacings (2 x 1000 m / sqrt(n)) to the whole extent (a Latin hypercube over log n, the
share and log range), and fits each with the defaults of
`bayesgeo fit` (nugget on, constant mean, 4 chains x (1000 tuning + 1000 draws), nutpie, low-rank
adaptation, target acceptance 0.8, dense likelihood up to 2,000 points) in two sampling coordinates
side by side, same data and sampler seed:

* ``legacy``: log practical_range_z, log sd_z, log nugget_sd_z (the package's coordinates);
* ``share``: log practical_range_z and (log total variance, logit spatial share) (issue 16's proposal;
  measured here, not the default);
* ``share_ta90`` (only when asked): the same with target acceptance 0.9 instead of 0.8;
* ``looks`` (only when asked): the package's coordinates with chains that continue while R-hat or ESS is
  too poor (bayesgeo.fitting.looks: looks at 1000, 2000 and 4000 draws per chain; the `bayesgeo fit` defaults since
  this arm was measured), against ``legacy``, the same chains stopped at 1000 draws; ``looks_ta90``: the
  same with target acceptance 0.9; ``share_looks``: the variance-split coordinates with chains continued; ``share_int_looks``: the same with
  the trend integrated out (dense; the looks judge the sampled parameters, beta is drawn afterwards);
* ``default``: the package as it stands, through ``bayesgeo.fitting.posterior.fit`` with its defaults (since
  issue 16: the variance-split coordinates, the trend integrated out of the dense likelihood and drawn
  afterwards, chains continued, a rerun at target acceptance 0.9 when the draws hold divergences; wall
  time includes the trend draws and any rerun, sampling seconds are those of the kept run);
  ``default_ta90``, ``default_ta95``: the same with target acceptance 0.9 or 0.95 from the start;
* ``share_int``, ``legacy_int`` (only when asked, dense only): those coordinates with the trend coefficients
  integrated out of the likelihood, y | theta ~ N(0, K + b^2 F F^T), and drawn after sampling
  from their exact conditional N(m, V), V = (F^T K^-1 F + I / b^2)^-1, m = V F^T K^-1 y
  (Rasmussen and Williams 2006, sec. 2.7): a measurement, not the package's model.

Per fit it records the convergence verdict of `bayesgeo.convergence.diagnostics.check_convergence` as the
command line computes it (exit 0 = pass or warn, exit 3 = fail), the minimum bulk ESS over every
checked parameter, the largest R-hat, divergences, sampling and wall seconds (wall includes the
compilation), and where the divergent draws sit (posterior nugget ratio and practical range /
extent of the divergent draws against all draws).

`python bench/bench_convergence.py [--quick] [--sets 0 1 ...] [--approx nn] [--resume FILE]`
prints a table per coordinate system and appends it to bench/RESULTS.md (unless ``--no-write``).
Every fit is appended to a JSON-lines file as it finishes (``--log``), so a stopped run can be
summarised or resumed (``--resume`` skips the fits already in the file).
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

from _common import publish, sampler_context  # noqa: E402  (bench/ is on sys.path when run as a script)

FAMILIES = ("exponential", "matern32", "matern52", "gaussian", "spherical")
SIDE = 1000.0  # m, side of the invented survey square
#: Arms compared: name -> (sampling coordinates, target acceptance rate).
ARMS = {"legacy": ("legacy", 0.8), "share": ("share", 0.8), "share_ta90": ("share", 0.9),
        "share_int": ("share", 0.8), "legacy_int": ("legacy", 0.8), "looks": ("legacy", 0.8),
        "looks_ta90": ("legacy", 0.9), "share_looks": ("share", 0.8), "share_int_looks": ("share", 0.8),
        "default": ("share", 0.8), "default_ta90": ("share", 0.9), "default_ta95": ("share", 0.95)}
COORDS = ("legacy", "share")  # the default side-by-side


def data_sets(count: int, seed: int = 16, *, n_max: int = 500) -> list[dict]:
    """``count`` data-set recipes, a Latin hypercube over log n in [50, n_max], nugget share in
    [0, 0.7] and log practical range between two sampling spacings (2 x side / sqrt(n)) and the
    extent (sqrt(2) x side); the family is cycled and one set in five (at random, not tied to a
    family) has no nugget at all. With ``count >= 20`` and ``n_max >= 500``, sets 0 and 1 are
    Matérn 3/2 at n = 500 (the speed target)."""
    rng = np.random.default_rng(seed)

    def strata():
        return (rng.permutation(count) + rng.random(count)) / count

    u_n, u_share, u_range = strata(), strata(), strata()
    no_nugget = set(rng.choice(count, size=count // 5, replace=False).tolist())
    out = []
    for i in range(count):
        family = FAMILIES[i % len(FAMILIES)]
        n = int(round(np.exp(np.log(50) + u_n[i] * (np.log(n_max) - np.log(50)))))
        if count >= 20 and n_max >= 500 and i < 2:
            family, n = "matern32", 500
        share0 = 0.0 if i in no_nugget else float(0.7 * u_share[i])
        spacing = SIDE / np.sqrt(n)
        lo, hi = 2.0 * spacing, np.sqrt(2.0) * SIDE
        prange = float(np.exp(np.log(lo) + u_range[i] * (np.log(hi) - np.log(lo))))
        out.append({"set": i, "family": family, "n": n, "nugget_share": share0, "practical_range": prange,
                    "spacing": spacing, "seed": int(rng.integers(2**31 - 1))})
    return out


def simulate(recipe: dict):
    """Point data of one recipe (total sill 4, mean 10: values in invented mg/kg)."""
    from bayesgeo.data.points import points_dataset
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng(recipe["seed"])
    xy = SIDE * rng.random((recipe["n"], 2))
    total = 4.0
    z = simulate_field(xy, covariance=recipe["family"], practical_range=recipe["practical_range"],
                       partial_sill=total * (1.0 - recipe["nugget_share"]), nugget=total * recipe["nugget_share"],
                       mean=10.0, rng=rng)
    return points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": f"set{recipe['set']}", "distance_units": "m",
                                                         "value_units": "mg/kg", "coords": "xy"})


def fit_one(recipe: dict, arm: str, approx: str) -> dict:
    """Fit one data set with the command-line defaults in the coordinates of ``arm``; the record of it."""
    import xarray as xr

    from bayesgeo.fitting.model import build_model_and_inputs
    from bayesgeo.fitting.posterior import derive
    from bayesgeo.fitting.sampling import compile_model, sample

    ds = simulate(recipe)
    t0 = time.perf_counter()
    coords, target_accept = ARMS[arm]
    if arm.startswith("default"):
        return _record(recipe, arm, *_fit_default(ds, recipe, approx, None if arm == "default" else target_accept),
                       t0=t0)
    # the coordinates of the arm; the trend coefficients integrated out (``_int``, dense) or sampled
    model, spec, y, design, dist = build_model_and_inputs(ds, covariance=recipe["family"], approx=approx,
                                                          _coordinates=coords,
                                                          _trend="integrated" if "_int" in arm else "sampled")
    compiled = compile_model(model)
    extra = {}
    if "looks" in arm:
        from bayesgeo.fitting.looks import convergence_look, default_max_draws

        if "_int" in arm:  # beta is drawn after sampling: the looks judge the sampled parameters alone
            prepare = lambda r: r  # noqa: E731
        else:
            prepare = lambda r: xr.DataTree.from_dict({  # noqa: E731
                "/posterior": derive(r["posterior"].to_dataset(), spec), "/sample_stats": r["sample_stats"].to_dataset()})
        extra = {"max_draws": default_max_draws(1000), "look": convergence_look(prepare)}
    raw = sample(compiled, seed=recipe["seed"] % 100_000, target_accept=target_accept, **extra)
    post = raw["posterior"].to_dataset()
    if "_int" in arm:
        from bayesgeo.gp.trend_posterior import draw_trend

        post["beta_z"] = draw_trend(post, spec, y, design.values, dist, seed=recipe["seed"] % 100_000)
    post = derive(post, spec)
    stats = raw["sample_stats"].to_dataset()
    return _record(recipe, arm, spec, post, stats, float(raw.attrs["sampling_seconds"]), raw.attrs.get("looks", []),
                   target_accept, t0=t0)


def _fit_default(ds, recipe: dict, approx: str, target_accept: float | None):
    """``bayesgeo.fitting.posterior.fit`` with its defaults but ``target_accept`` (None: the default, with its
    rerun at 0.9 when the draws hold divergences): (spec, posterior, sample stats, sampling s, looks,
    target accept)."""
    import json as _json

    from bayesgeo.fitting.posterior import fit, fit_spec

    tree = fit(ds, covariance=recipe["family"], approx=approx, seed=recipe["seed"] % 100_000,
               target_accept=target_accept)
    smp = _json.loads(tree.attrs["settings"])["sampler"]
    return (fit_spec(tree), tree["posterior"].to_dataset(), tree["sample_stats"].to_dataset(),
            float(smp["sampling_seconds"]), smp.get("looks", []), float(smp["target_accept"]), smp.get("rerun"))


def _record(recipe, arm, spec, post, stats, sampling_seconds, looks, target_accept, rerun=None, *, t0):
    """The JSON record of one fit (verdict, ESS, R-hat, divergences and where they sit, times)."""
    import xarray as xr

    from bayesgeo.convergence.diagnostics import check_convergence

    wall = time.perf_counter() - t0
    tree = xr.DataTree.from_dict({"/posterior": post, "/sample_stats": stats})
    conv = check_convergence(tree)
    table = conv.parameters
    div = np.asarray(stats["diverging"].values, dtype=bool)
    ratio = np.asarray(post["nugget_ratio"].values)
    rz = np.asarray(post["practical_range_z"].values)
    where = None
    if div.any():
        where = {"nugget_ratio_div_median": float(np.median(ratio[div])),
                 "nugget_ratio_all_median": float(np.median(ratio)),
                 "nugget_ratio_div_min": float(np.min(ratio[div])),
                 "nugget_ratio_all_q05": float(np.quantile(ratio, 0.05)),
                 "range_div_median": float(np.median(rz[div])), "range_all_median": float(np.median(rz)),
                 "range_all_q95": float(np.quantile(rz, 0.95))}
        b0 = np.asarray(post["beta_z"].sel(term="1").values)
        z0 = np.abs(b0 - b0.mean()) / b0.std()
        where["intercept_absz_div_median"] = float(np.median(z0[div]))  # |intercept - mean| in posterior sds
        where["long_range_share_div"] = float(np.mean(rz[div] > 1.0))  # divergent draws with range > extent
        where["long_range_share_all"] = float(np.mean(rz > 1.0))
    worst = [p["item"] + ":" + p["check"] for p in conv.problems if p["level"] == "fail"]
    return {**recipe, "coords": arm, "approx": spec.approx, "verdict": conv.verdict,
            "exit": 3 if conv.verdict == "fail" else 0, "min_ess_bulk": float(np.nanmin(table["ess_bulk"].values)),
            "min_ess_tail": float(np.nanmin(table["ess_tail"].values)), "max_rhat": float(np.nanmax(table["rhat"].values)),
            "divergences": int(conv.divergences), "sampling_seconds": sampling_seconds,
            "target_accept": target_accept, "wall_seconds": float(wall), "steps_per_draw": float(np.mean(stats["n_steps"].values)),
            "divergence_location": where, "failed": worst[:6], "draws_kept": int(post.sizes["draw"]),
            "looks": [{k: v for k, v in lk.items() if k != "short"} for lk in looks], "rerun": rerun}


def _rate(r: dict) -> float:
    """Minimum bulk ESS per sampling second of one fit record."""
    return r["min_ess_bulk"] / r["sampling_seconds"]


def summarise(records: list[dict], header: str, arms=COORDS) -> str:
    """Markdown: one row per arm (sets fitted in every arm), then per set, then the divergence locations."""
    lines = [header, "",
             "| arm | fits | exit 0 (pass or warn) | pass | median min bulk ESS | median min ESS/s | "
             "fits with divergences | divergences (all) | median wall (s) | total wall (s) |",
             "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    have = {(q["set"], q["coords"]) for q in records}
    sets = sorted({r["set"] for r in records if all((r["set"], c) in have for c in arms)})
    records = [r for r in records if r["coords"] in arms]
    for c in arms:
        rs = [r for r in records if r["coords"] == c and r["set"] in sets]
        if not rs:
            continue
        ok = sum(r["exit"] == 0 for r in rs)
        ess_s = [r["min_ess_bulk"] / r["sampling_seconds"] for r in rs]
        lines.append(
            f"| {c} | {len(rs)} | {ok}/{len(rs)} ({100 * ok / len(rs):.0f}%) | "
            f"{sum(r['verdict'] == 'pass' for r in rs)} | {np.median([r['min_ess_bulk'] for r in rs]):.0f} | "
            f"{np.median(ess_s):.2f} | {sum(r['divergences'] > 0 for r in rs)} | {sum(r['divergences'] for r in rs)} | "
            f"{np.median([r['wall_seconds'] for r in rs]):.1f} | {sum(r['wall_seconds'] for r in rs):.0f} |")
    big = [s for s in sets if any(r["set"] == s and r["family"] == "matern32" and r["n"] == 500 for r in records)]
    if big:
        lines += ["", "Matérn 3/2, n = 500 (speed target): min bulk ESS per sampling second, per set:", ""]
        for s in big:
            row = {r["coords"]: r for r in records if r["set"] == s}
            lines.append(f"- set {s}: " + ", ".join(
                f"{c} {row[c]['min_ess_bulk'] / row[c]['sampling_seconds']:.2f} ({row[c]['min_ess_bulk']:.0f} ESS in "
                f"{row[c]['sampling_seconds']:.0f} s, {row[c]['steps_per_draw']:.1f} steps/draw)" for c in arms if c in row)
                + "".join(f"; ratio {c}/{arms[0]} {_rate(row[c]) / _rate(row[arms[0]]):.2f}"
                          for c in arms[1:] if c in row and arms[0] in row))
    lines += ["", "Per set (family, n, true nugget share, practical range / spacing; per coordinates: verdict, "
              "min bulk ESS, max R-hat, divergences, sampling s):", "",
              "| set | family | n | nugget share | range / spacing | " + " | ".join(arms) + " |",
              "| --- | --- | --- | --- | --- | " + " | ".join("---" for _ in arms) + " |"]
    for s in sets:
        row = {r["coords"]: r for r in records if r["set"] == s}
        r0 = next(iter(row.values()))
        cells = [f"{row[c]['verdict']}, {row[c]['min_ess_bulk']:.0f}, {row[c]['max_rhat']:.3f}, {row[c]['divergences']}, "
                 f"{row[c]['sampling_seconds']:.0f}" + (f", {row[c]['draws_kept']} draws" if "looks" in c or c == "default" else "")
                 if c in row else "" for c in arms]
        lines.append(f"| {s} | {r0['family']} | {r0['n']} | {r0['nugget_share']:.2f} | "
                     f"{r0['practical_range'] / r0['spacing']:.1f} | " + " | ".join(cells) + " |")
    divs = [r for r in records if r["set"] in sets and r["divergence_location"]]
    if divs:
        lines += ["", "Where the divergent draws sit (median over the divergent draws against all draws of the fit):", "",
                  "| set | coordinates | divergences | nugget ratio: divergent / all (all 5%) | "
                  "practical range / extent: divergent / all (all 95%) | share of draws with range > extent: "
                  "divergent / all | intercept: median abs. deviation of divergent draws (posterior sds) |",
                  "| --- | --- | --- | --- | --- | --- | --- |"]
        for r in divs:
            w = r["divergence_location"]
            lines.append(f"| {r['set']} | {r['coords']} | {r['divergences']} | {w['nugget_ratio_div_median']:.3f} / "
                         f"{w['nugget_ratio_all_median']:.3f} ({w['nugget_ratio_all_q05']:.3f}) | "
                         f"{w['range_div_median']:.3f} / {w['range_all_median']:.3f} ({w['range_all_q95']:.3f}) | "
                         f"{w.get('long_range_share_div', np.nan):.2f} / {w.get('long_range_share_all', np.nan):.2f} | "
                         f"{w.get('intercept_absz_div_median', np.nan):.2f} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="6 small data sets (n <= 120): a smoke run")
    ap.add_argument("--count", type=int, default=40, help="number of data sets (default 40)")
    ap.add_argument("--sets", type=int, nargs="*", default=None, help="only these set numbers")
    ap.add_argument("--coords", nargs="*", default=list(COORDS), choices=list(ARMS),
                    help="arms: legacy (old coordinates), share (new), share_ta90 (new, target acceptance 0.9), "
                         "share_int / legacy_int (trend integrated out; dense), looks (legacy coordinates, chains "
                         "continued while R-hat or ESS is too poor)")
    ap.add_argument("--approx", choices=("dense", "nn"), default="dense")
    ap.add_argument("--log", default=str(ROOT / "bench" / "convergence_fits.jsonl"), help="JSON-lines record of every fit")
    ap.add_argument("--resume", action="store_true", help="skip fits already in --log")
    ap.add_argument("--summarise-only", action="store_true", help="only print the table of the fits in --log")
    ap.add_argument("--no-write", action="store_true", help="do not append to bench/RESULTS.md")
    args = ap.parse_args(argv)

    recipes = data_sets(6, seed=160, n_max=120) if args.quick else data_sets(args.count)
    if args.sets is not None:
        recipes = [r for r in recipes if r["set"] in args.sets]
    log = Path(args.log)
    mode = ("quick" if args.quick else "full") + f"/{args.approx}"
    done = []
    if log.exists() and (args.resume or args.summarise_only):
        done = [json.loads(line) for line in log.read_text().splitlines() if line.strip()]
        done = [r for r in done if r.get("mode") == mode]
    started = dt.datetime.now(dt.timezone.utc)
    load0 = os.getloadavg()[0]
    if not args.summarise_only:
        for k, recipe in enumerate(recipes):
            order = args.coords if k % 2 == 0 else args.coords[::-1]  # alternate which goes first
            for c in order:
                if any(r["set"] == recipe["set"] and r["coords"] == c for r in done):
                    continue
                rec = {**fit_one(recipe, c, args.approx), "mode": mode}
                done.append(rec)
                with open(log, "a") as fh:
                    fh.write(json.dumps(rec) + "\n")
                print(f"set {rec['set']:2d} {rec['family']:11s} n={rec['n']:3d} share={rec['nugget_share']:.2f} "
                      f"range/spacing={rec['practical_range'] / rec['spacing']:5.1f} {c:6s} {rec['verdict']:4s} "
                      f"ess={rec['min_ess_bulk']:6.0f} rhat={rec['max_rhat']:.3f} div={rec['divergences']:3d} "
                      f"t={rec['sampling_seconds']:.0f}s {' '.join(rec['failed'][:3])}", flush=True)
    wanted = {r["set"] for r in recipes}
    records = [r for r in done if r["set"] in wanted]
    for r in records:
        r.setdefault("target_accept", ARMS[r["coords"]][1])
    context = (f"summary of the fits recorded in {log.name} (run times there); {sampler_context()}"
               if args.summarise_only else sampler_context(started, load0))
    header = (f"## Convergence with the default settings ({mode})\n\n{context}. "
              f"Data sets: {len({r['set'] for r in records})} of {len(recipes)} recipes fitted; "
              "each fit 4 chains x (1000 + 1000), nutpie low-rank, target acceptance 0.8 (the `bayesgeo fit` "
              "defaults before chains were continued; 0.9 in the arm share_ta90; the arm looks continues the same "
              "chains to 2000 and 4000 draws while R-hat or ESS is too poor, the defaults now). ESS/s = minimum bulk ESS over every checked parameter / sampling seconds (compiled "
              "before); wall includes compilation.")
    publish(summarise(records, header, args.coords), write=not args.no_write)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
