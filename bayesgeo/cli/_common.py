"""Pieces shared by the command modules: data options, JSON output, progress bars, tables."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterable

import numpy as np
from bayesgeo.common.io import to_jsonable

__all__ = ["add_data_options", "data_kwargs", "read_data", "emit_json", "to_jsonable", "progress", "print_table",
           "refuse_renamed"]

#: Options of earlier versions and their new names (a command given one stops with a one-line usage error).
RENAMED_OPTIONS = {
    "--max-lag": "--lag-limit",
    "--prior-range": "--range-below",
    "--prior-sd": "--sd-above",
    "--prior-nugget": "--nugget-above",
    "--min-points": "--small-sites",
}


class _Renamed(argparse.Action):
    def __call__(self, parser, namespace, values, option_string=None):
        parser.error(f"{option_string} was renamed {RENAMED_OPTIONS[option_string]}")


def refuse_renamed(p, *old: str) -> None:
    """Hidden options ``old`` (keys of :data:`RENAMED_OPTIONS`) that stop with a usage error (exit 2)
    naming the new option."""
    for name in old:
        p.add_argument(name, nargs="*", action=_Renamed, help=argparse.SUPPRESS, dest=f"_renamed_{name[2:]}")


def add_data_options(p) -> None:
    """Options naming the columns of a point-data CSV (shared by every command that reads one)."""
    p.add_argument("data", metavar="DATA", help="point measurements: CSV, Excel (.xlsx), GeoPackage, shapefile, "
                                              "GeoJSON (or a bayesgeo .nc point file)")
    p.add_argument("--layer", metavar="NAME", help="worksheet of a workbook or layer of a GIS file")
    p.add_argument("--crs", metavar="CRS", help="coordinate reference system of the coordinates, e.g. EPSG:32633 "
                                                "(a GIS file's own is used when it has one)")
    p.add_argument("--to-crs", metavar="CRS", help="project the points first: 'utm' (the UTM zone of the data) or a "
                                                   "projected CRS; distances then in its unit (metres)")
    p.add_argument("--x", metavar="COL", help="x / easting / longitude column (detected if omitted)")
    p.add_argument("--y", metavar="COL", help="y / northing / latitude column (detected if omitted)")
    p.add_argument("--value", metavar="COL", help="measured value column; <X is a non-detect below reporting limit X")
    p.add_argument("--limit", metavar="COL", help="reporting-limit column of non-detects (with --detected)")
    p.add_argument("--detected", metavar="COL",
                   help="detected / not-detected flag column (not detected: <, ND, U, yes, 1, ...; with --limit)")
    p.add_argument("--site", metavar="COL", help="site label column (several-site data)")
    p.add_argument("--only-site", metavar="NAME", help="analyse only this site's rows (with --site)")
    p.add_argument("--covariate", metavar="COL", action="append", default=[], help="covariate column (repeatable)")
    p.add_argument("--category", metavar="COL", action="append", default=[],
                   help="categorical covariate: a column of labels (soil type, land use, ...), treatment coded in the "
                        "trend, each level with at least 5 points (repeatable)")
    p.add_argument("--baseline", metavar="COL=LEVEL", action="append", default=[],
                   help="baseline level of a --category column (default: its most frequent level; repeatable)")
    p.add_argument("--coords", choices=("auto", "xy", "lonlat"), default="auto",
                   help="planar coordinates (xy) or degrees (lonlat: great-circle km, longitudes -180..180 or 0..360); "
                        "auto refuses coordinates that could be degrees, see docs/data_files.md")
    p.add_argument("--duplicates", choices=("error", "mean"), default="error",
                   help="points at the same location: error (default) or average them")
    p.add_argument("--units", metavar="TEXT", help="units of the measured value, e.g. mg/kg")
    p.add_argument("--distance-units", metavar="TEXT", help="units of planar coordinates, e.g. m (lon/lat: km)")


def data_kwargs(args) -> dict:
    """The data settings named by :func:`add_data_options` arguments, as keyword arguments of the stages
    (keyword arguments of :func:`bayesgeo.data.points.read_points`)."""
    return dict(x=args.x, y=args.y, value=args.value, limit=getattr(args, "limit", None),
                detected=getattr(args, "detected", None), site=args.site,
                only_site=args.only_site,
                covariates=list(args.covariate), categories=list(getattr(args, "category", [])),
                baselines=list(getattr(args, "baseline", [])), coords=args.coords, duplicates=args.duplicates,
                units=args.units,
                distance_units=args.distance_units, small_sites=getattr(args, "small_sites", "error"),
                **{k: getattr(args, k, None) for k in ("crs", "to_crs", "layer")})


def read_data(args):
    """Read the data named by :func:`add_data_options` arguments."""
    from bayesgeo.data.points import read_points
    return read_points(args.data, **data_kwargs(args))


#: Input warnings printed during this command (see ``bayesgeo.cli._one_line_warnings``); added to --json output.
WARNINGS: list[str] = []


def emit_json(obj) -> None:
    """Print one JSON object on stdout (with ``"warnings"``: the input warnings printed on stderr, if any)."""
    if WARNINGS and isinstance(obj, dict):
        obj = {**obj, "warnings": [*obj.get("warnings", []), *WARNINGS]}
    sys.stdout.write(json.dumps(to_jsonable(obj)) + "\n")
    sys.stdout.flush()


def progress(iterable: Iterable | None = None, *, total: int | None = None, desc: str = "", enabled: bool = True):
    """A tqdm progress bar on stderr, shown only when ``enabled`` and stderr is a terminal."""
    from tqdm.auto import tqdm

    return tqdm(iterable, total=total, desc=desc, file=sys.stderr,
                disable=not (enabled and sys.stderr.isatty()), leave=False)


def print_table(rows: list[dict], columns: list[str], *, file=None, floatfmt: str = ".4g") -> None:
    """Print ``rows`` as an aligned plain-text table."""
    file = file or sys.stdout
    cells = [[c for c in columns]]
    for r in rows:
        cells.append([format(r[c], floatfmt) if isinstance(r[c], (float, np.floating)) else str(r[c]) for c in columns])
    widths = [max(len(row[i]) for row in cells) for i in range(len(columns))]
    for k, row in enumerate(cells):
        print("  ".join(s.rjust(w) for s, w in zip(row, widths)), file=file)
        if k == 0:
            print("  ".join("-" * w for w in widths), file=file)


