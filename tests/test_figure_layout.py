"""Figures a reviewer reads: no two pieces of text overlap.

Each figure is rendered with matplotlib's Agg renderer and the window extent of every visible text
(titles, axis labels, tick labels inside the view, legends, colour-bar labels, contour labels, the
CRS label, north arrow and scale bar, the caution footer) is compared with every other; two
intersecting boxes are a defect (what a reader sees as overlapping labels; matplotlib's own
``Bbox.overlaps``).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import xarray as xr
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.text import Text


def _hidden_tick_labels(fig) -> set[int]:
    """Tick labels matplotlib keeps for ticks outside the view (never drawn)."""
    out = set()
    for ax in fig.axes:
        for axis, (lo, hi) in ((ax.xaxis, sorted(ax.get_xlim())), (ax.yaxis, sorted(ax.get_ylim()))):
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                if not lo - 1e-9 * abs(hi - lo) <= tick.get_loc() <= hi + 1e-9 * abs(hi - lo):
                    out.update({id(tick.label1), id(tick.label2)})
    return out


def overlapping_texts(fig) -> list[tuple[str, str]]:
    """Pairs of visible texts of ``fig`` whose rendered boxes intersect."""
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    hidden = _hidden_tick_labels(fig)
    texts = [t for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip() and id(t) not in hidden]
    boxes = [(t.get_text()[:40], t.get_window_extent(renderer)) for t in texts]
    return [(a, b) for (a, ba), (b, bb) in itertools.combinations(boxes, 2) if ba.overlaps(bb)]


def _predictions(x0=431_000.0, y0=5_622_000.0, nx=40, ny=30, cell=10.0):
    x, y = x0 + cell * np.arange(nx), y0 + cell * np.arange(ny)
    xx, yy = np.meshgrid(x, y)
    prob = np.exp(-((xx - x.mean()) ** 2 + (yy - y.mean()) ** 2) / (8.0 * cell**2 * 10))
    pred = xr.Dataset({"mean": (("y", "x"), 40 * prob, {"units": "mg/kg"}),
                       "sd": (("y", "x"), 4 * prob + 1, {"units": "mg/kg"}),
                       "p_exceed": (("threshold", "y", "x"), prob[None], {"units": "1"})},
                      coords={"x": x, "y": y, "threshold": ("threshold", [40.0], {"units": "mg/kg"})})
    pred.attrs.update(target_kind="grid", distance_units="m", coords="xy",
                      crs_name="EPSG:32632 (WGS 84 / UTM zone 32N)")
    return pred, np.column_stack([xx.ravel()[::37], yy.ravel()[::37]])


@pytest.mark.parametrize("variable", ["mean", "sd", "p_exceed"])
@pytest.mark.parametrize("shape", [(40, 30), (15, 60), (80, 10)])
def test_map_figure_texts_do_not_overlap(variable, shape):
    """Maps of wide, tall and square grids with long UTM coordinates, samples, the CRS label, north arrow,
    scale bar, decision contours and a long caution: no two texts overlap."""
    from bayesgeo.predict.figures import map_figure

    pred, samples = _predictions(nx=shape[0], ny=shape[1])
    fig = map_figure(pred, variable, threshold=0 if variable == "p_exceed" else None, samples_xy=samples,
                     title="P(new measurement > 40 mg/kg) - site rail-siding", caution="Decisions follow local "
                     "regulation and the judgement of a licensed professional. " * 4)
    assert overlapping_texts(fig) == []


def test_the_check_finds_overlapping_text():
    """The checker itself: two labels written on top of each other are found, a tick outside the view is not."""
    from matplotlib.figure import Figure

    fig = Figure()
    ax = fig.add_subplot()
    ax.text(0.5, 0.5, "first label", transform=ax.transAxes)
    ax.text(0.52, 0.5, "second label", transform=ax.transAxes)
    ax.set_xticks([-10.0, 0.5])
    ax.set_xlim(0, 1)
    # a decoy where the label of the tick at -10 (outside the view, never drawn) is laid out
    ax.text(-10.0, -0.01, "decoy under the hidden tick", transform=ax.get_xaxis_transform(), ha="center", va="top")
    pairs = overlapping_texts(fig)
    hidden = ax.xaxis.get_major_ticks()[0].label1.get_text()
    assert hidden and ("first label", "second label") in pairs
    assert not any(hidden in (a, b) for a, b in pairs)
    assert not any("decoy" in a or "decoy" in b for a, b in pairs)


def test_exploration_and_samples_figures_texts_do_not_overlap():
    """The report's samples map (non-detects marked, threshold rings) and a site's semivariogram and correlogram
    with envelopes and quick fits, on the invented demo data: no two texts overlap."""
    import warnings

    from bayesgeo.data.demo import demo_data
    from bayesgeo.data.points import apply_transform
    from bayesgeo.explore.figures import correlogram_figure, semivariogram_figure
    from bayesgeo.explore.variogram import correlogram, semivariogram
    from bayesgeo.report.samples import samples_figure

    ds = demo_data()
    one = apply_transform(ds.isel(obs=np.flatnonzero(ds["site"].values == "mill-pond")).drop_vars("site"), "log")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # few pairs in the first lag bin of a small site: said elsewhere
        vg = semivariogram(one, bins=10, permutations=19, seed=1)
        cg = correlogram(one, bins=10, permutations=19, seed=1)
    for fig in (samples_figure(ds, [40.0]), semivariogram_figure(vg), correlogram_figure(cg)):
        assert overlapping_texts(fig) == []
