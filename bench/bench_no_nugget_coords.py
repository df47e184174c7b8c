"""Model without a nugget: sample (log range, log sd) or (log range, log microergodic parameter)?

Zhang (2004): with the smoothness fixed the data determine m = sigma^2 / phi^p (p = 2 nu for the
Matérn class, 1 for the spherical family; not defined for the Gaussian family) much better than
sigma and phi. The package samples log practical_range_z and log sd_z; the alternative samples
log practical_range_z and log m, with the same priors: given r, log m = 2 log sd - p log phi is a
one-to-one map of sd, so its density is the exponential PC prior of sd at sd(m, r) times
|d sd / d log m| = sd / 2. Both are linear in the log coordinates, so a low-rank mass matrix can
learn either; this script measures whether the choice matters.

Fits simulated no-nugget data sets (bench_convergence's recipes with the nugget share set to 0,
families other than Gaussian) without a nugget, 4 chains x (1000 + 1000), nutpie low rank, the two
coordinate choices side by side with the same seeds.

`python bench/bench_no_nugget_coords.py [--count 10] [--n-max 300] [--no-write]`
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))
sys.path.insert(0, str(ROOT))

from _common import publish, sampler_context  # noqa: E402
from bench_convergence import data_sets, simulate  # noqa: E402


def build(ds, family: str, arm: str):
    """No-nugget model in (log r, log sd) (the package's) or (log r, log m)."""
    import pymc as pm
    import pytensor.tensor as pt

    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import marginal_loglik
    from bayesgeo.fitting.model import build_model, model_inputs

    if arm == "log_sd":
        return build_model(ds, covariance=family, nugget=False, _trend="sampled")  # as when measured
    spec, y, design, dist = model_inputs(ds, covariance=family, nugget=False, approx="dense")
    cov = get_covariance(family)
    p, rf, lam = float(cov.microergodic_power), spec.range_factor, spec.rates["sd"]

    def logp(value, prange):
        sd = pt.exp(0.5 * (value + p * pt.log(prange / rf)))
        return pt.log(lam) - lam * sd + pt.log(sd) - np.log(2.0)

    def dist_fn(prange, size):
        return 2.0 * pt.log(pm.Exponential.dist(lam=lam, size=size)) - p * pt.log(prange / rf)

    with pm.Model(coords={"term": list(spec.terms)}) as model:
        prange = pm.InverseGamma("practical_range_z", alpha=1.0, beta=spec.rates["range"])
        log_m = pm.CustomDist("log_microergodic_z", prange, logp=logp, dist=dist_fn)
        sd2 = pt.exp(log_m + p * pt.log(prange / rf))
        pm.Deterministic("sd_z", pt.sqrt(sd2))
        beta = pm.Normal("beta_z", mu=0.0, sigma=spec.priors.beta_sd, dims="term")
        pm.Potential("loglik", marginal_loglik(y - pt.dot(design.values, beta), dist, cov, prange / rf, sd2, 0.0))
    return model, spec


def fit(recipe: dict, arm: str) -> dict:
    import xarray as xr

    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.fitting.posterior import derive
    from bayesgeo.fitting.sampling import compile_model, sample

    ds = simulate(recipe)
    model, spec = build(ds, recipe["family"], arm)
    raw = sample(compile_model(model), seed=recipe["seed"] % 100_000)
    post = derive(raw["posterior"].to_dataset(), spec)
    names = ["practical_range_z", "sd_z", "beta_z", "practical_range", "partial_sill", "microergodic"]
    tree = xr.DataTree.from_dict({"/posterior": post[names], "/sample_stats": raw["sample_stats"].to_dataset()})
    conv = check_convergence(tree)
    return {"verdict": conv.verdict, "min_ess": float(np.nanmin(conv.parameters["ess_bulk"].values)),
            "rhat": float(np.nanmax(conv.parameters["rhat"].values)), "div": int(conv.divergences),
            "steps": float(np.mean(raw["sample_stats"]["n_steps"].values)),
            "seconds": float(raw.attrs["sampling_seconds"])}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--count", type=int, default=10)
    ap.add_argument("--n-max", type=int, default=300)
    ap.add_argument("--no-write", action="store_true")
    args = ap.parse_args(argv)
    started, load0 = dt.datetime.now(dt.timezone.utc), os.getloadavg()[0]
    recipes = [r for r in data_sets(2 * args.count, seed=1602, n_max=args.n_max) if r["family"] != "gaussian"]
    recipes = [{**r, "nugget_share": 0.0} for r in recipes[: args.count]]
    rows, agg = [], {}
    for recipe in recipes:
        res = {arm: fit(recipe, arm) for arm in ("log_sd", "log_microergodic")}
        for arm, r in res.items():
            agg.setdefault(arm, []).append(r)
        line = (f"| {recipe['set']} | {recipe['family']} | {recipe['n']} | "
                f"{recipe['practical_range'] / recipe['spacing']:.1f} | "
                + " | ".join(f"{r['verdict']}, {r['min_ess']:.0f}, {r['rhat']:.3f}, {r['div']}, {r['steps']:.1f}"
                             for r in res.values()) + " |")
        print(line, flush=True)
        rows.append(line)
    out = [f"## No nugget: log sd or log microergodic parameter\n\n{sampler_context(started, load0)}. "
           "No-nugget data fitted without "
           "a nugget, 4 chains x (1000 + 1000), nutpie low rank, target acceptance 0.8; both arms sample log "
           "practical_range_z; checked: practical_range_z, sd_z, beta_z and the derived range, partial sill and "
           "microergodic parameter. ESS/s over sampling seconds.", "",
           "| coordinates | fits | exit 0 | pass | median min bulk ESS | median ESS/s | divergences (all) | median steps/draw |",
           "| --- | --- | --- | --- | --- | --- | --- | --- |"]
    for arm, rs in agg.items():
        out.append(f"| {arm} | {len(rs)} | {sum(r['verdict'] != 'fail' for r in rs)} | "
                   f"{sum(r['verdict'] == 'pass' for r in rs)} | {np.median([r['min_ess'] for r in rs]):.0f} | "
                   f"{np.median([r['min_ess'] / r['seconds'] for r in rs]):.1f} | {sum(r['div'] for r in rs)} | "
                   f"{np.median([r['steps'] for r in rs]):.1f} |")
    out += ["", "Per fit (verdict, min bulk ESS, max R-hat, divergences, steps/draw):", "",
            "| set | family | n | range / spacing | log sd | log microergodic |", "| --- | --- | --- | --- | --- | --- |",
            *rows]
    publish("\n".join(out), write=not args.no_write)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
