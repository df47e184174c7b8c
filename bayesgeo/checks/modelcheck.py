"""Model checks of a fit: leave-one-out comparison of fits and LOO-PIT calibration.

Comparison (:func:`compare_fits`). Every fit gets exact Gaussian leave-one-out densities per draw
(:mod:`bayesgeo.checks.loo`, in data units), PSIS-LOO turns them into the expected log predictive
density ``elpd_loo`` (Vehtari, Gelman and Gabry 2017, Statistics and Computing 27; Vehtari,
Simpson, Gelman, Yao and Gabry 2024, JMLR 25), and ``arviz.compare`` ranks the fits and gives
each one's difference to the best with its standard error. A point whose Pareto shape k exceeds
0.7 makes its importance-sampling estimate unreliable (Vehtari et al. 2024, sec. 3; the
threshold ArviZ also applies for large samples); they are counted per fit.

Calibration (:func:`loo_pit`). The probability integral transform of each observation under its
leave-one-out predictive, ``PIT_i = sum_s w_is Phi((z_i - mu_-i,s) / sd_-i,s)``: the exact
normal predictive of each draw, mixed over draws with the PSIS-smoothed importance weights
``w_is`` of that point (so the mixture approximates the leave-one-out posterior, not the full
one). A calibrated model gives PIT values close to uniform on (0, 1) (Gneiting, Balabdaoui and
Raftery 2007, JRSS B 69). The PIT is the same on the data and on the log scale.

The posterior predictive semivariogram check lives in :mod:`bayesgeo.checks.ppcheck`.

These checks judge a statistical model. Results that bear on contamination or exposure support,
and never replace, licensed professional judgement and the requirements of the local regulator.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np
import xarray as xr
from scipy import special

from bayesgeo.checks.loo import add_log_likelihood, loo_predictive
from bayesgeo.fitting.arrays import FitArrays, SiteFitArrays, any_fit_arrays, is_site_fit
from bayesgeo.common.validate import InputError

__all__ = [
    "PARETO_K_THRESHOLD",
    "CAUTION",
    "open_fit",
    "store_log_likelihood",
    "check_same_data",
    "fit_loo",
    "compare_fits",
    "loo_pit",
]

#: Pareto k above which a PSIS estimate is unreliable (Vehtari et al. 2024, JMLR 25, sec. 3).
PARETO_K_THRESHOLD = 0.7

CAUTION = (
    "Model checks judge a statistical model, not the site: results that bear on contamination or exposure "
    "support, and never replace, licensed professional judgement and the requirements of the local regulator."
)


# --- fits ---------------------------------------------------------------------------------------


def open_fit(path: str | Path, *, sites: bool = False):
    """:meth:`bayesgeo.fitting.fitted.Fit.read` of a fit folder (or its ``posterior.nc``), refused early when the
    model checks cannot use it. Returns the :class:`~bayesgeo.fitting.fitted.Fit`.

    With ``sites=True`` a several-site fit (:mod:`bayesgeo.fitting.hierarchical`) is accepted too, for
    the leave-one-out comparison.

    Raises
    ------
    InputError
        Missing folder or file, or a file that is not a readable single-site fit (or several-site
        fit with ``sites=True``).
    """
    from bayesgeo.fitting.fitted import Fit

    fit = Fit.read(path)  # settings, groups, sizes and finite draws, checked once (one line naming the file)
    if fit.several and not sites:
        raise InputError(f"{path}: a several-site fit; this check takes one site at a time")
    any_fit_arrays(fit.tree)  # refuse early what the checks cannot use
    return fit


def store_log_likelihood(path: str | Path, *, overwrite: bool = False) -> Path:
    """Store the exact leave-one-out ``log_likelihood`` group in a saved fit's ``posterior.nc``.

    The file is rewritten atomically (a temporary file moved into place and recorded in the
    folder's marker, :func:`bayesgeo.common.outputs.add_to_folder`), with every other group unchanged; a
    ``posterior.nc`` the marker does not vouch for is not replaced. Later comparisons read
    the stored group instead of recomputing it.

    Parameters
    ----------
    path : str or Path
        Fit folder (or its ``posterior.nc``).
    overwrite : bool
        Replace a ``log_likelihood`` group already in the file (refused otherwise).

    Returns
    -------
    Path
        The rewritten file.

    Raises
    ------
    InputError
        No readable fit, or a ``log_likelihood`` group present without ``overwrite``.
    """
    from bayesgeo.common.outputs import add_to_folder
    from bayesgeo.common.layout import FIT_FILE

    tree = open_fit(path, sites=True).tree
    file = Path(path) / FIT_FILE if Path(path).is_dir() else Path(path)
    if "log_likelihood" in tree.children and not overwrite:
        raise InputError(f"{file}: already holds a log_likelihood group; pass --overwrite to replace it")
    with add_to_folder(file.parent, file.name, overwrite=True) as tmp:
        add_log_likelihood(tree).to_netcdf(tmp, engine="netcdf4")
    return file


def check_same_data(fits: Mapping[str, FitArrays | SiteFitArrays]) -> list[str]:
    """Refuse fits made from different data; return cautions for lesser differences.

    Fits match when they hold the same number of points, the same locations and the same
    measured values (exactly), and, when both are several-site fits, the same site label for
    every point. A different source checksum with identical data is accepted with a caution (for
    example the same table saved twice), and so is a single-site fit beside a several-site fit of
    the same points (one field for all points against one per site).

    Raises
    ------
    InputError
        Naming the first fit that differs from the first one and how.
    """
    names = list(fits)
    ref_name, ref = names[0], fits[names[0]]
    cautions = []
    for name in names[1:]:
        fa = fits[name]
        why = None
        if fa.n != ref.n:
            why = f"{fa.n} points against {ref.n}"
        elif not np.array_equal(fa.xy, ref.xy):
            why = "the locations differ"
        elif not np.array_equal(fa.value, ref.value):
            why = "the measured values differ"
        elif fa.spec.distance_units != ref.spec.distance_units:
            why = f"distance units {fa.spec.distance_units!r} against {ref.spec.distance_units!r}"
        elif (isinstance(fa, SiteFitArrays) and isinstance(ref, SiteFitArrays)
              and not np.array_equal(fa.site, ref.site)):
            why = "the site labels of the points differ"
        if why:
            raise InputError(f"{name}: not fitted to the same data as {ref_name} ({why}); LOO compares fits of one data set")
        if fa.source_sha256 and ref.source_sha256 and fa.source_sha256 != ref.source_sha256:
            cautions.append(f"{name} and {ref_name} come from files with different checksums but identical data")
    kinds = {name: isinstance(fa, SiteFitArrays) for name, fa in fits.items()}
    if len(set(kinds.values())) > 1:
        single = ", ".join(k for k, v in kinds.items() if not v)
        cautions.append(f"{single}: one field for all points, compared with per-site fields of the several-site "
                        "fit(s); the comparison is fair (same points, exact leave-one-out for each model)")
    return cautions


def fit_loo(tree: xr.DataTree, *, predictive: xr.Dataset | None = None):
    """PSIS-LOO of one fit (``arviz.loo``, pointwise) on exact leave-one-out densities.

    A stored ``log_likelihood`` group of :func:`bayesgeo.checks.loo.add_log_likelihood` is used as is;
    otherwise the densities are computed (from ``predictive``, a :func:`bayesgeo.checks.loo.loo_predictive`
    result, when given). Returns the ArviZ ``ELPDDataLOO`` (``elpd``, ``se``, ``p``,
    ``pareto_k``, ``log_weights``, ...).
    """
    import warnings

    import arviz as az

    fa = any_fit_arrays(tree)
    if "log_likelihood" not in tree.children or fa.obs_name not in tree["log_likelihood"].data_vars:
        tree = add_log_likelihood(tree, predictive=predictive)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # high Pareto k is reported, not warned
        return az.loo(tree, pointwise=True, var_name=fa.obs_name)


def compare_fits(fits: Mapping[str, xr.DataTree], *, site: str | None = None,
                 k_threshold: float = PARETO_K_THRESHOLD, progress=None) -> xr.Dataset:
    """Rank fits of the same data by their PSIS-LOO expected log predictive density.

    Parameters
    ----------
    fits : mapping of str to xarray.DataTree
        Two or more fits of the same data, by name (for example the fit folder): single-site fits
        and several-site fits (:mod:`bayesgeo.fitting.hierarchical`, any pooling) alike. For a several-site
        fit each point's leave-one-out density conditions on its own site's points only (sites
        are independent given the parameters; :mod:`bayesgeo.checks.loo`).
    site : str, optional
        Compare on this site's points only: every fit must be a several-site fit holding it; its
        draws are taken with :func:`bayesgeo.fitting.hierarchical.site_fit` (the posterior stays the one
        conditioned on every site, so the elpd is the sum over the site's points of the
        whole-data pointwise elpd).
    k_threshold : float
        Pareto k above which a point's importance-sampling estimate is counted as unreliable
        (default 0.7, Vehtari et al. 2024).
    progress : callable, optional
        Bar factory for the nearest-neighbour leave-one-out of nn fits (:func:`bayesgeo.checks.loo.loo_predictive`).

    Returns
    -------
    xarray.Dataset
        Along ``fit`` (best first): ``rank`` (0 = best), ``covariance``, ``transform``,
        ``elpd_loo`` and ``se`` (log density of the data in data units, summed over points),
        ``elpd_diff`` (``elpd_loo`` minus the best one's, <= 0) with its standard error ``dse``,
        ``p_loo`` (effective number of parameters), ``weight`` (stacking weight),
        ``pareto_k_high`` (points with k > ``k_threshold``) and ``pareto_k_max``. Attributes:
        ``cautions`` (list of str), ``k_threshold``, ``method``, ``n``, ``site``; ``pooling``
        along ``fit`` ("single-site" or the pooling of a several-site fit); the pointwise
        ``elpd_i``, ``pareto_k`` and ``loo_pit`` (:func:`loo_pit`) sit along (``fit``, ``obs``).
        When every fit is a several-site fit (and no ``site`` is given), ``elpd_site`` and
        ``se_site`` along (``fit``, ``site``): the sum of ``elpd_i`` over each site's points and
        its standard error ``sqrt(n_s var(elpd_i))`` (as ArviZ computes ``se``).

    Raises
    ------
    InputError
        Fewer than two fits, fits of different data (points, values or site labels), or ``site``
        with a single-site fit or a site a fit does not hold.
    """
    import arviz as az

    if len(fits) < 2:
        raise InputError(f"compare: give at least two fits (got {len(fits)})")
    poolings = {name: _pooling_label(tree) for name, tree in fits.items()}
    if site is not None:
        fits = _restrict_to_site(fits, site)
    arrays = {name: any_fit_arrays(tree) for name, tree in fits.items()}
    cautions = check_same_data(arrays)
    preds = {name: loo_predictive(tree, arrays=arrays[name], progress=progress) for name, tree in fits.items()}
    cautions += [f"{k}: {p.attrs['caution']}" for k, p in preds.items() if p.attrs.get("caution")]
    elpds = {name: fit_loo(tree, predictive=preds[name]) for name, tree in fits.items()}
    pits = {name: _pit(arrays[name], preds[name], elpds[name]) for name in fits}
    table = az.compare(elpds, round_to="none")
    order = [str(i) for i in table.index]
    n = next(iter(arrays.values())).n
    high = {k: int((np.asarray(e.pareto_k) > k_threshold).sum()) for k, e in elpds.items()}
    out = xr.Dataset(
        {
            "rank": ("fit", table["rank"].to_numpy(dtype=int)),
            "covariance": ("fit", [_family_label(arrays[k]) for k in order]),
            "pooling": ("fit", [poolings[k] for k in order]),
            "transform": ("fit", [arrays[k].spec.transform or "none" for k in order]),
            "elpd_loo": ("fit", table["elpd"].to_numpy(dtype=float)),
            "se": ("fit", table["se"].to_numpy(dtype=float)),
            "elpd_diff": ("fit", table["elpd_diff"].to_numpy(dtype=float)),
            "dse": ("fit", table["dse"].to_numpy(dtype=float)),
            "p_loo": ("fit", table["p"].to_numpy(dtype=float)),
            "weight": ("fit", table["weight"].to_numpy(dtype=float)),
            "pareto_k_high": ("fit", [high[k] for k in order]),
            "pareto_k_max": ("fit", [float(np.max(elpds[k].pareto_k)) for k in order]),
            "elpd_i": (("fit", "obs"), np.stack([np.asarray(elpds[k].elpd_i) for k in order])),
            "pareto_k": (("fit", "obs"), np.stack([np.asarray(elpds[k].pareto_k) for k in order])),
            "loo_pit": (("fit", "obs"), np.stack([pits[k] for k in order])),
        },
        coords={"fit": order},
    )
    if all(isinstance(arrays[k], SiteFitArrays) for k in order):
        out = out.merge(_by_site(arrays[order[0]], out["elpd_i"]))
    for k in order:
        if high[k]:
            cautions.append(f"{k}: {high[k]} of {n} points have Pareto k > {k_threshold:g}; its elpd_loo is "
                            "unreliable there (Vehtari et al. 2024); a refit leaving those points out would settle it")
    if n < 100:
        cautions.append(f"only {n} points: elpd differences have skewed, heavy-tailed errors (Sivula et al. 2022); "
                        "read a difference under about 4 as no clear preference")
    best_diff = out["elpd_diff"].values[1:] if len(order) > 1 else np.array([])
    close = [k for k, d, s in zip(order[1:], best_diff, out["dse"].values[1:]) if abs(d) < 2.0 * s or abs(d) < 4.0]
    if close:
        cautions.append(f"{', '.join(close)} not clearly worse than {order[0]} (|elpd_diff| < 4 or < 2 dse)")
    cautions.append(CAUTION)
    out.attrs.update({
        "method": "PSIS-LOO (arviz.loo / arviz.compare) on " + "; ".join(sorted({p.attrs["method"] for p in preds.values()})),
        "k_threshold": float(k_threshold),
        "k_threshold_source": "Vehtari, Simpson, Gelman, Yao and Gabry (2024), JMLR 25, Pareto smoothed importance sampling",
        "n": n,
        "site": "" if site is None else site,
        "units": "log density of the measured values in data units (summed over points)",
        "cautions": cautions,
    })
    return out


def _restrict_to_site(fits: Mapping[str, xr.DataTree], site: str) -> dict[str, xr.DataTree]:
    """Each several-site fit reduced to one site (:func:`bayesgeo.fitting.hierarchical.site_fit`)."""
    from bayesgeo.fitting.hierarchical import site_fit
    from bayesgeo.fitting.site_inputs import site_spec

    out = {}
    for name, tree in fits.items():
        if not is_site_fit(tree):
            raise InputError(f"site: {name} is a single-site fit; a site is compared between several-site fits only")
        spec = site_spec(tree)
        if site not in spec.sites:
            raise InputError(f"site: {name} has no site {site!r}; its sites: {', '.join(spec.sites)}")
        out[name] = site_fit(tree, site)
    return out


def _pooling_label(tree: xr.DataTree) -> str:
    if not is_site_fit(tree):
        return "single-site"
    from bayesgeo.fitting.site_inputs import site_spec

    return site_spec(tree).pooling


def _by_site(sfa: SiteFitArrays, elpd_i: xr.DataArray) -> xr.Dataset:
    """Sum of pointwise elpd per site and its standard error sqrt(n_s var(elpd_i)) along (fit, site)."""
    x = np.asarray(elpd_i.values)
    sums, ses = [], []
    for label in sfa.sites:
        part = x[:, sfa.index[label]]
        sums.append(part.sum(axis=1))
        ses.append(np.sqrt(part.shape[1] * part.var(axis=1, ddof=1)) if part.shape[1] > 1 else np.zeros(x.shape[0]))
    dims = ("fit", "site")
    return xr.Dataset({"elpd_site": (dims, np.column_stack(sums)), "se_site": (dims, np.column_stack(ses)),
                       "n_site": ("site", [sfa.index[s].size for s in sfa.sites])},
                      coords={"fit": elpd_i["fit"].values, "site": list(sfa.sites)})


def _family_label(fa: FitArrays) -> str:
    spec = fa.spec
    return f"matern (nu={spec.nu:g})" if spec.covariance == "matern" else spec.covariance


def loo_pit(tree: xr.DataTree, *, elpd=None) -> xr.DataArray:
    """Leave-one-out probability integral transform of each observation.

    Parameters
    ----------
    tree : xarray.DataTree
        A single-site fit.
    elpd : ELPDDataLOO, optional
        Result of :func:`fit_loo` for ``tree`` (recomputed when omitted); its PSIS-smoothed log
        weights mix the per-draw predictives.

    Returns
    -------
    xarray.DataArray
        Along ``obs``, values in [0, 1]:
        ``PIT_i = sum_s w_is Phi((z_i - mu_-i,s) / sd_-i,s)`` (module docstring).
    """
    fa = any_fit_arrays(tree)
    pred = loo_predictive(tree, arrays=fa)
    elpd = fit_loo(tree, predictive=pred) if elpd is None else elpd
    return xr.DataArray(_pit(fa, pred, elpd), dims=("obs",), coords={"obs": fa.obs_index}, name="loo_pit",
                        attrs={"method": "exact normal LOO predictive per draw, mixed with PSIS weights"})


def _pit(fa: FitArrays, pred: xr.Dataset, elpd) -> np.ndarray:
    """sum_s w_is Phi((z_i - mu_-i,s) / sd_-i,s) with normalised PSIS weights w_is.

    A non-detect's PIT is only known to lie between 0 and P(z_i < limit_i): it gets the middle of that
    interval, half the probability (the mid-PIT of a censored value, the mean of its randomised PIT).
    """
    u = (fa.z[None, None, :] - pred["loo_mean"].values) / pred["loo_sd"].values
    cdf = special.ndtr(u)  # (chain, draw, obs)
    if fa.censored.any():
        cdf[..., fa.censored] *= 0.5
    lw = elpd.log_weights.transpose("chain", "draw", ...).values
    w = np.exp(lw - special.logsumexp(lw, axis=(0, 1), keepdims=True))
    return np.clip(np.sum(w * cdf, axis=(0, 1)), 0.0, 1.0)
