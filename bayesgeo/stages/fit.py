"""The fit stage: read point data, fit the Bayesian GP model, check it and write the fit folder.

One site: :func:`bayesgeo.fitting.posterior.fit` (or, with ``keep_sampling``, :func:`bayesgeo.fitting.keep_sampling.fit_until_converged`),
then the convergence check, written by :func:`bayesgeo.fitting.fitfile.save_fit`. Data with a site column of
several sites: :func:`bayesgeo.fitting.hierarchical.fit_sites`, plus (unless ``pooling="independent"``) the
independent fit for the shrinkage table and the sampling-design table of a new site, written by
:func:`bayesgeo.fitting.fitfile.save_fit`. Large fits are announced first (:mod:`bayesgeo.fitting.workload`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE
from bayesgeo.common.layout import DESIGN, FIT_FILE, FIT_REPORT, PRIOR_CHECK, SHRINKAGE, SUMMARY_CSV, SUMMARY_TXT
from bayesgeo.common.validate import InputError

__all__ = ["fit_folder", "workload_plan"]

EXIT_NOT_CONVERGED = 3


def workload_plan(ds, *, approx: str, neighbours, chains: int, draws: int, tune: int, pooling: str,
                  max_draws, log: Callable[[str], None] | None) -> dict:
    """The :func:`bayesgeo.fitting.workload.fit_plan` of this fit; its message goes to ``log`` (a large fit is announced
    before it starts). Refuses a dense likelihood that would not fit in this machine's memory."""
    from bayesgeo.data.points import sites_of
    from bayesgeo.fitting.workload import fit_plan, format_bytes, physical_memory_bytes

    labels = sites_of(ds)
    sizes = ({lab: int(np.count_nonzero(ds["site"].values == lab)) for lab in labels} if len(labels) > 1
             else {"": int(ds.sizes["obs"])})
    pooled = len(labels) > 1 and pooling != "independent"
    plan = fit_plan(sizes, approx=approx, neighbours=neighbours, chains=chains, draws=draws, tune=tune,
                    fits=2 if pooled else 1, max_draws=max_draws)
    ram = physical_memory_bytes()
    if ram is not None and plan["dense_memory_bytes"] > ram:
        raise InputError(f"approx: the dense likelihood of {plan['largest_site']:,} points with {chains} chains needs "
                         f"about {format_bytes(plan['dense_memory_bytes'])} of memory; this machine has "
                         f"{format_bytes(ram)}: use the nearest-neighbour likelihood, 'nn' (or 'auto'), docs/large_data.md")
    if plan["message"] and log is not None:
        log(f"note: {plan['message']}")
    return plan


def fit_folder(data, *, out, covariance: str, nu: float | None = None, nugget: bool = True, trend: int = 0,
               transform: str | None = None, range_below=None, sd_above=None, nugget_above=None,
               approx: str = "auto", neighbours: int | None = None, anisotropy: bool = False,
               sampler: str = "nutpie", chains: int = CHAINS,
               draws: int = DRAWS, tune: int = TUNE, target_accept: float | None = None, seed: int | None = None,
               max_draws: int | None = None, keep_sampling: float | None = None, pooling: str = "hierarchical",
               parametrisation: str = "noncentred", design_neighbours: int = 6, overwrite: bool = False,
               progressbar: bool = False, log: Callable[[str], None] | None = None, **data_settings) -> tuple[int, dict]:
    """Fit the model to the points in ``data`` and write the fit folder ``out``.

    Parameters
    ----------
    data : path
        CSV of point measurements (or a bayesgeo point file); ``data_settings`` are those of
        :func:`bayesgeo.data.points.read_points` (columns, site column, coordinates, duplicates, units, small sites).
    out : path
        Output folder, written atomically; refused if present unless ``overwrite``.
    covariance, nu, nugget, trend, transform, approx, neighbours, anisotropy :
        The model (:func:`bayesgeo.fitting.posterior.fit`); ``transform`` None or "log"; ``anisotropy``
        geometric anisotropy (planar coordinates; each site its own direction and ratio).
    range_below, sd_above, nugget_above : (float, float), optional
        PC-prior statements P(practical range < R0) = A1, P(sd > S0) = A2, P(nugget sd > T0) = A3 (data
        units); the several-site model puts its nugget prior on the fraction of the sill and refuses
        ``nugget_above``.
    sampler, chains, draws, tune, target_accept, seed, max_draws :
        The sampler (:func:`bayesgeo.fitting.sampling.sample`, :mod:`bayesgeo.fitting.looks`).
    keep_sampling : float, optional
        Minutes for fresh attempts while the check fails (single-site fits).
    pooling, parametrisation, design_neighbours :
        The several-site model (:func:`bayesgeo.fitting.hierarchical.fit_sites`) and the design table.
    progressbar : bool
        Show the sampler's progress bar.
    log : callable, optional
        Receives one line per long step (announced large fits only) and the workload note.

    Returns
    -------
    (status, report)
        3 when the convergence check fails, else 0; the fit report (:func:`bayesgeo.fitting.posterior.fit_report`
        or :func:`bayesgeo.fitting.hier_outputs.site_report`) with ``out``, ``workload`` and ``files``.
    """
    from bayesgeo.data.points import read_points, sites_of, trend_covariates
    from bayesgeo.fitting.looks import longest_chain
    from bayesgeo.common.outputs import claim
    from bayesgeo.fitting.priors import Priors

    if approx == "dense" and neighbours is not None:
        raise InputError("neighbours: applies to the nearest-neighbour likelihood ('nn', or 'auto' above 2,000 "
                         "points per site); drop it with the dense likelihood")
    max_draws = None if max_draws is None else longest_chain(draws, max_draws)
    claim(out, overwrite=overwrite, inputs=[data])  # refuse before minutes of sampling, not after
    ds = read_points(data, **data_settings)
    plan = workload_plan(ds, approx=approx, neighbours=neighbours, chains=chains, draws=draws, tune=tune,
                         pooling=pooling, max_draws=max_draws, log=log)
    quiet = (lambda _text: None)
    stage = log if (log is not None and plan["message"]) else quiet  # long steps, of announced fits
    model_kw = dict(covariance=covariance, nu=nu, nugget=nugget, trend=trend,
                    covariates=trend_covariates(data_settings), transform=transform, approx=approx,
                    neighbours=neighbours)
    if anisotropy:
        model_kw["anisotropy"] = True
    sample_kw = dict(sampler=sampler, chains=chains, draws=draws, tune=tune, target_accept=target_accept,
                     progressbar=progressbar, max_draws=max_draws)
    priors = Priors(range=_pair(range_below), sd=_pair(sd_above), nugget=_pair(nugget_above))
    if len(sites_of(ds)) > 1:
        if keep_sampling is not None:
            raise InputError("keep_sampling: single-site fits only for now; run without it and check each site")
        if nugget_above is not None:
            raise InputError("nugget_above: the several-site model puts its prior on the nugget fraction of the sill "
                             "(see docs/hierarchical.md); drop the nugget prior")
        status, report = _fit_sites(ds, out, priors=priors, pooling=pooling, parametrisation=parametrisation,
                                    design_neighbours=design_neighbours, small_sites=data_settings.get(
                                        "small_sites", "error"), seed=seed, overwrite=overwrite,
                                    model_kw=model_kw, sample_kw=sample_kw,
                                    say=log if (log is not None and (plan["message"] or progressbar)) else quiet)
    else:
        status, report = _fit_one(ds, out, priors=priors, seed=seed, keep_sampling=keep_sampling,
                                  overwrite=overwrite, stage=stage, model_kw=model_kw, sample_kw=sample_kw)
    report["out"] = str(out)
    report["workload"] = plan
    return status, report


def _pair(value) -> tuple | None:
    return tuple(value) if value else None


def _fit_one(ds, out, *, priors, seed, keep_sampling, overwrite, stage, model_kw, sample_kw) -> tuple[int, dict]:
    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.fitting.posterior import fit, fit_report, with_diagnostics
    from bayesgeo.fitting.fitfile import save_fit

    stage("compiling the model, then sampling (the nutpie bar shows draws when stderr is a terminal) ...")
    kw = dict(model_kw, priors=priors, seed=seed, **sample_kw)
    if keep_sampling is not None:
        from bayesgeo.fitting.keep_sampling import fit_until_converged

        tree, conv = fit_until_converged(ds, budget_minutes=keep_sampling, **kw)
    else:
        tree = fit(ds, **kw)
        stage("checking convergence ...")
        conv = check_convergence(tree)
    tree = with_diagnostics(tree, conv.to_json())
    stage(f"writing {out} ...")
    save_fit(tree, out, overwrite=overwrite)
    report = fit_report(tree)
    report["files"] = [FIT_FILE, SUMMARY_CSV, SUMMARY_TXT, FIT_REPORT, PRIOR_CHECK]
    return (EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0), report


def _fit_sites(ds, out, *, priors, pooling, parametrisation, design_neighbours, small_sites, seed, overwrite, say,
               model_kw, sample_kw) -> tuple[int, dict]:
    from bayesgeo.data.design import design_table
    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.fitting.fitfile import save_fit
    from bayesgeo.fitting.shrinkage import shrinkage_table
    from bayesgeo.fitting.hier_outputs import site_report, with_site_diagnostics
    from bayesgeo.fitting.hierarchical import fit_sites
    from bayesgeo.fitting.site_inputs import site_spec
    from bayesgeo.fitting.posterior import fit_settings
    from bayesgeo.common.validate import check_positive_int

    neighbours = check_positive_int(design_neighbours, "design_neighbours", minimum=2)
    if neighbours % 2:
        raise InputError(f"design_neighbours: expected an even number, got {neighbours}")
    kw = dict(model_kw, priors=priors, small_sites=small_sites)
    say(f"fitting the {pooling} model ...")
    tree = fit_sites(ds, pooling=pooling, seed=seed, parametrisation=parametrisation, **kw, **sample_kw)
    seed = int(fit_settings(tree)["sampler"]["seed"])  # the independent fit reuses it
    conv = check_convergence(tree)
    tree = with_site_diagnostics(tree, conv.to_json())
    shrink = design = None
    extra = {}
    if pooling != "independent":
        say("fitting each site independently for the shrinkage table ...")
        indep = fit_sites(ds, pooling="independent", seed=seed, **kw, **sample_kw)
        shrink = shrinkage_table(tree, indep)
        extra["independent_fit_verdict"] = check_convergence(indep).verdict
        spec = site_spec(tree)
        design = design_table(tree["new_site"].to_dataset(), covariance=spec.covariance,
                              nu=spec.nu if spec.covariance == "matern" else None, neighbours=neighbours,
                              distance_units=spec.distance_units, value_units=spec.model_units)
    save_fit(tree, out, overwrite=overwrite, shrinkage=shrink, design=design)
    report = site_report(tree, shrinkage=shrink, design=design)
    report.update(extra)
    files = [FIT_FILE, SUMMARY_CSV, SUMMARY_TXT, FIT_REPORT]
    if shrink is not None:
        files += [*SHRINKAGE, *DESIGN]
    report["files"] = files
    return (EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0), report
