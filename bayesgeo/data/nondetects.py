"""Non-detects: laboratory results reported only as below a reporting limit.

A value written ``<X`` (``<0.5``, ``< 0.5``; X a number) in the value column is a *non-detect* with
reporting limit X: the true value lies below X. Alternatively two columns named by the user carry
the same information: a flag column (detected or not) and a limit column (the reporting limit of the
non-detects). Limits may differ from row to row (batches, dilutions).

In the intake ``Dataset`` a non-detect keeps its limit in ``value`` and is marked in the boolean
``censored`` variable (present only when the data hold non-detects); ``attrs["non_detects"]``
counts them. No value is ever substituted (half the limit, the limit): substitution biases means,
variances and hence sills and ranges (Helsel 2012, *Statistics for Censored Environmental Data*,
2nd ed., ch. 1 and 6). The model treats them as left-censored (docs/model.md, "Non-detects").
"""

from __future__ import annotations

import re

import numpy as np

from bayesgeo.common.csvtable import MAX_MAGNITUDE, Table, numeric_column, parse_number
from bayesgeo.common.validate import InputError, format_rows

__all__ = ["MAX_SHARE", "NOT_DETECTED", "DETECTED", "censored_column", "check_share", "count_line"]

#: Largest share of non-detects per site that is still modelled. Above about 80% little beyond the
#: share of detects itself can be estimated (Helsel 2012, ch. 1; the 80% guideline is recalled from
#: memory there, common practice in environmental statistics).
MAX_SHARE = 0.8

#: Flag-column words (case-insensitive, spaces trimmed) meaning "not detected" and "detected". ``U`` is
#: the laboratory qualifier for an undetected analyte (common practice).
NOT_DETECTED = ("<", "nd", "u", "not detected", "non-detect", "nondetect", "below", "bdl", "true", "yes", "y", "1")
DETECTED = ("", "=", "d", "detected", "detect", "false", "no", "n", "0")

_LESS = re.compile(r"\s*<\s*(?P<limit>\S.*?)\s*")


def censored_column(table: Table, value: str, *, limit: str | None = None, detected: str | None = None
                    ) -> tuple[np.ndarray, np.ndarray]:
    """The value column as ``(values, censored)``: numbers, and for a non-detect its reporting limit.

    Parameters
    ----------
    table : bayesgeo.common.csvtable.Table
    value : str
        The value column; ``<X`` cells are non-detects with limit X.
    limit, detected : str, optional
        Columns with the reporting limit and the detected / not-detected flag (:data:`DETECTED`,
        :data:`NOT_DETECTED`), given together. A non-detect then takes its limit from ``limit``
        (its value cell may be empty); a detected row needs a number in ``value``.

    Returns
    -------
    values : ndarray (n,)
        Measured values, and the reporting limit of each non-detect.
    censored : ndarray of bool (n,)

    Raises
    ------
    InputError
        One line naming the file, row and column: a limit that is not a finite number, a flag that
        is not a known word, a detected value that is not a number, only one of ``limit`` and
        ``detected``.
    """
    src = table.src
    rows = [r for r, _ in table.rows]
    if (limit is None) != (detected is None):
        raise InputError(f"{'limit' if limit is None else 'detected'}: the limit column and the detected flag "
                         "column are given together (name both, or write non-detects as <X in the value column)")
    cells = table.column(value)
    flags = table.column(detected) if detected else None
    limits = table.column(limit) if limit else None
    censored = np.zeros(len(cells), dtype=bool)
    shown = list(cells)  # the cells as numbers: a non-detect's limit in place of <X
    for k, cell in enumerate(cells):
        where = f"{src}: row {rows[k]}"
        if flags is not None:
            flag = flags[k].strip().lower()
            if flag not in NOT_DETECTED and flag not in DETECTED:
                raise InputError(f"{where}, column {detected!r}: {flags[k]!r} is not a detected/not-detected flag "
                                 f"(not detected: {', '.join(w for w in NOT_DETECTED if w)}; detected: empty, "
                                 f"{', '.join(w for w in DETECTED if w)})")
            if flag in NOT_DETECTED:
                censored[k] = True
                shown[k] = repr(_finite_limit(limits[k], where, limit))
                continue
        if _LESS.fullmatch(cell):
            if flags is not None:
                raise InputError(f"{where}, column {value!r}: {cell.strip()!r} is written as a non-detect but column "
                                 f"{detected!r} says detected; correct one of them")
            censored[k] = True
            shown[k] = repr(_finite_limit(cell.strip()[1:], where, value))
    if not censored.any():
        return numeric_column(table, value), censored
    j = table.header.index(value)
    numbers = Table(src, table.header, [(r, [*c[:j], s, *c[j + 1:]]) for (r, c), s in zip(table.rows, shown)])
    return numeric_column(numbers, value), censored


def _finite_limit(text: str, where: str, col: str) -> float:
    v = parse_number(text)
    if v is None or not np.isfinite(v) or abs(v) > MAX_MAGNITUDE:
        shown = text.strip() or "(empty)"
        raise InputError(f"{where}, column {col!r}: the reporting limit {shown!r} of a non-detect is not a finite "
                         "number; write the limit as a plain number (e.g. <0.5)")
    return float(v)


def check_share(censored: np.ndarray, site: np.ndarray | None, rows: np.ndarray, src: str) -> None:
    """Refuse a site whose share of non-detects exceeds :data:`MAX_SHARE` (naming the share and its rows)."""
    labels = [""] if site is None else list(dict.fromkeys(site.tolist()))
    for label in labels:
        pick = np.ones(censored.size, bool) if site is None else site == label
        n, k = int(pick.sum()), int(censored[pick].sum())
        if n and k / n > MAX_SHARE:
            where = f" at site {label!r}" if label else ""
            raise InputError(f"{src}: {k} of {n} values{where} ({100 * k / n:.0f}%) are non-detects (rows "
                             f"{format_rows(rows[pick & censored])}); above {100 * MAX_SHARE:.0f}% the spatial "
                             "structure cannot be estimated from the few detected values; report the share of "
                             "detects instead")


def count_line(ds) -> str | None:
    """``"k of n values are non-detects (reporting limits a to b units)"`` for data with non-detects (limits as
    the laboratory reported them, also after a log transform), per site when there are several; None without."""
    if "censored" not in ds:
        return None
    cens = np.asarray(ds["censored"].values, bool)
    if not cens.any():
        return None
    lim = np.asarray(ds["value"].values, float)[cens]
    lim = np.exp(lim) if ds.attrs.get("transform") == "log" else lim
    span = f"{lim.min():g}" if lim.min() == lim.max() else f"{lim.min():g} to {lim.max():g}"
    line = f"{int(cens.sum())} of {cens.size} values are non-detects (reporting limits {span}"
    units = ds.attrs.get("value_units", "")
    line += f" {units})" if units else ")"
    if "site" in ds.coords and len(set(ds["site"].values.tolist())) > 1:
        site = ds["site"].values
        per = [f"{s}: {int(cens[site == s].sum())} of {int((site == s).sum())}" for s in dict.fromkeys(site.tolist())]
        line += "; per site " + ", ".join(per)
    return line
