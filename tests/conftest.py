"""Shared fixtures: small CSV writers and the demo data."""

from __future__ import annotations

import os

os.environ.setdefault("MPLBACKEND", "Agg")

import numpy as np
import pytest


@pytest.fixture
def write_csv(tmp_path):
    """Write rows (list of lists, first the header) to a CSV and return its path."""

    def _write(rows, name="points.csv"):
        path = tmp_path / name
        path.write_text("\n".join(",".join(str(c) for c in r) for r in rows) + "\n")
        return path

    return _write


@pytest.fixture
def grid_rows():
    """Header plus 25 points on a 5 x 5 grid (100 m spacing) with a smooth value."""
    rng = np.random.default_rng(1)
    rows = [["x", "y", "conc"]]
    for i in range(5):
        for j in range(5):
            rows.append([100 * i, 100 * j, round(10 + i + 0.5 * j + rng.normal(), 3)])
    return rows
