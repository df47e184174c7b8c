"""Names of every file and folder bayesgeo writes, in one place: fit folders, stage outputs, run folders.

A fit folder (``bayesgeo fit``) holds the fit and what the later stages add to it::

    posterior.nc  summary.csv  summary.txt  fit.json  prior_check.png     (fit; one site)
    shrinkage.csv/png  design.csv/png                                     (fit; several sites)
    diagnostics/diagnostics.json + figures                                 (check)
    variogram_check.png/csv, or variogram_check_<site>.png/csv             (variogram-check)
    predictions.nc + maps/, or predictions_<site>.nc + maps_<site>/        (map)

A study's run folder (:func:`bayesgeo.study.runner.run_study`)::

    inputs/  explore/  fits/<family>/  compare/  figures/  tables/  report.html  manifest.json

``<site>`` is :func:`bayesgeo.common.sitenames.site_file_name` of the site label: safe in a file name and
distinct for distinct labels.
"""

from __future__ import annotations

from pathlib import Path

__all__ = [
    "FIT_FILE", "SUMMARY_CSV", "SUMMARY_TXT", "FIT_REPORT", "PRIOR_CHECK", "SHRINKAGE", "DESIGN",
    "DIAGNOSTICS_DIR", "DIAGNOSTICS_FILE", "PREDICTIONS_FILE", "MAPS_DIR", "VGCHECK_FIGURE", "VGCHECK_TABLE",
    "EXPLORE_FILE", "COMPARISON_FILE", "REPORT_FILE", "REPORT_PDF_FILE", "RUN_INPUTS", "RUN_EXPLORE", "RUN_FITS", "RUN_COMPARE",
    "RUN_FIGURES", "RUN_TABLES", "site_part", "prediction_names", "vgcheck_names", "fit_folder_of",
]

# fit folder
FIT_FILE = "posterior.nc"
SUMMARY_CSV = "summary.csv"
SUMMARY_TXT = "summary.txt"
FIT_REPORT = "fit.json"
PRIOR_CHECK = "prior_check.png"
SHRINKAGE = ("shrinkage.csv", "shrinkage.png")
DESIGN = ("design.csv", "design.png")
# stages that add to a fit folder
DIAGNOSTICS_DIR = "diagnostics"
DIAGNOSTICS_FILE = "diagnostics.json"
PREDICTIONS_FILE = "predictions.nc"
MAPS_DIR = "maps"
VGCHECK_FIGURE = "variogram_check.png"
VGCHECK_TABLE = "variogram_check.csv"
# explore and compare folders
EXPLORE_FILE = "explore.json"
COMPARISON_FILE = "comparison.json"
# run folder of a study
REPORT_FILE = "report.html"
#: The same report rendered to PDF (bayesgeo.report.pdf), where WeasyPrint can run.
REPORT_PDF_FILE = "report.pdf"
RUN_INPUTS = "inputs"
RUN_EXPLORE = "explore"
RUN_FITS = "fits"
RUN_COMPARE = "compare"
RUN_FIGURES = "figures"
RUN_TABLES = "tables"


def site_part(site: str) -> str:
    """The file-name form of a site label (:func:`bayesgeo.common.sitenames.site_file_name`)."""
    from bayesgeo.common.sitenames import site_file_name

    return site_file_name(site)


def _with_site(name: str, site: str | None) -> str:
    if site is None:
        return name
    stem, dot, ext = name.partition(".")
    return f"{stem}_{site_part(site)}{dot}{ext}"


def prediction_names(site: str | None = None) -> tuple[str, str]:
    """The predictions file and the maps folder of the map stage (per site: ``predictions_<site>.nc``, ``maps_<site>``)."""
    return _with_site(PREDICTIONS_FILE, site), _with_site(MAPS_DIR, site)


def vgcheck_names(site: str | None = None) -> tuple[str, str]:
    """The figure and table of the variogram check (per site: ``variogram_check_<site>.png`` and ``.csv``)."""
    return _with_site(VGCHECK_FIGURE, site), _with_site(VGCHECK_TABLE, site)


def fit_folder_of(root: str | Path, family: str) -> Path:
    """The fit folder of covariance family ``family`` in a study's run folder ``root``."""
    return Path(root) / RUN_FITS / family
