"""The two likelihood engines behind one interface, chosen once from a fit's settings.

A fit's likelihood is either exact (``dense``: the n x n covariance matrix, one Cholesky
factorisation per evaluation, :mod:`bayesgeo.gp.dense`) or the nearest-neighbour (Vecchia)
approximation (``nn``: each point conditioned on its m nearest earlier points in a maximin
ordering, no n x n matrix, :mod:`bayesgeo.gp.nn`). Everything that depends on that choice is a
method of the engine, so the stages never branch on it:

========================  ===================================  ======================================
method                    dense                                nn
========================  ===================================  ======================================
``distances``             distance matrix and its maximum      largest pair distance only (O(n) memory)
``loglik``                :func:`~bayesgeo.gp.dense.marginal_loglik`   :func:`~bayesgeo.gp.nn.nn_loglik`
``draw_moments``          kriging with every datum             kriging with the m nearest data
``loo``                   exact (eq. 5.12 of Rasmussen and     conditional on the nearest other points
                          Williams 2006)                       (:mod:`bayesgeo.gp.nn_loo`)
``replicates``            multivariate normal (Cholesky of K)  Vecchia simulation
``approximation_check``   None (exact)                         :func:`~bayesgeo.gp.nn_accuracy.approximation_check`
========================  ===================================  ======================================

:func:`choose` turns the user's ``approx`` (``auto``, ``dense`` or ``nn``) and the number of
points into the engine's name and m, once per fit (per site for several sites); the name is
stored in the fit's settings (``approx``, ``site_approx``) and :func:`engine` returns the engine
from it. The fits arrays (``fa``) taken by ``loo`` and ``replicates`` are
:class:`bayesgeo.fitting.arrays.FitArrays` (``spec``, ``draws``, ``xy``, ``y``, ``design``,
``dist``): this package reads only those attributes and imports nothing of the later stages.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass

import numpy as np

from bayesgeo.common.geometry import distance_matrix
from bayesgeo.common.validate import InputError, check_choice, check_positive_int

__all__ = ["APPROX", "DENSE_LIMIT", "NN_PREDICT_NEIGHBOURS", "LooResult", "Engine", "choose", "engine", "resolve",
           "with_imputed"]

#: Likelihood choices: exact dense, nearest-neighbour (Vecchia), or dense up to DENSE_LIMIT points.
APPROX = ("auto", "dense", "nn")

#: ``approx="auto"`` uses the dense likelihood up to this many points (per site), nn beyond: at
#: n = 2,000 one dense log-density and gradient costs about 0.25 s here (bench/RESULTS.md), so a fit
#: takes hours beyond it.
DENSE_LIMIT = 2000

#: Data points per target for the nearest-neighbour kriging of a fit with the nn likelihood.
NN_PREDICT_NEIGHBOURS = 30


@dataclass(frozen=True)
class LooResult:
    """Leave-one-out predictives of every draw and point on the standardised scale, (draws, n) each,
    with the method's description and any further attributes (``loo_neighbours``, ``caution``)."""

    mean: np.ndarray
    var: np.ndarray
    logp: np.ndarray
    method: str
    attrs: dict


class Engine:
    """Interface of a likelihood engine (the two instances are :func:`engine` ``("dense")`` and ``("nn")``)."""

    name: str = ""
    #: Whether the trend coefficients can be integrated out of this likelihood (a dense K + b^2 F F^T).
    integrates_trend: bool = False
    #: Whether joint (full-covariance) kriging is available (area averages, conditional simulations).
    joint_kriging: bool = False

    def distances(self, xy: np.ndarray, metric: str) -> tuple[float, np.ndarray | None]:
        """The largest distance between two points and, for the dense engine, the distance matrix."""
        raise NotImplementedError

    def loglik(self, resid, *, xy, dist, covariance, scale, partial_sill, nugget, neighbours: int, metric: str,
               distance_scale: float, extra=None, anisotropy=None):
        """PyTensor scalar log N(resid | 0, K) (or its approximation); ``dist`` is the distance matrix divided by
        ``distance_scale`` (dense), ``xy`` the locations (nn); ``extra`` a constant added to K (dense only);
        ``anisotropy`` the anisotropy vector (a length-2 tensor; dense only, :mod:`bayesgeo.gp.anisotropy`)."""
        raise NotImplementedError

    def predict_neighbours(self, neighbours: int) -> int:
        """m of the kriging basis of a fit with this likelihood (0: every datum)."""
        raise NotImplementedError

    def draw_moments(self, basis, xy_new, design_new, *, include_nugget: bool = True):
        """Kriging mean and variance per draw at new locations, (D, m) each, in model units, from a
        :class:`bayesgeo.gp.kriging.KrigingBasis` (``engine(basis.engine_name)`` is the engine to ask)."""
        raise NotImplementedError

    def residual_means(self, basis, xy_new, resid) -> np.ndarray:
        """Kriging means (no trend) of residual vectors ``resid`` (D, S, n), S per draw, at new locations:
        (D, S, m) in model units (conditioning by kriging, :mod:`bayesgeo.gp.joint`)."""
        raise NotImplementedError

    def loo(self, fa, *, neighbours: int | None = None, progress=None) -> LooResult:
        """Leave-one-out predictives of every point and draw of the fit ``fa``; ``progress(total=, desc=)``
        makes a bar for long work (the nearest-neighbour engine's, counting points)."""
        raise NotImplementedError

    def replicates(self, fa, picks: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        """Replicate data in the fit's model units, (n, len(picks)), replicate r from flat draw ``picks[r]``;
        noise drawn from ``rng`` as consecutive rows of n standard normals."""
        raise NotImplementedError

    def simulation(self, neighbours: int) -> str:
        """How :meth:`replicates` simulates, for the attributes of the variogram check."""
        raise NotImplementedError

    def approximation_check(self, posterior, xy, *, covariance: str, neighbours: int, metric: str) -> dict | None:
        """The accuracy check of an approximate likelihood at the posterior medians; None when exact."""
        return None


class _Dense(Engine):
    name = "dense"
    integrates_trend = True
    joint_kriging = True

    def distances(self, xy, metric):
        d = distance_matrix(xy, metric)
        return float(d.max()), d

    def loglik(self, resid, *, xy, dist, covariance, scale, partial_sill, nugget, neighbours, metric,
               distance_scale, extra=None, anisotropy=None):
        if anisotropy is not None:
            from bayesgeo.gp.dense_aniso import marginal_loglik_aniso

            return marginal_loglik_aniso(resid, np.asarray(xy, float) / distance_scale, covariance, scale,
                                         partial_sill, nugget, anisotropy, extra=extra)
        from bayesgeo.gp.dense import marginal_loglik

        return marginal_loglik(resid, dist, covariance, scale, partial_sill, nugget, extra=extra)

    def predict_neighbours(self, neighbours):
        return 0

    def draw_moments(self, basis, xy_new, design_new, *, include_nugget=True):
        from bayesgeo.gp.kriging import draw_moments

        return draw_moments(basis, xy_new, design_new, include_nugget=include_nugget)

    def residual_means(self, basis, xy_new, resid):
        from bayesgeo.gp.kriging import residual_means

        return residual_means(basis, xy_new, resid)

    def loo(self, fa, *, neighbours=None, progress=None):
        from bayesgeo.gp.dense_loo import _loo_one, draw_covariances

        nc, nd = fa.draws["sd_z"].shape
        mean, var, logp = (np.empty((nc * nd, fa.n)) for _ in range(3))
        for k, mu, c in draw_covariances(fa):
            m, v, lp = _loo_one(_values(fa, k) - mu, c)
            mean[k], var[k], logp[k] = m + mu, v, lp
        _censored_terms(fa, mean, var, logp)
        return LooResult(mean, var, logp, "exact Gaussian leave-one-out (Sundararajan and Keerthi 2001; Rasmussen "
                         "and Williams 2006, eq. 5.12)", {})

    def replicates(self, fa, picks, rng):
        from bayesgeo.gp.dense_loo import draw_covariances

        ys = np.empty((fa.n, picks.size))
        for col, (_, mu, c) in enumerate(draw_covariances(fa, picks)):
            ys[:, col] = mu + np.linalg.cholesky(c) @ rng.standard_normal(fa.n)
        return fa.spec.values_of(ys)

    def simulation(self, neighbours):
        return "exact multivariate normal (Cholesky of K)"


class _NearestNeighbour(Engine):
    name = "nn"

    def distances(self, xy, metric):
        from bayesgeo.common.pairs import max_pair_distance

        return max_pair_distance(xy[:, 0], xy[:, 1], group=np.zeros(len(xy), dtype=np.int64),
                                 greatcircle=metric == "greatcircle"), None

    def loglik(self, resid, *, xy, dist, covariance, scale, partial_sill, nugget, neighbours, metric,
               distance_scale, extra=None, anisotropy=None):
        from bayesgeo.gp.nn import nn_loglik

        if extra is not None and anisotropy is None:
            raise ValueError("the trend coefficients can be integrated out of the dense likelihood only")
        if anisotropy is not None:
            from bayesgeo.gp.nn import _structure
            from bayesgeo.gp.nn_aniso import nn_loglik_aniso

            xy, nbr = _structure(xy, len(xy), neighbours, "maximin", metric)
            return nn_loglik_aniso(resid, xy, covariance, scale, partial_sill, nugget, anisotropy, nbr=nbr,
                                   distance_scale=distance_scale)
        if extra is not None:
            raise ValueError("the trend coefficients can be integrated out of the dense likelihood only")
        return nn_loglik(resid, xy, covariance, scale, partial_sill, nugget, neighbours=neighbours, metric=metric,
                         distance_scale=distance_scale)

    def predict_neighbours(self, neighbours):
        return NN_PREDICT_NEIGHBOURS

    def draw_moments(self, basis, xy_new, design_new, *, include_nugget=True):
        from bayesgeo.gp.kriging import draw_xy
        from bayesgeo.gp.nn_kriging import nn_kriging_moments

        def moments(values, k, j=0):  # draws k (a slice) with data values; coordinates of draw j
            return nn_kriging_moments(draw_xy(basis, basis.xy, j), values, basis.design, draw_xy(basis, xy_new, j),
                                      design_new, covariance=basis.covariance, scale=basis.scale[k],
                                      partial_sill=basis.partial_sill[k], nugget=basis.nugget[k], beta=basis.beta[k],
                                      metric=basis.metric, neighbours=basis.neighbours, include_nugget=include_nugget)

        if basis.values.ndim == 1 and basis.anisotropy is None:
            return moments(basis.values, slice(None))
        # imputed non-detects, or an anisotropic fit: each draw its own values and coordinates
        parts = [moments(basis.values if basis.values.ndim == 1 else basis.values[k], slice(k, k + 1), k)
                 for k in range(basis.n_draws)]
        return np.vstack([m for m, _ in parts]), np.vstack([v for _, v in parts])

    def residual_means(self, basis, xy_new, resid):
        from bayesgeo.gp.nn_kriging import nn_residual_means

        return nn_residual_means(basis, xy_new, resid)

    def loo(self, fa, *, neighbours=None, progress=None):
        from bayesgeo.gp.nn_loo import loo_neighbour_count, nn_loo

        spec = fa.spec
        m = loo_neighbour_count(spec.neighbours, fa.n, neighbours)
        nc, nd = fa.draws["sd_z"].shape
        # phi in the distance units of the coordinates (the kernel does not divide by the distance scale)
        scale = spec.scale_of(fa.draws["practical_range_z"].reshape(-1))
        psill, tau2 = fa.draws["sd_z"].reshape(-1) ** 2, fa.draws["nugget_sd_z"].reshape(-1) ** 2
        beta = fa.draws["beta_z"].reshape(nc * nd, -1)
        aniso = None
        if "anisotropy_z" in fa.draws:  # each draw in its own rotated and scaled coordinates
            from bayesgeo.gp.anisotropy import angle_ratio, to_isotropic

            angle, ratio = angle_ratio(fa.draws["anisotropy_z"].reshape(-1, 2))
            aniso = lambda k: to_isotropic(fa.xy, angle[k], ratio[k])  # noqa: E731 (one draw at a time)
        with (progress or _no_bar)(total=fa.n, desc="nearest-neighbour LOO") as bar:
            if "censored_z" not in fa.draws and aniso is None:
                mean, var, logp = nn_loo(fa.y, fa.xy, fa.design, covariance=spec.covariance, scale=scale,
                                         partial_sill=psill, nugget=tau2, beta=beta, neighbours=m, metric=spec.metric,
                                         progress=bar)
            else:  # each draw conditions on its own imputed non-detects
                from bayesgeo.gp.nn_loo import loo_neighbours

                nbr = loo_neighbours(fa.xy, neighbours=m, metric=spec.metric)
                parts = [nn_loo(_values(fa, k), fa.xy if aniso is None else aniso(k), fa.design,
                                covariance=spec.covariance, scale=scale[k], partial_sill=psill[k], nugget=tau2[k],
                                beta=beta[k], neighbours=m, metric=spec.metric,
                                nbr=nbr if aniso is None else None) for k in range(scale.size)]
                mean, var, logp = (np.vstack([p[i] for p in parts]) for i in range(3))
                if bar is not None:
                    bar.update(fa.n)
            _censored_terms(fa, mean, var, logp)
        attrs = {"loo_neighbours": int(m)}
        if m < fa.n - 1:
            attrs["caution"] = (
                f"nearest-neighbour leave-one-out (m = {m}) approximates the exact one; with smooth covariance "
                "families (Matérn 3/2, 5/2, Gaussian) and a nugget, elpd differences were off by up to a third of "
                "themselves in our checks (docs/model_checks.md): read small differences between such fits as no "
                "clear preference")
        return LooResult(mean, var, logp, f"nearest-neighbour Gaussian leave-one-out: each point conditioned on its "
                         f"{m} nearest other points (simple kriging on the neighbours; exact when m = n - 1)", attrs)

    def replicates(self, fa, picks, rng):
        from bayesgeo.gp.nn_simulate import nn_replicates

        return nn_replicates(fa, picks, rng)

    def simulation(self, neighbours):
        return f"nearest-neighbour (Vecchia) model of the fit, m = {neighbours}; all pairs within lag_limit"

    def approximation_check(self, posterior, xy, *, covariance, neighbours, metric):
        from bayesgeo.gp.nn_accuracy import approximation_check

        if "anisotropy_angle" in posterior:  # at the posterior direction and median ratio (bayesgeo.gp.anisotropy)
            from bayesgeo.gp.anisotropy import to_isotropic

            xy = to_isotropic(xy, posterior["anisotropy_angle"].attrs["circular_mean"],
                              float(posterior["anisotropy_ratio"].median()))
        return approximation_check(posterior, xy, covariance=covariance, neighbours=neighbours, metric=metric)


def with_imputed(values: np.ndarray, censored: np.ndarray, imputed: np.ndarray) -> np.ndarray:
    """``values`` (n,) with the non-detects (``censored``, boolean or positions) at ``imputed``: (k,) for one
    draw gives (n,), (D, k) for D draws gives (D, n). The one place imputed non-detects enter data."""
    imputed = np.asarray(imputed, dtype=float)
    out = np.array(np.broadcast_to(np.asarray(values, dtype=float), imputed.shape[:-1] + np.shape(values)))
    out[..., censored] = imputed
    return out


def _values(fa, k: int) -> np.ndarray:
    """The standardised values of flat draw ``k``: the data, the non-detects at that draw's imputed values."""
    if "censored_z" not in fa.draws:
        return fa.y
    return with_imputed(fa.y, fa.censored, fa.draws["censored_z"].reshape(-1, int(fa.censored.sum()))[k])


def _censored_terms(fa, mean: np.ndarray, var: np.ndarray, logp: np.ndarray) -> None:
    """For each non-detect i, its leave-one-out term becomes log P(y_i < L_i | rest) = log Phi((L_i - mean_i) /
    sd_i), the probability of a result below its reporting limit L_i (``fa.y`` holds the limits), in place."""
    if not fa.censored.any():
        return
    from scipy.special import log_ndtr

    c = fa.censored
    with np.errstate(divide="ignore", invalid="ignore"):
        logp[:, c] = np.where(var[:, c] > 0, log_ndtr((fa.y[c] - mean[:, c]) / np.sqrt(var[:, c])), -np.inf)


@contextlib.contextmanager
def _no_bar(**_):
    yield None


_ENGINES = {"dense": _Dense(), "nn": _NearestNeighbour()}


def engine(name: str | None) -> Engine:
    """The engine of a fit's (or site's) stored likelihood name, ``"dense"`` (also for None or "") or ``"nn"``."""
    return _ENGINES[name or "dense"]


def resolve(approx: str, n: int) -> str:
    """The engine name ``approx`` gives for ``n`` points: ``auto`` is dense up to :data:`DENSE_LIMIT`, nn beyond."""
    if approx == "auto":
        return "dense" if n <= DENSE_LIMIT else "nn"
    return approx


def choose(approx: str, neighbours: int | None, n: int, family: str) -> tuple[str, int]:
    """The likelihood of ``n`` points: ``(name, m)``, m = 0 for dense.

    ``auto`` is dense up to :data:`DENSE_LIMIT` points, nearest-neighbour beyond; the
    nearest-neighbour m is ``neighbours`` (default :data:`bayesgeo.gp.nn.DEFAULT_NEIGHBOURS`), at
    most n - 1.

    Raises
    ------
    InputError
        An unknown ``approx``, a bad ``neighbours``, or ``nn`` with the general ``matern`` family.
    """
    check_choice(approx, APPROX, "approx")
    approx = resolve(approx, n)
    if approx == "dense":
        return "dense", 0
    if family == "matern":
        raise InputError("approx: the general 'matern' family has no nearest-neighbour kernel; "
                         "use exponential, matern32, matern52, gaussian or spherical")
    from bayesgeo.gp.nn import DEFAULT_NEIGHBOURS

    m = DEFAULT_NEIGHBOURS if neighbours is None else check_positive_int(neighbours, "neighbours")
    return "nn", min(m, n - 1)
