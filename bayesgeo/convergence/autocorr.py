"""Trace autocorrelation and integrated autocorrelation time (IAT) of MCMC draws.

Two layers: NumPy kernels working on arrays whose last two axes are ``(chain, draw)``, and thin
xarray wrappers that accept a posterior ``DataTree``/``Dataset`` (flattened to one row per scalar
parameter, see :func:`stack_parameters`) or a ``DataArray`` with ``chain`` and ``draw`` dims.

Definitions (Geyer 1992, *Statistical Science* 7, 473-483; Sokal 1997, "Monte Carlo methods in
statistical mechanics", in *Functional Integration*, Springer):

* autocorrelation at lag k of one chain x_1..x_n with mean m:
  rho_k = sum_{t=1}^{n-k} (x_t - m)(x_{t+k} - m) / sum_{t=1}^{n} (x_t - m)^2
  (the usual biased estimator, computed with an FFT);
* integrated autocorrelation time tau = 1 + 2 sum_{k>=1} rho_k, so that the effective sample
  size of the mean is N / tau.

The infinite sum is truncated by one of two published estimators:

``"geyer"`` (default)
    Geyer's initial monotone sequence: sum pairs P_k = rho_{2k} + rho_{2k+1} while they stay
    positive, forcing them to be non-increasing. With several chains the lag-k correlations are
    combined with the between-chain variance as in Vehtari, Gelman, Simpson, Carpenter and
    Bürkner (2021, *Bayesian Analysis* 16, eq. 10), the computation behind Stan's and ArviZ's ESS.
``"sokal"``
    Sokal's automatic window: tau(M) = 1 + 2 sum_{k=1}^{M} rho_k with the smallest M >= c tau(M),
    c = 5. Several chains are combined by averaging their autocorrelation functions first. The
    window assumes positive autocorrelation: for antithetic chains (negative rho_1) it stops at
    M = 1 and underestimates tau; use ``"geyer"`` there.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError

__all__ = [
    "IAT_METHODS",
    "SOKAL_C",
    "acf_array",
    "autocorrelation",
    "default_lag_limit",
    "iat_array",
    "integrated_autocorrelation_time",
    "stack_parameters",
]

#: Names of the IAT estimators, with their published source.
IAT_METHODS: dict[str, str] = {
    "geyer": "Geyer's initial monotone sequence (Geyer 1992, Statistical Science 7); chains combined "
             "as in Vehtari et al. 2021, Bayesian Analysis 16",
    "sokal": "Sokal's automatic windowing with c = 5 (Sokal 1997); chain autocorrelations averaged",
}

#: Window constant of Sokal's estimator (Sokal 1997 recommends c between 4 and 10).
SOKAL_C = 5.0

#: Fewest lags shown by default, and the multiple of the IAT the default lag axis reaches.
MIN_LAGS = 20
LAG_IAT_MULTIPLE = 3.0


# --- NumPy kernels ------------------------------------------------------------------------------


def _autocov(x: np.ndarray) -> np.ndarray:
    """Autocovariance (divisor n) along the last axis, all lags 0..n-1, via a zero-padded FFT."""
    n = x.shape[-1]
    xc = x - x.mean(axis=-1, keepdims=True)
    m = 1 << (2 * n - 1).bit_length()
    f = np.fft.rfft(xc, n=m, axis=-1)
    return np.fft.irfft(f * np.conjugate(f), n=m, axis=-1)[..., :n] / n


def acf_array(x: np.ndarray, *, lag_limit: int | None = None) -> np.ndarray:
    """Autocorrelation of each chain along the last axis, lags 0..lag_limit.

    A chain with zero variance (a stuck chain) gives NaN at every lag.
    """
    x = np.asarray(x, dtype=float)
    cov = _autocov(x)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = cov / cov[..., :1]
    moving = (np.ptp(x, axis=-1, keepdims=True) > 0) & (cov[..., :1] > 0)
    rho = np.where(moving, rho, np.nan)
    if lag_limit is not None:
        rho = rho[..., : lag_limit + 1]
    return rho


def _geyer_2d(x: np.ndarray) -> float:
    """Geyer initial-monotone IAT of a (chain, draw) array, chains combined (Vehtari et al. 2021)."""
    n_chain, n_draw = x.shape
    if n_draw < 4 or not np.all(np.isfinite(x)) or np.ptp(x) == 0:
        return math.nan
    acov = _autocov(x)
    chain_var = acov[:, 0] * n_draw / (n_draw - 1.0)
    w = chain_var.mean()
    var_plus = w * (n_draw - 1.0) / n_draw
    if n_chain > 1:
        var_plus += np.var(x.mean(axis=1), ddof=1)
    if not var_plus > 0:
        return math.nan
    # rho_t = 1 - (W - mean_m(acov_m(t))) / var_plus, the combined lag-t correlation
    rho = 1.0 - (w - acov.mean(axis=0)) / var_plus
    rho[0] = 1.0
    # initial positive sequence of pair sums P_k = rho_2k + rho_2k+1
    n_pairs = n_draw // 2
    pairs = rho[: 2 * n_pairs].reshape(n_pairs, 2).sum(axis=1)
    neg = np.nonzero(pairs <= 0.0)[0]
    k = int(neg[0]) if neg.size else n_pairs
    # Stan's refinement (kept by ArviZ): the first element of the first non-positive pair,
    # if itself positive, is added once
    tail = rho[2 * k] if k < n_pairs and rho[2 * k] > 0.0 else 0.0
    # initial monotone sequence
    pairs = np.minimum.accumulate(pairs[:k])
    return float(-1.0 + 2.0 * pairs.sum() + tail)


def _sokal_2d(x: np.ndarray, c: float = SOKAL_C) -> float:
    """Sokal automatic-window IAT of a (chain, draw) array, chain ACFs averaged."""
    if x.shape[-1] < 4 or not np.all(np.isfinite(x)):
        return math.nan
    rho = acf_array(x)
    if np.isnan(rho).any():
        return math.nan
    rho = rho.mean(axis=0)
    taus = 2.0 * np.cumsum(rho) - 1.0  # taus[M] = 1 + 2 sum_{k=1}^{M} rho_k
    ok = np.nonzero(np.arange(taus.size) >= c * taus)[0]
    m = int(ok[0]) if ok.size else taus.size - 1
    return float(taus[m])


_KERNELS = {"geyer": _geyer_2d, "sokal": _sokal_2d}


def iat_array(x: np.ndarray, *, method: str = "geyer", per_chain: bool = False) -> np.ndarray:
    """IAT of an array with trailing ``(chain, draw)`` axes.

    Returns shape ``x.shape[:-2]`` (chains combined) or ``x.shape[:-1]`` (``per_chain=True``).
    NaN where a chain has zero variance, non-finite draws, or fewer than 4 draws.
    """
    if method not in _KERNELS:
        raise InputError(f"IAT method: {method!r} is not one of {', '.join(_KERNELS)}")
    kernel = _KERNELS[method]
    x = np.asarray(x, dtype=float)
    if x.ndim < 2:
        raise InputError(f"IAT: expected trailing (chain, draw) axes, got shape {x.shape}")
    lead = x.shape[:-2]
    flat = x.reshape(-1, *x.shape[-2:])
    if per_chain:
        out = np.array([[kernel(row[c : c + 1]) for c in range(row.shape[0])] for row in flat])
        return out.reshape(*lead, x.shape[-2])
    return np.array([kernel(row) for row in flat]).reshape(lead)


def default_lag_limit(x: np.ndarray) -> int:
    """Lags enough to show the decay: 3 x the largest per-chain IAT, at least 20, at most n - 1.

    For an AR(1) chain with coefficient phi the IAT is (1 + phi)/(1 - phi), so three IATs reach
    lag ~ 6 / (1 - phi), where phi^k has fallen below about 0.25% (phi = 0.9) -- past the decay.
    """
    x = np.asarray(x, dtype=float)
    n_draw = x.shape[-1]
    with np.errstate(invalid="ignore"):
        taus = iat_array(x.reshape(-1, *x.shape[-2:]), per_chain=True)
    finite = taus[np.isfinite(taus)]
    tau = float(finite.max()) if finite.size else 1.0
    return int(max(1, min(n_draw - 1, max(MIN_LAGS, math.ceil(LAG_IAT_MULTIPLE * tau)))))


# --- xarray layer -------------------------------------------------------------------------------


def _label(name: str, index: dict) -> str:
    if not index:
        return name
    return f"{name}[{', '.join(str(v) for v in index.values())}]"


def stack_parameters(data, *, var_names: Sequence[str] | None = None) -> xr.DataArray:
    """Posterior draws as one ``DataArray`` with dims ``(parameter, chain, draw)``.

    Each scalar element gets its own row, labelled ``name`` or ``name[coord, ...]`` (for example
    ``beta[intercept]`` or ``site_mean[B]``). Non-numeric variables are skipped.

    Parameters
    ----------
    data : xarray.DataTree or xarray.Dataset
        A tree with a ``posterior`` group, or the posterior ``Dataset`` itself, with dims
        ``chain`` and ``draw``.
    var_names : sequence of str, optional
        Variables to keep (default: all numeric ones), in that order.
    """
    ds = _posterior_dataset(data)
    names = [v for v in ds.data_vars if np.issubdtype(ds[v].dtype, np.number) or ds[v].dtype == bool]
    if var_names is not None:
        var_names = [var_names] if isinstance(var_names, str) else list(var_names)
        unknown = [v for v in var_names if v not in ds.data_vars]
        if unknown:
            raise InputError(f"posterior variable(s) {', '.join(map(repr, unknown))} not found; "
                             f"available: {', '.join(map(str, ds.data_vars))}")
        names = [v for v in var_names if v in names]
    if not names:
        raise InputError("posterior: no numeric variables with dims (chain, draw) to check")
    rows, labels, variables = [], [], []
    for name in names:
        da = ds[name].astype(float).transpose("chain", "draw", ...)
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        if not extra:
            rows.append(da.values)
            labels.append(name)
            variables.append(name)
            continue
        stacked = da.stack(_element=extra).transpose("_element", "chain", "draw")
        for i in range(stacked.sizes["_element"]):
            el = stacked.isel(_element=i)
            index = {d: (el[d].item() if d in el.coords else "?") for d in extra}
            rows.append(el.values)
            labels.append(_label(name, index))
            variables.append(name)
    out = xr.DataArray(
        np.stack(rows), dims=("parameter", "chain", "draw"),
        coords={"parameter": labels, "variable": ("parameter", variables),
                "chain": ds["chain"].values, "draw": ds["draw"].values},
        name="draws",
    )
    return out


def _posterior_dataset(data) -> xr.Dataset:
    """The posterior ``Dataset`` of a tree (or the dataset itself), checked for chain/draw dims."""
    if isinstance(data, xr.DataTree):
        if "posterior" not in data.children:
            raise InputError("posterior tree: no 'posterior' group; expected the output of a bayesgeo fit")
        ds = data["posterior"].to_dataset()
    elif isinstance(data, xr.Dataset):
        ds = data
    else:
        raise TypeError(f"expected an xarray DataTree or Dataset, got {type(data).__name__}")
    missing = [d for d in ("chain", "draw") if d not in ds.dims]
    if missing:
        raise InputError(f"posterior: missing dimension(s) {', '.join(missing)}; expected (chain, draw)")
    if ds.sizes["draw"] < 4:
        raise InputError(f"posterior: {ds.sizes['draw']} draws per chain; at least 4 are needed")
    return ds


def _as_draws(data, var_names) -> xr.DataArray:
    if isinstance(data, xr.DataArray):
        missing = [d for d in ("chain", "draw") if d not in data.dims]
        if missing:
            raise InputError(f"draws: missing dimension(s) {', '.join(missing)}; expected (chain, draw)")
        return data.astype(float)
    return stack_parameters(data, var_names=var_names)


def autocorrelation(data, *, lag_limit: int | None = None, var_names: Sequence[str] | None = None) -> xr.DataArray:
    """Autocorrelation of the draws of each parameter and chain.

    Parameters
    ----------
    data : xarray.DataTree, xarray.Dataset or xarray.DataArray
        Posterior draws. A tree or dataset is flattened by :func:`stack_parameters`; a
        ``DataArray`` must have dims ``chain`` and ``draw`` (other dims are kept).
    lag_limit : int, optional
        Largest lag. Default :func:`default_lag_limit`: three times the largest per-chain IAT,
        at least 20 and at most ``draw - 1``, which covers the decay of the autocorrelation.
    var_names : sequence of str, optional
        Variables to keep (tree or dataset input only).

    Returns
    -------
    xarray.DataArray
        Dims ``(..., chain, lag)``; values are dimensionless, 1 at lag 0. The attribute
        ``estimator`` names the estimator.

    References
    ----------
    Box, Jenkins and Reinsel (2008), *Time Series Analysis*, 4th ed., sec. 2.1.5 (the estimator).
    """
    da = _as_draws(data, var_names)
    da = da.transpose(..., "chain", "draw")
    n_draw = da.sizes["draw"]
    if lag_limit is None:
        lag_limit = default_lag_limit(da.values)
    elif isinstance(lag_limit, bool) or not isinstance(lag_limit, (int, np.integer)) or not 1 <= lag_limit < n_draw:
        raise InputError(f"lag_limit: expected an integer from 1 to {n_draw - 1} (draws - 1), got {lag_limit!r}")
    out = xr.apply_ufunc(
        acf_array, da, input_core_dims=[["draw"]], output_core_dims=[["lag"]],
        kwargs={"lag_limit": int(lag_limit)},
    )
    out = out.assign_coords(lag=np.arange(int(lag_limit) + 1))
    out.name = "autocorrelation"
    out.attrs.update(units="1", estimator="sample autocorrelation with divisor n (FFT)")
    return out


def integrated_autocorrelation_time(
    data, *, method: str = "geyer", per_chain: bool = False, var_names: Sequence[str] | None = None
) -> xr.DataArray:
    """Integrated autocorrelation time tau = 1 + 2 sum_k rho_k of each parameter.

    Parameters
    ----------
    data : xarray.DataTree, xarray.Dataset or xarray.DataArray
        As for :func:`autocorrelation`.
    method : {"geyer", "sokal"}
        Truncation of the sum (see the module docstring): Geyer's initial monotone sequence
        (default; Geyer 1992, chains combined as in Vehtari et al. 2021) or Sokal's automatic
        window with c = 5 (Sokal 1997).
    per_chain : bool
        One value per chain instead of one per parameter with the chains combined.
    var_names : sequence of str, optional
        Variables to keep (tree or dataset input only).

    Returns
    -------
    xarray.DataArray
        IAT in draws (``draws / IAT`` is the effective sample size of the mean); dims of the
        input without ``draw`` (and without ``chain`` unless ``per_chain``). NaN for a chain with
        zero variance. The attribute ``estimator`` names the method and its source.
    """
    if method not in IAT_METHODS:
        raise InputError(f"IAT method: {method!r} is not one of {', '.join(IAT_METHODS)}")
    da = _as_draws(data, var_names).transpose(..., "chain", "draw")
    core = [["draw"]] if per_chain else [["chain", "draw"]]
    if per_chain:
        func = lambda a: iat_array(a[..., None, :], method=method, per_chain=True)[..., 0]  # noqa: E731
    else:
        func = lambda a: iat_array(a, method=method)  # noqa: E731
    out = xr.apply_ufunc(func, da, input_core_dims=core, output_core_dims=[[]])
    out.name = "iat"
    out.attrs.update(units="draws", method=method, estimator=IAT_METHODS[method])
    return out
