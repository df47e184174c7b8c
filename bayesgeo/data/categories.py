"""Categorical covariates: columns of labels (soil type, geological unit, land use, fill or native ground, a
field trial's treatment) read as levels, and their treatment coding in the trend.

A category column with levels ``L_0 < L_1 < ... < L_k`` (sorted as text) enters the trend as ``k``
indicator columns, one per level other than the baseline (treatment coding): the column of level ``L``
is 1 at a point labelled ``L`` and 0 elsewhere, so the baseline's mean is the rest of the trend and the
coefficient of ``L`` is the difference of level ``L``'s mean from the baseline's, in value units (on the
log scale under the log transform). The indicator columns are labelled ``"<column>=<level>"``.

The baseline is the most frequent level (ties: the first in sorted order), which gives the most
precise differences, unless the user names one (``--baseline COL=LEVEL``). It is recorded with the
variable (``attrs["baseline"]``) and in the design attributes of every fit.

Refusals (one line, naming the file and column): an empty cell; labels that differ only in letter case
or surrounding spaces are one label (spaces stripped, with a warning) or refused (case); a column with
one level; a level with fewer than :data:`MIN_LEVEL_POINTS` points; at prediction, a level the fit has
not seen. Prediction on a grid takes the category of each cell from the polygon of a zone layer that
holds the cell's centre (:func:`zone_categories`).

References: treatment ("dummy") coding of a factor in a linear model, e.g. Chambers and Hastie (1992),
*Statistical Models in S*, sec. 2.3.2; Fox (2016), *Applied Regression Analysis and Generalized Linear
Models*, 3rd ed., sec. 7.1.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np

from bayesgeo.common.validate import InputError, format_rows

__all__ = ["MIN_LEVEL_POINTS", "KIND", "category_labels", "parse_baselines", "choose_baseline", "category_attrs",
           "is_category", "levels_of", "treatment_columns", "level_terms", "check_levels", "refuse_unknown",
           "zone_categories"]

#: Fewest points a level of a category needs (our choice, docs/model.md "Categorical covariates"): its
#: coefficient is the difference of its mean from the baseline's, and from fewer points that difference is
#: confounded with the spatial field around them.
MIN_LEVEL_POINTS = 5

#: ``attrs["covariate_kind"]`` of a category variable.
KIND = "category"


def category_labels(table, col: str) -> np.ndarray:
    """The labels of column ``col`` of a :class:`bayesgeo.common.csvtable.Table`, surrounding spaces removed.

    Raises
    ------
    InputError
        Empty cells, or labels that differ only in letter case (naming the rows of each spelling).
    """
    j = table.header.index(col)
    rows = [r for r, _ in table.rows]
    labels = [cells[j].strip() for _, cells in table.rows]
    empty = [r for r, lb in zip(rows, labels) if not lb]
    if empty:
        raise InputError(f"{table.src}: empty cells in category column {col!r} at rows {format_rows(empty)}; "
                         "give every point a level")
    spellings: dict[str, dict[str, list[int]]] = {}
    for r, lb in zip(rows, labels):
        spellings.setdefault(lb.casefold(), {}).setdefault(lb, []).append(r)
    for group in spellings.values():
        if len(group) > 1:
            shown = " and ".join(f"{lb!r} (rows {format_rows(rs, limit=3)})" for lb, rs in list(group.items())[:3])
            raise InputError(f"{table.src}: category column {col!r} has levels differing only in letter case: "
                             f"{shown}; write each level the same way")
    return np.asarray(labels, dtype=str)


def parse_baselines(items: Sequence[str] | Mapping[str, str] | None, categories: Sequence[str]) -> dict[str, str]:
    """``["COL=LEVEL", ...]`` (``--baseline``, repeatable) as ``{COL: LEVEL}``; every COL must be a category."""
    if not items:
        return {}
    pairs = list(items.items()) if isinstance(items, Mapping) else []
    for text in ([] if isinstance(items, Mapping) else [items] if isinstance(items, str) else items):
        col, sep, level = str(text).partition("=")
        if not sep or not col.strip() or not level.strip():
            raise InputError(f"baselines: expected COL=LEVEL (e.g. ground=native), got {text!r}")
        pairs.append((col.strip(), level.strip()))
    out: dict[str, str] = {}
    for col, level in pairs:
        if col not in categories:
            have = ", ".join(categories) or "none"
            raise InputError(f"baselines: {col!r} is not a category column (categories: {have}; name it with "
                             "--category first)")
        if col in out and out[col] != level:
            raise InputError(f"baselines: two baselines for column {col!r} ({out[col]!r} and {level!r})")
        out[col] = str(level)
    return out


def choose_baseline(labels, given: str | None, col: str, src: str) -> str:
    """The baseline level: ``given`` (which must be a level), else the most frequent (ties: first sorted)."""
    counts = Counter(str(v) for v in np.asarray(labels).ravel())
    levels = sorted(counts)
    if given is not None:
        if given not in counts:
            raise InputError(f"{src}: baseline {given!r} is not a level of category column {col!r} "
                             f"(levels: {', '.join(levels)})")
        return given
    top = max(counts.values())
    return next(lv for lv in levels if counts[lv] == top)


def category_attrs(labels, baseline: str) -> dict:
    """Attributes of a category variable: its kind, baseline and sorted levels (a JSON string, so that a
    NetCDF file keeps a list of one as a list)."""
    levels = sorted({str(v) for v in np.asarray(labels).ravel()})
    return {"covariate_kind": KIND, "baseline": str(baseline), "levels": json.dumps(levels),
            "long_name": f"category (treatment coded in the trend; baseline {baseline!r})"}


def is_category(var) -> bool:
    """True for a category variable (:func:`category_attrs`) or any variable of text labels."""
    return var.attrs.get("covariate_kind") == KIND or np.asarray(var.values).dtype.kind in "USO"


def levels_of(var) -> tuple[list[str], str]:
    """Sorted levels and baseline of a category variable (from its attributes, else from its labels)."""
    levels = var.attrs.get("levels")
    if levels is None:
        levels = sorted({str(v) for v in np.asarray(var.values).ravel()})
    elif isinstance(levels, str):
        levels = json.loads(levels) if levels.startswith("[") else [levels]
    levels = [str(v) for v in levels]
    baseline = var.attrs.get("baseline")
    if baseline is None:
        baseline = choose_baseline(var.values, None, str(var.name), "data")
    return levels, str(baseline)


def level_terms(name: str, levels: Sequence[str], baseline: str) -> list[str]:
    """Design-column labels of a category: ``"<name>=<level>"`` for each level but the baseline, sorted."""
    return [f"{name}={lv}" for lv in levels if lv != baseline]


def treatment_columns(labels, levels: Sequence[str], baseline: str) -> np.ndarray:
    """Indicator columns (m, k - 1) of the levels other than ``baseline`` (order of ``levels``): 1.0 where a
    label equals the level, else 0.0. Labels outside ``levels`` raise ValueError (check them first with
    :func:`refuse_unknown`)."""
    labels = np.asarray(labels).astype(str).ravel()
    unknown = sorted(set(labels.tolist()) - set(levels))
    if unknown:
        raise ValueError(f"labels {unknown} are not levels {list(levels)}")
    others = [lv for lv in levels if lv != baseline]
    return np.column_stack([labels == lv for lv in others]).astype(float) if others else np.empty((labels.size, 0))


def check_levels(labels, levels: Sequence[str], col: str, src: str, rows=None, where: str = "") -> None:
    """Refuse a category with one level, or a level with fewer than :data:`MIN_LEVEL_POINTS` points."""
    labels = np.asarray(labels).astype(str).ravel()
    if len(levels) < 2:
        raise InputError(f"{src}: category column {col!r}{where} has one level ({', '.join(levels)}); "
                         "it is the intercept: drop the category")
    counts = {lv: int(np.sum(labels == lv)) for lv in levels}
    few = [lv for lv in levels if counts[lv] < MIN_LEVEL_POINTS]
    if few:
        lv = few[0]
        at = "" if rows is None else f" (rows {format_rows(np.asarray(rows)[labels == lv], limit=5)})"
        raise InputError(f"{src}: category column {col!r}{where}: level {lv!r} has {counts[lv]} points{at}; "
                         f"each level needs at least {MIN_LEVEL_POINTS}: merge it with a similar level or drop "
                         "those points")


def refuse_unknown(labels, levels: Sequence[str], col: str, src: str, rows=None) -> None:
    """One-line refusal of labels that are not levels the fit has seen (naming rows when given)."""
    labels = np.asarray(labels).astype(str).ravel()
    bad = ~np.isin(labels, list(levels))
    if bad.any():
        first = str(labels[bad][0])
        at = "" if rows is None else f" at rows {format_rows(np.asarray(rows)[bad], limit=5)}"
        raise InputError(f"{src}: column {col!r}: level {first!r}{at} is not one the fit has seen "
                         f"(levels: {', '.join(levels)}); the trend has no coefficient for it")


def zone_categories(path: str | Path, xy, names: Mapping[str, Sequence[str]], *, layer: str | None = None,
                    crs: str | None = None) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """The category of each location from a polygon layer: the attribute of the polygon holding it.

    Parameters
    ----------
    path : str or Path
        A GIS vector file of polygons (GeoPackage, shapefile, GeoJSON, FlatGeobuf; read with pyogrio).
    xy : ndarray, shape (m, 2)
        Locations (cell centres), in the coordinates of the fit.
    names : mapping
        Category column -> its levels: each must be an attribute of the layer.
    layer : str, optional
        Layer of a file holding several.
    crs : str, optional
        The fit's CRS (WKT or EPSG code); a layer declaring a different one is refused.

    Returns
    -------
    labels : dict
        Column -> labels (m,) (``""`` where no polygon holds the location).
    covered : ndarray of bool, shape (m,)
        Locations inside some polygon (points on a boundary count as inside: shapely's ``covered_by``).

    Raises
    ------
    InputError
        Unreadable file, several layers without ``layer``, a geometry that is not a polygon, a missing
        attribute, a CRS other than the fit's, overlapping polygons that disagree on a location's category,
        or, on a polygon holding a location, a level the fit has not seen (naming the feature's row, header
        = row 1; polygons holding no location are not read further).
    """
    import pyogrio
    import shapely
    from pyogrio.raw import read

    src = str(path)
    if not Path(path).is_file():
        raise InputError(f"{src}: zone file not found")
    try:
        layers = [str(n) for n, _ in pyogrio.list_layers(path)]
        if layer is None and len(layers) > 1:
            raise InputError(f"{src}: holds {len(layers)} layers ({', '.join(layers)}); name one with --zones-layer")
        if layer is not None and layer not in layers:
            raise InputError(f"{src}: no layer {layer!r} (layers: {', '.join(layers)})")
        meta, _, geometry, fields = read(path, layer=layer if layer is not None else layers[0])
    except InputError:
        raise
    except Exception as err:  # GDAL's errors for unreadable files
        raise InputError(f"{src}: not readable as a GIS polygon layer ({err})") from None
    _same_crs(meta.get("crs"), crs, src)
    header = [str(f) for f in meta["fields"]]
    geoms = shapely.from_wkb(geometry) if geometry is not None else None
    if geoms is None or not len(geoms):
        raise InputError(f"{src}: the layer has no polygons")
    kinds = shapely.get_type_id(geoms)
    bad = np.flatnonzero(~np.isin(kinds, (3, 6)) | shapely.is_missing(geoms))
    if bad.size:
        g = geoms[bad[0]]
        raise InputError(f"{src}: row {bad[0] + 2} (feature {bad[0] + 1}): a {getattr(g, 'geom_type', 'missing')} "
                         "geometry; a zone layer holds polygons")
    attrs = {}
    for col, levels in names.items():
        if col not in header:
            raise InputError(f"{src}: the trend needs category attribute {col!r} on the zone polygons; "
                             f"attributes are: {', '.join(header) or 'none'}")
        attrs[col] = np.array(["" if v is None else str(v).strip() for v in fields[header.index(col)]], dtype=object)
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    pts = shapely.points(xy)
    pt_idx, poly_idx = shapely.STRtree(geoms).query(pts, predicate="covered_by")
    used = np.unique(poly_idx)  # polygons holding a location: their levels must be known (others are not used)
    for col, vals in attrs.items():
        refuse_unknown(vals[used], names[col], col, src, rows=used + 2)
    m = len(pts)
    first = np.full(m, -1, dtype=np.int64)
    hit, at = np.unique(pt_idx, return_index=True)
    first[hit] = poly_idx[at]  # the first polygon found holding each location
    covered = first >= 0
    out = {}
    for col, vals in attrs.items():
        clash = np.flatnonzero(vals[poly_idx] != vals[first[pt_idx]])
        if clash.size:
            i, k = int(pt_idx[clash[0]]), int(poly_idx[clash[0]])
            raise InputError(f"{src}: overlapping polygons (rows {int(first[i]) + 2} and {k + 2}) give the location "
                             f"({xy[i, 0]:.6g}, {xy[i, 1]:.6g}) two levels of {col!r} ({vals[first[i]]!r} and "
                             f"{vals[k]!r}); make the zones disjoint")
        out[col] = np.where(covered, vals[np.maximum(first, 0)], "").astype(str)
    return out, covered


def _same_crs(declared: str | None, fit_crs: str | None, src: str) -> None:
    """Refuse a zone layer whose declared CRS differs from the fit's (no silent reprojection)."""
    if not declared or not fit_crs:
        return
    from pyproj import CRS

    try:
        same = CRS.from_user_input(declared).equals(CRS.from_user_input(fit_crs), ignore_axis_order=True)
    except Exception:  # noqa: BLE001 - an unparseable CRS is a mismatch here
        same = False
    if not same:
        name = CRS.from_user_input(declared).name if declared else "?"
        raise InputError(f"{src}: the zone layer's CRS ({name}) is not the fit's; reproject the layer to the fit's "
                         "CRS in your GIS first")
