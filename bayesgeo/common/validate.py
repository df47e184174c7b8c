"""User-input checks shared by every entry point.

Each failure raises :class:`InputError` whose message is one line naming the file, the row(s)
and the column (or the option or study-file key), the bad value and what would be accepted. The
command line prints that line and exits with status 2; the Python API lets it propagate.

Numeric options are bounded here, once, for the command line and study files alike
(:data:`INT_LIMITS`, :data:`FLOAT_LIMITS`): :func:`int_option` and :func:`float_option` give
``argparse`` types, :func:`check_int` and :func:`check_float` the same checks for values read from
a study file.
"""

from __future__ import annotations

import argparse
import math
import operator
from collections.abc import Iterable, Sequence

__all__ = ["InputError", "format_rows", "check_choice", "check_positive_int", "check_positive", "check_int",
           "check_float", "check_prior_pair", "int_option", "float_option", "PriorPairAction", "INT_LIMITS",
           "FLOAT_LIMITS", "SEED_MAX"]

#: Largest seed: seeds are stored as signed 64-bit integers (NetCDF attributes); numpy's
#: ``default_rng`` takes any non-negative integer and nutpie any integer below 2**64.
SEED_MAX = 2**63 - 1

#: Accepted range (inclusive) of every integer option, by name; shared by the command line and study files.
#: The upper bounds are far beyond sensible use and stop values that would overflow or run for ever.
INT_LIMITS: dict[str, tuple[int, int]] = {
    "seed": (0, SEED_MAX),
    "chains": (1, 64),
    "draws": (1, 1_000_000),
    "tune": (0, 1_000_000),
    "neighbours": (1, 200),
    "trend": (0, 3),
    "bins": (2, 1_000),
    "permutations": (0, 100_000),
    "replicates": (1, 100_000),
    "autocorr_lag": (1, 1_000_000),
    "chunk_cells": (1, 10_000_000),
    "simulate": (0, 10_000),
    "design_neighbours": (2, 50),
    "sbc_replicates": (2, 10_000),
    "layout_points": (8, 100_000),
    "workers": (1, 256),
    "prediction_draws": (1, 64_000_000),
}

#: Accepted range of every real-valued option: name -> (low, high, low_open, high_open); always finite.
FLOAT_LIMITS: dict[str, tuple[float, float, bool, bool]] = {
    "positive": (0.0, math.inf, True, True),
    "nonnegative": (0.0, math.inf, False, True),
    "any": (-math.inf, math.inf, True, True),
    "probability": (0.0, 1.0, True, True),
    "nu": (0.0, 50.0, True, False),
    "censored": (0.0, 0.6, True, False),
}


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


def _shown(value) -> str:
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 200:
        return f"an integer of about {int(value.bit_length() * 0.30103) + 1} digits"
    text = repr(value)
    return text if len(text) <= 40 else text[:30] + "...(" + str(len(text)) + " characters)"


def _int_problem(value, minimum: int | None, maximum: int | None) -> tuple[str | None, int | None]:
    """(None, the integer) when acceptable, else (what is wrong, None)."""
    if maximum is None:
        wanted = f"an integer >= {minimum}" if minimum is not None else "an integer"
    elif minimum is None:
        wanted = f"an integer <= {maximum}"
    else:
        wanted = f"an integer from {minimum} to {maximum}"
    try:
        if isinstance(value, bool):
            raise TypeError
        v = operator.index(value)
    except TypeError:
        return f"expected {wanted}, got {_shown(value)}", None
    if (minimum is not None and v < minimum) or (maximum is not None and v > maximum):
        return f"expected {wanted}, got {_shown(v)}", None
    return None, int(v)


def check_int(value, what: str, *, minimum: int | None = None, maximum: int | None = None,
              limit: str | None = None) -> int:
    """An integer in ``[minimum, maximum]`` (or the range :data:`INT_LIMITS` ``[limit]``); bools refused."""
    if limit is not None:
        minimum, maximum = INT_LIMITS[limit]
    problem, v = _int_problem(value, minimum, maximum)
    if problem:
        raise InputError(f"{what}: {problem}")
    return v


def check_positive_int(value, what: str, minimum: int = 1, maximum: int | None = None) -> int:
    """An integer >= ``minimum`` (and <= ``maximum`` when given; bools refused)."""
    return check_int(value, what, minimum=minimum, maximum=maximum)


def _float_problem(value, low: float, high: float, low_open: bool, high_open: bool) -> tuple[str | None, float | None]:
    if low == -math.inf and high == math.inf:
        wanted = "a finite number"
    elif high == math.inf:
        wanted = f"a finite number {'>' if low_open else '>='} {low:g}"
    else:
        wanted = f"a number in {'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"
    try:
        if isinstance(value, bool):
            raise TypeError
        v = float(value)
    except (TypeError, ValueError, OverflowError):
        return f"expected {wanted}, got {_shown(value)}", None
    ok = (math.isfinite(v) and (v > low if low_open else v >= low) and (v < high if high_open else v <= high))
    return (None, v) if ok else (f"expected {wanted}, got {_shown(value)}", None)


def check_float(value, what: str, limit: str = "any") -> float:
    """A finite number in the range :data:`FLOAT_LIMITS` ``[limit]`` (``"positive"``, ``"probability"``, ...)."""
    problem, v = _float_problem(value, *FLOAT_LIMITS[limit])
    if problem:
        raise InputError(f"{what}: {problem}")
    return v


def check_positive(value, what: str) -> float:
    """A finite number > 0."""
    problem, v = _float_problem(value, *FLOAT_LIMITS["positive"])
    if problem:
        raise InputError(f"{what}: expected a positive number, got {_shown(value)}")
    return v


def check_prior_pair(pair, what: str) -> tuple[float, float]:
    """A prior statement ``(value, probability)``: a finite value > 0 and a probability in (0, 1)."""
    wanted = "two numbers: a positive value and a probability in (0, 1)"
    if isinstance(pair, (str, bytes)) or not isinstance(pair, Sequence) or len(pair) != 2:
        raise InputError(f"{what}: expected {wanted}, got {_shown(pair)}")
    p1, v = _float_problem(pair[0], *FLOAT_LIMITS["positive"])
    p2, a = _float_problem(pair[1], *FLOAT_LIMITS["probability"])
    if p1:
        raise InputError(f"{what}: the value (first number): {p1}")
    if p2:
        raise InputError(f"{what}: the probability (second number): {p2}")
    return v, a


# --- argparse types: the same checks, reported by argparse as "argument --NAME: <problem>" ----------
def int_option(limit: str):
    """An ``argparse`` ``type=`` for an integer option bounded by :data:`INT_LIMITS` ``[limit]``."""
    lo, hi = INT_LIMITS[limit]

    def parse(text: str) -> int:
        try:
            value = int(str(text).strip(), 10)
        except ValueError:
            value = text
        problem, v = _int_problem(value, lo, hi)
        if problem:
            raise argparse.ArgumentTypeError(problem)
        return v

    parse.__name__ = f"integer ({limit})"
    return parse


def float_option(limit: str = "any"):
    """An ``argparse`` ``type=`` for a finite real option in the range :data:`FLOAT_LIMITS` ``[limit]``."""

    def parse(text: str) -> float:
        problem, v = _float_problem(str(text).strip(), *FLOAT_LIMITS[limit])
        if problem:
            raise argparse.ArgumentTypeError(problem)
        return v

    parse.__name__ = f"number ({limit})"
    return parse


class PriorPairAction(argparse.Action):
    """``nargs=2`` action for a prior statement (value, probability), checked by :func:`check_prior_pair`."""

    def __call__(self, parser, namespace, values, option_string=None):
        try:
            pair = check_prior_pair(list(values), "x")
        except InputError as err:
            raise argparse.ArgumentError(self, str(err).removeprefix("x: ")) from None
        setattr(namespace, self.dest, pair)
