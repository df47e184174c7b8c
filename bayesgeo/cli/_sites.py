"""The several-site options of ``bayesgeo fit``: data with a site column (``--site COL``).

:func:`add_site_arguments` adds ``--pooling``, ``--small-sites``, ``--parametrisation`` and
``--design-neighbours`` to its parser; the fit itself is :func:`bayesgeo.stages.fit.fit_folder`. Outputs as for one site (``posterior.nc``, ``summary.csv``,
``summary.txt``, ``fit.json``) plus ``shrinkage.csv``/``shrinkage.png`` (pooled against
independent fits per site; not for ``--pooling independent``) and ``design.csv``/``design.png``
(grid spacing against predictive sd for a new site; not for ``--pooling independent``).
"""

from __future__ import annotations

__all__ = ["add_site_arguments"]


def add_site_arguments(p) -> None:
    """``--pooling``, ``--small-sites``, ``--parametrisation`` and ``--design-neighbours`` for the several-site model."""
    from bayesgeo.fitting.site_inputs import CENTRED_MIN_POINTS, PARAMETRISATIONS, POOLINGS, SMALL_SITE_POLICIES
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.common.validate import int_option

    p.add_argument("--pooling", choices=POOLINGS, default="hierarchical",
                   help="with --site: share covariance parameters through a population (hierarchical, default), "
                        "not at all (independent) or fully (complete)")
    refuse_renamed(p, "--min-points")
    p.add_argument("--small-sites", choices=SMALL_SITE_POLICIES, default="error",
                   help="with --site: a site with fewer than 10 points is an error (default) or is kept in the "
                        "model with a warning (keep)")
    p.add_argument("--parametrisation", choices=PARAMETRISATIONS, default="noncentred",
                   help="with --site and hierarchical pooling: sample the site effects non-centred (default), "
                        f"centred, or auto (centred for sites of at least {CENTRED_MIN_POINTS} points); the "
                        "posterior is the same, only sampling speed differs")
    p.add_argument("--design-neighbours", type=int_option("design_neighbours"), default=6, metavar="K",
                   help="with --site: grid nodes per side (K x K) used by the sampling-design aid (default 6)")
