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


class RecordingBar:
    """A progress bar that records its total, description and how far it was advanced."""

    def __init__(self, total=None, desc=""):
        self.total, self.desc, self.n = total, desc, 0

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def update(self, k):
        self.n += k


@pytest.fixture
def recording_progress():
    """A bar factory ``progress(total=..., desc=...)`` and the list of the bars it made."""
    bars = []

    def factory(total=None, desc=""):
        bars.append(RecordingBar(total, desc))
        return bars[-1]

    return factory, bars


def write_fit_folder(tree, folder):
    """Write ``tree`` as ``folder/posterior.nc`` the way bayesgeo writes fit folders (with the output
    marker of bayesgeo.common.outputs), for tests that build posteriors by hand."""
    from bayesgeo.common.outputs import new_folder

    with new_folder(folder) as tmp:
        tree.to_netcdf(tmp / "posterior.nc", engine="netcdf4")
    return folder
