"""Saved fits: read once, decoded once, checked once, before any stage uses them.

Every command that opens a fit folder (``map``, ``variogram-check``, ``compare``, ``check``) and
:meth:`bayesgeo.Fit.read` go through :func:`read_fit`, so a damaged or foreign file is refused with
one line naming the file and what is wrong, instead of a traceback or, worse, numbers computed from
it. :func:`check_fit` verifies, for single-site fits (:mod:`bayesgeo.fitting.posterior`) and several-site
fits (:mod:`bayesgeo.fitting.hierarchical`) alike:

* the ``settings`` attribute: valid JSON with a ``model`` table that decodes into the fit's spec,
  naming a covariance family of the registry (:mod:`bayesgeo.gp.covariance`), a known transform and
  likelihood; the ``diagnostics``, ``approximation`` and ``cautions`` attributes, when present,
  valid JSON too;
* the groups ``posterior``, ``observed_data`` and ``constant_data`` and the variables the stages read;
* sizes: as many observed values as locations and design rows, and as the settings record; the
  design has one column per trend term; a several-site fit's site labels match its settings;
* finiteness: every posterior draw, observed value, coordinate and design entry is a finite number
  (a NaN or infinite draw would otherwise turn into all-NaN maps or a NaN elpd with exit 0).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.common.io import read_datatree
from bayesgeo.common.layout import FIT_FILE, FIT_REPORT, PRIOR_CHECK, SUMMARY_CSV, SUMMARY_TXT
from bayesgeo.common.outputs import new_folder
from bayesgeo.common.validate import InputError

__all__ = ["read_fit", "save_fit", "check_fit", "check_finite_draws"]

_SAMPLED = ("practical_range_z", "sd_z", "beta_z")
_GROUPS = ("posterior", "observed_data", "constant_data")


def read_fit(directory: str | Path, *, written_by: str = "bayesgeo fit", require_fit: bool = True) -> xr.DataTree:
    """Read ``directory/posterior.nc`` (or that file itself) into memory and check it (:func:`check_fit`).

    With ``require_fit=False`` (the convergence check, which also takes a bare posterior from another
    program) only a ``posterior`` group with finite draws is required, and the settings are checked
    when present.

    Raises
    ------
    InputError
        One line naming the file: missing, unreadable as NetCDF (truncated, not NetCDF), or failing
        :func:`check_fit`.
    """
    path = Path(directory)
    if path.is_dir():
        path = path / FIT_FILE
    if not path.is_file():
        raise InputError(f"{path}: no fit found (expected {FIT_FILE} written by '{written_by}')")
    source = str(path)
    tree = read_datatree(path, what="NetCDF fit")
    if require_fit or "settings" in tree.attrs:
        return check_fit(tree, source)
    if "posterior" not in tree.children:
        raise InputError(f"{source}: no 'posterior' group; expected the output of a bayesgeo fit")
    _check_json_attrs(tree, source)
    check_finite_draws(tree, source)
    return tree


def save_fit(tree: xr.DataTree, directory: str | Path, *, overwrite: bool = False,
             shrinkage: xr.Dataset | None = None, design: xr.Dataset | None = None) -> Path:
    """Write a fit folder atomically, for single-site and several-site fits alike.

    Files: ``posterior.nc`` (the tree, netCDF4), ``summary.csv`` (one row per parameter, or per site,
    population and new-site parameter, with the convergence verdict), ``summary.txt``, ``fit.json``
    (:func:`bayesgeo.fitting.posterior.fit_report` or :func:`bayesgeo.fitting.hier_outputs.site_report`),
    and ``prior_check.png`` for a single-site fit, or, when given, ``shrinkage.csv``/``.png`` and
    ``design.csv``/``.png`` for a several-site fit (:func:`bayesgeo.fitting.hier_outputs.write_site_extras`).
    The folder is assembled under a temporary name and renamed at the end
    (:func:`bayesgeo.common.outputs.new_folder`, which also says what ``overwrite`` may replace).
    """
    import json

    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from bayesgeo.fitting import hier_outputs as several_site
    from bayesgeo.fitting import posterior as single_site

    several = tree.attrs.get("settings") and single_site.fit_settings(tree).get("format") == single_site.SEVERAL_SITE_FORMAT
    if several:
        report = several_site.site_report(tree, shrinkage=shrinkage, design=design)
        rows, text = several_site.summary_table(tree), several_site.summary_text_sites(report)
    elif shrinkage is not None or design is not None:
        raise ValueError("shrinkage and design tables belong to several-site fits")
    else:
        report = single_site.fit_report(tree)
        rows, text = single_site.summary_table(tree), single_site.summary_text(report)
    verdict = (report["diagnostics"] or {}).get("verdict", "not checked")
    with new_folder(directory, overwrite=overwrite) as tmp:
        tree.to_netcdf(tmp / FIT_FILE, engine="netcdf4")
        several_site.write_csv(tmp / SUMMARY_CSV, rows, {"diagnostics": "NOT CONVERGED" if verdict == "fail" else verdict})
        (tmp / SUMMARY_TXT).write_text(text, encoding="utf-8")
        (tmp / FIT_REPORT).write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
        if several:
            several_site.write_site_extras(tmp, tree, verdict, shrinkage=shrinkage, design=design)
        else:
            fig = single_site.prior_check_figure(tree)
            fig.savefig(tmp / PRIOR_CHECK, dpi=120, bbox_inches="tight")
            plt.close(fig)
    return Path(directory)


#: JSON attributes a fit may carry besides ``settings``, and the type each must decode to.
_JSON_ATTRS = {"diagnostics": dict, "approximation": dict, "cautions": list}


def _check_json_attrs(tree: xr.DataTree, source: str) -> None:
    """The optional JSON attributes (convergence verdict, nn check, cautions) must decode too."""
    import json

    for name, kind in _JSON_ATTRS.items():
        if name not in tree.attrs:
            continue
        try:
            value = json.loads(tree.attrs[name])
        except (TypeError, ValueError) as err:
            raise InputError(f"{source}: the '{name}' attribute is not valid JSON ({' '.join(str(err).split())}): "
                             "the file is damaged (cut short or edited); refit, or restore it from a copy") from None
        if not isinstance(value, kind):
            raise InputError(f"{source}: the '{name}' attribute holds {type(value).__name__} where a "
                             f"{'table' if kind is dict else 'list'} is expected: the file is damaged")


def check_fit(tree: xr.DataTree, source: str = "fit") -> xr.DataTree:
    """Check that ``tree`` is a complete, consistent bayesgeo fit (see the module docstring); return it.

    Raises
    ------
    InputError
        One line: ``"<source>: <what is wrong>"``.
    """
    from bayesgeo.fitting.posterior import SEVERAL_SITE_FORMAT, fit_settings, fit_spec

    settings = fit_settings(tree, source)
    _check_json_attrs(tree, source)
    several = settings.get("format") == SEVERAL_SITE_FORMAT
    if several:
        from bayesgeo.fitting.site_inputs import site_spec

        spec = site_spec(tree, source)
        n_expected = int(sum(spec.n))
    else:
        spec = fit_spec(tree, source)
        n_expected = int(spec.n)
    _check_spec_values(spec, source)
    missing = [g for g in _GROUPS if g not in tree.children]
    if missing:
        raise InputError(f"{source}: no {', '.join(repr(g) for g in missing)} group: not a complete bayesgeo fit "
                         "(damaged, or written by another program)")
    post, obs, const = (tree[g].to_dataset() for g in _GROUPS)
    need = {"posterior": [*_SAMPLED, *(["nugget_sd_z"] if spec.nugget else [])],
            "observed_data": ["value"], "constant_data": ["x", "y", "design"]}
    for group, names in need.items():
        ds = {"posterior": post, "observed_data": obs, "constant_data": const}[group]
        lacking = [v for v in names if v not in ds.variables]
        if lacking:
            raise InputError(f"{source}: {group} lacks {', '.join(lacking)}: not a complete bayesgeo fit")
    n_obs, n_xy = obs["value"].size, const["x"].size
    if not (n_obs == n_xy == const["y"].size == const["design"].shape[0] == n_expected):
        raise InputError(f"{source}: sizes disagree: observed_data holds {n_obs} values, constant_data {n_xy} "
                         f"locations and {const['design'].shape[0]} design rows, the settings record {n_expected} "
                         "points; the file is damaged")
    if const["design"].ndim != 2 or const["design"].shape[1] != len(spec.terms):
        raise InputError(f"{source}: the design has {const['design'].shape[1:]} columns but the settings name "
                         f"{len(spec.terms)} trend terms ({', '.join(spec.terms)}); the file is damaged")
    if several:
        _check_sites(spec, post, obs, source)
    check_finite_draws(tree, source)
    for group, ds, names in (("observed_data", obs, ["value"]), ("constant_data", const, ["x", "y", "design"])):
        for name in names:
            bad = int(np.count_nonzero(~np.isfinite(np.asarray(ds[name].values, dtype=float))))
            if bad:
                raise InputError(f"{source}: {group} variable {name} holds {bad} non-finite value(s) (NaN or "
                                 "infinite); the file is damaged")
    return tree


def check_finite_draws(tree: xr.DataTree, source: str = "fit") -> None:
    """Refuse a posterior with a NaN or infinite draw, naming the file and the variable."""
    post = tree["posterior"].to_dataset()
    for name, da in post.data_vars.items():
        if not np.issubdtype(da.dtype, np.number):
            continue
        bad = int(np.count_nonzero(~np.isfinite(da.values)))
        if bad:
            raise InputError(f"{source}: posterior variable {name} holds {bad} non-finite draw(s) (NaN or infinite) "
                             f"of {da.size}; nothing computed from it could be trusted: refit")


def _check_spec_values(spec, source: str) -> None:
    """Settings values the stages branch on: a registry family, a known transform and likelihood."""
    from bayesgeo.gp.covariance import FAMILIES, get_covariance

    try:
        get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    except (ValueError, TypeError):
        nu = f" with nu = {spec.nu!r}" if spec.covariance == "matern" else ""
        raise InputError(f"{source}: the settings name covariance family {spec.covariance!r}{nu}, which this version "
                         f"does not know (known: {', '.join(FAMILIES)}); damaged, or written by another "
                         "version") from None
    import math

    for name, positive in (("value_sd", True), ("distance_scale", True), ("range_factor", True),
                           ("value_mean", False)):
        v = getattr(spec, name, 1.0)
        if not (isinstance(v, (int, float)) and math.isfinite(v) and (v > 0 or not positive)):
            raise InputError(f"{source}: the settings record {name} = {v!r}, expected a finite number"
                             f"{' > 0' if positive else ''}; the file is damaged")
    if spec.transform not in (None, "log"):
        raise InputError(f"{source}: the settings name transform {spec.transform!r}; known: none, log")
    approx = [getattr(spec, "approx", "dense"), *getattr(spec, "site_approx", ())]
    known = ("auto", "dense", "nn") if hasattr(spec, "site_approx") else ("dense", "nn")
    for a in approx:
        if a not in known:
            raise InputError(f"{source}: the settings name likelihood {a!r}; known: {', '.join(known)}")


def _check_sites(spec, post: xr.Dataset, obs: xr.Dataset, source: str) -> None:
    if "site" not in obs.variables:
        raise InputError(f"{source}: observed_data carry no site labels: not a complete several-site fit")
    labels = set(np.asarray(obs["site"].values).astype(str))
    if labels != set(spec.sites) or len(spec.n) != len(spec.sites):
        raise InputError(f"{source}: the site labels of the data ({', '.join(sorted(labels))}) differ from the sites "
                         f"the settings record ({', '.join(spec.sites) or 'none'}); the file is damaged")
    counts = {str(k): int(v) for k, v in zip(*np.unique(np.asarray(obs["site"].values).astype(str), return_counts=True))}
    wrong = [f"{s}: {counts.get(s, 0)} against {n}" for s, n in zip(spec.sites, spec.n) if counts.get(s, 0) != n]
    if wrong:
        raise InputError(f"{source}: points per site differ from the settings ({'; '.join(wrong)}); the file is damaged")
    if "site" not in post.dims or [str(s) for s in post["site"].values] != list(spec.sites):
        raise InputError(f"{source}: the posterior's site dimension does not list the sites the settings record "
                         f"({', '.join(spec.sites)}); the file is damaged")
