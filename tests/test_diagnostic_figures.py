"""Diagnostic figures (bayesgeo.convergence.figures)."""

from __future__ import annotations

import numpy as np
import pytest

from bayesgeo.convergence.autocorr import stack_parameters
from bayesgeo.convergence.figures import _default_figure_vars, _pair_vars, write_diagnostic_figures
from bayesgeo.common.validate import InputError

az = pytest.importorskip("arviz")


def small_tree(n_latent=0, seed=0):
    rng = np.random.default_rng(seed)
    post = {"practical_range": rng.lognormal(5.0, 0.2, (2, 120)), "nugget": rng.gamma(3.0, 0.1, (2, 120)),
            "partial_sill": rng.lognormal(0.0, 0.2, (2, 120)), "beta": rng.normal(size=(2, 120, 2))}
    dims = {"beta": ["term"]}
    if n_latent:
        post["f"] = rng.normal(size=(2, 120, n_latent))
        dims["f"] = ["obs"]
    ss = {"diverging": rng.random((2, 120)) < 0.02, "energy": rng.normal(size=(2, 120))}
    return az.from_dict({"posterior": post, "sample_stats": ss}, dims=dims,
                        coords={"term": ["intercept", "depth_m"]})


def test_figures_written_and_not_overwritten(tmp_path):
    """ACF, trace, rank and pair PNGs are written; a second call refuses to overwrite them
    (bayesgeo rule: outputs are never silently overwritten)."""
    tree = small_tree()
    paths = write_diagnostic_figures(tree, tmp_path, lag_limit=25)
    assert [p.name for p in paths] == ["acf.png", "trace.png", "rank.png", "pair.png"]
    for p in paths:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(InputError, match="already exists"):
        write_diagnostic_figures(tree, tmp_path, lag_limit=25)


def test_default_variables_skip_a_latent_field():
    """By default a 40-element latent field is left out of the figures and the pair plot shows the
    covariance parameters (range, sill, nugget) only."""
    draws = stack_parameters(small_tree(n_latent=40))
    chosen = _default_figure_vars(draws)
    assert chosen == ["practical_range", "nugget", "partial_sill", "beta"]
    assert _pair_vars(draws) == ["practical_range", "partial_sill", "nugget"]
