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

import warnings
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError, check_choice, check_positive_int
from bayesgeo.calibration.ranks import rank_of

__all__ = [
    "KINDS",
    "QUANTITIES",
    "SBCConfig",
    "QUICK",
    "FULL",
    "generated_layout",
    "sbc_model",
    "prior_draws",
    "simulate_data",
    "simulation_based_calibration",
    "with_settings",
]

#: Models SBC can check.
KINDS = ("single", "nn", "hierarchical")
#: Quantity label -> (sampled variable, term index or None).
QUANTITIES = {
    "practical_range": ("practical_range_z", None),
    "partial_sill": ("sd_z", None),
    "nugget": ("nugget_sd_z", None),
    "intercept": ("beta_z", 0),
}
_LEVELS = (0.5, 0.9)
#: Per-replicate convergence figures kept beside the verdict (bayesgeo.convergence.diagnostics.check_convergence).
_FIT_DIAGNOSTICS = {
    "rhat_max": "largest rank-normalised split R-hat of the checked quantities",
    "ess_min": "smallest bulk or tail ESS of the checked quantities (draws)",
    "divergences": "divergent transitions among the kept draws (all chains)",
    "failed_checks": "checks at level fail, e.g. 'rhat[sd_z],ess_bulk[nugget_sd_z]' (empty when none)",
    "draws": "draws per chain kept (more than the setting when the chains were continued, bayesgeo.fitting.looks)",
}


@dataclass(frozen=True)
class SBCConfig:
    """Settings of one SBC run (one model configuration).

    Attributes
    ----------
    kind : {"single", "nn", "hierarchical"}
        Which model (module docstring).
    covariance : str
        Covariance family; ``nu`` its smoothness (``"matern"`` only).
    nugget : bool
        Model (and simulate) a nugget.
    neighbours : int
        Conditioning neighbours m of the nn likelihood (``kind="nn"``).
    chains, draws, tune : int
        Sampler settings per replicate (nutpie, low-rank adaptation).
    ranks_of : int
        L, the number of thinned posterior draws each true value is ranked among (ranks 0..L).
    target_accept : float
        Target acceptance of NUTS.
    thresholds : dict
        Overrides of :class:`bayesgeo.convergence.diagnostics.Thresholds` for the convergence verdict.
    max_draws : int or None
        The chains continue while R-hat or ESS *fails* (relaxed thresholds above), looking at
        ``draws``, doubling, up to this many draws per chain (:mod:`bayesgeo.fitting.looks`); ``None``:
        ``4 * draws`` as in ``bayesgeo fit``; equal to ``draws``: off.
    coordinates : {"share", "legacy"}
        Sampling coordinates of the variances of the single-site model (``build_model``'s private
        ``_coordinates``: the default log total variance and logit spatial share, or the earlier
        log sds; docs/model.md). Same model and priors either way.
    trend : {"auto", "sampled"}
        ``"auto"``: as ``build_model`` (the dense likelihood integrates the trend coefficients out
        and SBC draws them after sampling from their exact conditional, as ``bayesgeo fit`` does);
        ``"sampled"``: they are sampled (the earlier model). The nn likelihood always samples them.
    """

    kind: str = "single"
    covariance: str = "matern32"
    nu: float | None = None
    nugget: bool = True
    neighbours: int = 10
    chains: int = 2
    draws: int = 500
    tune: int = 500
    ranks_of: int = 99
    target_accept: float = 0.9
    thresholds: tuple = ()
    max_draws: int | None = None
    coordinates: str = "share"
    trend: str = "auto"

    @property
    def label(self) -> str:
        """Short name, e.g. ``single/matern32/nugget``."""
        return f"{self.kind}/{self.covariance}/{'nugget' if self.nugget else 'no-nugget'}"

    def to_dict(self) -> dict:
        """Plain dictionary (JSON-able)."""
        d = asdict(self)
        d["thresholds"] = dict(self.thresholds)
        return d


#: Settings of the quick mode (CI): short chains, few ranks.
QUICK = SBCConfig(chains=2, draws=200, tune=300, ranks_of=49, thresholds=(("ess_fail", 50.0), ("rhat", 1.05)))
#: Settings of the full mode. About 40% of the fits with a nugget fail the convergence check here
#: whatever the tuning length (500, 1,000 and 2,000 were compared): the failures come from prior
#: draws the data barely identify, not from short adaptation (docs/validation.md, "Unconverged fits").
FULL = SBCConfig(chains=2, draws=500, tune=500, ranks_of=99, thresholds=(("ess_fail", 100.0), ("rhat", 1.02)))


def generated_layout(n: int = 28, *, sites: int = 1, side: float = 100.0, seed: int = 0) -> xr.Dataset:
    """A random layout of ``n`` points per site in a ``side`` x ``side`` square (metres).

    Values are standard normal draws (only the template of the standardisation; SBC replaces
    them). With ``sites > 1`` the sites are labelled ``"A"``, ``"B"``, ... and placed side by
    side. Used when the user gives no data file.
    """
    from bayesgeo.data.points import points_dataset

    n = check_positive_int(n, "points", minimum=6)
    sites = check_positive_int(sites, "sites")
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0.0, side, (n * sites, 2))
    xy[:, 0] += np.repeat(np.arange(sites) * 2.0 * side, n)
    labels = np.repeat([chr(ord("A") + k) for k in range(sites)], n) if sites > 1 else None
    ds = points_dataset(xy[:, 0], xy[:, 1], rng.normal(size=n * sites), site=labels,
                        attrs={"source": "generated layout", "distance_units": "m", "value_units": "1"})
    return ds


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


def sbc_model(template: xr.Dataset, config: SBCConfig):
    """The model SBC fits: build_model / build_site_model on ``template`` with swappable data.

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

    model, spec, y, design, dist = build_model_and_inputs(
        template, covariance=config.covariance, nu=config.nu, nugget=config.nugget,
        _coordinates=config.coordinates, _trend="sampled" if config.kind == "nn" else config.trend)
    blocks = [{"y": y, "design": np.asarray(design.values, dtype=float), "dist": dist}]
    nn = None
    if config.kind == "nn":
        nn = {"xy": np.column_stack([template["x"].values, template["y"].values]).astype(float),
              "covariance": spec.covariance, "neighbours": int(config.neighbours), "metric": spec.metric,
              "distance_scale": spec.distance_scale}
    return _swap_constants(model, [y], nn), blocks, spec


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
            "beta_z": np.atleast_1d(get("beta_z"))}


def simulate_data(truth: dict, block: dict, spec, rng: np.random.Generator) -> np.ndarray:
    """y = F beta + chol(K) e, e ~ N(0, I), with K of :func:`bayesgeo.gp.dense.covariance_matrix`.

    ``truth`` holds ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (or None) and ``beta_z`` on
    the standardised scale; ``block`` the design and scaled distances.
    """
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import covariance_matrix

    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    tau2 = 0.0 if truth["nugget_sd_z"] is None else truth["nugget_sd_z"] ** 2
    k = covariance_matrix(block["dist"], cov, truth["practical_range_z"] / spec.range_factor, truth["sd_z"] ** 2, tau2)
    chol = np.linalg.cholesky(k)
    return block["design"] @ truth["beta_z"] + chol @ rng.standard_normal(len(k))


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
    base = _compiled(p)
    compiled = CompiledModel(model=base.model, compiled=base.compiled.with_data(
        **{f"sbc_y_{i}": y for i, y in enumerate(p["ys"])}))
    names = [q for q in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z")
             if q in base.model.named_vars]
    look = convergence_look(lambda t: t, thresholds=dict(cfg.thresholds) or None, var_names=names, levels=("fail",))
    tree = sample(compiled, chains=cfg.chains, draws=cfg.draws, tune=cfg.tune, target_accept=cfg.target_accept,
                  seed=int(unit.seed % (2**31 - 1)), look=look,
                  max_draws=longest_chain(cfg.draws, cfg.max_draws))
    post = tree["posterior"].to_dataset()
    if p["trend"] is not None:  # integrated out: exact conditional draws, as bayesgeo.fitting.posterior.fit makes them
        from bayesgeo.gp.trend_posterior import draw_trend

        t = p["trend"]
        post["beta_z"] = draw_trend(post, t["spec"], p["ys"][0], t["design"], t["dist"],
                                    seed=[int(unit.seed % (2**31 - 1)), 3])
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
            da = da.isel(term=term)
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
            "failed_checks": ",".join(p["item"] for p in conv.problems if p["level"] == "fail")}


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
    if hier:  # population medians of the practical range and of the field sd (build_site_model)
        for label, var in (("population_range", "population_range_z"), ("population_sd", "population_sd_z")):
            if var in one:
                items[label] = {"var": var, "site": None, "term": None, "value": float(one[var])}
    return items, blocks


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
    payloads, truths = [], []
    key = (config, _layout_key(template))
    for r in range(replicates):
        items, tblocks = _truth_items(prior, r, spec, config.kind)
        ys = [simulate_data(t, b, spec, noise) for t, b in zip(tblocks, blocks)]
        payloads.append({"key": key, "template": template, "config": config, "ys": ys, "truth": items,
                         "trend": None if "beta_z" in model.named_vars else {"spec": spec, **blocks[0]}})
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
         **{k: ("replicate", np.array([res[k] for res in results])) for k in _FIT_DIAGNOSTICS}},
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


def with_settings(config: SBCConfig, **changes) -> SBCConfig:
    """A copy of ``config`` with some fields changed (checked)."""
    for key in ("chains", "draws", "tune", "ranks_of", "neighbours"):
        if key in changes:
            changes[key] = check_positive_int(changes[key], f"--{key.replace('_', '-')}")
    if changes.get("max_draws") is not None:
        changes["max_draws"] = check_positive_int(changes["max_draws"], "max_draws")
    out = replace(config, **changes)
    from bayesgeo.fitting.looks import longest_chain

    longest_chain(out.draws, out.max_draws)  # refuses max_draws below draws
    if out.chains * out.draws < out.ranks_of:
        need = -(-out.ranks_of // out.chains)
        raise InputError(f"draws: {out.draws} draws per chain x {out.chains} chains is fewer than the {out.ranks_of} "
                         f"posterior draws each rank is taken among (Talts et al. 2018); use --draws {need} or more")
    return out
