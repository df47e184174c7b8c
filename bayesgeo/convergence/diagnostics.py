"""Convergence diagnostics of a posterior sample and a pass / warn / fail verdict.

For every scalar parameter (raw and derived; vector variables such as ``beta`` per element,
site-indexed ones per site) :func:`check_convergence` reports, computed with ArviZ 1.x
(``arviz_stats``):

* rank-normalised split R-hat, the larger of the bulk and folded versions;
* bulk ESS and tail ESS (the smaller of the ESS of the 5% and 95% quantile indicators);
* Monte Carlo standard error of the mean and of the 5% and 95% quantiles;
* the integrated autocorrelation time (Geyer's initial monotone sequence, see
  :mod:`bayesgeo.convergence.autocorr`).

From the sampler statistics it reports divergent transitions (count, share, per chain, and where
the divergent draws sit relative to the others), E-BFMI per chain, the share of transitions that
hit the maximum tree depth and the step size per chain. nutpie's names (``depth``,
``maxdepth_reached``) and PyMC's own (``tree_depth``, ``reached_max_treedepth``) are both read.

Each failed check becomes a *problem* with its threshold, the threshold's source and concrete
advice. Thresholds (:class:`Thresholds`):

======================  ===================  ===========  ============================================
check                   pass                 level        source
======================  ===================  ===========  ============================================
R-hat                   < 1.01               fail         Vehtari et al. 2021
bulk / tail ESS         >= 400               warn         Vehtari et al. 2021 (400 = 100 per chain x 4)
bulk / tail ESS         >= 100               fail         common practice (our choice of band)
divergences             none                 warn         common practice (Betancourt 2017)
divergences             share <= 1%          fail         our choice
E-BFMI (per chain)      >= 0.3               warn         Betancourt 2016
tree depth saturation   share <= 0           warn         common practice
======================  ===================  ===========  ============================================

References
----------
Vehtari, Gelman, Simpson, Carpenter and Bürkner (2021). Rank-normalization, folding, and
localization: an improved R-hat for assessing convergence of MCMC. *Bayesian Analysis* 16(2).
Betancourt (2016). Diagnosing suboptimal cotangent disintegrations in Hamiltonian Monte Carlo.
arXiv:1604.00695.
Betancourt (2017). A conceptual introduction to Hamiltonian Monte Carlo. arXiv:1701.02434.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields, replace

import numpy as np
import xarray as xr

from bayesgeo.convergence.autocorr import IAT_METHODS, iat_array, stack_parameters
from bayesgeo.common.validate import InputError
from bayesgeo.common.io import to_jsonable
from bayesgeo.convergence.sampler_stats import (_DEPTH_NAMES, _SATURATION_NAMES, _divergence_location, _first,
                                                _max_depth, _sample_stats)

__all__ = ["CAUTION", "Convergence", "Thresholds", "check_convergence"]

VERDICTS = ("pass", "warn", "fail")

#: Printed with every verdict; the diagnostics feed contamination and exposure decisions.
CAUTION = (
    "Convergence diagnostics can reveal sampling problems but cannot prove their absence, and a "
    "'pass' says nothing about whether the model suits the site. Results that feed contamination "
    "or exposure decisions must be reviewed against local regulation and guidance and by a "
    "licensed professional."
)

_SOURCES = {
    "rhat": "Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021, Bayesian Analysis 16: rank-normalised split R-hat < 1.01",
    "ess": "Vehtari et al. 2021, Bayesian Analysis 16: bulk and tail ESS > 400 (100 per chain with 4 chains)",
    "ess_fail": "common practice: below 100 the ESS and R-hat estimates themselves are unreliable (our choice of band)",
    "divergence": "common practice (Betancourt 2017, arXiv:1701.02434): any divergence may bias the sample",
    "divergence_fail_share": "our choice: more than 1% of transitions divergent",
    "bfmi": "Betancourt 2016, arXiv:1604.00695: E-BFMI below 0.3 indicates poor energy exploration",
    "tree_depth_share": "common practice: transitions stopped at the maximum tree depth (efficiency, not bias)",
}

ADVICE = {
    "rhat": ("chains disagree: run longer tuning and more draws; inspect the trace and rank plots for a "
             "stuck or multimodal chain (range and partial sill trade off along a ridge); use a more "
             "informative range prior (e.g. a PC prior) or sample the microergodic parameter "
             "sigma^2/phi^(2 nu); run at least 4 chains; `bayesgeo fit` continues the same chains while R-hat or "
             "ESS is too poor, up to --max-draws (default 4 x --draws): raise it; `bayesgeo fit --keep-sampling "
             "MINUTES` refits with fresh chains and doubled tuning and draws until the check passes or the time "
             "runs out"),
    "ess": ("too few effective draws: run more draws (ESS grows about linearly with them); use "
            "low-rank or dense mass-matrix adaptation, which helps the correlated range and sill; "
            "reparametrise (log scale, microergodic parameter); raise `bayesgeo fit --max-draws` (the chains "
            "continue while ESS is too low) or use `--keep-sampling MINUTES`, which does the longer runs for you"),
    "divergence": ("raise the target acceptance rate (e.g. 0.95) and the tuning length; if the divergent "
                   "draws sit at small range or near-zero nugget (see divergence_location), use a more "
                   "informative prior that keeps them away from zero or drop the nugget"),
    "bfmi": ("the momentum resampling explores the energy poorly (heavy tails or funnel geometry): "
             "longer tuning, sample sill and range on the log scale, more informative priors"),
    "tree_depth": ("trajectories hit the maximum tree depth (an efficiency problem, not a bias): rescale "
                   "coordinates so the range is of order 1 (e.g. km instead of m), use low-rank "
                   "mass-matrix adaptation, or raise the maximum depth"),
    "stuck": ("a chain did not move for this parameter: check the model for evaluation failures "
              "(a covariance matrix that is not positive definite returns NaN), add a small nugget "
              "or jitter, rerun with another seed and longer tuning"),
    "nonfinite": "non-finite draws: the model produced NaN/inf; check the data scaling and priors, then rerun",
    "chains": "R-hat needs at least 2 chains: run 4 chains (Vehtari et al. 2021 recommend at least 4)",
    "sample_stats": "no sampler statistics in the file: save the sample_stats group to check divergences, E-BFMI and tree depth",
}


@dataclass(frozen=True)
class Thresholds:
    """Verdict thresholds; the sources are in :data:`_SOURCES` and in every JSON output.

    Attributes
    ----------
    rhat : float
        R-hat at or above this fails (Vehtari et al. 2021: 1.01).
    ess : float
        Bulk or tail ESS below this warns (Vehtari et al. 2021: 400).
    ess_fail : float
        Bulk or tail ESS below this fails (our band: 100).
    divergence_fail_share : float
        A share of divergent transitions above this fails (our choice: 0.01); any divergence warns.
    bfmi : float
        E-BFMI of a chain below this warns (Betancourt 2016: 0.3).
    tree_depth_share : float
        A share of transitions at the maximum tree depth above this warns (0: any).
    """

    rhat: float = 1.01
    ess: float = 400.0
    ess_fail: float = 100.0
    divergence_fail_share: float = 0.01
    bfmi: float = 0.3
    tree_depth_share: float = 0.0

    def to_json(self) -> dict:
        """``{name: {"value", "source"}}``."""
        return {k: {"value": v, "source": _SOURCES[k]} for k, v in asdict(self).items()}


def _thresholds(thresholds) -> Thresholds:
    if thresholds is None:
        return Thresholds()
    if isinstance(thresholds, Thresholds):
        return thresholds
    if isinstance(thresholds, Mapping):
        valid = [f.name for f in fields(Thresholds)]
        bad = [k for k in thresholds if k not in valid]
        if bad:
            raise InputError(f"thresholds: unknown key(s) {', '.join(map(repr, bad))}; valid: {', '.join(valid)}")
        values = {}
        for k, v in thresholds.items():
            try:
                values[k] = float(v)
            except (TypeError, ValueError):
                raise InputError(f"thresholds: {k}: expected a number, got {v!r}") from None
            if not math.isfinite(values[k]) or values[k] < 0:
                raise InputError(f"thresholds: {k}: expected a finite number >= 0, got {v!r}")
        return replace(Thresholds(), **values)
    raise TypeError(f"thresholds: expected a Thresholds or a dict, got {type(thresholds).__name__}")


@dataclass(frozen=True)
class Convergence:
    """Result of :func:`check_convergence`.

    Attributes
    ----------
    verdict : {"pass", "warn", "fail"}
    parameters : xarray.Dataset
        Dim ``parameter`` (one row per scalar element); variables ``mean``, ``sd``, ``rhat``,
        ``ess_bulk``, ``ess_tail``, ``mcse_mean``, ``mcse_q05``, ``mcse_q95`` (units of the
        parameter), ``iat`` (draws).
    divergences : int
        Divergent transitions among the kept draws (all chains).
    divergence_share : float
    divergences_per_chain : list of int
    divergence_location : dict
        Per parameter: mean and 5%/95% quantiles of the divergent and the other draws, and the
        shift of the divergent mean in posterior standard deviations.
    bfmi : list of float
        E-BFMI per chain (empty if no energy was stored).
    tree_depth : dict
        ``max_depth`` (if known), ``saturation_share`` and per-chain shares and mean depths.
    step_size : list of float
        Mean step size per chain.
    thresholds : Thresholds
    problems : list of dict
        ``item``, ``check`` (rhat, ess_bulk, ess_tail, divergence, bfmi, tree_depth, stuck, nonfinite,
        chains, sample_stats), ``level`` ("warn"/"fail"), ``value``, ``threshold``, ``source``,
        ``advice``, ``message``.
    notes : list of str
        Remarks that do not change the verdict (e.g. parameters constant across all draws).
    n_chains, n_draws : int
        Chains and kept draws per chain.
    sampler : str
        ``inference_library`` attribute of the sample (e.g. "nutpie"), or "unknown".
    """

    verdict: str
    parameters: xr.Dataset
    divergences: int
    divergence_share: float
    divergences_per_chain: list
    divergence_location: dict
    bfmi: list
    tree_depth: dict
    step_size: list
    thresholds: Thresholds
    problems: list
    notes: list = field(default_factory=list)
    n_chains: int = 0
    n_draws: int = 0
    sampler: str = "unknown"

    def table(self):
        """Per-parameter diagnostics (mean, sd, R-hat, bulk and tail ESS, MCSE, IAT) as a pandas DataFrame."""
        return self.parameters.to_dataframe()

    def __repr__(self) -> str:
        worst = ", ".join(p["message"] for p in self.problems[:3])
        more = f" (+{len(self.problems) - 3} more)" if len(self.problems) > 3 else ""
        return (f"<Convergence {self.verdict.upper()}: {self.n_chains} chains x {self.n_draws} draws, "
                f"{self.divergences} divergences{'; ' + worst + more if worst else ''}>")

    def _repr_html_(self) -> str:
        import html

        colour = {"pass": "#1b7837", "warn": "#b35806", "fail": "#b2182b"}.get(self.verdict, "#444444")
        items = "".join(f"<li>{html.escape(p['message'])}</li>" for p in self.problems)
        table = self.table()[["mean", "sd", "rhat", "ess_bulk", "ess_tail"]].to_html(
            float_format=lambda v: f"{v:.4g}", border=0)
        return (f"<div><strong style='color:{colour}'>convergence: {self.verdict.upper()}</strong> "
                f"({self.n_chains} chains x {self.n_draws} draws, {self.divergences} divergent transitions)"
                f"<ul>{items}</ul>{table}<p style='font-size:smaller'>{html.escape(CAUTION)}</p></div>")

    def to_json(self) -> dict:
        """A JSON-ready dict (NaN as ``None``) with the keys listed in the module docstring."""
        ps = self.parameters
        cols = ("mean", "sd", "rhat", "ess_bulk", "ess_tail", "mcse_mean", "mcse_q05", "mcse_q95", "iat")
        params = {str(p): {c: _num(ps[c].values[i]) for c in cols} for i, p in enumerate(ps["parameter"].values)}
        return to_jsonable({
            "verdict": self.verdict,
            "parameters": params,
            "divergences": self.divergences,
            "divergence_share": self.divergence_share,
            "divergences_per_chain": self.divergences_per_chain,
            "divergence_location": self.divergence_location,
            "bfmi": self.bfmi,
            "tree_depth": self.tree_depth,
            "step_size": self.step_size,
            "thresholds": self.thresholds.to_json(),
            "problems": self.problems,
            "notes": self.notes,
            "n_chains": self.n_chains,
            "n_draws": self.n_draws,
            "sampler": self.sampler,
            "iat_estimator": IAT_METHODS["geyer"],
            "ess_tail_quantiles": [0.05, 0.95],
            "caution": CAUTION,
        })


def _num(v):
    v = float(v)
    return v if math.isfinite(v) else None




# --- per-parameter table ------------------------------------------------------------------------


def parameter_table(draws: xr.DataArray) -> xr.Dataset:
    """R-hat, ESS, MCSE and IAT of each row of a ``(parameter, chain, draw)`` array (ArviZ kernels)."""
    from arviz_stats.base import array_stats

    x = np.asarray(draws.values, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        stats = {
            "mean": x.mean(axis=(-2, -1)),
            "sd": x.reshape(x.shape[0], -1).std(axis=-1, ddof=1),
            "rhat": array_stats.rhat(x, chain_axis=-2, draw_axis=-1, method="rank"),
            "ess_bulk": array_stats.ess(x, chain_axis=-2, draw_axis=-1, method="bulk"),
            "ess_tail": array_stats.ess(x, chain_axis=-2, draw_axis=-1, method="tail", prob=(0.05, 0.95)),
            "mcse_mean": array_stats.mcse(x, chain_axis=-2, draw_axis=-1, method="mean"),
            "mcse_q05": array_stats.mcse(x, chain_axis=-2, draw_axis=-1, method="quantile", prob=0.05),
            "mcse_q95": array_stats.mcse(x, chain_axis=-2, draw_axis=-1, method="quantile", prob=0.95),
            "iat": iat_array(x, method="geyer"),
        }
    units = {"rhat": "1", "ess_bulk": "draws", "ess_tail": "draws", "iat": "draws"}
    ds = xr.Dataset(
        {k: ("parameter", np.asarray(v, dtype=float).reshape(-1)) for k, v in stats.items()},
        coords={k: v for k, v in draws.coords.items() if k == "parameter" or v.dims == ("parameter",)},
    )
    for k in ds.data_vars:
        ds[k].attrs["units"] = units.get(k, "units of the parameter")
    ds.attrs.update(
        rhat="rank-normalised split R-hat, max of bulk and folded (Vehtari et al. 2021), arviz_stats",
        ess_tail="min of the ESS of the 5% and 95% quantile indicators (Vehtari et al. 2021), arviz_stats",
        iat=IAT_METHODS["geyer"],
    )
    return ds


_PER_ITEM_CHECKS = ("rhat", "ess_bulk", "ess_tail", "bfmi")


def _problem(item, level, value, threshold, source_key, advice_key, message) -> dict:
    prefix = item.split("[", 1)[0]
    check = prefix if "[" in item and prefix in _PER_ITEM_CHECKS else advice_key
    return {"item": item, "check": check, "level": level, "value": value, "threshold": threshold,
            "source": _SOURCES.get(source_key, source_key), "advice": ADVICE[advice_key], "message": message}


# --- the check ----------------------------------------------------------------------------------


def check_convergence(tree, *, var_names: Sequence[str] | None = None, thresholds=None) -> Convergence:
    """Check the convergence of a posterior sample and give a verdict.

    Parameters
    ----------
    tree : xarray.DataTree or xarray.Dataset
        Output of ``pm.sample`` (groups ``posterior`` and, for sampler checks, ``sample_stats``),
        or a posterior ``Dataset`` alone (then divergences, E-BFMI and tree depth are not checked
        and the verdict is at best "warn").
    var_names : sequence of str, optional
        Posterior variables to check; default all numeric ones.
    thresholds : Thresholds or dict, optional
        Overrides of the default :class:`Thresholds`, e.g. ``{"rhat": 1.05}``.

    Returns
    -------
    Convergence
        Verdict "pass" (no problem), "warn" (problems of level warn only) or "fail".

    Notes
    -----
    R-hat, ESS and MCSE are computed by ``arviz_stats`` on each scalar parameter exactly as
    ``az.rhat``, ``az.ess(method="bulk")``, ``az.ess(method="tail", prob=(0.05, 0.95))`` and
    ``az.mcse(method="mean" | "quantile")`` would compute them (Vehtari et al. 2021).
    """
    th = _thresholds(thresholds)
    draws = stack_parameters(tree, var_names=var_names)
    table = parameter_table(draws)
    n_chains, n_draws = draws.sizes["chain"], draws.sizes["draw"]
    x = np.asarray(draws.values, dtype=float)
    labels = [str(p) for p in draws["parameter"].values]
    problems: list[dict] = []
    notes: list[str] = []

    # --- draws themselves: non-finite, constant, stuck chains
    finite = np.isfinite(x).all(axis=(1, 2))
    with np.errstate(invalid="ignore"):
        chain_range = np.ptp(x, axis=2)  # (parameter, chain); exactly 0 for a chain that repeats one value
        pooled_range = np.ptp(x.reshape(x.shape[0], -1), axis=1)
    constant = finite & (pooled_range == 0)
    assessed = finite & ~constant
    for i, label in enumerate(labels):
        if not finite[i]:
            bad = int((~np.isfinite(x[i])).sum())
            problems.append(_problem(label, "fail", bad, 0, "common practice: every draw must be finite",
                                     "nonfinite", f"{label}: {bad} non-finite draws"))
        elif constant[i]:
            notes.append(f"{label}: constant across all draws and chains (a fixed quantity?); not assessed")
        else:
            stuck = [c for c in range(n_chains) if chain_range[i, c] == 0]
            if stuck:
                problems.append(_problem(label, "fail", stuck, "chain variance > 0",
                                         "common practice: a chain that never moves has not explored the posterior",
                                         "stuck", f"{label}: chain(s) {', '.join(map(str, stuck))} did not move"))
    if not assessed.any() and not any(p["level"] == "fail" for p in problems):
        problems.append(_problem("posterior", "fail", 0, "some parameter varies",
                                 "common practice: a sample in which nothing varies has not explored the posterior",
                                 "stuck", "no parameter varies across draws: the sampler did not move"))

    # --- R-hat and ESS
    if n_chains < 2:
        problems.append(_problem("chains", "warn", n_chains, 2, "rhat", "chains",
                                 f"{n_chains} chain: R-hat cannot be computed"))
    for i, label in enumerate(labels):
        if not assessed[i]:
            continue
        r = float(table["rhat"].values[i])
        if n_chains >= 2 and (not math.isfinite(r) or r >= th.rhat):
            problems.append(_problem(f"rhat[{label}]", "fail", r, th.rhat, "rhat", "rhat",
                                     f"{label}: R-hat {r:.4g} >= {th.rhat:g}"))
        for kind in ("ess_bulk", "ess_tail"):
            e = float(table[kind].values[i])
            if not math.isfinite(e) or e < th.ess_fail:
                problems.append(_problem(f"{kind}[{label}]", "fail", e, th.ess_fail, "ess_fail", "ess",
                                         f"{label}: {kind.replace('_', ' ')} {e:.0f} < {th.ess_fail:g}"))
            elif e < th.ess:
                problems.append(_problem(f"{kind}[{label}]", "warn", e, th.ess, "ess", "ess",
                                         f"{label}: {kind.replace('_', ' ')} {e:.0f} < {th.ess:g}"))

    # --- sampler statistics
    ss = _sample_stats(tree)
    divergences, share, per_chain_div, location = 0, 0.0, [], {}
    bfmi, step_size = [], []
    tree_depth: dict = {"max_depth": None, "saturation_share": None, "saturation_share_per_chain": [],
                        "mean_depth_per_chain": [], "statistic": None}
    if ss is None or "diverging" not in ss.data_vars:
        problems.append(_problem("sample_stats", "warn", None, None,
                                 "common practice: divergences and E-BFMI are part of every HMC check",
                                 "sample_stats", "no sampler statistics: divergences, E-BFMI and tree depth not checked"))
    if ss is not None:
        div_da = _first(ss, ("diverging",))
        if div_da is not None:
            div = np.asarray(div_da.values, dtype=bool)
            divergences = int(div.sum())
            share = divergences / div.size
            per_chain_div = [int(v) for v in div.sum(axis=1)]
            location = _divergence_location(draws.isel(parameter=np.nonzero(assessed)[0]), div)
            if divergences:
                where = sorted(location.items(), key=lambda kv: -abs(kv[1]["shift_sd"] or 0))[:3]
                sits = "; ".join(f"{k}: divergent mean {v['divergent_mean']:.4g} vs {v['other_mean']:.4g} "
                                 f"({v['shift_sd']:+.2f} sd)" for k, v in where)
                level = "fail" if share > th.divergence_fail_share else "warn"
                key = "divergence_fail_share" if level == "fail" else "divergence"
                problems.append(_problem("divergences", level, divergences,
                                         th.divergence_fail_share if level == "fail" else 0, key, "divergence",
                                         f"{divergences} divergent transitions ({100 * share:.2f}% of draws)"
                                         + (f"; they sit at {sits}" if sits else "")))
        energy = _first(ss, ("energy",))
        if energy is not None:
            from arviz_stats.base import array_stats

            bfmi = [float(v) for v in array_stats.bfmi(np.asarray(energy.values, dtype=float))]
            for c, v in enumerate(bfmi):
                if v < th.bfmi:
                    problems.append(_problem(f"bfmi[chain {c}]", "warn", v, th.bfmi, "bfmi", "bfmi",
                                             f"chain {c}: E-BFMI {v:.3f} < {th.bfmi:g}"))
        step = _first(ss, ("step_size",))
        if step is not None:
            step_size = [float(v) for v in np.asarray(step.values, dtype=float).mean(axis=1)]
        depth, sat = _first(ss, _DEPTH_NAMES), _first(ss, _SATURATION_NAMES)
        tree_depth["max_depth"] = _max_depth(ss)
        if depth is not None:
            tree_depth["mean_depth_per_chain"] = [float(v) for v in np.asarray(depth.values, float).mean(axis=1)]
            tree_depth["statistic"] = depth.name
        if sat is None and depth is not None and tree_depth["max_depth"] is not None:
            sat_values = np.asarray(depth.values) >= tree_depth["max_depth"]
        else:
            sat_values = None if sat is None else np.asarray(sat.values, dtype=bool)
        if sat_values is not None:
            sat_share = float(sat_values.mean())
            tree_depth["saturation_share"] = sat_share
            tree_depth["saturation_share_per_chain"] = [float(v) for v in sat_values.mean(axis=1)]
            if sat_share > th.tree_depth_share:
                problems.append(_problem("tree_depth", "warn", sat_share, th.tree_depth_share,
                                         "tree_depth_share", "tree_depth",
                                         f"{100 * sat_share:.2f}% of transitions hit the maximum tree depth"))

    levels = {p["level"] for p in problems}
    verdict = "fail" if "fail" in levels else "warn" if "warn" in levels else "pass"
    sampler = "unknown"
    if isinstance(tree, xr.DataTree) and "posterior" in tree.children:
        sampler = str(tree["posterior"].attrs.get("inference_library", "unknown"))
    return Convergence(
        verdict=verdict, parameters=table, divergences=divergences, divergence_share=share,
        divergences_per_chain=per_chain_div, divergence_location=location, bfmi=bfmi,
        tree_depth=tree_depth, step_size=step_size, thresholds=th, problems=problems, notes=notes,
        n_chains=int(n_chains), n_draws=int(n_draws), sampler=sampler,
    )


