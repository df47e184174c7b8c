"""The schema of study files: every table and key, its kind, default, accepted values and one-line help.

:mod:`bayesgeo.study.settings` reads and checks a study file against it; docs/study_file.md is its
reference for people.
"""

from __future__ import annotations

from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE
from bayesgeo.gp.covariance import FAMILIES

__all__ = ["POOLINGS", "REQUIRED", "SCHEMA", "KIND_TEXT", "RENAMED"]

#: Poolings a study may name: one site, or the several-site models of :mod:`bayesgeo.fitting.hierarchical`.
POOLINGS = ("single", "hierarchical", "independent", "complete")

# --- the schema -------------------------------------------------------------------------------
# key -> (kind, default, choices or None, one-line help). Kinds: str, int, float, bool, path,
# str_list, float_list, float_pair, family_list, int_or_all, area. ``REQUIRED`` marks a key that must be given.
REQUIRED = object()

SCHEMA: dict[str, dict[str, tuple]] = {
    "": {
        "title": ("str", "", None, "title printed at the top of the report"),
    },
    "data": {
        "path": ("path", REQUIRED, None, "point measurements: CSV, Excel, GeoPackage, shapefile, GeoJSON (or .nc)"),
        "layer": ("str", None, None, "worksheet of a workbook or layer of a GIS file"),
        "crs": ("str", None, None, "CRS of the coordinates, e.g. EPSG:32633 (a GIS file's own is used)"),
        "to_crs": ("str", None, None, "project the points first: 'utm' or a projected CRS"),
        "x": ("str", None, None, "x / easting / longitude column (detected if omitted)"),
        "y": ("str", None, None, "y / northing / latitude column (detected if omitted)"),
        "value": ("str", None, None, "measured value column; <X is a non-detect below reporting limit X"),
        "limit": ("str", None, None, "reporting-limit column of non-detects (with detected)"),
        "detected": ("str", None, None, "detected / not-detected flag column (with limit)"),
        "site": ("str", None, None, "site label column (several-site data)"),
        "covariates": ("str_list", [], None, "covariate columns to read"),
        "categories": ("str_list", [], None, "categorical covariate columns (labels, treatment coded in the trend)"),
        "baselines": ("str_list", [], None, "baseline level of a category, as \"COL=LEVEL\" (default: most frequent)"),
        "units": ("str", None, None, "units of the measured value, e.g. mg/kg"),
        "distance_units": ("str", None, None, "units of planar coordinates, e.g. m"),
        "coords": ("str", "auto", ("auto", "xy", "lonlat"), "planar (xy) or degrees (lonlat)"),
        "duplicates": ("str", "error", ("error", "mean"), "points at the same location: error or average"),
    },
    "explore": {
        "bins": ("int", 15, None, "number of lag bins"),
        "lag_limit": ("float", None, None, "largest lag (distance units); default half the largest distance"),
        "permutations": ("int", 99, None, "random permutations for envelopes (0 for none)"),
        "estimator": ("str", "classical", ("classical", "cressie-hawkins"), "semivariogram estimator"),
        "trend": ("int", None, None, "polynomial trend order 0-3 (default: the model's)"),
        "transform": ("str", None, ("none", "log"), "transform of the values (default: the model's)"),
        "seed": ("int", 1, None, "seed of the permutations"),
    },
    "model": {
        "covariance": ("family_list", ["matern32"], FAMILIES, "covariance family, or a list of families to compare"),
        "nu": ("float", None, None, "Matérn smoothness (family 'matern' only)"),
        "nugget": ("bool", True, None, "fit a nugget"),
        "trend": ("int", 0, None, "polynomial trend order in the coordinates, 0-3"),
        "covariates": ("str_list", [], None,
                       "covariates in the trend (a subset of data.covariates and data.categories)"),
        "transform": ("str", "none", ("none", "log"), "model the values or their natural logarithm"),
        "pooling": ("str", None, POOLINGS,
                    "single (one site) or, with [data] site, hierarchical, independent or complete "
                    "(default: hierarchical with a site column, else single)"),
        "approx": ("str", "auto", ("auto", "dense", "nn"),
                   "likelihood: dense (exact), nn (nearest-neighbour approximation) or auto (dense up to 2,000 points)"),
        "neighbours": ("int", None, None, "neighbours of a nearest-neighbour likelihood (with approx = 'nn')"),
        "anisotropy": ("bool", False, None, "geometric anisotropy: a direction and a ratio of ranges (planar "
                       "coordinates; each site its own)"),
    },
    "model.priors": {
        "range_below": ("float_pair", None, None, "[R0, A1]: P(practical range < R0) = A1"),
        "sd_above": ("float_pair", None, None, "[S0, A2]: P(sd of the field > S0) = A2"),
        "nugget_above": ("float_pair", None, None, "[T0, A3]: P(nugget sd > T0) = A3"),
    },
    "sampler": {
        "name": ("str", "nutpie", ("nutpie", "pymc"), "NUTS implementation"),
        "chains": ("int", CHAINS, None, "chains"),
        "draws": ("int", DRAWS, None, "kept draws per chain"),
        "max_draws": ("int", None, None, "continue the same chains up to this many draws per chain while R-hat or "
                                         "ESS is too poor (default 4 x draws; equal to draws: off)"),
        "tune": ("int", TUNE, None, "tuning iterations per chain"),
        "target_accept": ("float", None, None, "target acceptance rate, in (0, 1) (default 0.8, 0.9 for several-site "
                                               "models, and a fit whose draws hold divergent transitions is sampled "
                                               "once more at 0.9, 0.95; a value given here is used as it is)"),
        "seed": ("int", 1, None, "seed of the sampler (same seed, same numbers)"),
    },
    "check": {
        "replicates": ("int", 200, None, "replicate data sets of the posterior predictive semivariogram check"),
        "seed": ("int", 1, None, "seed of the replicates"),
    },
    "prediction": {
        "cell": ("float", None, None, "grid cell side (distance units; default ~100 cells on the longer side)"),
        "margin": ("float", 0.0, None, "widen the grid's bounding box on every side"),
        "points": ("path", None, None, "CSV of target points instead of a grid"),
        "zones": ("path", None, None, "polygon layer giving the trend's categories on a grid (cells in no polygon "
                                      "are left out)"),
        "zones_layer": ("str", None, None, "layer of a zones file holding several"),
        "thresholds": ("float_list", [], None, "levels for exceedance probabilities (data units)"),
        "area": ("area", None, None, "area(s) to average over: a polygon CSV path or [xmin, ymin, xmax, ymax], a list "
                                     "of these (one per site), or a table {site = area}"),
        "draws": ("int_or_all", 500, None, "posterior draws used for prediction (or 'all')"),
        "nugget": ("str", "include", ("include", "exclude"), "include the nugget in point predictions"),
        "hull_mask": ("bool", False, None, "leave out cells outside the convex hull of the samples"),
        "seed": ("int", 0, None, "seed of the area simulations"),
    },
    "output": {
        "dir": ("path", None, None, "run folder (default: <study file stem>-run beside the study file)"),
        "overwrite": ("bool", False, None, "replace an existing run folder"),
    },
}

KIND_TEXT = {
    "str": "a string", "int": "an integer", "float": "a number", "bool": "true or false", "path": "a string (path)",
    "str_list": "a list of strings", "float_list": "a list of numbers", "float_pair": "a list of two numbers",
    "family_list": "a family name or a list of them", "int_or_all": "a positive integer or \"all\"",
    "area": "a path (string), [xmin, ymin, xmax, ymax], a list of these, or a table {site = area}",
}


#: Keys of earlier versions and their new names: a study file using one gets a one-line error naming the new key.
RENAMED: dict[tuple[str, str], str] = {
    ("explore", "max_lag"): "lag_limit",
    ("model.priors", "range"): "range_below",
    ("model.priors", "sd"): "sd_above",
    ("model.priors", "nugget"): "nugget_above",
}
