"""Where does the intercept's over-coverage come from? Rao-Blackwellised coverage beside the raw
SBC coverage of the trend intercept (the experiment behind "Intercept ranks" in docs/validation.md).

The full-mode SBC of the single-site model (Matérn 3/2 with nugget, 60 generated points, layout
seed 7, 2 chains x (500 tune + 500 draws), L = 99) found the intercept's central 50% interval
covering the truth about 59% of the time. This script refits SBC replicates *exactly* as
:func:`bayesgeo.calibration.validation.simulation_based_calibration` does (it calls that very function, chunk by
chunk, with a wrapper around :func:`bayesgeo.fitting.sampling.sample` and
:func:`bayesgeo.calibration.simulation.simulate_data` that keeps the posterior draws and the simulated data), and
then compares, per replicate:

* raw coverage: the SBC's own rule (the truth inside the central a-interval of ``np.quantile`` of
  *all* 2 x 500 beta_z draws, ends included; validation.py ``_replicate``), also the same rule on
  the L = 99 thinned draws, and ``u_raw`` = share of all beta_z draws below the truth;
* Rao-Blackwellised coverage from the covariance-parameter draws only: given theta = (practical
  range, field sd, nugget sd) and y, beta ~ Normal(m, v) with v = (F^T K^-1 F + I / b^2)^-1 and
  m = v F^T K^-1 y (Gaussian linear model with known covariance and conjugate prior N(0, b^2 I):
  Rasmussen and Williams 2006, *Gaussian Processes for Machine Learning*, sec. 2.7, explicit basis
  functions, cited from memory; the same formula as intercept_exact.py), K from
  :func:`bayesgeo.gp.dense.covariance_matrix` (jitter 1e-6 x partial sill on the diagonal, as the
  model's likelihood kernel adds it). ``u_rb`` = mean over draws of Phi((beta* - m) / sqrt(v)); the
  50% interval covers iff 0.25 < u_rb < 0.75, the 90% iff 0.05 < u_rb < 0.95. Under the exact
  posterior u_rb is Uniform(0, 1) across replicates (probability integral transform);
* a second arm with theta FIXED at the truth: a one-parameter PyMC model (beta_z ~ N(0, b), the
  Gaussian likelihood with the true K, written in whitened form z = L^-1 y ~ N(L^-1 F beta, I),
  L = chol(K)) sampled by nutpie with the same settings and seed. Its draws give the same raw
  coverage and ``u_fixed``; ``u_true`` = Phi((beta* - m*) / sqrt(v*)) is the exact answer.

Usage::

    python docs/validation/intercept_rb.py check [--seed 100]            # one replicate: RB mean vs draws
    python docs/validation/intercept_rb.py run --chunks 30 --chunk-size 10 --seed 100 --work DIR
    python docs/validation/intercept_rb.py merge --work DIR --out docs/validation/intercept-rb
    python docs/validation/intercept_rb.py exact --replicates 20000 --seed 9000   # no MCMC: u given the true theta
    # the same experiment at the quick-mode settings (28 points, 2 x (300 + 200), L = 49):
    python docs/validation/intercept_rb.py run --mode quick --layout-seed 5 --seed 1000 --chunks 30 --work DIR2

Chunk c uses SBC seed ``seed + c``: chunks of 10 from seed 100 redraw the very truths and data of the
full-mode run of docs/validation.md (``full2.json``; ``merge`` compares the ranks and verdicts, which
match only approximately on another machine: nutpie's draws are reproducible on one machine, not
across machines). ``run`` skips chunks already saved, so it can be stopped and resumed; ``merge``
writes ``OUT.nc`` (per replicate) and ``OUT.json``: coverage counts with ``scipy.stats.binomtest``
against 0.5 / 0.9, chi-square tests of u in 10 equal bins (``scipy.stats.chisquare``), paired
raw-against-other tables with McNemar's exact test (a binomial test of the discordant pairs), for all
replicates, converged / unconverged fits (SBC verdict), and seeds 100-109 against the rest.
"""

from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.calibration.ranks import _thin, rank_of

_LEVELS = (0.5, 0.9)


def _setup(a):
    from bayesgeo.calibration import config as C, simulation as SIM, validation as V

    base = C.QUICK if a.mode == "quick" else C.FULL
    cfg = C.with_settings(base, kind="single", covariance="matern32", nugget=True)
    tpl = C.generated_layout(a.points or (28 if a.mode == "quick" else 60), seed=a.layout_seed)
    _, blocks, spec = SIM.sbc_model(tpl, cfg)
    return V, cfg, tpl, blocks[0], spec


def _sbc_chunk(V, cfg, tpl, replicates, seed):
    """The SBC's own result for one chunk, plus every fit's tree and the simulated (truth, y)."""
    import bayesgeo.fitting.sampling as S

    trees, sims = [], []
    orig_sample, orig_sim = S.sample, V.simulate_data

    def sample(*a, **k):
        t = orig_sample(*a, **k)
        trees.append(t)
        return t

    def simulate(truth, block, spec, rng):
        y = orig_sim(truth, block, spec, rng)
        sims.append((truth, y))
        return y

    S.sample, V.simulate_data = sample, simulate
    try:
        res = V.simulation_based_calibration(tpl, cfg, replicates=replicates, seed=seed)
    finally:
        S.sample, V.simulate_data = orig_sample, orig_sim
    assert len(trees) == replicates and len(sims) == replicates
    return res, trees, sims


def _conditional(dist, F, y, cov, spec, prange, sd, nug, b):
    """m and v of the intercept given theta (Bayesian linear model with known K), and the factor."""
    from scipy.linalg import cho_factor, cho_solve

    from bayesgeo.gp.dense import covariance_matrix

    k = covariance_matrix(dist, cov, prange / spec.range_factor, sd**2, 0.0 if nug is None else nug**2)
    cf = cho_factor(k, lower=True, check_finite=False)
    kif, kiy = cho_solve(cf, F, check_finite=False), cho_solve(cf, y, check_finite=False)
    vb = np.linalg.inv(F.T @ kif + np.eye(F.shape[1]) / b**2)
    m = vb @ (F.T @ kiy)
    return m, vb, cf


def _cover(draws_flat, truth):
    """validation.py's rule: truth within [q_(1-a)/2, q_(1+a)/2] of np.quantile of the draws."""
    return [bool(np.quantile(draws_flat, (1 - a) / 2) <= truth <= np.quantile(draws_flat, (1 + a) / 2))
            for a in _LEVELS]


def _u_cover(u):
    return [bool((1 - a) / 2 < u < (1 + a) / 2) for a in _LEVELS]


def _fixed_model(n, p, b):
    """beta_z ~ N(0, b); z ~ N(g beta, I) with z = L^-1 y, g = L^-1 F swapped per replicate."""
    import pymc as pm

    from bayesgeo.fitting.sampling import compile_model

    with pm.Model(coords={"term": list(range(p))}) as m:
        z = pm.Data("z", np.zeros(n))
        g = pm.Data("g", np.ones((n, p)))
        beta = pm.Normal("beta_z", 0.0, b, dims="term")
        pm.Normal("obs", mu=pm.math.dot(g, beta), sigma=1.0, observed=z)
    return compile_model(m)


def _ess(x):
    from arviz_stats.base import array_stats

    return (float(array_stats.ess(x, chain_axis=-2, draw_axis=-1, method="bulk")),
            float(array_stats.ess(x, chain_axis=-2, draw_axis=-1, method="tail", prob=(0.05, 0.95))),
            float(array_stats.rhat(x, chain_axis=-2, draw_axis=-1)))


def _analyse(V, cfg, block, spec, res, trees, sims, fixed):
    """Per-replicate records of one chunk (dict of arrays along replicate)."""
    from scipy.linalg import solve_triangular
    from scipy.stats import norm

    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.fitting.sampling import CompiledModel, sample

    cov = get_covariance(spec.covariance)
    F, dist, b = block["design"], block["dist"], float(spec.priors.beta_sd)
    j = list(spec.terms).index("1")
    L = cfg.ranks_of
    rows = []
    for r, (tree, (truth, y)) in enumerate(zip(trees, sims)):
        post = tree["posterior"].to_dataset()
        beta = np.asarray(post["beta_z"].isel(term=j).transpose("chain", "draw").values, dtype=float)
        flat, thin = beta.ravel(), _thin(beta, L)
        bstar = float(truth["beta_z"][j])
        assert np.isclose(bstar, float(res["truth"].sel(quantity="intercept").values[r]))
        th = {q: np.asarray(post[q].transpose("chain", "draw").values, dtype=float).ravel()
              for q in ("practical_range_z", "sd_z", "nugget_sd_z")}
        ms, vs = np.empty(flat.size), np.empty(flat.size)
        for i in range(flat.size):
            m, vb, _ = _conditional(dist, F, y, cov, spec, th["practical_range_z"][i], th["sd_z"][i],
                                    th["nugget_sd_z"][i], b)
            ms[i], vs[i] = m[j], vb[j, j]
        u_rb = float(np.mean(norm.cdf((bstar - ms) / np.sqrt(vs))))
        u_raw = float(np.mean(flat < bstar))
        ess_b, ess_t, rhat_b = _ess(beta)
        cov_sbc = [bool(c) for c in res["covered"].sel(quantity="intercept").values[r]]
        rec = {"seed_sampler": int(tree.attrs["seed"]), "verdict": str(res["verdict"].values[r]),
               "failed_checks": str(res["failed_checks"].values[r]), "rank": int(res["rank"].sel(quantity="intercept").values[r]),
               "truth_beta": bstar, "truth_range": truth["practical_range_z"], "truth_sd": truth["sd_z"],
               "truth_nugget": truth["nugget_sd_z"],
               "cover_sbc": cov_sbc, "cover_raw": _cover(flat, bstar), "cover_raw_thin": _cover(thin, bstar),
               "cover_rb": _u_cover(u_rb), "u_raw": u_raw, "u_rb": u_rb,
               "u_raw_thin": float(np.mean(thin < bstar)),
               "mean_draws": float(flat.mean()), "sd_draws": float(flat.std(ddof=1)),
               "mean_rb": float(ms.mean()), "sd_rb": float(np.sqrt(vs.mean() + ms.var())),
               "mcse_mean": float(flat.std(ddof=1) / np.sqrt(max(ess_b, 1.0))),
               "ess_bulk_beta": ess_b, "ess_tail_beta": ess_t, "rhat_beta": rhat_b,
               "thin_draws": thin}
        # cover_raw must equal the SBC's own record (same rule, same draws)
        rec["sbc_rule_matches"] = rec["cover_raw"] == cov_sbc
        # --- arm 2: theta fixed at the truth, only beta sampled
        m_t, v_t, cf = _conditional(dist, F, y, cov, spec, truth["practical_range_z"], truth["sd_z"],
                                    truth["nugget_sd_z"], b)
        u_true = float(norm.cdf((bstar - m_t[j]) / np.sqrt(v_t[j, j])))
        rec.update({"u_true": u_true, "cover_true": _u_cover(u_true), "mean_true": float(m_t[j]),
                    "sd_true": float(np.sqrt(v_t[j, j]))})
        if fixed is not None:
            z = solve_triangular(cf[0], y, lower=True, check_finite=False)
            g = solve_triangular(cf[0], F, lower=True, check_finite=False)
            comp = CompiledModel(model=fixed.model, compiled=fixed.compiled.with_data(z=z, g=g))
            t2 = sample(comp, chains=cfg.chains, draws=cfg.draws, tune=cfg.tune, target_accept=cfg.target_accept,
                        seed=int(tree.attrs["seed"]))
            b2 = np.asarray(t2["posterior"]["beta_z"].isel(term=j).transpose("chain", "draw").values, dtype=float)
            conv2 = check_convergence(t2, var_names=["beta_z"], thresholds=dict(cfg.thresholds) or None)
            e2 = _ess(b2)
            rec.update({"cover_fixed": _cover(b2.ravel(), bstar), "u_fixed": float(np.mean(b2 < bstar)),
                        "rank_fixed": int(rank_of(bstar, b2, L)), "verdict_fixed": conv2.verdict,
                        "ess_bulk_fixed": e2[0], "ess_tail_fixed": e2[1], "mean_fixed": float(b2.mean()),
                        "sd_fixed": float(b2.std(ddof=1))})
        rows.append(rec)
    return rows


def _to_dataset(rows, seed, L) -> xr.Dataset:
    data = {}
    for key in rows[0]:
        vals = [r[key] for r in rows]
        if key == "thin_draws":
            data[key] = (("replicate", "thinned"), np.array(vals, dtype=np.float32))
        elif key.startswith("cover_"):
            data[key] = (("replicate", "level"), np.array(vals, dtype=bool))
        elif isinstance(vals[0], str):
            data[key] = ("replicate", np.array(vals, dtype=object).astype(str))
        else:
            data[key] = ("replicate", np.array([np.nan if v is None else v for v in vals]))
    ds = xr.Dataset(data, coords={"level": list(_LEVELS), "thinned": np.arange(L)})
    ds["sbc_seed"] = ("replicate", np.full(len(rows), seed))
    ds["sbc_index"] = ("replicate", np.arange(len(rows)))
    return ds


def _run(a) -> None:
    V, cfg, tpl, block, spec = _setup(a)
    work = Path(a.work)
    work.mkdir(parents=True, exist_ok=True)
    fixed = None if a.no_fixed else _fixed_model(block["design"].shape[0], block["design"].shape[1],
                                                 float(spec.priors.beta_sd))
    deadline = time.time() + a.minutes * 60 if a.minutes else None
    for c in range(a.chunks):
        path = work / f"chunk-{a.seed + c}.nc"
        if path.exists():
            continue
        if deadline is not None and time.time() > deadline:
            print(f"deadline reached before chunk {c}; stopping", flush=True)
            break
        t0 = time.perf_counter()
        res, trees, sims = _sbc_chunk(V, cfg, tpl, a.chunk_size, a.seed + c)
        t1 = time.perf_counter()
        rows = _analyse(V, cfg, block, spec, res, trees, sims, fixed)
        ds = _to_dataset(rows, a.seed + c, cfg.ranks_of)
        ds.attrs.update({"mode": a.mode, "points": int(tpl.sizes["obs"]), "layout_seed": a.layout_seed,
                         "config": json.dumps(cfg.to_dict()), "sbc_seconds": t1 - t0, "analysis_seconds": time.perf_counter() - t1,
                         "loadavg_end": os.getloadavg()[0],
                         "finished": time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime())})
        ds.to_netcdf(str(path) + ".tmp", engine="netcdf4")
        os.replace(str(path) + ".tmp", path)
        print(f"chunk {c} (seed {a.seed + c}): SBC {t1 - t0:.0f} s, analysis {ds.attrs['analysis_seconds']:.0f} s; "
              f"50% raw/rb/fixed {int(ds.cover_raw[:, 0].sum())}/{int(ds.cover_rb[:, 0].sum())}/"
              f"{int(ds.cover_fixed[:, 0].sum()) if 'cover_fixed' in ds else '-'} of {a.chunk_size}; "
              f"rule matches SBC {bool(ds.sbc_rule_matches.all())}", flush=True)


def _check(a) -> None:
    """One replicate: the RB mean of beta against the mean of the beta draws (MC error from bulk ESS)."""
    V, cfg, tpl, block, spec = _setup(a)
    res, trees, sims = _sbc_chunk(V, cfg, tpl, 1, a.seed)
    fixed = _fixed_model(block["design"].shape[0], block["design"].shape[1], float(spec.priors.beta_sd))
    r = _analyse(V, cfg, block, spec, res, trees, sims, fixed)[0]
    z = (r["mean_draws"] - r["mean_rb"]) / r["mcse_mean"]
    print(json.dumps({k: v for k, v in r.items() if k != "thin_draws"}, indent=1, default=str))
    print(f"mean of beta draws {r['mean_draws']:.4f}, RB mean {r['mean_rb']:.4f}, MCSE {r['mcse_mean']:.4f}, "
          f"z = {z:.2f}; sd draws {r['sd_draws']:.4f}, RB sd {r['sd_rb']:.4f}")


def _exact(a) -> None:
    """No MCMC: u_true = Phi((beta* - m*) / sqrt(v*)) over many replicates, its 50% / 90% coverage."""
    import warnings

    import pymc as pm
    from scipy.stats import binomtest, chisquare, norm

    from bayesgeo.gp.covariance import get_covariance

    V, cfg, tpl, block, spec = _setup(a)
    from bayesgeo.calibration import simulation as SIM

    model, _, _ = SIM.sbc_model(tpl, cfg)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="The effect of Potentials", category=UserWarning)
        prior = pm.sample_prior_predictive(draws=a.replicates, model=model, random_seed=a.seed,
                                           var_names=SIM._sampled_names(model))["prior"].to_dataset()
    rng = np.random.default_rng(np.random.SeedSequence([a.seed, 1]))
    cov, j, b = get_covariance(spec.covariance), list(spec.terms).index("1"), float(spec.priors.beta_sd)
    u = np.empty(a.replicates)
    for r in range(a.replicates):
        _, tb = SIM._truth_items(prior, r, spec, "single")
        t = tb[0]
        y = SIM.simulate_data(t, block, spec, rng)
        m, vb, _ = _conditional(block["dist"], block["design"], y, cov, spec, t["practical_range_z"], t["sd_z"],
                                t["nugget_sd_z"], b)
        u[r] = norm.cdf((t["beta_z"][j] - m[j]) / np.sqrt(vb[j, j]))
    out = {"replicates": int(a.replicates), "seed": a.seed, "points": int(tpl.sizes["obs"]),
           "u_bins10": np.histogram(u, bins=10, range=(0, 1))[0].tolist()}
    out["chisquare_p"] = float(chisquare(out["u_bins10"]).pvalue)
    for a_ in _LEVELS:
        c = int(np.sum(np.abs(u - 0.5) < a_ / 2))
        out[f"cover_{a_:g}"] = {"count": c, "share": c / len(u), "binomtest_p": float(binomtest(c, len(u), a_).pvalue)}
    print(json.dumps(out))


def _tests(ds: xr.Dataset, mask) -> dict:
    from scipy.stats import binomtest, chisquare

    n = int(mask.sum())
    out = {"replicates": n}
    if n == 0:
        return out
    for arm in ("raw", "raw_thin", "rb", "fixed", "true"):
        key = f"cover_{arm}"
        if key not in ds:
            continue
        entry = {}
        for k, a in enumerate(_LEVELS):
            c = int(ds[key].values[mask, k].sum())
            entry[f"{a:g}"] = {"count": c, "of": n, "share": c / n, "binomtest_p": float(binomtest(c, n, a).pvalue)}
        out[key] = entry
    for u in ("u_raw", "u_rb", "u_fixed", "u_true"):
        if u not in ds:
            continue
        counts = np.histogram(ds[u].values[mask], bins=10, range=(0.0, 1.0))[0]
        res = chisquare(counts)
        out[u] = {"bins10": counts.tolist(), "chisquare_p": float(res.pvalue),
                  "central_half": int(np.sum(np.abs(ds[u].values[mask] - 0.5) < 0.25))}
    pairs = {}
    for other in ("rb", "fixed", "true"):
        if f"cover_{other}" not in ds:
            continue
        for k, a in enumerate(_LEVELS):
            r_, o_ = ds["cover_raw"].values[mask, k], ds[f"cover_{other}"].values[mask, k]
            only_raw, only_o = int(np.sum(r_ & ~o_)), int(np.sum(~r_ & o_))
            d = only_raw + only_o
            pairs[f"raw_vs_{other}_{a:g}"] = {
                "both": int(np.sum(r_ & o_)), "neither": int(np.sum(~r_ & ~o_)),
                "raw_only": only_raw, f"{other}_only": only_o,
                "mcnemar_exact_p": float(binomtest(only_raw, d, 0.5).pvalue) if d else None}
    out["paired"] = pairs
    ratio = ds["sd_draws"].values[mask] / ds["sd_rb"].values[mask]
    zmean = (ds["mean_draws"].values[mask] - ds["mean_rb"].values[mask]) / ds["mcse_mean"].values[mask]
    out["sd_draws_over_sd_rb"] = {"median": float(np.median(ratio)), "q10": float(np.quantile(ratio, 0.1)),
                                  "q90": float(np.quantile(ratio, 0.9))}
    out["mean_draws_minus_rb_in_mcse"] = {"median_abs": float(np.median(np.abs(zmean))),
                                          "share_abs_above_3": float(np.mean(np.abs(zmean) > 3))}
    out["ess_bulk_beta_median"] = float(np.median(ds["ess_bulk_beta"].values[mask]))
    if "sd_fixed" in ds:
        out["sd_fixed_over_sd_true"] = {"median": float(np.median(ds["sd_fixed"].values[mask] / ds["sd_true"].values[mask]))}
    return out


def _merge(a) -> None:
    work = Path(a.work)
    paths = sorted(work.glob("chunk-*.nc"), key=lambda p: int(p.stem.split("-")[1]))
    parts = [xr.load_dataset(p) for p in paths]
    ds = xr.concat(parts, dim="replicate", combine_attrs="drop")
    ds = ds.assign_coords(replicate=np.arange(ds.sizes["replicate"]))
    conv = ds["verdict"].values != "fail"
    summary = {"replicates": int(ds.sizes["replicate"]), "chunks": [
        {"seed": int(p.sbc_seed.values[0]), "replicates": int(p.sizes["replicate"]),
         "sbc_seconds": float(p.attrs["sbc_seconds"]), "analysis_seconds": float(p.attrs["analysis_seconds"]),
         "loadavg_end": float(p.attrs["loadavg_end"]), "finished": p.attrs["finished"]} for p in parts],
        "sbc_rule_matches_all": bool(ds["sbc_rule_matches"].values.all()),
        "all": _tests(ds, np.ones(ds.sizes["replicate"], bool)),
        "converged": _tests(ds, conv), "unconverged": _tests(ds, ~conv),
        "seeds_100_109": _tests(ds, ds["sbc_seed"].values < 110),
        "seeds_from_110": _tests(ds, ds["sbc_seed"].values >= 110)}
    full2 = Path(__file__).with_name("full2.json")
    same = parts[0].attrs.get("mode", "full") == "full" and parts[0].attrs.get("points", 60) == 60 \
        and parts[0].attrs.get("layout_seed", 7) == 7
    if full2.exists() and same:  # do the first chunks reproduce the full-mode run replicate for replicate?
        ref = json.loads(full2.read_text())["single-matern32-nugget"]
        qi = ref["quantity_order"].index("intercept")
        sel = ds["sbc_seed"].values < 100 + len(ref["chunks"])
        idx = (ds["sbc_seed"].values[sel] - 100) * 10 + ds["sbc_index"].values[sel]
        mine = ds["rank"].values[sel].astype(int)
        theirs = np.array([ref["ranks"][i][qi] for i in idx])
        summary["reproduces_full2"] = {"compared": int(sel.sum()), "same_intercept_rank": int(np.sum(mine == theirs)),
                                       "same_verdict": int(np.sum(ds["verdict"].values[sel] == np.array(
                                           [ref["verdicts"][i] for i in idx])))}
    cfg = json.loads(parts[0].attrs.get("config", "{}"))
    if not cfg:  # chunks saved before the attribute existed were all run with the default (full) settings
        from bayesgeo.calibration.config import FULL, with_settings

        cfg = with_settings(FULL, kind="single", covariance="matern32", nugget=True).to_dict()
    summary["setting"] = {"mode": parts[0].attrs.get("mode", "full"), "points": int(parts[0].attrs.get("points", 60)),
                          "layout_seed": int(parts[0].attrs.get("layout_seed", 7)), "config": cfg}
    ds.attrs.update({"description": "per-replicate raw vs Rao-Blackwellised coverage of the intercept "
                     "(docs/validation/intercept_rb.py)",
                     "model": f"single/matern32/nugget, {summary['setting']['points']} generated points, "
                              f"layout seed {summary['setting']['layout_seed']}",
                     "sampler": f"nutpie, {cfg.get('chains', 2)} chains x ({cfg.get('tune', 500)} tune + "
                                f"{cfg.get('draws', 500)} draws), target_accept {cfg.get('target_accept', 0.9)}, low-rank",
                     "config": json.dumps(cfg), "scale": "standardised (beta_z)"})
    if a.no_draws:
        ds = ds.drop_vars(["thin_draws", "thinned"])
    for k in ds.data_vars:  # float32 keeps the file small; the tests above used float64
        if ds[k].dtype == np.float64:
            ds[k] = ds[k].astype(np.float32)
    ds.to_netcdf(a.out + ".nc", engine="netcdf4",
                 encoding={k: {"zlib": True, "complevel": 4} for k in ds.data_vars if ds[k].dtype.kind in "fiub"})
    Path(a.out + ".json").write_text(json.dumps(summary, indent=1) + "\n")
    print(json.dumps(summary, indent=1))


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = p.add_subparsers(dest="cmd", required=True)
    c = sub.add_parser("check")
    c.add_argument("--seed", type=int, default=100)
    r = sub.add_parser("run")
    e = sub.add_parser("exact")
    e.add_argument("--replicates", type=int, default=20000)
    e.add_argument("--seed", type=int, default=9000)
    for q in (c, r, e):
        q.add_argument("--mode", choices=("full", "quick"), default="full",
                       help="SBC settings: config.FULL (default) or config.QUICK")
        q.add_argument("--points", type=int, default=0, help="generated layout size (default 60 full, 28 quick)")
        q.add_argument("--layout-seed", type=int, default=7)
    r.add_argument("--chunks", type=int, default=30)
    r.add_argument("--chunk-size", type=int, default=10)
    r.add_argument("--seed", type=int, default=100)
    r.add_argument("--work", required=True)
    r.add_argument("--minutes", type=float, default=0.0, help="start no new chunk after this many minutes")
    r.add_argument("--no-fixed", action="store_true", help="skip the fixed-theta arm")
    m = sub.add_parser("merge")
    m.add_argument("--work", required=True)
    m.add_argument("--out", required=True)
    m.add_argument("--no-draws", action="store_true", help="leave the thinned beta_z draws out of OUT.nc")
    a = p.parse_args()
    {"check": _check, "run": _run, "merge": _merge, "exact": _exact}[a.cmd](a)


if __name__ == "__main__":
    main()
