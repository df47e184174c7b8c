"""bayesgeo: Bayesian geostatistics with honest uncertainty in range, sill and nugget.

The names here are the curated public API, in the order of the stages:
data -> exploration -> model -> fit -> checks -> prediction -> study runs. Everything else is
reachable through its stage package (``bayesgeo.explore``, ``bayesgeo.fitting``, ``bayesgeo.checks``,
``bayesgeo.predict``, ...), documented there. The short path from points to a map::

    fit = bayesgeo.Fit.sample(bayesgeo.read_points("samples.csv", value="lead_mg_kg"), seed=1)
    fit.convergence
    maps = bayesgeo.predict_map(fit, cell=10.0, thresholds=[400.0])
"""

from __future__ import annotations

from bayesgeo.common.validate import InputError
from bayesgeo.gp.covariance import FAMILIES, get_covariance
from bayesgeo.data.points import read_points
from bayesgeo.data.demo import demo_data
from bayesgeo.data.targets import grid_targets, read_target_points
from bayesgeo.explore.variogram import correlogram, semivariogram
from bayesgeo.explore.figures import correlogram_figure, semivariogram_figure
from bayesgeo.explore.quickfit import quick_fits
from bayesgeo.convergence.diagnostics import Convergence, check_convergence
from bayesgeo.convergence.figures import write_diagnostic_figures
from bayesgeo.fitting.priors import Priors
from bayesgeo.fitting.fitted import Fit, NotConvergedError
from bayesgeo.fitting.posterior import fit
from bayesgeo.fitting.hierarchical import fit_sites
from bayesgeo.checks.modelcheck import compare_fits
from bayesgeo.checks.ppcheck import variogram_check
from bayesgeo.predict.maps import predict_map
from bayesgeo.predict.prediction import area_average, basis_from_fit, predict_targets
from bayesgeo.report.writer import write_report
from bayesgeo.study.settings import read_study
from bayesgeo.study.runner import run_study

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
    "predict_map",
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
