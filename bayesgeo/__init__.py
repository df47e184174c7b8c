"""bayesgeo: Bayesian geostatistics with honest uncertainty in range, sill and nugget.

The public API is a small set of functions on xarray objects, one module per stage:
data -> explore -> covariance -> priors -> model -> sampling -> diagnostics -> predict -> report.
"""

from __future__ import annotations

from bayesgeo.covariance import FAMILIES, Covariance, get_covariance
from bayesgeo.data import read_points
from bayesgeo.demo import demo_data, write_demo_data
from bayesgeo.autocorr import autocorrelation, integrated_autocorrelation_time
from bayesgeo.diagnostic_figures import write_diagnostic_figures
from bayesgeo.diagnostics import Convergence, Thresholds, check_convergence
from bayesgeo.design import design_table, kriging_variance
from bayesgeo.hier_outputs import save_site_fit, shrinkage_table
from bayesgeo.hierarchical import build_site_model, fit_sites, site_fit
from bayesgeo.explore import correlogram, directional_semivariograms, lag_bins, semivariogram
from bayesgeo.figures import correlogram_figure, directional_figure, semivariogram_figure
from bayesgeo.check_figures import loo_pit_figure, variogram_check_figure
from bayesgeo.loo import add_log_likelihood, pointwise_loo_loglik
from bayesgeo.model import FitSpec, build_model
from bayesgeo.fitted import Fit, NotConvergedError
from bayesgeo.posterior import fit, fit_report, fit_spec, prior_check_figure, save_fit, summary_table
from bayesgeo.priors import Priors, plot_prior_semivariogram, prior_semivariogram
from bayesgeo.sampling import compile_model, sample
from bayesgeo.modelcheck import compare_fits, loo_pit, store_log_likelihood
from bayesgeo.ppcheck import variogram_check
from bayesgeo.parallel import WorkUnit, make_units, run_units
from bayesgeo.predict import area_average, basis_from_fit, kriging_moments, make_basis, posterior_parameters, predict_targets
from bayesgeo.quickfit import fit_ml, fit_wls, quick_fits
from bayesgeo.targets import discretise_area, grid_targets, hull_mask, read_target_points
from bayesgeo.trend import design_at, design_matrix, fit_trend
from bayesgeo.validate import InputError
from bayesgeo.study import Study, read_study
from bayesgeo.pipeline import run_study
from bayesgeo.report import build_report, write_report
from bayesgeo.validation import SBCConfig, generated_layout, sbc_summary, simulation_based_calibration

__version__ = "0.1.0"

__all__ = [
    "SBCConfig",
    "generated_layout",
    "sbc_summary",
    "simulation_based_calibration",
    "FAMILIES",
    "Convergence",
    "Covariance",
    "InputError",
    "Thresholds",
    "autocorrelation",
    "check_convergence",
    "correlogram",
    "correlogram_figure",
    "demo_data",
    "design_at",
    "design_matrix",
    "directional_figure",
    "directional_semivariograms",
    "fit_ml",
    "fit_trend",
    "fit_wls",
    "get_covariance",
    "integrated_autocorrelation_time",
    "lag_bins",
    "quick_fits",
    "read_points",
    "semivariogram",
    "semivariogram_figure",
    "write_demo_data",
    "write_diagnostic_figures",
    "FitSpec",
    "Priors",
    "build_model",
    "compile_model",
    "fit",
    "fit_report",
    "fit_spec",
    "Fit",
    "NotConvergedError",
    "plot_prior_semivariogram",
    "prior_check_figure",
    "prior_semivariogram",
    "sample",
    "save_fit",
    "summary_table",
    "area_average",
    "basis_from_fit",
    "discretise_area",
    "grid_targets",
    "hull_mask",
    "kriging_moments",
    "make_basis",
    "posterior_parameters",
    "predict_targets",
    "read_target_points",
    "add_log_likelihood",
    "compare_fits",
    "loo_pit",
    "loo_pit_figure",
    "pointwise_loo_loglik",
    "store_log_likelihood",
    "variogram_check",
    "variogram_check_figure",
    "WorkUnit",
    "make_units",
    "run_units",
    "maximin_order",
    "nearest_previous",
    "nn_error_moments",
    "nn_kriging_moments",
    "nn_loglik",
    "nn_loglik_and_grad",
    "build_site_model",
    "design_table",
    "fit_sites",
    "kriging_variance",
    "save_site_fit",
    "shrinkage_table",
    "site_fit",
    "Study",
    "read_study",
    "run_study",
    "build_report",
    "write_report",
]

# Loaded on first use: the nearest-neighbour likelihood needs PyTensor and Numba, which
# `import bayesgeo` (data intake, exploration) should not pay for.
_LAZY = {name: "bayesgeo.vecchia" for name in
         ("maximin_order", "nearest_previous", "nn_error_moments", "nn_kriging_moments", "nn_loglik",
          "nn_loglik_and_grad")}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'bayesgeo' has no attribute {name!r}")
