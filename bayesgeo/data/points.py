"""Point-data intake: a CSV, Excel or GIS file (or one of our own NetCDF files) into one ``xarray.Dataset``.

The result has one dimension, ``obs``, with coordinates ``x``, ``y`` (and ``site`` when a site
column is given) and ``row`` (the 1-based spreadsheet row of each point in the input file, the
header being row 1), the measured ``value`` and any covariates as data variables. Units, the
coordinate reference system (WKT, :mod:`bayesgeo.data.crs`) and the source file are kept in attributes.
The file formats are those of :mod:`bayesgeo.data.formats`. The input file is only read.
"""

from __future__ import annotations

import warnings
from collections import defaultdict
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.common.csvtable import MAX_MAGNITUDE, InputWarning, guess_value, numeric_column
from bayesgeo.common.geometry import continuous_longitudes
from bayesgeo.common.outputs import sha256_file
from bayesgeo.common.validate import InputError, check_choice, format_rows
from bayesgeo.data.categories import category_attrs, category_labels, choose_baseline, is_category, parse_baselines
from bayesgeo.data.crs import check_lonlat_ranges, coords_for, georeference, refuse_lonlat_lookalike, resolve_crs
from bayesgeo.data.formats import read_source
from bayesgeo.data.nondetects import censored_column, check_share

__all__ = ["MIN_POINTS", "TRANSFORMS", "READ_KEYS", "FIT_DATA_ATTRS", "read_points", "read_settings", "points_dataset",
           "trend_covariates", "sites_of", "apply_transform"]

#: Value transforms: ``None`` (values as they are) or ``"log"`` (natural logarithm).
TRANSFORMS = (None, "log")

#: Fewest points per site for a spatial analysis (fewer cannot pin down a variogram).
MIN_POINTS = 10

_X_NAMES = ("x", "easting", "east", "e", "lon", "longitude", "long")
_Y_NAMES = ("y", "northing", "north", "n", "lat", "latitude")
COORDS = ("auto", "xy", "lonlat")
DUPLICATES = ("error", "mean")
SMALL_SITES = ("error", "keep")
_POOLED_MIN = 3


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
    categories: Sequence[str] = (),
    baselines: Sequence[str] | Mapping[str, str] | None = None,
    coords: str = "auto",
    duplicates: str = "error",
    units: str | None = None,
    distance_units: str | None = None,
    crs: str | None = None,
    only_site: str | None = None,
    small_sites: str = "error",
    limit: str | None = None,
    detected: str | None = None,
    to_crs: str | None = None,
    layer: str | None = None,
) -> xr.Dataset:
    """Read point measurements into a ``Dataset`` along ``obs``.

    Parameters
    ----------
    path : str or Path
        A CSV file with a header row, an Excel workbook (``.xlsx``), a GIS file of points (GeoPackage,
        shapefile, GeoJSON, FlatGeobuf), or a NetCDF file written by bayesgeo (``.nc``).
    x, y : str, optional
        Location columns. Detected when omitted (x/easting/lon, y/northing/lat).
    value : str, optional
        Measured value column; detected when exactly one numeric column is left over. A cell ``<X``
        is a non-detect with reporting limit X (:mod:`bayesgeo.data.nondetects`): the Dataset then
        holds a boolean ``censored`` variable and the limit in ``value``.
    site : str, optional
        Column labelling the site of each point (for several-site analyses).
    covariates : sequence of str
        Extra numeric columns kept as covariates for the trend.
    categories : sequence of str
        Columns of labels kept as categorical covariates (soil type, geological unit, land use, ...):
        text variables whose attributes give their sorted levels and baseline
        (:mod:`bayesgeo.data.categories`; treatment coded in the trend).
    baselines : sequence of str or mapping, optional
        ``"COL=LEVEL"`` items (or ``{COL: LEVEL}``) naming the baseline level of a category; default the
        most frequent level (ties: the first in sorted order).
    coords : {"auto", "xy", "lonlat"}
        ``xy``: planar coordinates, Euclidean distances in coordinate units. ``lonlat``: degrees,
        great-circle distances in km; longitudes written -180..180 or 0..360, re-expressed as one
        continuous range when the data cross 180 degrees (``attrs["longitude_convention"]``).
        ``auto`` (default) is ``xy`` but refuses coordinates that all lie in the degree box
        (|lat| <= 90, lon in [-180, 180] or [0, 360]), so degrees are never silently treated as
        planar units.
    duplicates : {"error", "mean"}
        Points sharing a location: an error listing the rows, or averaged into one point.
    units : str, optional
        Units of the measured value (e.g. ``"mg/kg"``), recorded in attributes.
    distance_units : str, optional
        Units of planar coordinates (e.g. ``"m"``); with ``coords="lonlat"`` distances are in km
        and this must be omitted or ``"km"``.
    crs : str, optional
        Coordinate reference system of the coordinates: an EPSG code (``"EPSG:32633"``) or WKT. A GIS file's
        own CRS is used when it declares one (a different ``crs`` is refused). A geographic CRS makes
        the coordinates lon/lat, a projected one planar in its unit.
    to_crs : str, optional
        Project the points first: ``"utm"`` (the UTM zone of the data's centre) or a projected CRS
        (pyproj); distances, ranges and cells are then in its unit (metres). Recorded in attributes.
    layer : str, optional
        Worksheet of a workbook or layer of a GIS file (default: the first sheet; the only layer).
    only_site : str, optional
        Keep the rows of this one site (needs ``site``); checks then apply to that site alone.
    small_sites : {"error", "keep"}
        A site with fewer than :data:`MIN_POINTS` points is an error (default), or is kept
        (``"keep"``, for a hierarchical model that lets it borrow strength from the others; it
        still needs 3 points, and at least one site must have :data:`MIN_POINTS`).
    limit, detected : str, optional
        Columns with the reporting limits and the detected / not-detected flags of non-detects
        (given together; :func:`bayesgeo.data.nondetects.censored_column`).

    Returns
    -------
    xarray.Dataset

    Raises
    ------
    InputError
        One-line message naming the file, row(s) and column of bad input (the CSV rules are in
        :mod:`bayesgeo.common.csvtable` and docs/data_files.md).

    Warns
    -----
    InputWarning
        Site labels stripped of surrounding spaces (naming the rows).
    """
    check_choice(coords, COORDS, "coords")
    check_choice(duplicates, DUPLICATES, "duplicates")
    check_choice(small_sites, SMALL_SITES, "small_sites")
    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise InputError(f"{src}: file not found")
    if path.suffix.lower() in (".nc", ".nc4", ".netcdf"):
        return _read_netcdf(path)
    source = read_source(path, layer=layer)
    table = source.table
    header, body = table.header, table.rows
    if not body:
        raise InputError(f"{src}: no data rows below the header")

    if source.xy and not (x or y):
        x, y = source.xy  # the point geometry of a GIS file
    xcol = _require(header, x, "--x", src) if x else _detect(header, _X_NAMES, "x (easting/longitude)", "--x", src)
    ycol = _require(header, y, "--y", src) if y else _detect(header, _Y_NAMES, "y (northing/latitude)", "--y", src)
    crs_obj = resolve_crs(source.crs, crs, src)
    coords = coords_for(crs_obj, coords, src)
    sitecol = _require(header, site, "--site", src) if site else None
    covs = [_require(header, c, "--covariate", src) for c in covariates]
    cats = [_require(header, c, "--category", src) for c in categories]
    both = [c for c in cats if c in covs]
    if both:
        raise InputError(f"{src}: column {both[0]!r} is given both as --covariate (numbers) and as --category "
                         "(labels); give it once")
    chosen = parse_baselines(baselines, cats)
    vcol = _require(header, value, "--value", src) if value else guess_value(table, {xcol, ycol, sitecol, *covs, *cats})
    if vcol in cats:
        raise InputError(f"{src}: column {vcol!r} is the measured value; it cannot also be a --category")
    labels = {c: category_labels(table, c) for c in cats}

    limit = _require(header, limit, "--limit", src) if limit else None
    detected = _require(header, detected, "--detected", src) if detected else None
    numeric = {c: numeric_column(table, c) for c in dict.fromkeys((xcol, ycol, *covs)) if c != vcol}
    numeric[vcol], censored = censored_column(table, vcol, limit=limit, detected=detected)
    _check_spread(numeric, [r for r, _ in body], src)
    file_rows = np.array([r for r, _ in body])
    lonlat = coords == "lonlat"
    if lonlat and distance_units not in (None, "km"):
        raise InputError(f"distance_units: great-circle distances (--coords lonlat) are in km, got {distance_units!r}")
    if coords == "auto":  # on every row of the file: degrees or not is a property of the file, not of a site
        refuse_lonlat_lookalike(numeric[xcol], numeric[ycol], xcol, ycol, src)
    frame = ""
    if lonlat:
        check_lonlat_ranges(numeric[xcol], numeric[ycol], file_rows, xcol, ycol, src)
        numeric[xcol] = continuous_longitudes(numeric[xcol])
        frame = "0..360" if numeric[xcol].max() > 180.0 else "-180..180"
    numeric[xcol], numeric[ycol], lonlat, distance_units, crs_info = georeference(
        numeric[xcol], numeric[ycol], crs=crs_obj, to_crs=to_crs, lonlat=lonlat, distance_units=distance_units,
        src=src)

    sites = None
    if sitecol is not None:
        sites = np.array(_site_labels(table, sitecol), dtype=object)
        empty = file_rows[sites == ""]
        if empty.size:
            raise InputError(f"{src}: empty cells in column {sitecol!r} at rows {format_rows(empty)}")
        sites = sites.astype(str)
        if only_site is not None:
            keep = sites == only_site
            if not keep.any():
                labels = ", ".join(dict.fromkeys(sites.tolist()))
                raise InputError(f"{src}: --only-site: no site {only_site!r} in column {sitecol!r} (sites: {labels})")
            sites, file_rows, censored = sites[keep], file_rows[keep], censored[keep]
            numeric = {c: v[keep] for c, v in numeric.items()}
            labels = {c: v[keep] for c, v in labels.items()}
    elif only_site is not None:
        raise InputError(f"{src}: --only-site needs --site COL naming the site column")

    attrs = {
        "source": path.name,
        "source_sha256": sha256_file(path),
        "x_column": xcol,
        "y_column": ycol,
        "value_column": vcol,
        "site_column": sitecol or "",
        "covariates": list(covs),
        "categories": list(cats),
        "coords": "lonlat" if lonlat else "xy",
        "distance_units": distance_units,
        "value_units": units or "",
        **crs_info,
        "duplicates": duplicates,
    }
    if layer is not None:
        attrs["layer"] = layer
    if lonlat:
        attrs["longitude_convention"] = frame
    if censored.any():
        check_share(censored, sites, file_rows, src)
        attrs["non_detects"] = int(censored.sum())
        attrs["limit_column"], attrs["detected_column"] = limit or "", detected or ""
    ds = points_dataset(
        numeric[xcol], numeric[ycol], numeric[vcol],
        site=sites, covariates={c: numeric[c] for c in covs}, rows=file_rows, attrs=attrs,
        censored=censored if censored.any() else None,
        categories={c: (v, category_attrs(v, choose_baseline(v, chosen.get(c), c, src))) for c, v in labels.items()},
    )
    return _finish(ds, src, duplicates, small_sites)


#: The attributes of the data a fit records (``settings["data"]``): where the data came from and their CRS.
FIT_DATA_ATTRS = ("source", "source_sha256", "coords", "crs", "crs_name", "x_column", "y_column", "value_column",
                  "site_column")

#: The keyword arguments of :func:`read_points` that say how to read a data file: the command line, study
#: files and the settings stored in a run name them alike.
READ_KEYS = ("x", "y", "value", "limit", "detected", "site", "covariates", "categories", "baselines", "coords",
             "duplicates", "units", "distance_units", "crs", "to_crs", "layer")


def read_settings(settings) -> dict:
    """The :data:`READ_KEYS` of a settings mapping that are given (not None), as keyword arguments of
    :func:`read_points`."""
    return {k: settings[k] for k in READ_KEYS if settings.get(k) is not None}


def trend_covariates(settings) -> tuple[str, ...]:
    """The covariates of the trend in read settings (:data:`READ_KEYS`): numeric ``covariates``, then ``categories``."""
    return (*(settings.get("covariates") or ()), *(settings.get("categories") or ()))


def points_dataset(x, y, value, *, site=None, covariates=None, rows=None, attrs=None, censored=None,
                   categories=None) -> xr.Dataset:
    """Assemble the intake ``Dataset`` from arrays (no checks; see :func:`read_points`); ``censored`` marks
    non-detects, whose ``value`` is their reporting limit; ``categories`` maps a name to its labels, or to
    ``(labels, attrs)`` (:func:`bayesgeo.data.categories.category_attrs`; default: baseline the most
    frequent level)."""
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
    for name, col in (categories or {}).items():
        labels, cat_attrs = col if isinstance(col, tuple) else (col, None)
        labels = np.asarray(labels).astype(str)
        data[name] = ("obs", labels, cat_attrs or category_attrs(labels, choose_baseline(labels, None, name, "data")))
    if censored is not None:
        data["censored"] = ("obs", np.asarray(censored, dtype=bool),
                            {"long_name": "non-detect: the value is the reporting limit; the true value lies below it"})
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
        raise InputError(f"transform: {transform!r} is not one of: none, log")
    out = ds.copy()
    out.attrs["transform"] = transform or "none"
    if transform is None:
        return out
    z = np.asarray(ds["value"].values, dtype=float)
    bad = z <= 0
    if np.any(bad):
        col = ds.attrs.get("value_column", "value")
        limits = " (reporting limits of non-detects included)" if "censored" in ds and ds["censored"].values[bad].any() else ""
        raise InputError(
            f"{ds.attrs.get('source') or 'data'}: --transform log needs positive values; column {col!r} has "
            f"zero or negative values{limits} at rows {format_rows(ds['row'].values[bad])}"
        )
    units = ds.attrs.get("value_units", "") or "value units"
    out["value"] = ("obs", np.log(z), {**ds["value"].attrs, "units": f"log({units})"})
    return out


def _site_labels(table, col: str) -> list[str]:
    """Site labels stripped of surrounding spaces (a warning names the rows); labels that differ only in
    spaces or only in letter case are refused, naming the rows of each spelling."""
    j = table.header.index(col)
    rows = [r for r, _ in table.rows]
    raw = [cells[j] for _, cells in table.rows]
    _refuse_spellings(table.src, col, rows, raw, str.strip, "spaces",
                      "Write each site's label the same way in every row")
    changed = [(r, c) for r, c in zip(rows, raw) if c != c.strip() and c.strip()]
    if changed:
        shown = ", ".join(dict.fromkeys(repr(c) for _, c in changed[:3]))
        warnings.warn(
            f"{table.src}: column {col!r} has labels with leading or trailing spaces ({shown}) at rows "
            f"{format_rows([r for r, _ in changed])}; the spaces were removed", InputWarning, stacklevel=3)
    labels = [c.strip() for c in raw]
    _refuse_spellings(table.src, col, rows, labels, str.casefold, "letter case",
                      "Relabel so that they differ in more than case (per-site output files would collide on "
                      "Windows and macOS file systems)")
    return labels


def _refuse_spellings(src: str, col: str, rows, labels, key, what: str, advice: str) -> None:
    """Refuse labels that are one label under ``key`` but spelled differently, naming each spelling's rows."""
    spellings: dict[str, dict[str, list[int]]] = defaultdict(dict)
    for r, lb in zip(rows, labels):
        spellings[key(lb)].setdefault(lb, []).append(r)
    for group in spellings.values():
        if len(group) > 1:
            shown = " and ".join(f"{lb!r} (rows {format_rows(rs, limit=3)})" for lb, rs in list(group.items())[:3])
            raise InputError(f"{src}: column {col!r} has labels differing only in {what}: {shown}; one site typed "
                             f"two ways, or two sites? {advice}")


def _check_spread(numeric: dict, rows: list[int], src: str) -> None:
    """Refuse columns whose spread is so small that powers of differences (sill, its variance) underflow."""
    for col, v in numeric.items():
        spread = float(np.ptp(v)) if v.size else 0.0
        if 0.0 < spread < 1.0 / MAX_MAGNITUDE:
            raise InputError(
                f"{src}: column {col!r} varies by only {spread:g} (rows {format_rows(rows)}); below "
                f"{1.0 / MAX_MAGNITUDE:g} powers of the differences underflow in double precision; rescale the "
                "column (other units)")


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
            hint = "" if keep_small or len(labels) == 1 else " (or --small-sites keep to keep it in a hierarchical fit)"
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
    if "censored" in ds and duplicates == "mean":
        mixed = [g for g in dup if ds["censored"].values[g].any()]
        if mixed:
            raise InputError(f"{src}: duplicate locations with non-detects at rows {format_rows(rows[mixed[0]], limit=4)}"
                             "; a non-detect cannot be averaged with other values: keep one result per location")
    if duplicates == "error":
        listed = "; ".join(format_rows(rows[g], limit=4) for g in dup[:5])
        more = f"; ... ({len(dup)} locations)" if len(dup) > 5 else ""
        raise InputError(
            f"{src}: duplicate locations in columns {ds.attrs['x_column']!r}, {ds.attrs['y_column']!r} "
            f"at rows {listed}{more}; pass --duplicates mean to average them"
        )
    for name in [v for v in ds.data_vars if is_category(ds[v])]:
        mixed = [g for g in dup if len(set(ds[name].values[g].tolist())) > 1]
        if mixed:
            raise InputError(f"{src}: duplicate locations at rows {format_rows(rows[mixed[0]], limit=4)} have "
                             f"different levels of category column {name!r}; one location has one level: correct "
                             "the labels")
    keep = [g[0] for g in groups.values()]
    out = ds.isel(obs=np.array(sorted(keep)))
    for name in [v for v in out.data_vars if not is_category(out[v])]:
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
        bad = ds["row"].values[np.abs(ds[name].values) > MAX_MAGNITUDE]
        if bad.size:
            raise InputError(f"{src}: variable {name!r} exceeds {MAX_MAGNITUDE:g} in magnitude at rows "
                             f"{format_rows(bad)} (powers and sums must stay finite); rescale it (other units)")
    ds.attrs.setdefault("coords", "xy")
    ds.attrs.setdefault("distance_units", "coordinate units")
    ds.attrs.setdefault("value_column", "value")
    ds.attrs.setdefault("x_column", "x")
    ds.attrs.setdefault("y_column", "y")
    ds.attrs["source"] = path.name
    ds.attrs["source_sha256"] = sha256_file(path)
    return _finish(ds, src, ds.attrs.get("duplicates", "error"))
