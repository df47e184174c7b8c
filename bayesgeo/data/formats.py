"""The files sample points come in: CSV, Excel workbooks and GIS vector files, each read into one :class:`Table`.

Every format becomes the same table of text cells with spreadsheet row numbers
(:class:`bayesgeo.common.csvtable.Table`), so one set of column rules, non-detect rules and one-line
errors serves them all (docs/data_files.md):

* CSV (``.csv``, ``.txt``): :func:`bayesgeo.common.csvtable.read_table`.
* Excel (``.xlsx``, ``.xlsm``): one worksheet (the first, or ``layer``) through openpyxl; the header is
  the first non-empty row and rows keep the sheet's own numbers.
* GIS vector files (``.gpkg``, ``.shp``, ``.geojson``, ``.json``, ``.fgb``): one layer of points through
  pyogrio (GDAL); the attribute columns as they are plus the point coordinates as two columns, and the
  layer's coordinate reference system. A feature's row is counted as in a spreadsheet export of the
  attribute table: header row 1, first feature row 2.

Files are only read.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from bayesgeo.common.csvtable import Table, read_table
from bayesgeo.common.validate import InputError

__all__ = ["EXCEL", "VECTOR", "Source", "read_source"]

#: File suffixes read as Excel workbooks.
EXCEL = (".xlsx", ".xlsm")
#: File suffixes read as GIS vector files (through GDAL).
VECTOR = (".gpkg", ".shp", ".geojson", ".json", ".fgb")
_CSV = (".csv", ".txt", ".tsv")


@dataclass(frozen=True)
class Source:
    """A table of points and what its file says about them.

    Attributes
    ----------
    table : Table
        Header and text cells with spreadsheet row numbers.
    crs : str or None
        The coordinate reference system the file declares (GIS files; as GDAL gives it), else None.
    xy : tuple of str or None
        The columns holding the point geometry's coordinates (GIS files), else None.
    kind : str
        ``"csv"``, ``"excel"`` or ``"vector"``.
    """

    table: Table
    crs: str | None = None
    xy: tuple[str, str] | None = None
    kind: str = "csv"


def read_source(path: str | Path, *, layer: str | None = None, what: str = "data") -> Source:
    """Read the points file ``path`` (any format of the module docstring).

    Parameters
    ----------
    path : str or Path
    layer : str, optional
        Worksheet of a workbook or layer of a GIS file (default: the first sheet; the only layer).
    what : str
        What the file is, for the not-found message.

    Raises
    ------
    InputError
        One line naming the file (and row or layer) of an unreadable file, a missing layer, or a
        geometry that is not a point.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in EXCEL:
        return Source(_read_excel(path, layer), kind="excel")
    if suffix in VECTOR:
        return _read_vector(path, layer)
    if layer is not None:
        raise InputError(f"{path}: --layer names a worksheet or GIS layer; a {suffix or 'text'} file has none")
    if suffix and suffix not in _CSV and path.is_file():
        raise InputError(f"{path}: files ending {suffix} are not read; give CSV, Excel ({', '.join(EXCEL)}) or a "
                         f"GIS vector file ({', '.join(VECTOR)})")
    return Source(read_table(path, what=what))


def _cell(v) -> str:
    """A spreadsheet or attribute value as the text a CSV would hold."""
    if v is None:
        return ""
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v)).lower()
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return "" if math.isnan(v) else repr(float(v))
    if isinstance(v, (dt.datetime, dt.date)):
        return v.isoformat()
    return str(v)


def _read_excel(path: Path, layer: str | None) -> Table:
    if not path.is_file():
        raise InputError(f"{path}: file not found")
    try:
        import openpyxl
    except ImportError:  # pragma: no cover - a declared dependency
        raise InputError(f"{path}: reading Excel files needs openpyxl (pip install openpyxl)") from None
    try:
        book = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as err:  # openpyxl raises many kinds for a damaged or foreign file
        raise InputError(f"{path}: not readable as an Excel workbook ({type(err).__name__}: {err})") from None
    try:
        names = book.sheetnames
        if layer is not None and layer not in names:
            raise InputError(f"{path}: no worksheet {layer!r} (worksheets: {', '.join(names)})")
        sheet = book[layer if layer is not None else names[0]]
        records = [(i, [_cell(v) for v in row]) for i, row in enumerate(sheet.iter_rows(values_only=True), start=1)]
    finally:
        book.close()
    records = [(i, cells) for i, cells in records if any(c.strip() for c in cells)]
    if not records:
        raise InputError(f"{path}: worksheet {sheet.title!r} is empty (a header row naming the columns is needed)")
    head_row, header = records[0]
    header = [h.strip() for h in header]
    while header and not header[-1]:
        header.pop()
    _unique(header, f"{path}: row {head_row} (header)")
    width = len(header)
    rows = []
    for i, cells in records[1:]:
        extra = [c for c in cells[width:] if c.strip()]
        if extra:
            raise InputError(f"{path}: row {i}: {extra[0]!r} is under no column (the header row {head_row} names "
                             f"{width} columns)")
        rows.append((i, (cells + [""] * width)[:width]))
    return Table(f"{path}", header, rows)


def _unique(header: list[str], where: str) -> None:
    seen: set[str] = set()
    for h in header:
        if not h:
            raise InputError(f"{where}: a column has no name")
        if h in seen:
            raise InputError(f"{where} names column {h!r} twice; column names must be unique")
        seen.add(h)


def _read_vector(path: Path, layer: str | None) -> Source:
    if not path.exists():
        raise InputError(f"{path}: file not found")
    try:
        import pyogrio
        import shapely
        from pyogrio.raw import read
    except ImportError:  # pragma: no cover - declared dependencies
        raise InputError(f"{path}: reading GIS files needs pyogrio and shapely (pip install pyogrio shapely)") from None
    try:
        layers = [str(name) for name, _ in pyogrio.list_layers(path)]
    except Exception as err:  # GDAL's errors for unreadable files
        raise InputError(f"{path}: not readable as a GIS vector file ({err})") from None
    if layer is None and len(layers) > 1:
        raise InputError(f"{path}: holds {len(layers)} layers ({', '.join(layers)}); name one with --layer")
    if layer is not None and layer not in layers:
        raise InputError(f"{path}: no layer {layer!r} (layers: {', '.join(layers)})")
    try:
        meta, _, geometry, fields = read(path, layer=layer if layer is not None else layers[0])
    except Exception as err:
        raise InputError(f"{path}: not readable as a GIS vector file ({err})") from None
    header = [str(f) for f in meta["fields"]]
    _unique(header, f"{path}: the attribute table")
    if geometry is None:
        raise InputError(f"{path}: the layer has no geometry; give the coordinates as columns of a CSV instead")
    geoms = shapely.from_wkb(geometry)
    kinds = shapely.get_type_id(geoms)
    multi = kinds == 4  # MultiPoint: one point only
    if multi.any():
        single = shapely.get_num_geometries(geoms[multi]) == 1
        geoms[np.flatnonzero(multi)[single]] = shapely.get_geometry(geoms[multi][single], 0)
        kinds = shapely.get_type_id(geoms)
    bad = np.flatnonzero((kinds != 0) | shapely.is_empty(geoms) | shapely.is_missing(geoms))
    if bad.size:
        k, g = int(bad[0]), geoms[int(bad[0])]
        what = "no geometry" if g is None or shapely.is_empty(g) else f"a {g.geom_type}"
        raise InputError(f"{path}: row {k + 2} (feature {k + 1}): {what}; bayesgeo takes one point per feature "
                         f"({bad.size} such features; convert to points in your GIS first)")
    names = ("x", "y") if not {"x", "y"} & set(header) else ("geometry_x", "geometry_y")
    x, y = shapely.get_x(geoms), shapely.get_y(geoms)
    cols = [[_cell(v) for v in col] for col in fields] + [[repr(float(v)) for v in x], [repr(float(v)) for v in y]]
    rows = [(k + 2, [c[k] for c in cols]) for k in range(len(geoms))]
    return Source(Table(str(path), [*header, *names], rows), crs=meta.get("crs") or None, xy=names, kind="vector")
