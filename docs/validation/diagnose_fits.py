"""Refit SBC replicates of the single model one by one and record why each fails the convergence
check (the experiment behind "Unconverged fits" in docs/validation.md).

Same layout, prior draws, simulated data and sampler seeds as ``bayesgeo validate --kind single
--seed SEED --points N`` (full-mode thresholds), with the tuning length, draws and chains free.
One JSON line per replicate: true values, verdict, failed checks, R-hat, bulk/tail ESS,
divergences, mean step size and leapfrog steps, ranks. Example::

    python docs/validation/diagnose_fits.py --reps 30 --tune 1000 --out tune1000.json
"""
import argparse, json, time, warnings
import numpy as np
from bayesgeo.calibration import ranks as RK
from bayesgeo.calibration import config as C, simulation as S
from bayesgeo.calibration.parallel import make_units
from bayesgeo.fitting.sampling import CompiledModel, sample, compile_model
from bayesgeo.convergence.diagnostics import check_convergence
import pymc as pm

ap = argparse.ArgumentParser()
ap.add_argument("--reps", type=int, default=30); ap.add_argument("--points", type=int, default=60)
ap.add_argument("--seed", type=int, default=7); ap.add_argument("--chains", type=int, default=2)
ap.add_argument("--tune", type=int, default=500); ap.add_argument("--draws", type=int, default=500)
ap.add_argument("--ta", type=float, default=0.9); ap.add_argument("--only", type=str, default="")
ap.add_argument("--nugget", type=int, default=1); ap.add_argument("--out", required=True)
ap.add_argument("--L", type=int, default=99); ap.add_argument("--adapt", default="low_rank")
ap.add_argument("--rhat", type=float, default=1.02); ap.add_argument("--essfail", type=float, default=100)
a = ap.parse_args()
cfg = C.with_settings(C.FULL, chains=a.chains, tune=a.tune, draws=a.draws, ranks_of=a.L, nugget=bool(a.nugget),
                      target_accept=a.ta)
tpl = C.generated_layout(a.points, seed=a.seed)
model, blocks, spec = S.sbc_model(tpl, cfg)
with warnings.catch_warnings():
    warnings.filterwarnings("ignore")
    prior = pm.sample_prior_predictive(draws=a.reps, model=model, random_seed=a.seed, var_names=S._sampled_names(model))
prior = prior["prior"].to_dataset() if hasattr(prior, "children") else prior.prior
noise = np.random.default_rng(np.random.SeedSequence([a.seed, 1]))
payloads, truths, ys = [], [], []
for r in range(a.reps):
    items, tb = S._truth_items(prior, r, spec, "single")
    y = [S.simulate_data(t, b, spec, noise) for t, b in zip(tb, blocks)]
    payloads.append(r); truths.append(items); ys.append(y)
units = make_units(payloads, a.seed)
base = compile_model(model)
only = [int(s) for s in a.only.split(",")] if a.only else range(a.reps)
rows = []
for r in only:
    t0 = time.perf_counter()
    c = CompiledModel(model=base.model, compiled=base.compiled.with_data(**{f"sbc_y_{i}": y for i, y in enumerate(ys[r])}))
    tree = sample(c, chains=cfg.chains, draws=cfg.draws, tune=cfg.tune, target_accept=cfg.target_accept,
                  seed=int(units[r].seed % (2**31 - 1)), adaptation=a.adapt)
    post = tree["posterior"].to_dataset()
    names = [q for q in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z") if q in post]
    conv = check_convergence(tree, var_names=names, thresholds={"rhat": a.rhat, "ess_fail": a.essfail})
    pt = conv.parameters
    ss = tree["sample_stats"].to_dataset()
    ranks = {}
    for label, v in truths[r].items():
        da = post[v["var"]]
        if v["term"] is not None: da = da.isel(term=v["term"])
        arr = np.asarray(da.transpose("chain", "draw").values, float)
        ranks[label] = RK.rank_of(v["value"], arr, cfg.ranks_of)
    rows.append({"r": r, "truth": {k: v["value"] for k, v in truths[r].items()}, "verdict": conv.verdict,
                 "fails": [p["item"] for p in conv.problems if p["level"] == "fail"],
                 "warns": [p["item"] for p in conv.problems if p["level"] == "warn"],
                 "rhat": dict(zip(map(str, pt["parameter"].values), np.round(pt["rhat"].values, 4).tolist())),
                 "ess_bulk": dict(zip(map(str, pt["parameter"].values), np.round(pt["ess_bulk"].values, 0).tolist())),
                 "ess_tail": dict(zip(map(str, pt["parameter"].values), np.round(pt["ess_tail"].values, 0).tolist())),
                 "div": int(conv.divergences), "step": [round(float(s), 4) for s in conv.step_size],
                 "nsteps": float(ss["n_steps"].mean()), "ranks": ranks,
                 "post_sd_beta": float(post["beta_z"].isel(term=0).std()),
                 "post_mean_beta": float(post["beta_z"].isel(term=0).mean()),
                 "sec": round(time.perf_counter() - t0, 2)})
    print(json.dumps(rows[-1]), flush=True)
json.dump({"args": vars(a), "rows": rows}, open(a.out, "w"), indent=1)
