"""bayesgeo: Bayesian geostatistics with honest uncertainty in range, sill and nugget.

The names here are the curated public API, in the order of the stages:
data -> exploration -> model -> fit -> checks -> prediction -> study runs. Everything else is
reachable through its module (``bayesgeo.explore``, ``bayesgeo.predict``, ``bayesgeo.loo``, ...),
documented there. The short path from points to a map::

    fit = bayesgeo.Fit.sample(bayesgeo.read_points("samples.csv", value="lead_mg_kg"), seed=1)
    fit.convergence
    maps = fit.predict(cell=10.0, thresholds=[400.0])
"""

from __future__ import annotations

from bayesgeo.covariance import FAMILIES, get_covariance
from bayesgeo.data import read_points
from bayesgeo.demo import demo_data
from bayesgeo.diagnostic_figures import write_diagnostic_figures
from bayesgeo.diagnostics import Convergence, check_convergence
from bayesgeo.explore import correlogram, semivariogram
from bayesgeo.figures import correlogram_figure, semivariogram_figure
from bayesgeo.fitted import Fit, NotConvergedError
from bayesgeo.hierarchical import fit_sites
from bayesgeo.modelcheck import compare_fits
from bayesgeo.pipeline import run_study
from bayesgeo.posterior import fit
from bayesgeo.ppcheck import variogram_check
from bayesgeo.predict import area_average, basis_from_fit, predict_targets
from bayesgeo.priors import Priors
from bayesgeo.quickfit import quick_fits
from bayesgeo.report import write_report
from bayesgeo.study import read_study
from bayesgeo.targets import grid_targets, read_target_points
from bayesgeo.validate import InputError

__version__ = "0.1.0"

__all__ = [
    # data
    "read_points",
    "demo_data",
    # exploration
    "semivariogram",
    "correlogram",
    "quick_fits",
    "semivariogram_figure",
    "correlogram_figure",
    # model
    "FAMILIES",
    "get_covariance",
    "Priors",
    # fit
    "Fit",
    "fit",
    "fit_sites",
    # checks
    "Convergence",
    "check_convergence",
    "write_diagnostic_figures",
    "compare_fits",
    "variogram_check",
    # prediction
    "grid_targets",
    "read_target_points",
    "basis_from_fit",
    "predict_targets",
    "area_average",
    # study runs
    "read_study",
    "run_study",
    "write_report",
    # errors
    "InputError",
    "NotConvergedError",
]
