"""Tests of the shared option checks (bayesgeo.common.validate): bounds, finiteness, one-line messages."""

from __future__ import annotations

import argparse

import numpy as np
import pytest

from bayesgeo.common.validate import (INT_LIMITS, SEED_MAX, InputError, check_float, check_int, check_prior_pair,
                               float_option, int_option)


def test_seed_bound_matches_what_the_libraries_take():
    """SEED_MAX = 2**63 - 1: numpy's default_rng takes it (any non-negative integer, numpy docs
    "SeedSequence"), and so does nutpie (an unsigned 64-bit seed); a NetCDF int64 attribute holds it."""
    assert SEED_MAX == np.iinfo(np.int64).max
    np.random.default_rng(SEED_MAX)
    from nutpie import _lib

    _lib.PyNutsSettings.Diag(SEED_MAX)
    assert check_int(SEED_MAX, "--seed", limit="seed") == SEED_MAX
    with pytest.raises(InputError, match=r"^--seed: expected an integer from 0 to 9223372036854775807, got 1180591620717411303424$"):
        check_int(2**70, "--seed", limit="seed")


@pytest.mark.parametrize("value", [True, 1.5, "3", None, np.float64(2.0)])
def test_check_int_refuses_non_integers(value):
    """Bools, floats and strings are not integers (a TOML ``true`` or ``2.0`` is refused, not coerced)."""
    with pytest.raises(InputError, match=r"^chains: expected an integer from 1 to 64, got "):
        check_int(value, "chains", limit="chains")


def test_check_int_accepts_numpy_integers_and_long_values_are_shortened():
    """numpy integers pass; a 5,000-digit value is shown shortened so the message stays one short line."""
    assert check_int(np.int64(4), "chains", limit="chains") == 4
    with pytest.raises(InputError) as err:
        check_int(10**5000, "chains", limit="chains")
    assert len(str(err.value)) < 150 and "digits" in str(err.value)


@pytest.mark.parametrize("value, limit, ok", [
    (0.5, "probability", True), (0.0, "probability", False), (1.0, "probability", False),
    (float("nan"), "any", False), (float("inf"), "positive", False), (-0.0, "nonnegative", True),
    (50.0, "nu", True), (50.1, "nu", False), (0.0, "nu", False), ("2.5", "positive", True), ("x", "any", False),
])
def test_check_float(value, limit, ok):
    """Finite numbers inside the named range pass, everything else (NaN, inf, ends of open ranges) is refused."""
    if ok:
        assert check_float(value, "v", limit) == float(value)
    else:
        with pytest.raises(InputError, match=r"^v: expected "):
            check_float(value, "v", limit)


def test_prior_pair():
    """A PC-prior statement is (V > 0 finite, A in (0, 1)) (Fuglstad et al. 2019, JASA 114)."""
    assert check_prior_pair([100, 0.05], "p") == (100.0, 0.05)
    with pytest.raises(InputError, match=r"^p: expected two numbers"):
        check_prior_pair([1.0], "p")
    with pytest.raises(InputError, match=r"^p: the value \(first number\): expected a finite number > 0, got 0"):
        check_prior_pair([0, 0.5], "p")
    with pytest.raises(InputError, match=r"^p: the probability \(second number\): expected a number in \(0, 1\)"):
        check_prior_pair([1, 1.0], "p")


def test_argparse_types_name_the_option():
    """The argparse types report through argparse as 'argument --NAME: <problem>' (Python docs, argparse
    'type': an ArgumentTypeError message is shown as is)."""
    parser = argparse.ArgumentParser(exit_on_error=False)
    parser.add_argument("--chains", type=int_option("chains"))
    parser.add_argument("--cell", type=float_option("positive"))
    assert parser.parse_args(["--chains", " 8 "]).chains == 8
    for argv, text in ((["--chains", "65"], "expected an integer from 1 to 64, got 65"),
                       (["--chains", "9" * 5000], "expected an integer from 1 to 64"),
                       (["--cell", "1e999"], "expected a finite number > 0, got '1e999'")):
        with pytest.raises(argparse.ArgumentError, match=text):
            parser.parse_args(argv)
    assert all(lo <= hi for lo, hi in INT_LIMITS.values())
