"""The model simulation-based calibration fits, its prior draws and the data it simulates.

The single-site model is :func:`bayesgeo.fitting.model.build_model`'s own, its data vector swapped for a
shared variable (graph surgery) so that nutpie compiles it once; the several-site one is
:func:`bayesgeo.fitting.hierarchical.build_site_model`'s. Truths come from the model's prior
(``pymc.sample_prior_predictive``), data from the exact Gaussian process (:func:`simulate_data`). The
method is described in :mod:`bayesgeo.calibration.validation`.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.calibration.config import KINDS, QUANTITIES, SBCConfig
from bayesgeo.common.validate import InputError, check_choice

__all__ = ["sbc_model", "prior_draws", "simulate_data"]


def _sampled_names(model) -> list[str]:
    return [v.name for v in model.free_RVs] + [v.name for v in model.deterministics]


def _swap_constants(model, ys: Sequence[np.ndarray], nn: dict | None):
    """Rebuild ``model`` with the data constants ``ys`` replaced by shared ``sbc_y_<i>``."""
    import pytensor
    from pymc.model.fgraph import fgraph_from_model, model_from_fgraph
    from pytensor.graph.basic import Constant

    from bayesgeo.gp.dense import GPLogpGrad

    fg, _ = fgraph_from_model(model)
    consts = [v for v in fg.variables if isinstance(v, Constant) and getattr(v.data, "ndim", 0) == 1]
    for i, y in enumerate(ys):
        hits = [c for c in consts if c.data.shape == y.shape and np.array_equal(c.data, y)]
        if len(hits) != 1:
            raise RuntimeError(f"SBC: expected one data constant for block {i}, found {len(hits)}")
        fg.replace(hits[0], pytensor.shared(np.array(y, dtype=float), name=f"sbc_y_{i}"), import_missing=True)
    if nn is not None:
        from bayesgeo.gp.nn import nn_loglik

        nodes = [a for a in fg.apply_nodes if isinstance(a.op, GPLogpGrad)]
        if len(nodes) != 1:
            raise RuntimeError(f"SBC nn: expected one dense likelihood node, found {len(nodes)}")
        resid, _, scale, psill, nug = nodes[0].inputs
        new = nn_loglik(resid, nn["xy"], nn["covariance"], scale, psill, nug, neighbours=nn["neighbours"],
                        metric=nn["metric"], distance_scale=nn["distance_scale"])
        fg.replace(nodes[0].outputs[0], new, import_missing=True)
    return model_from_fgraph(fg, mutate_fgraph=True)


def sbc_model(template: xr.Dataset, config: SBCConfig, *, fixed=None):
    """The model SBC fits: build_model / build_site_model on ``template`` with swappable data.

    ``fixed`` (a FitSpec): build the single-site model of ``template``'s own values and non-detects with
    that spec's standardisation constants and resolved priors instead, no data swapped (each replicate
    of a censored configuration, :mod:`bayesgeo.calibration.censoring`).

    Returns
    -------
    model : pymc.Model
        Same priors and likelihood as the package's model (nn: likelihood replaced); data in
        shared variables ``sbc_y_0``, ``sbc_y_1``, ... (one per site).
    blocks : list of dict
        Per data block: ``y`` (template standardised values), ``design`` (n, p), ``dist`` (n, n,
        divided by D).
    spec : FitSpec or SiteSpec
    """
    check_choice(config.kind, KINDS, "kind")
    if config.kind == "hierarchical":
        from bayesgeo.fitting.hierarchical import build_site_model
        from bayesgeo.fitting.site_inputs import site_inputs

        kw = dict(covariance=config.covariance, nu=config.nu, nugget=config.nugget, pooling="hierarchical")
        model, spec = build_site_model(template, **kw)
        _, data = site_inputs(template, **kw)
        blocks = [{"y": d.y, "design": d.design, "dist": d.dist} for d in data]
        return _swap_constants(model, [b["y"] for b in blocks], None), blocks, spec
    from bayesgeo.fitting.model import build_model_and_inputs

    held = {} if fixed is None else {"priors": fixed.priors, "_standardise": (fixed.value_mean, fixed.value_sd)}
    if config.anisotropy:
        held["anisotropy"] = True
    model, spec, y, design, dist = build_model_and_inputs(
        template, covariance=config.covariance, nu=config.nu, nugget=config.nugget,
        _coordinates=config.coordinates, _trend="sampled" if config.kind == "nn" else config.trend, **held)
    xy = np.column_stack([template["x"].values, template["y"].values]).astype(float) / spec.distance_scale
    blocks = [{"y": y, "design": np.asarray(design.values, dtype=float), "dist": dist, "xy": xy}]
    nn = None
    if config.kind == "nn":
        nn = {"xy": np.column_stack([template["x"].values, template["y"].values]).astype(float),
              "covariance": spec.covariance, "neighbours": int(config.neighbours), "metric": spec.metric,
              "distance_scale": spec.distance_scale}
    return _swap_constants(model, [y] if fixed is None else [], nn), blocks, spec


def prior_draws(model, spec, replicates: int, seed: int) -> xr.Dataset:
    """``replicates`` draws (chain 0) of every sampled and deterministic variable of the SBC model
    from its prior (``pymc.sample_prior_predictive``), plus ``beta_z`` from its Normal(0, b^2) prior
    when the model integrates the trend coefficients out (seeded by ``[seed, 2]``)."""
    import pymc as pm

    with warnings.catch_warnings():  # the likelihood potential is rightly ignored when drawing the prior
        warnings.filterwarnings("ignore", message="The effect of Potentials", category=UserWarning)
        prior = pm.sample_prior_predictive(draws=replicates, model=model, random_seed=int(seed),
                                           var_names=_sampled_names(model))
    prior = prior["prior"].to_dataset() if hasattr(prior, "children") else prior.prior
    if "beta_z" not in prior:
        b = np.random.default_rng(np.random.SeedSequence([int(seed), 2])).normal(
            0.0, spec.priors.beta_sd, (1, replicates, len(spec.terms)))
        prior["beta_z"] = (("chain", "draw", "term"), b)
    return prior


def _truth_block(prior: xr.Dataset, i: int, hier: bool) -> dict:
    def get(name):
        if name not in prior:
            return None
        v = prior[name].values
        return np.asarray(v[i] if hier else v, dtype=float)

    return {"practical_range_z": float(get("practical_range_z")), "sd_z": float(get("sd_z")),
            "nugget_sd_z": None if get("nugget_sd_z") is None else float(get("nugget_sd_z")),
            "beta_z": np.atleast_1d(get("beta_z")), "anisotropy_z": get("anisotropy_z")}


def simulate_data(truth: dict, block: dict, spec, rng: np.random.Generator) -> np.ndarray:
    """y = F beta + chol(K) e, e ~ N(0, I), with K of :func:`bayesgeo.gp.dense.covariance_matrix`.

    ``truth`` holds ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (or None) and ``beta_z`` on
    the standardised scale; ``block`` the design and scaled distances; with ``anisotropy_z`` in ``truth`` the
    distances are the anisotropic ones of the block's scaled coordinates ``xy``.
    """
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import covariance_matrix

    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    tau2 = 0.0 if truth["nugget_sd_z"] is None else truth["nugget_sd_z"] ** 2
    dist = block["dist"]
    if truth.get("anisotropy_z") is not None:
        from bayesgeo.gp.anisotropy import angle_ratio, anisotropic_distance

        angle, ratio = angle_ratio(truth["anisotropy_z"])
        dist = anisotropic_distance(block["xy"], block["xy"], float(angle), float(ratio))
    k = covariance_matrix(dist, cov, truth["practical_range_z"] / spec.range_factor, truth["sd_z"] ** 2, tau2)
    chol = np.linalg.cholesky(k)
    return block["design"] @ truth["beta_z"] + chol @ rng.standard_normal(len(k))


def _truth_items(prior: xr.Dataset, r: int, spec, kind: str) -> tuple[dict, list[dict]]:
    """Labelled true values (for ranking) and per-block truths (for simulation) of replicate r."""
    one = prior.isel(chain=0, draw=r)
    hier = kind == "hierarchical"
    sites = list(spec.sites) if hier else [None]
    items, blocks = {}, []
    for i, site in enumerate(sites):
        t = _truth_block(one, i, hier)
        blocks.append(t)
        for label, (var, term) in QUANTITIES.items():
            if var == "nugget_sd_z" and t["nugget_sd_z"] is None:
                continue
            if term is not None and "1" not in spec.terms:
                continue
            value = t[var] if term is None else float(t[var][list(spec.terms).index("1")])
            key = label if site is None else f"{label}[{site}]"
            items[key] = {"var": var, "site": None if site is None else i,
                          "term": None if term is None else list(spec.terms).index("1"), "value": float(value)}
    if not hier and blocks[0].get("anisotropy_z") is not None:  # the two sampled anisotropy coordinates
        for j, label in enumerate(("anisotropy_cos", "anisotropy_sin")):
            items[label] = {"var": "anisotropy_z", "site": None, "term": j, "dim": "anisotropy_coord",
                            "value": float(blocks[0]["anisotropy_z"][j])}
    if hier:  # population medians of the practical range and of the field sd (build_site_model)
        for label, var in (("population_range", "population_range_z"), ("population_sd", "population_sd_z")):
            if var in one:
                items[label] = {"var": var, "site": None, "term": None, "value": float(one[var])}
    return items, blocks


def _censoring_limit(model, spec, block: dict, config: SBCConfig, seed: int) -> float:
    """The fixed reporting limit of a censored configuration (:func:`bayesgeo.calibration.censoring.censoring_limit`):
    pilot truths and noise from seed streams the replicates do not use."""
    from bayesgeo.calibration.censoring import PILOT, censoring_limit

    if config.kind == "hierarchical":
        raise InputError("censored: SBC checks non-detects with the single-site models only")
    pilot = prior_draws(model, spec, PILOT, int(np.random.SeedSequence([int(seed), 4]).generate_state(1)[0]))
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 5]))
    return censoring_limit(lambda i: simulate_data(_truth_items(pilot, i, spec, config.kind)[1][0], block, spec, rng),
                           config.censored)
