"""User-input checks shared by every entry point.

Each failure raises :class:`InputError` whose message is one line naming the file, the row(s)
and the column, the bad value and what would be accepted. The command line prints that line and
exits with status 2; the Python API lets it propagate.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

__all__ = ["InputError", "format_rows", "check_choice", "check_positive_int", "check_positive"]


class InputError(ValueError):
    """Bad user input (a file, a column, an option). The message is a single line."""


def format_rows(rows: Iterable[int], limit: int = 10) -> str:
    """``"3, 7, 12"`` or ``"3, 7, ... (25 rows)"`` for a list of 1-based spreadsheet rows."""
    rows = list(rows)
    shown = ", ".join(str(r) for r in rows[:limit])
    if len(rows) > limit:
        shown += f", ... ({len(rows)} rows)"
    return shown


def check_choice(value: str, choices: Sequence[str], what: str) -> str:
    """Return ``value`` if it is one of ``choices``, else raise naming the valid ones."""
    if value not in choices:
        raise InputError(f"{what}: {value!r} is not one of {', '.join(map(str, choices))}")
    return value


def check_positive_int(value, what: str, minimum: int = 1) -> int:
    """An integer >= ``minimum`` (bools refused)."""
    if isinstance(value, bool) or not isinstance(value, (int,)) or value < minimum:
        raise InputError(f"{what}: expected an integer >= {minimum}, got {value!r}")
    return int(value)


def check_positive(value, what: str) -> float:
    """A finite number > 0."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{what}: expected a positive number, got {value!r}") from None
    if not (v > 0.0 and v < float("inf")):
        raise InputError(f"{what}: expected a positive number, got {value!r}")
    return v
