"""Simulation-based calibration (SBC) of the bayesgeo models and samplers.

SBC (Talts, Betancourt, Simpson, Vehtari and Gelman 2018, "Validating Bayesian inference
algorithms with simulation-based calibration", arXiv:1804.06788) checks a model *and* the
computation that fits it: draw parameters theta* from the prior, simulate data y from
p(y | theta*), fit, and record the rank of theta* among L (thinned) posterior draws. If the
posterior draws come from the exact posterior of the same model, every rank is uniform on
0..L whatever the model; a sampler, likelihood or prior/likelihood mismatch shows up as a
non-uniform histogram (U shape: posterior too narrow; hump: too wide; slope: biased).

What is calibrated here:

* ``kind="single"``: the model of :func:`bayesgeo.fitting.model.build_model` itself. The model is built
  once from a *template* (the layout's locations with the user's values, or standard normal
  values on a generated layout) and its standardised data vector, a constant of the PyMC graph,
  is swapped for a shared variable (graph surgery on the model's ``FunctionGraph``), so the
  priors, transforms and likelihood are the very ones build_model produced. nutpie compiles it
  once and each replicate only replaces the data (``CompiledModel.with_data``).
* ``kind="nn"``: the same model with the dense likelihood node replaced by the nearest-neighbour
  (Vecchia) likelihood of :func:`bayesgeo.gp.nn.nn_loglik` on the same inputs (build_model has
  no switch for it yet). Data are simulated from the *exact* Gaussian process, so the check
  covers the approximation error as well as the sampler.
* ``kind="hierarchical"``: the several-site model of :func:`bayesgeo.fitting.hierarchical.build_site_model`
  (pooling ``"hierarchical"``), one data vector per site.

The SBC holds on the model's standardised scale, where the priors are fixed numbers (the template
fixes the standardisation constants m, s, D). In a real fit m, s and the default prior scales come
from the data themselves, which SBC cannot check; ``docs/validation.md`` says more.

True values come from ``pymc.sample_prior_predictive`` on the model (the same prior by
construction). Data: y = F beta + chol(K) e with K from
:func:`bayesgeo.gp.dense.covariance_matrix` (including the model's jitter). Quantities: the
practical range (``practical_range_z``), partial sill (``sd_z``), nugget (``nugget_sd_z``) and
trend intercept (``beta_z`` at term "1"); ranks and central intervals are unchanged by the
increasing maps to data units (range x D, sill (s sd_z)^2, ...), so they are computed on the
sampled scale.

Fits that fail :func:`bayesgeo.convergence.diagnostics.check_convergence` are *kept* in the ranks and
coverage, flagged per replicate (``verdict``) and listed in the summary; the summary also gives
the coverage among passing fits only.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from bayesgeo.calibration.config import QUICK, SBCConfig
from bayesgeo.calibration.ranks import rank_of
from bayesgeo.calibration.simulation import _censoring_limit, _truth_items, prior_draws, sbc_model, simulate_data
from bayesgeo.common.validate import InputError, check_positive_int

__all__ = ["simulation_based_calibration"]

_LEVELS = (0.5, 0.9)
#: Per-replicate convergence figures kept beside the verdict (bayesgeo.convergence.diagnostics.check_convergence).
_FIT_DIAGNOSTICS = {
    "rhat_max": "largest rank-normalised split R-hat of the checked quantities",
    "ess_min": "smallest bulk or tail ESS of the checked quantities (draws)",
    "divergences": "divergent transitions among the kept draws (all chains)",
    "failed_checks": "checks at level fail, e.g. 'rhat[sd_z],ess_bulk[nugget_sd_z]' (empty when none)",
    "draws": "draws per chain kept (more than the setting when the chains were continued, bayesgeo.fitting.looks)",
}


_CACHE: dict = {}


def _compiled(payload):
    key = payload["key"]
    if key not in _CACHE:
        from bayesgeo.fitting.sampling import compile_model

        model, _, _ = sbc_model(payload["template"], payload["config"])
        _CACHE.clear()
        _CACHE[key] = compile_model(model)
    return _CACHE[key]


def _replicate(unit) -> dict:
    """Fit one simulated data set and rank the truth (a work unit of :func:`bayesgeo.calibration.parallel.run_units`)."""
    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.fitting.looks import convergence_look, longest_chain
    from bayesgeo.fitting.sampling import CompiledModel, sample

    p, cfg = unit.payload, unit.payload["config"]
    if p["censored"] is not None:  # this replicate's own non-detects: its own model (calibration.censoring)
        from bayesgeo.calibration.censoring import censored_template
        from bayesgeo.fitting.sampling import compile_model

        spec = p["spec"]
        tpl = censored_template(p["template"], p["ys"][0], p["censored"], spec.value_mean, spec.value_sd)
        compiled = base = compile_model(sbc_model(tpl, cfg, fixed=spec)[0])
    else:
        base = _compiled(p)
        compiled = CompiledModel(model=base.model, compiled=base.compiled.with_data(
            **{f"sbc_y_{i}": y for i, y in enumerate(p["ys"])}))
    names = [q for q in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z", "anisotropy_z")
             if q in base.model.named_vars]
    look = convergence_look(lambda t: t, thresholds=dict(cfg.thresholds) or None, var_names=names, levels=("fail",))
    tree = sample(compiled, chains=cfg.chains, draws=cfg.draws, tune=cfg.tune, target_accept=cfg.target_accept,
                  seed=int(unit.seed % (2**31 - 1)), look=look,
                  max_draws=longest_chain(cfg.draws, cfg.max_draws))
    post = tree["posterior"].to_dataset()
    if p["trend"] is not None:  # integrated out: exact conditional draws, as bayesgeo.fitting.posterior.fit makes them
        from bayesgeo.fitting.posterior import values_per_draw
        from bayesgeo.gp.trend_posterior import draw_trend

        t, cens = p["trend"], np.flatnonzero(p["censored"]) if p["censored"] is not None else np.zeros(0, int)
        post["beta_z"] = draw_trend(post, p["spec"], values_per_draw(p["ys"][0], cens, post), t["design"], t["dist"],
                                    seed=[int(unit.seed % (2**31 - 1)), 3], xy=t.get("xy"))
        names = [*names, "beta_z"]
        attrs = dict(tree.attrs)
        tree = xr.DataTree.from_dict({"/posterior": post, "/sample_stats": tree["sample_stats"].to_dataset()})
        tree.attrs = attrs
    conv = check_convergence(tree, var_names=[v for v in names if v in post],
                             thresholds=dict(cfg.thresholds) or None)
    ranks, cover = {}, {}
    for label, value in p["truth"].items():
        name, site, term = value["var"], value["site"], value["term"]
        da = post[name]
        if site is not None:
            da = da.isel(site=site)
        if term is not None:
            da = da.isel({value.get("dim", "term"): term})
        arr = np.asarray(da.transpose("chain", "draw").values, dtype=float)
        ranks[label] = rank_of(value["value"], arr, cfg.ranks_of)
        flat = arr.ravel()
        cover[label] = [bool(np.quantile(flat, (1 - a) / 2) <= value["value"] <= np.quantile(flat, (1 + a) / 2))
                        for a in _LEVELS]
    table = conv.parameters
    return {"index": unit.index, "ranks": ranks, "cover": cover, "verdict": conv.verdict,
            "draws": int(post.sizes["draw"]),
            "seconds": float(tree.attrs.get("sampling_seconds", np.nan)),
            "rhat_max": float(np.nanmax(table["rhat"].values)),
            "ess_min": float(np.nanmin(np.minimum(table["ess_bulk"].values, table["ess_tail"].values))),
            "divergences": int(conv.divergences),
            "non_detects": 0 if p["censored"] is None else int(np.sum(p["censored"])),
            "failed_checks": ",".join(p["item"] for p in conv.problems if p["level"] == "fail")}


def simulation_based_calibration(template: xr.Dataset, config: SBCConfig = QUICK, *, replicates: int = 25,
                                 seed: int = 0, scheduler: str | None = None, workers: int = 1,
                                 progress=None) -> xr.Dataset:
    """Run SBC: draw from the model's prior, simulate, fit, rank, for ``replicates`` data sets.

    Parameters
    ----------
    template : xarray.Dataset
        Point data fixing the layout (and the standardisation constants): the user's data, or
        :func:`generated_layout`. Several sites for ``kind="hierarchical"``.
    config : SBCConfig
        Model and sampler settings (:data:`QUICK`, :data:`FULL` or your own).
    replicates : int
        Number of simulated data sets N.
    seed : int
        The prior draws and each replicate's noise and sampler seed follow from it (same seed,
        same numbers).
    scheduler, workers
        Passed to :func:`bayesgeo.calibration.parallel.run_units` (replicates are its work units).
    progress : object with ``update(int)``, optional

    Returns
    -------
    xarray.Dataset
        Along ``replicate`` and ``quantity``: ``rank`` (0..L), ``covered`` (with dim ``level``:
        0.5, 0.9), ``truth``; along ``replicate``: ``verdict``, ``seconds``, ``rhat_max``,
        ``ess_min``, ``divergences`` and ``failed_checks`` (which checks failed). Attributes:
        ``config`` (JSON), ``ranks_of`` (L), ``seed``, ``replicates``, ``n`` (points), ``model``.
    """
    import json

    from bayesgeo.calibration.parallel import make_units, run_units

    replicates = check_positive_int(replicates, "replicates")
    if config.kind == "nn" and config.covariance == "matern":
        raise InputError("covariance: the nn likelihood has no general 'matern' family; pick a fixed-smoothness one")
    model, blocks, spec = sbc_model(template, config)
    prior = prior_draws(model, spec, replicates, seed)
    noise = np.random.default_rng(np.random.SeedSequence([int(seed), 1]))
    limit = _censoring_limit(model, spec, blocks[0], config, seed) if config.censored else None
    payloads, truths = [], []
    key = (config, _layout_key(template))
    for r in range(replicates):
        items, tblocks = _truth_items(prior, r, spec, config.kind)
        ys = [simulate_data(t, b, spec, noise) for t, b in zip(tblocks, blocks)]
        mask = None
        if limit is not None:
            from bayesgeo.calibration.censoring import censor

            ys[0], mask = censor(ys[0], limit)
        payloads.append({"key": key, "template": template, "config": config, "ys": ys, "truth": items, "spec": spec,
                         "censored": mask,
                         "trend": None if "beta_z" in model.named_vars else blocks[0]})
        truths.append(items)
    units = make_units(payloads, seed)
    results = run_units(_replicate, units, scheduler=scheduler, workers=workers, progress=progress)
    labels = list(truths[0])
    out = xr.Dataset(
        {"rank": (("replicate", "quantity"), np.array([[res["ranks"][q] for q in labels] for res in results])),
         "covered": (("replicate", "quantity", "level"),
                     np.array([[res["cover"][q] for q in labels] for res in results], dtype=bool)),
         "truth": (("replicate", "quantity"), np.array([[t[q]["value"] for q in labels] for t in truths])),
         "verdict": ("replicate", np.array([res["verdict"] for res in results], dtype=object).astype(str)),
         "seconds": ("replicate", np.array([res["seconds"] for res in results])),
         **{k: ("replicate", np.array([res[k] for res in results])) for k in _FIT_DIAGNOSTICS},
         **({"non_detects": ("replicate", np.array([res["non_detects"] for res in results]),
                             {"long_name": f"values below the reporting limit {limit:.4g} (standardised)"})}
            if limit is not None else {})},
        coords={"replicate": np.arange(replicates), "quantity": labels, "level": list(_LEVELS)},
        attrs={"config": json.dumps(config.to_dict()), "ranks_of": int(config.ranks_of), "seed": int(seed),
               "replicates": replicates, "n": int(template.sizes["obs"]), "model": config.label,
               "layout": str(template.attrs.get("source", "data")),
               "scale": "standardised (ranks and central intervals equal those in data units)"},
    )
    out["truth"].attrs["long_name"] = "true value on the sampled (standardised) scale"
    for k, text in _FIT_DIAGNOSTICS.items():
        out[k].attrs["long_name"] = text
    return out


def _layout_key(ds: xr.Dataset) -> str:
    import hashlib

    h = hashlib.sha256()
    for name in ("x", "y", "value"):
        h.update(np.ascontiguousarray(ds[name].values, dtype=float).tobytes())
    if "site" in ds.coords:
        h.update("|".join(map(str, ds["site"].values)).encode())
    return h.hexdigest()
