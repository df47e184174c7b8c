"""Settings of simulation-based calibration (SBC): which model, which sampler settings, which layout.

:class:`SBCConfig` names one model configuration; :data:`QUICK` and :data:`FULL` are the two modes of
``bayesgeo validate``; :func:`generated_layout` makes a sampling layout when the user gives none. The
method is described in :mod:`bayesgeo.calibration.validation`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError, check_positive_int

__all__ = ["KINDS", "QUANTITIES", "SBCConfig", "QUICK", "FULL", "generated_layout", "with_settings"]

#: Models SBC can check.
KINDS = ("single", "nn", "hierarchical")
#: Quantity label -> (sampled variable, term index or None).
QUANTITIES = {
    "practical_range": ("practical_range_z", None),
    "partial_sill": ("sd_z", None),
    "nugget": ("nugget_sd_z", None),
    "intercept": ("beta_z", 0),
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
    censored : float
        0 (default): no non-detects. A share in (0, 0.6]: values below a fixed reporting limit, the
        share's quantile of the prior predictive, are reported as non-detects and modelled as censored
        (:mod:`bayesgeo.calibration.censoring`; single-site models only).
    anisotropy : bool
        Geometric anisotropy (:mod:`bayesgeo.gp.anisotropy`; single-site dense model): truths of the
        anisotropy vector come from its prior, data from the anisotropic covariance, and the two sampled
        coordinates ``anisotropy_z`` are ranked besides the other quantities.
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
    censored: float = 0.0
    anisotropy: bool = False

    @property
    def label(self) -> str:
        """Short name, e.g. ``single/matern32/nugget`` (``.../censored-30%`` with non-detects)."""
        tail = f"/censored-{100 * self.censored:.0f}%" if self.censored else ""
        tail += "/anisotropic" if self.anisotropy else ""
        return f"{self.kind}/{self.covariance}/{'nugget' if self.nugget else 'no-nugget'}{tail}"

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


def with_settings(config: SBCConfig, **changes) -> SBCConfig:
    """A copy of ``config`` with some fields changed (checked)."""
    for key in ("chains", "draws", "tune", "ranks_of", "neighbours"):
        if key in changes:
            changes[key] = check_positive_int(changes[key], f"--{key.replace('_', '-')}")
    if changes.get("max_draws") is not None:
        changes["max_draws"] = check_positive_int(changes["max_draws"], "max_draws")
    if "censored" in changes:
        share = float(changes["censored"])
        if not 0.0 <= share <= 0.6:
            raise InputError(f"censored: the share of non-detects must be between 0 and 0.6, got {share!r}")
        changes["censored"] = share
    out = replace(config, **changes)
    if out.censored and out.kind == "hierarchical":
        raise InputError("censored: SBC checks non-detects with the single-site models only")
    if out.anisotropy and out.kind != "single":
        raise InputError("anisotropy: SBC checks anisotropy with the single-site dense model only")
    from bayesgeo.fitting.looks import longest_chain

    longest_chain(out.draws, out.max_draws)  # refuses max_draws below draws
    if out.chains * out.draws < out.ranks_of:
        need = -(-out.ranks_of // out.chains)
        raise InputError(f"draws: {out.draws} draws per chain x {out.chains} chains is fewer than the {out.ranks_of} "
                         f"posterior draws each rank is taken among (Talts et al. 2018); use --draws {need} or more")
    return out
