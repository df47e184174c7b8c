"""Dense GP likelihood: our value-and-gradient Op against PyMC's pm.gp.Marginal and the LAPACK floor.

Part 1, one log-density + gradient, side by side in one run (interleaved rounds, median):
  (a) ours:    PyTensor function (Numba linker, as nutpie uses) of a model log-density and its
               gradient, the likelihood being bayesgeo.gp.dense.marginal_loglik (Matérn 3/2);
  (b) builtin: the same statistical model written with pm.gp.Marginal(Matern32).marginal_likelihood;
  (c) floor:   LAPACK dpotrf + dpotri alone (scipy.linalg.lapack) at the same n, buffer reused.
Part 2, full fits with nutpie (2 chains, tune + draws as below; compiled once, sampling timed): our model (bayesgeo.fitting.model.build_model)
  with nutpie's default diagonal adaptation and with adaptation="low_rank", against the
  pm.gp.Marginal model with the same priors; wall time, minimum bulk ESS (ArviZ), ESS/s.

Run on a quiet machine: `OPENBLAS_NUM_THREADS=1 python bench/bench_likelihood.py`. Prints a table and
appends it, with date and machine information, to bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import statistics
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import arviz as az  # noqa: E402
import nutpie  # noqa: E402
import pymc as pm  # noqa: E402
import pytensor  # noqa: E402
import pytensor.tensor as pt  # noqa: E402
import xarray as xr  # noqa: E402
from scipy.linalg import lapack  # noqa: E402

from bayesgeo.data.demo import simulate_field  # noqa: E402
from bayesgeo.fitting.model import build_model  # noqa: E402

FREE = ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z")
SIDE = 1000.0  # m, square study area of an invented survey


def dataset(n: int, seed: int) -> xr.Dataset:
    """n sites uniform on a 1 km square, Matérn 3/2 field (practical range 300 m, sill 1, nugget 0.25)."""
    rng = np.random.default_rng(seed)
    xy = np.round(SIDE * rng.random((n, 2)), 1)
    z = simulate_field(xy, covariance="matern32", practical_range=300.0, partial_sill=1.0, nugget=0.25,
                       mean=5.0, rng=rng)
    return xr.Dataset({"value": ("obs", z)},
                      coords={"x": ("obs", xy[:, 0]), "y": ("obs", xy[:, 1]), "row": ("obs", np.arange(2, n + 2))},
                      attrs={"source": f"bench-{n}", "crs": "local"})


def builtin_model(ds: xr.Dataset):
    """The same model as build_model(ds) in its earlier coordinates (log sds, trend sampled; standardised
    scale, same priors), likelihood by pm.gp.Marginal: the two differ only in the likelihood code."""
    ours, spec = build_model(ds, covariance="matern32", nugget=True, trend=0, _coordinates="legacy", _trend="sampled")
    rates = spec.rates
    xy = np.column_stack([ds["x"].values, ds["y"].values]) / spec.distance_scale
    y = (ds["value"].values - spec.value_mean) / spec.value_sd
    with pm.Model(coords={"term": list(spec.terms)}) as model:
        prange = pm.InverseGamma("practical_range_z", alpha=1.0, beta=rates["range"])
        sd = pm.Exponential("sd_z", lam=rates["sd"])
        tau = pm.Exponential("nugget_sd_z", lam=rates["nugget"])
        beta = pm.Normal("beta_z", mu=0.0, sigma=spec.priors.beta_sd, dims="term")
        # PyMC's Matern32 is (1 + sqrt(3) r / ls) exp(-sqrt(3) r / ls): ls = sqrt(3) phi
        ls = np.sqrt(3.0) * prange / spec.range_factor
        gp = pm.gp.Marginal(mean_func=pm.gp.mean.Constant(beta[0]), cov_func=sd**2 * pm.gp.cov.Matern32(2, ls))
        gp.marginal_likelihood("y", X=xy, y=y, sigma=tau)
    return ours, model


def grad_function(model):
    """Compiled (Numba linker) function of the model log-density and its gradient, at the initial point."""
    logp = model.logp()
    grads = pt.grad(logp, model.value_vars)
    fn = pytensor.function(model.value_vars, [logp, *grads], mode="NUMBA")
    start = model.initial_point()
    args = [start[v.name] for v in model.value_vars]
    return lambda: fn(*args)


def lapack_floor(ds: xr.Dataset):
    """dpotrf + dpotri on a reused Fortran-ordered buffer holding the Matérn 3/2 matrix."""
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    d = np.sqrt(((xy[:, None] - xy[None]) ** 2).sum(-1)) / 63.2
    k = np.asfortranarray((1 + d) * np.exp(-d) + 0.25 * np.eye(len(d)))
    buf = np.empty_like(k, order="F")

    def run():
        np.copyto(buf, k)
        c, info = lapack.dpotrf(buf, lower=1, overwrite_a=1, clean=0)
        inv, info2 = lapack.dpotri(c, lower=1, overwrite_c=1)
        assert info == 0 and info2 == 0

    def copy_only():
        np.copyto(buf, k)

    return run, copy_only


def timed(fn, reps: int) -> float:
    """Median seconds per call over ``reps`` calls."""
    ts = []
    for _ in range(reps):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return statistics.median(ts)


def per_gradient(sizes, rounds: int) -> list[dict]:
    rows = []
    for n in sizes:
        ds = dataset(n, seed=n)
        ours, builtin = builtin_model(ds)
        f_ours, f_builtin = grad_function(ours), grad_function(builtin)
        floor, copy_only = lapack_floor(ds)
        v_ours, v_builtin = f_ours(), f_builtin()  # warm up (and compile)
        # both models have the same log-density up to the constant of the Potential vs observed y
        reps = max(3, int(2000 / n))
        t = {"ours": [], "builtin": [], "floor": [], "copy": []}
        for _ in range(rounds):  # interleave so that load from elsewhere hits all alike
            t["ours"].append(timed(f_ours, reps))
            t["builtin"].append(timed(f_builtin, reps))
            t["floor"].append(timed(floor, reps))
            t["copy"].append(timed(copy_only, reps))
        m = {k: statistics.median(v) for k, v in t.items()}
        floor_s = m["floor"] - m["copy"]
        diff = abs(float(v_ours[0]) - float(v_builtin[0]))
        rows.append({"n": n, "ours_ms": 1e3 * m["ours"], "builtin_ms": 1e3 * m["builtin"], "floor_ms": 1e3 * floor_s,
                     "ours/builtin": m["ours"] / m["builtin"], "ours/floor": m["ours"] / floor_s, "logp_diff": diff})
        print(f"n={n}: ours {1e3 * m['ours']:.2f} ms, pm.gp.Marginal {1e3 * m['builtin']:.2f} ms, "
              f"LAPACK floor {1e3 * floor_s:.2f} ms, |logp difference| {diff:.2e}", flush=True)
    return rows


def min_bulk_ess(tree) -> float:
    post = tree["posterior"].to_dataset()[list(FREE)]
    ess = az.ess(post, method="bulk")
    return float(min(float(ess[v].min()) for v in ess.data_vars))


def fit(compiled, *, adaptation: str, seed: int, tune: int, draws: int) -> dict:
    """nutpie with its defaults except ``adaptation``; wall time of sampling only (compiled before)."""
    t0 = time.perf_counter()
    tree = nutpie.sample(compiled, draws=draws, tune=tune, chains=2, cores=2, seed=seed, progress_bar=False,
                         adaptation=adaptation)
    wall = time.perf_counter() - t0
    stats = tree["sample_stats"]
    ess = min_bulk_ess(tree)
    steps = float(stats["n_steps"].mean()) if "n_steps" in stats else float("nan")
    div = int(stats["diverging"].sum()) if "diverging" in stats else -1
    return {"wall_s": wall, "ess": ess, "ess_per_s": ess / wall, "steps": steps, "divergences": div}


def full_fits(sizes, seeds, tune: int, draws: int) -> list[dict]:
    rows = []
    for n in sizes:
        ds = dataset(n, seed=n)
        ours, builtin = builtin_model(ds)
        compiled = {}
        for label, model in (("ours", ours), ("pm.gp.Marginal", builtin)):
            t0 = time.perf_counter()
            compiled[label] = nutpie.compile_pymc_model(model)
            print(f"n={n} {label}: nutpie compile {time.perf_counter() - t0:.1f} s", flush=True)
        for seed in seeds:
            for label, key, adaptation in (("ours, diag", "ours", "diag"), ("ours, low_rank", "ours", "low_rank"),
                                           ("pm.gp.Marginal, diag", "pm.gp.Marginal", "diag")):
                r = fit(compiled[key], adaptation=adaptation, seed=seed, tune=tune, draws=draws)
                r.update(n=n, seed=seed, model=label)
                rows.append(r)
                print(f"n={n} seed={seed} {label}: {r['wall_s']:.1f} s, min bulk ESS {r['ess']:.0f}, "
                      f"{r['ess_per_s']:.2f} ESS/s, {r['steps']:.1f} leapfrog steps/draw, "
                      f"{r['divergences']} divergences", flush=True)
    return rows


def in_sampler(sizes, rounds: int, tune: int, draws: int) -> list[dict]:
    """Short nutpie runs of both models alternated: wall time per leapfrog step and chain.

    Full fits run one after the other, so a change of machine load between them biases their
    ratio; alternating short runs exposes both models to the same load."""
    rows = []
    for n in sizes:
        ds = dataset(n, seed=n)
        ours, builtin = builtin_model(ds)
        compiled = {"ours": nutpie.compile_pymc_model(ours), "pm.gp.Marginal": nutpie.compile_pymc_model(builtin)}
        per = {k: [] for k in compiled}
        for r in range(rounds):
            for key, cm in compiled.items():
                t0 = time.perf_counter()
                tree = nutpie.sample(cm, draws=draws, tune=tune, chains=2, cores=2, seed=100 + r, progress_bar=False,
                                     save_warmup=True)
                wall = time.perf_counter() - t0
                steps = float(tree["warmup_sample_stats"]["n_steps"].sum() + tree["sample_stats"]["n_steps"].sum())
                per[key].append(wall / (steps / 2.0))  # 2 chains run side by side
        m = {k: statistics.median(v) for k, v in per.items()}
        rows.append({"n": n, "ours_ms": 1e3 * m["ours"], "builtin_ms": 1e3 * m["pm.gp.Marginal"],
                     "ratio": m["ours"] / m["pm.gp.Marginal"]})
        print(f"n={n}: in nutpie, ms per leapfrog step and chain: ours {1e3 * m['ours']:.2f}, "
              f"pm.gp.Marginal {1e3 * m['pm.gp.Marginal']:.2f}, ratio {m['ours'] / m['pm.gp.Marginal']:.2f}",
              flush=True)
    return rows


def report(grad_rows, fit_rows, args, step_rows=()) -> str:
    now = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    cpu = platform.processor() or platform.machine()
    lines = ["", "## Dense likelihood", "",
             f"{now}; {platform.system()} {platform.machine()} {cpu}, {os.cpu_count()} CPUs, 1-minute load "
             f"average {args.load_start:.1f} at the start and {os.getloadavg()[0]:.1f} at the end (other jobs "
             "inflate times: read the ratios), "
             f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}; pymc {pm.__version__}, "
             f"pytensor {pytensor.__version__}; `python bench/bench_likelihood.py "
             f"{' '.join(sys.argv[1:])}`.", "",
             "One log-density + gradient (median of interleaved rounds; Matérn 3/2 with nugget, model of "
             "bayesgeo.fitting.model.build_model; builtin = the same model with pm.gp.Marginal; floor = LAPACK "
             "dpotrf + dpotri alone):", "",
             "| n | ours (ms) | pm.gp.Marginal (ms) | LAPACK floor (ms) | ours / builtin | ours / floor |",
             "| --- | --- | --- | --- | --- | --- |"]
    for r in grad_rows:
        lines.append(f"| {r['n']:,} | {r['ours_ms']:.2f} | {r['builtin_ms']:.2f} | {r['floor_ms']:.2f} | "
                     f"{r['ours/builtin']:.2f} | {r['ours/floor']:.2f} |")
    if step_rows:
        lines += ["", f"Inside nutpie (short runs of 100 tune + 100 draws, 2 chains on 2 cores, the two models "
                  f"alternated {args.step_rounds} times, median): wall time per leapfrog step and chain", "",
                  "| n | ours (ms) | pm.gp.Marginal (ms) | ours / builtin |", "| --- | --- | --- | --- |"]
        for r in step_rows:
            lines.append(f"| {r['n']:,} | {r['ours_ms']:.2f} | {r['builtin_ms']:.2f} | {r['ratio']:.2f} |")
    if fit_rows:
        lines += ["", f"Full fits, nutpie (defaults but the adaptation), 2 chains on 2 cores, {args.tune} tune + "
                  f"{args.draws} draws; wall = sampling only (compiled before); ESS = minimum bulk ESS over the free parameters (ArviZ); ratio = ESS/s over pm.gp.Marginal's at the same n "
                  "and seed:", "",
                  "| n | seed | model, adaptation | wall (s) | min bulk ESS | ESS/s | ratio | steps/draw | divergences |",
                  "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
        for r in fit_rows:
            base = [b for b in fit_rows if b["n"] == r["n"] and b["seed"] == r["seed"] and b["model"].startswith("pm.gp")]
            ratio = r["ess_per_s"] / base[0]["ess_per_s"] if base else float("nan")
            lines.append(f"| {r['n']:,} | {r['seed']} | {r['model']} | {r['wall_s']:.1f} | {r['ess']:.0f} | "
                         f"{r['ess_per_s']:.2f} | {ratio:.2f} | {r['steps']:.1f} | {r['divergences']} |")
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", type=int, nargs="*", default=[200, 500, 1000, 2000])
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--fit-sizes", type=int, nargs="*", default=[200, 500])
    p.add_argument("--seeds", type=int, nargs="*", default=[1, 2])
    p.add_argument("--tune", type=int, default=500)
    p.add_argument("--draws", type=int, default=500)
    p.add_argument("--step-sizes", type=int, nargs="*", default=[200],
                   help="sizes for alternated short nutpie runs timing each leapfrog step (0 to skip)")
    p.add_argument("--step-rounds", type=int, default=3)
    p.add_argument("--no-append", action="store_true", help="print only; do not append to bench/RESULTS.md")
    args = p.parse_args(argv)
    args.load_start = os.getloadavg()[0]
    grad_rows = per_gradient(args.sizes, args.rounds)
    step_rows = in_sampler([n for n in args.step_sizes if n > 0], args.step_rounds, tune=100, draws=100)
    fit_rows = full_fits(args.fit_sizes, args.seeds, args.tune, args.draws)
    text = report(grad_rows, fit_rows, args, step_rows)
    print(text)
    if not args.no_append:
        path = ROOT / "bench" / "RESULTS.md"
        if not path.exists():
            path.write_text("# Benchmark results\n")
        with path.open("a") as fh:
            fh.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
