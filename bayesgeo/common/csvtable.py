"""Strict reading of a CSV table: every oddity is refused with its file, row and column.

Shared by the point-data intake (:mod:`bayesgeo.data.points`) and the target/area readers
(:mod:`bayesgeo.data.targets`). Rows are 1-based spreadsheet rows (the header is row 1; a quoted
field spanning lines still counts as one row). Refused, each with a one-line
:class:`~bayesgeo.common.validate.InputError`:

* bytes that are not UTF-8 text (the row and column of the first bad byte);
* a column name used twice in the header;
* a row with more fields than the header (unless the extra fields are empty) or fewer;
* in a numeric column: anything but a plain decimal number, with a hint for digit separators
  (``1_000``, ``1,000``), decimal commas (``1,5``), censored values (``<0.5``) and non-ASCII
  characters; magnitudes above :data:`MAX_MAGNITUDE`.
"""

from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from bayesgeo.common.validate import InputError, format_rows

__all__ = ["MAX_MAGNITUDE", "InputWarning", "Table", "read_table", "parse_number", "number_problem", "numeric_column"]

#: Largest magnitude accepted in a numeric column. The partial sill is in squared value units
#: and its draws are squared again and summed by the convergence diagnostics (variances,
#: autocorrelations over up to ~1e4 draws), so fourth powers times ~1e8 must stay below the largest
#: double (1.8e308): |v| < ~1e75. A fit of values near 1e149 overflowed there (measured); 1e50
#: leaves a wide margin and no real measurement or coordinate comes near it.
MAX_MAGNITUDE = 1e50

class InputWarning(UserWarning):
    """Input was accepted with a change or a doubt the user should know of (one line; the CLI prints it)."""


_NUMBER = re.compile(r"[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NONFINITE = {"nan", "inf", "infinity"}


@dataclass(frozen=True)
class Table:
    """A CSV read by :func:`read_table`.

    Attributes
    ----------
    src : str
        The file as named by the user (for messages).
    header : list of str
        Column names, stripped of surrounding spaces; trailing unnamed columns dropped.
    rows : list of (int, list of str)
        Spreadsheet row number and cells (exactly ``len(header)``) of every non-blank row.
    """

    src: str
    header: list[str]
    rows: list[tuple[int, list[str]]]

    def column(self, name: str) -> list[str]:
        """The stripped cells of column ``name``, one per row."""
        j = self.header.index(name)
        return [cells[j].strip() for _, cells in self.rows]


def _decode(data: bytes, src: str) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        prefix = data[:err.start].decode("utf-8-sig", errors="replace")
        records = list(csv.reader(io.StringIO(prefix, newline="")))
        if not records or prefix.endswith(("\n", "\r")):
            row, field = len(records) + 1, 0
        else:
            row, field = len(records), max(len(records[-1]) - 1, 0)
        first = next(csv.reader(io.StringIO(data.decode("utf-8-sig", errors="replace"), newline="")), [])
        if row == 1:
            where = f"row 1 (header), field {field + 1}"
        else:
            name = repr(first[field].strip()) if field < len(first) else f"number {field + 1}"
            where = f"row {row}, column {name}"
        raise InputError(
            f"{src}: {where}: byte 0x{data[err.start]:02x} is not UTF-8 text; save the file "
            "as UTF-8 (in spreadsheet programs: 'CSV UTF-8')"
        ) from None


def read_table(path: str | Path, *, what: str = "data") -> Table:
    """Read a CSV file with a header row, refusing malformed text and ragged rows.

    Parameters
    ----------
    path : str or Path
    what : str
        What the file is (``"data"``, ``"--points"``, ``"--area"``), for the not-found message.

    Returns
    -------
    Table

    Raises
    ------
    InputError
        Missing or empty file, non-UTF-8 bytes, a duplicate column name, a row with a different
        number of fields than the header; each naming the file, row and column.
    """
    path = Path(path)
    src = str(path)
    if not path.is_file():
        raise InputError(f"{src}: file not found" if what == "data" else f"{src}: {what} file not found")
    text = _decode(path.read_bytes(), src)
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        records = list(reader)
    except csv.Error as err:
        raise InputError(f"{src}: near line {reader.line_num}: not readable as CSV ({err})") from None
    if not records or not any(c.strip() for c in records[0]):
        raise InputError(f"{src}: empty file (a header row naming the columns is needed)")
    header = [h.strip() for h in records[0]]
    while header and not header[-1]:
        header.pop()
    seen: dict[str, int] = {}
    for j, h in enumerate(header):
        if h and h in seen:
            raise InputError(f"{src}: row 1 (header) names column {h!r} twice (columns {seen[h] + 1} and {j + 1}); "
                             "column names must be unique")
        seen.setdefault(h, j)
    rows = []
    for i, cells in enumerate(records[1:]):
        row = i + 2
        if not any(c.strip() for c in cells):
            continue
        if len(cells) > len(header):
            extra = [c for c in cells[len(header):] if c.strip()]
            if extra:
                raise InputError(
                    f"{src}: row {row} has {len(cells)} fields but the header has {len(header)} "
                    f"({', '.join(header)}); {extra[0].strip()!r} is under no column (a stray comma, a decimal "
                    "comma or an unquoted comma in a label?)")
            cells = cells[:len(header)]
        elif len(cells) < len(header):
            raise InputError(
                f"{src}: row {row} has {len(cells)} fields but the header has {len(header)}; no cell for column "
                f"{header[len(cells)]!r} (a missing field or comma?)")
        rows.append((row, cells))
    return Table(src, header, rows)


def parse_number(cell: str) -> float | None:
    """A plain decimal number (``-1.5``, ``2e3``), NaN for an empty cell or nan/inf words, else None."""
    s = cell.strip()
    if not s:
        return math.nan
    if s.lstrip("+-").lower() in _NONFINITE:
        return float(s)
    if _NUMBER.fullmatch(s):
        return float(s)
    return None


def _shown(s: str, limit: int = 40) -> str:
    """``repr`` of a cell, shortened to about ``limit`` characters for a one-line message."""
    return repr(s) if len(s) <= limit else repr(s[:limit]) + f"... ({len(s)} characters)"


def number_problem(cell: str) -> str:
    """Why ``cell`` is not accepted as a number, with what to write instead."""
    s = cell.strip()
    if len(s) > 40:
        return f"{_shown(s)} is not a number"
    if not s:
        return "the cell is empty"
    if re.fullmatch(r"[+-]?[0-9]+(?:_[0-9]+)+(?:\.[0-9]*)?", s):
        return f"{s!r} has digit separators ('_'); write the number without them"
    if re.fullmatch(r"[+-]?[0-9]{1,3}(?:,[0-9]{3})+(?:\.[0-9]*)?", s):
        return f"{s!r} has digit separators (','); write the number without them, or it is a decimal comma"
    if re.fullmatch(r"[+-]?[0-9]*,[0-9]+", s):
        return f"{s!r} has a decimal comma; write a decimal point"
    if s[:1] == "<":
        return (f"{s!r} is a censored value (a non-detect); non-detects are accepted in the value column only, "
                "written <X with the reporting limit X (e.g. <0.5)")
    if s[:1] == ">":
        return (f"{s!r} is a censored value (above a limit), which bayesgeo does not model; enter the measured "
                "number or remove the row")
    if not s.isascii():
        return f"{s!r} is not a plain decimal number (it has non-ASCII characters)"
    return f"{s!r} is not a number"


def numeric_column(table: Table, col: str) -> np.ndarray:
    """The cells of ``col`` as finite floats of magnitude at most :data:`MAX_MAGNITUDE`.

    Raises
    ------
    InputError
        Listing the rows whose cells are not numbers (the first with the reason), are empty,
        NaN or infinite, or exceed :data:`MAX_MAGNITUDE` in magnitude.
    """
    cells = table.column(col)
    rows = [r for r, _ in table.rows]
    out = np.empty(len(cells))
    bad: list[int] = []
    for k, cell in enumerate(cells):
        v = parse_number(cell)
        if v is None:
            bad.append(k)
            v = math.nan
        out[k] = v
    src = table.src
    if bad:
        why = number_problem(cells[bad[0]])
        raise InputError(f"{src}: row {rows[bad[0]]}, column {col!r}: {why}{_also(rows, bad)}")
    overflow = [k for k in np.flatnonzero(np.isinf(out)) if cells[k].lstrip("+-").lower() not in _NONFINITE]
    out[overflow] = np.sign(out[overflow]) * np.finfo(float).max  # a number too large for a double
    nonfinite = [rows[k] for k in np.flatnonzero(~np.isfinite(out))]
    if nonfinite:
        raise InputError(f"{src}: column {col!r} has empty, NaN or infinite cells at rows {format_rows(nonfinite)}")
    huge = np.flatnonzero(np.abs(out) > MAX_MAGNITUDE)
    if huge.size:
        k = huge[0]
        shown = cells[k] if len(cells[k]) <= 40 else cells[k][:40] + "..."
        raise InputError(
            f"{src}: row {rows[k]}, column {col!r}: {shown} is too large in magnitude (limit {MAX_MAGNITUDE:g}, "
            f"so that powers and sums stay finite in double precision){_also(rows, huge)}; rescale the column "
            "(other units)")
    return out


def _also(rows, idx) -> str:
    return f" (also rows {format_rows([rows[k] for k in idx[1:]])})" if len(idx) > 1 else ""


def guess_value(table: Table, taken: set) -> str:
    """The one numeric column not in ``taken``; else an error naming the nearly numeric columns.

    A column counts as numeric when every non-empty cell is a plain number. When none (or
    several) qualify, the message names the columns whose cells are mostly numbers with the rows
    and values that are not.
    """
    numeric, nearly = [], []
    for h in table.header:
        if not h or h in taken:
            continue
        cells = table.column(h)
        parsed = [parse_number(c) for c in cells]
        text = [k for k, (c, v) in enumerate(zip(cells, parsed)) if v is None or (c and not math.isfinite(v))]
        filled = sum(1 for c in cells if c)
        if filled and not text:
            numeric.append(h)
        elif filled and len(text) <= filled / 2:
            rows = [table.rows[k][0] for k in text]
            vals = ", ".join(dict.fromkeys(repr(cells[k]) for k in text[:3]))
            nearly.append(f"{h!r} is numeric except {vals} at rows {format_rows(rows, limit=5)}")
    if len(numeric) == 1:
        return numeric[0]
    if numeric:
        found = f"several numeric columns: {', '.join(numeric)}"
    else:
        found = "no column is entirely numeric" + (f"; {'; '.join(nearly)}" if nearly else "")
    return _raise_guess(table.src, found)


def _raise_guess(src: str, found: str):
    raise InputError(f"{src}: cannot tell which column holds the measured value ({found}); name it with --value")
