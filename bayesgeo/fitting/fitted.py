"""One fitted model passed between the stages: read once, settings decoded once, a view per site.

A :class:`Fit` wraps the ``xarray.DataTree`` a fit is saved as (``posterior.nc``, layout in
:mod:`bayesgeo.fitting.posterior` and :mod:`bayesgeo.fitting.hierarchical`) together with what every stage needs
from it, decoded once: the settings, the model spec, the stored diagnostics and cautions. A
several-site fit gives a single-site view of each site with :meth:`Fit.site`, so the later stages
(check, prediction, variogram check, report) work on one kind of object. The tree stays the saved
form: nothing is remembered outside it.

A notebook session in a handful of calls::

    fit = Fit.sample(points, covariance="matern32", transform="log", seed=7)
    fit.convergence            # pass / warn / fail, with an HTML display
    fit.summary()              # pandas DataFrame of the parameters in data units
    pred = predict_map(fit, cell=10.0, thresholds=[20.0])   # mean, sd, quantiles, P(value > 20)

(:func:`bayesgeo.predict.maps.predict_map`: prediction is a later stage, so it takes the fit rather
than the fit reaching forward to it).
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import cached_property
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError

__all__ = ["Fit", "NotConvergedError", "as_fit", "read_site"]


class NotConvergedError(RuntimeError):
    """Prediction from a fit that failed the convergence check, without ``allow_unconverged=True``."""


def _file(path) -> Path:
    from bayesgeo.common.layout import FIT_FILE

    path = Path(path)
    return path / FIT_FILE if path.is_dir() else path


class Fit:
    """A fitted model and its decoded settings.

    Parameters
    ----------
    tree : xarray.DataTree
        A fit in the saved layout (:func:`bayesgeo.fitting.posterior.fit`, :func:`bayesgeo.fitting.hierarchical.fit_sites`).
    source : str or Path, optional
        The file it was read from (named in error messages).

    Raises
    ------
    InputError
        The tree carries no readable ``settings`` attribute (not a bayesgeo fit).
    """

    def __init__(self, tree: xr.DataTree, *, source: str | Path | None = None):
        from bayesgeo.fitting.posterior import SEVERAL_SITE_FORMAT, fit_settings

        self.tree = tree
        self.source = None if source is None else Path(source)
        self.settings: dict = fit_settings(tree, None if source is None else str(source))
        self.several: bool = self.settings.get("format") == SEVERAL_SITE_FORMAT

    # --- making one ---------------------------------------------------------------------------

    @classmethod
    def read(cls, path: str | Path, *, written_by: str = "bayesgeo fit") -> Fit:
        """Read and check a saved fit: a fit folder or its ``posterior.nc`` (:func:`bayesgeo.fitting.fitfile.read_fit`:
        settings, groups, sizes and finite draws, one error line naming the file)."""
        from bayesgeo.fitting.fitfile import read_fit

        return cls(read_fit(path, written_by=written_by), source=_file(path))

    @classmethod
    def sample(cls, points: xr.Dataset, *, check: bool = True, **settings) -> Fit:
        """Fit the model to point data and (by default) attach the convergence check.

        Points with a ``site`` coordinate of several sites get the several-site model
        (:func:`bayesgeo.fitting.hierarchical.fit_sites`, ``pooling`` default hierarchical), others the
        single-site one (:func:`bayesgeo.fitting.posterior.fit`); ``settings`` are their keyword arguments.
        """
        from bayesgeo.data.points import sites_of

        if len(sites_of(points)) > 1:
            from bayesgeo.fitting.hierarchical import fit_sites

            tree = fit_sites(points, **settings)
        else:
            if "pooling" in settings:
                raise InputError("pooling: the points hold one site; pooling applies to several sites")
            from bayesgeo.fitting.posterior import fit

            tree = fit(points, **settings)
        out = cls(tree)
        return out.with_check() if check else out

    # --- what the stages read -----------------------------------------------------------------

    @cached_property
    def spec(self):
        """:class:`bayesgeo.fitting.model.FitSpec` (one site) or :class:`bayesgeo.fitting.site_inputs.SiteSpec`."""
        if self.several:
            from bayesgeo.fitting.site_inputs import site_spec

            return site_spec(self.tree, None if self.source is None else str(self.source))
        from bayesgeo.fitting.posterior import fit_spec

        return fit_spec(self.tree, None if self.source is None else str(self.source))

    @property
    def sites(self) -> tuple[str, ...]:
        """Site labels of a several-site fit; ``()`` for a single-site fit."""
        return tuple(self.spec.sites) if self.several else ()

    @property
    def extracted_site(self) -> str | None:
        """The site this single-site view was taken from (:meth:`site`), else None."""
        return (self.settings.get("extracted_from") or {}).get("site")

    @property
    def posterior(self) -> xr.Dataset:
        return self.tree["posterior"].to_dataset()

    @cached_property
    def diagnostics(self) -> dict | None:
        """The stored convergence check (``Convergence.to_json()``), or None before :meth:`with_check`."""
        from bayesgeo.fitting.posterior import stored

        return stored(self.tree, "diagnostics")

    @cached_property
    def cautions(self) -> list[str]:
        from bayesgeo.fitting.posterior import stored

        return list(stored(self.tree, "cautions", []))

    @cached_property
    def approximation(self) -> dict | None:
        """What the nearest-neighbour likelihood approximated (``approximation`` attribute), or None."""
        from bayesgeo.fitting.posterior import approximation_of

        return approximation_of(self.tree)

    @property
    def stored_verdict(self) -> str | None:
        """Verdict of the stored check ("pass", "warn", "fail"), or None."""
        return None if self.diagnostics is None else self.diagnostics.get("verdict")

    # --- stages ---------------------------------------------------------------------------------

    def site(self, name: str | None) -> Fit:
        """The single-site view of site ``name`` (:func:`bayesgeo.fitting.hierarchical.site_fit`).

        A single-site fit is returned as it is when ``name`` is None (or the site it was taken from).

        Raises
        ------
        InputError
            A several-site fit without a name, an unknown site (the known ones are listed), or a name
            for a single-site fit.
        """
        where = f"{self.source}: " if self.source else ""
        if not self.several:
            if name is None or name == self.extracted_site:
                return self
            raise InputError(f"site: {where}a single-site fit; drop the site name")
        if name is None:
            raise InputError(f"site: {where}a several-site fit; choose a site ({', '.join(self.sites)})")
        from bayesgeo.fitting.hierarchical import site_fit

        return Fit(site_fit(self.tree, name), source=self.source)

    @cached_property
    def convergence(self):
        """The convergence check of the draws (:func:`bayesgeo.convergence.diagnostics.check_convergence`), computed once."""
        return self.check()

    def check(self, *, var_names: Sequence[str] | None = None, thresholds=None):
        """Run the convergence check (:func:`bayesgeo.convergence.diagnostics.check_convergence`); see also :attr:`convergence`."""
        from bayesgeo.convergence.diagnostics import check_convergence

        return check_convergence(self.tree, var_names=var_names, thresholds=thresholds)

    def with_check(self, convergence=None) -> Fit:
        """A new Fit whose tree carries the check's JSON and cautions updated for its verdict."""
        conv = self.convergence if convergence is None else convergence
        if self.several:
            from bayesgeo.fitting.hier_outputs import with_site_diagnostics

            tree = with_site_diagnostics(self.tree, conv.to_json())
        else:
            from bayesgeo.fitting.posterior import with_diagnostics

            tree = with_diagnostics(self.tree, conv.to_json())
        out = Fit(tree, source=self.source)
        out.__dict__["convergence"] = conv
        return out

    def gate_verdict(self) -> str:
        """The verdict prediction is gated on: the check of the draws, made "fail" by a stored failed check."""
        verdict = self.convergence.verdict
        return "fail" if self.stored_verdict == "fail" else verdict

    def summary(self, *, prob: float = 0.9):
        """Posterior summaries in data units as a pandas DataFrame (one row per parameter, and per site)."""
        import pandas as pd

        if self.several:
            from bayesgeo.fitting.hier_outputs import summary_table
        else:
            from bayesgeo.fitting.posterior import summary_table
        return pd.DataFrame(summary_table(self.tree, prob=prob))

    def save(self, directory: str | Path, *, overwrite: bool = False, **extras) -> Path:
        """Write the fit folder atomically (:func:`bayesgeo.fitting.fitfile.save_fit`, whose keyword ``extras``,
        the several-site shrinkage and design tables, it passes on)."""
        from bayesgeo.fitting.fitfile import save_fit

        return save_fit(self.tree, directory, overwrite=overwrite, **extras)

    # --- display --------------------------------------------------------------------------------

    def _label(self) -> str:
        spec = self.spec
        kind = f"{spec.pooling} several-site fit of {len(self.sites)} sites" if self.several else "single-site fit"
        n = int(np.sum(spec.n)) if self.several else int(spec.n)
        smp = self.settings.get("sampler", {})
        draws = f"{smp.get('chains', '?')} chains x {smp.get('draws', '?')} draws"
        site = f", site {self.extracted_site}" if self.extracted_site else ""
        return f"{kind}{site}: {spec.covariance}, n = {n}, {draws}, check: {self.stored_verdict or 'not stored'}"

    def __repr__(self) -> str:
        src = f" from {self.source}" if self.source else ""
        return f"<bayesgeo.Fit {self._label()}{src}>"

    def _repr_html_(self) -> str:
        import html

        table = self.summary().to_html(index=False, float_format=lambda v: f"{v:.4g}", border=0)
        cautions = "".join(f"<li>{html.escape(c)}</li>" for c in self.cautions)
        return (f"<div><strong>bayesgeo.Fit</strong> {html.escape(self._label())}{table}"
                f"<ul style='font-size:smaller'>{cautions}</ul></div>")


def as_fit(fit: Fit | xr.DataTree) -> Fit:
    """``fit`` itself, or a fit ``DataTree`` wrapped (its settings decoded here, once)."""
    return fit if isinstance(fit, Fit) else Fit(fit)


def read_site(folder, site: str | None = None) -> Fit:
    """The fit in ``folder`` (:meth:`Fit.read`) as one site: a single-site fit itself, or site ``site`` of a
    several-site fit (:meth:`Fit.site`).

    Raises
    ------
    InputError
        No readable fit; a several-site fit without ``site``; a ``site`` for a single-site fit; an unknown site.
    """
    fit = Fit.read(folder)
    if fit.several and site is None:
        raise InputError(f"site: {folder} holds a several-site fit; choose one site (sites: {', '.join(fit.sites)})")
    if not fit.several and site is not None:
        raise InputError(f"site: {folder} holds a single-site fit; drop the site")
    return fit.site(site)
