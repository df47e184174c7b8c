"""Point-data intake: a CSV (or one of our own NetCDF files) into one ``xarray.Dataset``.

The result has one dimension, ``obs``, with coordinates ``x``, ``y`` (and ``site`` when a site
column is given) and ``row`` (the 1-based spreadsheet row of each point in the input file, the
header being row 1), the measured ``value`` and any covariates as data variables. Units, the
coordinate system and the source file are kept in attributes. The input file is only read.
"""

from __future__ import annotations

import csv
import hashlib
import math
from collections import defaultdict
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.validate import InputError, check_choice, format_rows

__all__ = ["MIN_POINTS", "TRANSFORMS", "read_points", "points_dataset", "sites_of", "apply_transform"]

#: Value transforms: ``None`` (values as they are) or ``"log"`` (natural logarithm).
TRANSFORMS = (None, "log")

#: Fewest points per site for a spatial analysis (fewer cannot pin down a variogram).
MIN_POINTS = 10

_X_NAMES = ("x", "easting", "east", "e", "lon", "longitude", "long")
_Y_NAMES = ("y", "northing", "north", "n", "lat", "latitude")
_LONLAT_NAMES = {"lon", "longitude", "long", "lat", "latitude"}
COORDS = ("auto", "xy", "lonlat")
DUPLICATES = ("error", "mean")
SMALL_SITES = ("error", "keep")
_POOLED_MIN = 3


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _detect(header: Sequence[str], names: Sequence[str], what: str, option: str, src: str) -> str:
    lower = {h.strip().lower(): h for h in header}
    for n in names:
        if n in lower:
            return lower[n]
    raise InputError(
        f"{src}: no {what} column found (looked for {', '.join(names)}); "
        f"name it with {option} (columns: {', '.join(header)})"
    )


def _require(header: Sequence[str], col: str, option: str, src: str) -> str:
    if col not in header:
        raise InputError(f"{src}: column {col!r} ({option}) not found; columns are: {', '.join(header)}")
    return col


def read_points(
    path: str | Path,
    *,
    x: str | None = None,
    y: str | None = None,
    value: str | None = None,
    site: str | None = None,
    covariates: Sequence[str] = (),
    coords: str = "auto",
    duplicates: str = "error",
    units: str | None = None,
    distance_units: str | None = None,
    crs: str | None = None,
    only_site: str | None = None,
    small_sites: str = "error",
) -> xr.Dataset:
    """Read point measurements into a ``Dataset`` along ``obs``.

    Parameters
    ----------
    path : str or Path
        A CSV file with a header row, or a NetCDF file written by bayesgeo (``.nc``).
    x, y : str, optional
        Location columns. Detected when omitted (x/easting/lon, y/northing/lat).
    value : str, optional
        Measured value column; detected when exactly one numeric column is left over.
    site : str, optional
        Column labelling the site of each point (for several-site analyses).
    covariates : sequence of str
        Extra numeric columns kept as covariates for the trend.
    coords : {"auto", "xy", "lonlat"}
        ``xy``: planar coordinates, Euclidean distances in coordinate units. ``lonlat``: degrees,
        great-circle distances in km. ``auto`` (default) is ``xy`` but refuses coordinates that
        look like longitude/latitude, so degrees are never silently treated as planar units.
    duplicates : {"error", "mean"}
        Points sharing a location: an error listing the rows, or averaged into one point.
    units : str, optional
        Units of the measured value (e.g. ``"mg/kg"``), recorded in attributes.
    distance_units : str, optional
        Units of planar coordinates (e.g. ``"m"``); with ``coords="lonlat"`` distances are in km
        and this must be omitted or ``"km"``.
    crs : str, optional
        Coordinate reference system label, recorded in attributes.
    only_site : str, optional
        Keep the rows of this one site (needs ``site``); checks then apply to that site alone.
    small_sites : {"error", "keep"}
        A site with fewer than :data:`MIN_POINTS` points is an error (default), or is kept
        (``"keep"``, for a hierarchical model that lets it borrow strength from the others; it
        still needs 3 points, and at least one site must have :data:`MIN_POINTS`).

    Returns
    -------
    xarray.Dataset

    Raises
    ------
    InputError
        One-line message naming the file, row(s) and column of bad input.
    """
    check_choice(coords, COORDS, "--coords")
    check_choice(duplicates, DUPLICATES, "--duplicates")
    check_choice(small_sites, SMALL_SITES, "--min-points")
    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise InputError(f"{src}: file not found")
    if path.suffix.lower() in (".nc", ".nc4", ".netcdf"):
        return _read_netcdf(path)
    try:
        with path.open(newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except UnicodeDecodeError as err:
        raise InputError(f"{src}: not a UTF-8 text CSV file ({err.reason} at byte {err.start})") from None
    except csv.Error as err:
        raise InputError(f"{src}: not a readable CSV file ({err})") from None
    if not rows or not any(c.strip() for c in rows[0]):
        raise InputError(f"{src}: empty file (a header row and at least {MIN_POINTS} data rows are needed)")
    header = [h.strip() for h in rows[0]]
    body = [(i + 2, r) for i, r in enumerate(rows[1:]) if any(c.strip() for c in r)]
    if not body:
        raise InputError(f"{src}: no data rows below the header")

    xcol = _require(header, x, "--x", src) if x else _detect(header, _X_NAMES, "x (easting/longitude)", "--x", src)
    ycol = _require(header, y, "--y", src) if y else _detect(header, _Y_NAMES, "y (northing/latitude)", "--y", src)
    sitecol = _require(header, site, "--site", src) if site else None
    covs = [_require(header, c, "--covariate", src) for c in covariates]
    if value:
        vcol = _require(header, value, "--value", src)
    else:
        vcol = _guess_value(header, body, {xcol, ycol, sitecol, *covs}, src)

    numeric = {c: _numeric_column(header, body, c, src) for c in (xcol, ycol, vcol, *covs)}
    file_rows = np.array([r for r, _ in body])
    sites = None
    if sitecol is not None:
        j = header.index(sitecol)
        sites = np.array([(r[j].strip() if j < len(r) else "") for _, r in body], dtype=object)
        empty = file_rows[sites == ""]
        if empty.size:
            raise InputError(f"{src}: empty cells in column {sitecol!r} at rows {format_rows(empty)}")
        sites = sites.astype(str)
        if only_site is not None:
            keep = sites == only_site
            if not keep.any():
                labels = ", ".join(dict.fromkeys(sites.tolist()))
                raise InputError(f"{src}: --only-site: no site {only_site!r} in column {sitecol!r} (sites: {labels})")
            sites, file_rows = sites[keep], file_rows[keep]
            numeric = {c: v[keep] for c, v in numeric.items()}
    elif only_site is not None:
        raise InputError(f"{src}: --only-site needs --site COL naming the site column")

    lonlat = coords == "lonlat"
    if lonlat and distance_units not in (None, "km"):
        raise InputError(f"--distance-units: great-circle distances (--coords lonlat) are in km, got {distance_units!r}")
    if coords == "auto":
        _refuse_lonlat_lookalike(numeric[xcol], numeric[ycol], xcol, ycol, src)
    if lonlat:
        _check_lonlat_ranges(numeric[xcol], numeric[ycol], file_rows, xcol, ycol, src)

    attrs = {
        "source": path.name,
        "source_sha256": _sha256(path),
        "x_column": xcol,
        "y_column": ycol,
        "value_column": vcol,
        "site_column": sitecol or "",
        "covariates": list(covs),
        "coords": "lonlat" if lonlat else "xy",
        "distance_units": "km" if lonlat else (distance_units or "coordinate units"),
        "value_units": units or "",
        "crs": crs or ("EPSG:4326 (lon/lat)" if lonlat else ""),
        "duplicates": duplicates,
    }
    ds = points_dataset(
        numeric[xcol], numeric[ycol], numeric[vcol],
        site=sites, covariates={c: numeric[c] for c in covs}, rows=file_rows, attrs=attrs,
    )
    return _finish(ds, src, duplicates, small_sites)


def points_dataset(x, y, value, *, site=None, covariates=None, rows=None, attrs=None) -> xr.Dataset:
    """Assemble the intake ``Dataset`` from arrays (no checks; see :func:`read_points`)."""
    n = len(value)
    coords = {
        "x": ("obs", np.asarray(x, dtype=float)),
        "y": ("obs", np.asarray(y, dtype=float)),
        "row": ("obs", np.arange(2, n + 2) if rows is None else np.asarray(rows, dtype=np.int64)),
    }
    if site is not None:
        coords["site"] = ("obs", np.asarray(site, dtype=str))
    data = {"value": ("obs", np.asarray(value, dtype=float))}
    for name, col in (covariates or {}).items():
        data[name] = ("obs", np.asarray(col, dtype=float))
    ds = xr.Dataset(data, coords=coords, attrs=dict(attrs or {}))
    ds["value"].attrs["units"] = ds.attrs.get("value_units", "")
    ds["row"].attrs["long_name"] = "row in the input file (header = row 1)"
    return ds


def sites_of(ds: xr.Dataset) -> list[str]:
    """Site labels in order of first appearance (``[""]`` for a single-site data set)."""
    if "site" not in ds.coords:
        return [""]
    labels = ds["site"].values
    _, first = np.unique(labels, return_index=True)
    return [str(labels[i]) for i in sorted(first)]


def apply_transform(ds: xr.Dataset, transform: str | None) -> xr.Dataset:
    """Return a copy of ``ds`` whose ``value`` is transformed (``"log"``: natural logarithm).

    Concentrations are positive and right-skewed, so modelling their logarithm is common practice.
    The copy records ``attrs["transform"]`` and labels the units ``log(<units>)``.

    Raises
    ------
    InputError
        Unknown transform, or zero/negative values under ``"log"`` (naming the rows and column).
    """
    if transform in ("none", ""):
        transform = None
    if transform not in TRANSFORMS:
        raise InputError(f"--transform: {transform!r} is not one of: none, log")
    out = ds.copy()
    out.attrs["transform"] = transform or "none"
    if transform is None:
        return out
    z = np.asarray(ds["value"].values, dtype=float)
    bad = z <= 0
    if np.any(bad):
        col = ds.attrs.get("value_column", "value")
        raise InputError(
            f"{ds.attrs.get('source') or 'data'}: --transform log needs positive values; column {col!r} has "
            f"zero or negative values at rows {format_rows(ds['row'].values[bad])}"
        )
    units = ds.attrs.get("value_units", "") or "value units"
    out["value"] = ("obs", np.log(z), {**ds["value"].attrs, "units": f"log({units})"})
    return out


def _guess_value(header, body, taken, src) -> str:
    free = [h for h in header if h not in taken]
    numeric = []
    for h in free:
        j = header.index(h)
        try:
            [float(r[j]) for _, r in body[:20] if j < len(r) and r[j].strip()]
            numeric.append(h)
        except ValueError:
            pass
    if len(numeric) == 1:
        return numeric[0]
    raise InputError(
        f"{src}: cannot tell which column holds the measured value; name it with --value "
        f"(candidates: {', '.join(numeric) or 'none'})"
    )


def _numeric_column(header, body, col, src) -> np.ndarray:
    j = header.index(col)
    out = np.empty(len(body))
    bad_rows: list[int] = []
    for k, (row, cells) in enumerate(body):
        cell = cells[j].strip() if j < len(cells) else ""
        try:
            v = float(cell) if cell else math.nan
        except ValueError:
            raise InputError(f"{src}: row {row}, column {col!r}: {cell!r} is not a number") from None
        if not math.isfinite(v):
            bad_rows.append(row)
        out[k] = v
    if bad_rows:
        raise InputError(f"{src}: column {col!r} has empty, NaN or infinite cells at rows {format_rows(bad_rows)}")
    return out


def _refuse_lonlat_lookalike(xv, yv, xcol, ycol, src) -> None:
    named = xcol.lower() in _LONLAT_NAMES or ycol.lower() in _LONLAT_NAMES
    in_range = np.all(np.abs(xv) <= 180.0) and np.all(np.abs(yv) <= 90.0)
    # A survey laid out on a planar grid spans metres or more; lon/lat of one survey spans < a few degrees.
    small_span = np.ptp(xv) < 5.0 and np.ptp(yv) < 5.0
    if in_range and (named or small_span):
        raise InputError(
            f"{src}: columns {xcol!r}, {ycol!r} look like longitude/latitude "
            f"(x in [{xv.min():g}, {xv.max():g}], y in [{yv.min():g}, {yv.max():g}]); "
            "pass --coords lonlat for great-circle distances in km, or --coords xy if they are planar"
        )


def _check_lonlat_ranges(xv, yv, rows, xcol, ycol, src) -> None:
    for vals, col, lim in ((xv, xcol, 180.0), (yv, ycol, 90.0)):
        bad = rows[np.abs(vals) > lim]
        if bad.size:
            raise InputError(
                f"{src}: column {col!r} is outside [-{lim:g}, {lim:g}] degrees at rows {format_rows(bad)} "
                "(--coords lonlat expects longitude/latitude in degrees)"
            )


def _finish(ds: xr.Dataset, src: str, duplicates: str, small_sites: str = "error") -> xr.Dataset:
    ds = _handle_duplicates(ds, src, duplicates)
    vcol = ds.attrs.get("value_column", "value")
    labels = sites_of(ds)
    keep_small = small_sites == "keep" and len(labels) > 1
    counts = {lb: int(np.sum(ds["site"].values == lb)) if lb else ds.sizes["obs"] for lb in labels}
    if keep_small and max(counts.values()) < MIN_POINTS:
        raise InputError(f"{src}: no site has {MIN_POINTS} points (largest: {max(counts.values())}); "
                         "small sites can borrow strength only from larger ones")
    for label in labels:
        part = ds if label == "" else ds.isel(obs=np.flatnonzero(ds["site"].values == label))
        where = "" if label == "" else f" at site {label!r}"
        need = _POOLED_MIN if keep_small else MIN_POINTS
        if part.sizes["obs"] < need:
            hint = "" if keep_small or len(labels) == 1 else " (or --min-points pool to keep it in a hierarchical fit)"
            raise InputError(
                f"{src}: only {part.sizes['obs']} points{where} (rows {format_rows(part['row'].values)}); "
                f"a spatial analysis needs at least {need} per site{hint}"
            )
        if part.sizes["obs"] < MIN_POINTS:
            continue  # a small pooled site may well have equal values
        v = part["value"].values
        if np.all(v == v[0]):
            raise InputError(f"{src}: every value in column {vcol!r}{where} equals {v[0]:g}; nothing varies to model")
    return ds


def _handle_duplicates(ds: xr.Dataset, src: str, duplicates: str) -> xr.Dataset:
    site = ds["site"].values if "site" in ds.coords else np.full(ds.sizes["obs"], "")
    groups: dict[tuple, list[int]] = defaultdict(list)
    for i, key in enumerate(zip(ds["x"].values, ds["y"].values, site)):
        groups[key].append(i)
    dup = [g for g in groups.values() if len(g) > 1]
    if not dup:
        return ds
    rows = ds["row"].values
    if duplicates == "error":
        listed = "; ".join(format_rows(rows[g], limit=4) for g in dup[:5])
        more = f"; ... ({len(dup)} locations)" if len(dup) > 5 else ""
        raise InputError(
            f"{src}: duplicate locations in columns {ds.attrs['x_column']!r}, {ds.attrs['y_column']!r} "
            f"at rows {listed}{more}; pass --duplicates mean to average them"
        )
    keep = [g[0] for g in groups.values()]
    out = ds.isel(obs=np.array(sorted(keep)))
    for name in out.data_vars:
        vals = out[name].values.copy()
        for g in dup:
            vals[sorted(keep).index(g[0])] = ds[name].values[g].mean()
        out[name] = ("obs", vals, ds[name].attrs)
    out.attrs["duplicates_averaged"] = int(sum(len(g) - 1 for g in dup))
    return out


def _read_netcdf(path: Path) -> xr.Dataset:
    src = str(path)
    try:
        ds = xr.load_dataset(path)
    except Exception as err:  # noqa: BLE001 - any reader failure is bad input here
        raise InputError(f"{src}: not a readable NetCDF file ({type(err).__name__}: {err})") from None
    missing = [v for v in ("x", "y", "value") if v not in ds.variables]
    if "obs" not in ds.dims or missing:
        raise InputError(
            f"{src}: not a bayesgeo point file (needs dimension 'obs' and variables x, y, value; "
            f"missing: {', '.join(missing) or 'dimension obs'})"
        )
    if "row" not in ds.coords:
        ds = ds.assign_coords(row=("obs", np.arange(2, ds.sizes["obs"] + 2)))
    for name in ("x", "y", "value"):
        bad = ds["row"].values[~np.isfinite(ds[name].values)]
        if bad.size:
            raise InputError(f"{src}: variable {name!r} has NaN or infinite values at rows {format_rows(bad)}")
    ds.attrs.setdefault("coords", "xy")
    ds.attrs.setdefault("distance_units", "coordinate units")
    ds.attrs.setdefault("value_column", "value")
    ds.attrs.setdefault("x_column", "x")
    ds.attrs.setdefault("y_column", "y")
    ds.attrs["source"] = path.name
    ds.attrs["source_sha256"] = _sha256(path)
    return _finish(ds, src, ds.attrs.get("duplicates", "error"))
