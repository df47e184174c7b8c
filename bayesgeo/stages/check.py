"""The check stage: convergence diagnostics of a fit folder, with a verdict and figures.

Reads ``posterior.nc`` (a bayesgeo fit, or a bare posterior from another program); writes
``diagnostics/`` (atomically) with ``diagnostics.json`` and the figures. An earlier ``diagnostics/`` is
left as it is (the verdict is still computed and returned) unless ``overwrite`` replaces it. A
several-site fit keeps one verdict for the whole posterior and adds per-site blocks
(:func:`bayesgeo.convergence.sites.site_convergence`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

from bayesgeo.common.layout import DIAGNOSTICS_DIR, DIAGNOSTICS_FILE
from bayesgeo.common.layout import FIT_FILE as POSTERIOR_FILE
from bayesgeo.common.validate import InputError

__all__ = ["check_fit", "read_posterior"]

EXIT_NOT_CONVERGED = 3


def read_posterior(folder):
    """Open ``folder/posterior.nc`` as a DataTree (loaded into memory); InputError if impossible.

    A bare posterior from another program is accepted; a bayesgeo fit (settings present) is checked in
    full (:func:`bayesgeo.fitting.fitfile.read_fit`).
    """
    from bayesgeo.fitting.fitfile import read_fit

    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: no such folder; expected a fit folder holding {POSTERIOR_FILE}")
    path = folder / POSTERIOR_FILE
    if not path.is_file():
        raise InputError(f"{path}: not found; run a fit into {folder} first")
    return read_fit(path, require_fit=False)


def check_fit(folder, *, var_names: Sequence[str] | None = None, lag_limit: int | None = None,
              figures: bool = True, overwrite: bool = False, progress: Callable | None = None) -> tuple[int, dict]:
    """Check the convergence of the posterior in ``folder`` and write ``diagnostics/``.

    Parameters
    ----------
    folder : path
        Fit folder holding ``posterior.nc``.
    var_names : sequence of str, optional
        Variables to check (default: the model parameters, :func:`bayesgeo.convergence.diagnostics.check_convergence`).
    lag_limit : int, optional
        Largest lag (draws) of the autocorrelation figure (default: 3 x the largest IAT, at least 20).
    figures, overwrite :
        Draw the figures; replace an earlier ``diagnostics/`` (kept otherwise).
    progress : callable, optional
        Bar factory ``progress(total=, desc=)``; None for none.

    Returns
    -------
    (status, result)
        3 when the verdict is fail, else 0; ``result`` is ``Convergence.to_json()`` plus the
        approximation check, per-site blocks of a several-site fit, the files written (or ``kept``)
        and ``figure_error`` (a figure that failed does not hide the verdict).
    """
    from bayesgeo.convergence.diagnostics import check_convergence
    from bayesgeo.convergence.sites import site_convergence
    from bayesgeo.common.outputs import check_addable
    from bayesgeo.fitting.posterior import approximation_of

    folder = Path(folder)
    tree = read_posterior(folder)
    if lag_limit is not None and lag_limit < 1:
        raise InputError(f"lag_limit: expected an integer >= 1, got {lag_limit}")
    outdir = folder / DIAGNOSTICS_DIR
    keep = (outdir.exists() or outdir.is_symlink()) and not overwrite
    if not keep:
        check_addable(folder, DIAGNOSTICS_DIR, overwrite=overwrite)
    bar = progress(total=2 if keep or not figures else 3, desc="check") if progress else None
    try:
        conv = check_convergence(tree, var_names=var_names or None)
    except InputError as err:  # the posterior's shape: name the file it came from
        raise InputError(f"{folder / POSTERIOR_FILE}: {err}") from None
    if bar is not None:
        bar.update()
    result = conv.to_json()
    result["approximation"] = approximation_of(tree)
    by_site = site_convergence(tree, conv)
    if by_site is not None:
        result.update(sites=by_site["sites"], population=by_site["population"], site_note=by_site["note"])
    if keep:
        result.update(posterior=str(folder / POSTERIOR_FILE), diagnostics=None, figures=[], figure_error=None,
                      kept=str(outdir))
        if bar is not None:
            bar.update()
    else:
        _write(folder, tree, result, var_names=var_names, lag_limit=lag_limit, figures=figures,
               overwrite=overwrite, bar=bar)
    if bar is not None:
        bar.close()
    return (EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0), result


def _write(folder: Path, tree, result: dict, *, var_names, lag_limit, figures: bool, overwrite: bool, bar) -> None:
    """Write ``DIAGNOSTICS_DIR`` (diagnostics.json and the figures) into the fit folder; adds the file names
    to ``result``."""
    from bayesgeo.common.io import write_json
    from bayesgeo.common.outputs import add_to_folder

    outdir = folder / DIAGNOSTICS_DIR
    written_figures, figure_error = [], None
    with add_to_folder(folder, DIAGNOSTICS_DIR, overwrite=overwrite, kind="dir") as tmp:
        if figures:
            from bayesgeo.convergence.figures import write_diagnostic_figures

            try:
                written = write_diagnostic_figures(tree, tmp, var_names=var_names or None, lag_limit=lag_limit)
                written_figures = [str(outdir / p.name) for p in written]
            except InputError:
                raise
            except Exception as err:  # noqa: BLE001 - a figure must not hide the verdict
                figure_error = " ".join(f"{type(err).__name__}: {err}".split())
            if bar is not None:
                bar.update()
        result.update(posterior=str(folder / POSTERIOR_FILE), diagnostics=str(outdir / DIAGNOSTICS_FILE),
                      figures=written_figures, figure_error=figure_error)
        write_json(tmp / DIAGNOSTICS_FILE, result)
        if bar is not None:
            bar.update()
