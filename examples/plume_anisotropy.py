"""A directional fit: an invented groundwater plume whose range is longest along the flow.

The Quillmoor fuel depot (invented) has 120 monitoring wells on a local site grid in metres. Dissolved
hydrocarbons (log scale) spread furthest along the groundwater flow, towards 60 degrees clockwise from north,
so the field is simulated with geometric anisotropy: major axis at 60 degrees, ratio of ranges 3.5, a
geometric-mean practical range of 250 m and a nugget. The script

1. explores the directional semivariograms and prints the direction and ratio they suggest;
2. fits the isotropic and the anisotropic Matérn 3/2 model (``fit --anisotropy``) and prints the posterior
   direction, ratio and practical ranges along both axes;
3. compares the two by leave-one-out (the anisotropic model should win);
4. maps the probability of exceeding an illustrative action level with the anisotropic fit.

Usage: ``python examples/plume_anisotropy.py [OUT_DIR]`` (default ``plume-out``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for two short chains (used by the tests; numbers are rougher). All values are
invented; the action level is illustrative, not a regulatory value. Decisions on contaminated land follow the
local regulator's rules and the judgement of a licensed professional.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np

import bayesgeo
from bayesgeo.data.points import points_dataset
from bayesgeo.explore.anisotropy import suggest_anisotropy
from bayesgeo.explore.variogram import directional_semivariograms
from bayesgeo.gp.anisotropy import anisotropic_distance
from bayesgeo.gp.covariance import get_covariance
from bayesgeo.predict.figures import write_map_figures

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"
ACTION_LEVEL = 400.0  # ug/L, illustrative only


def plume(n: int = 120, seed: int = 11):
    """The invented wells and their measured concentrations (ug/L)."""
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0.0, 800.0, (n, 2))
    cov = get_covariance("matern32")
    k = 0.9 * cov.correlation(anisotropic_distance(xy, xy, 60.0, 3.5), 250.0 / cov.range_factor) + 0.1 * np.eye(n)
    logc = np.log(120.0) + np.linalg.cholesky(k) @ rng.standard_normal(n)
    return points_dataset(xy[:, 0], xy[:, 1], np.round(np.exp(logc), 1),
                          attrs={"source": "Quillmoor fuel depot (invented)", "distance_units": "m",
                                 "value_units": "ug/L", "value_column": "hydrocarbons"})


def main(out: Path) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    wells = plume()
    logged = wells.copy()
    logged["value"] = np.log(wells["value"])
    guess = suggest_anisotropy(directional_semivariograms(logged, lag_limit=400.0, bins=8),
                               bayesgeo.semivariogram(logged, lag_limit=400.0, bins=8))
    if guess is not None:
        print(f"directional semivariograms suggest {guess['angle']:.0f} degrees, ratio {guess['ratio']:.1f}")
    chains, draws = (2, 300) if QUICK else (4, 1000)
    kw = dict(covariance="matern32", transform="log", chains=chains, draws=draws, tune=draws, seed=5)
    iso = bayesgeo.Fit.sample(wells, **kw)
    aniso = bayesgeo.Fit.sample(wells, anisotropy=True, **kw)
    post = aniso.tree["posterior"]
    rows = {}
    for name in ("anisotropy_angle", "anisotropy_ratio", "practical_range_major", "practical_range_minor"):
        q = np.quantile(post[name].values.ravel(), [0.05, 0.5, 0.95])
        if name == "anisotropy_angle":
            q = q % 180.0
        rows[name] = q
        print(f"{name}: {q[1]:.3g} (90% interval {q[0]:.3g} to {q[2]:.3g}) {post[name].attrs.get('units', '')}")
    table = bayesgeo.compare_fits({"isotropic": iso.tree, "anisotropic": aniso.tree})
    best = str(table["fit"].values[0])
    print(f"leave-one-out prefers the {best} model: elpd {float(table['elpd_loo'].values[0]):.1f} against "
          f"{float(table['elpd_loo'].values[1]):.1f}")
    pred = bayesgeo.predict_map(aniso, cell=20.0 if QUICK else 8.0, thresholds=[ACTION_LEVEL],
                                draws=50 if QUICK else 300, allow_unconverged=True)
    xy = np.column_stack([wells["x"].values, wells["y"].values])
    write_map_figures(pred, out, samples_xy=xy, not_converged=pred.attrs["convergence_verdict"] == "fail",
                      caution="Invented data; the action level is illustrative. Decisions follow local regulation "
                              "and licensed professional judgement.")
    print(f"verdicts: isotropic {iso.convergence.verdict}, anisotropic {aniso.convergence.verdict}; maps in {out}/")
    return {"rows": rows, "verdict": aniso.convergence.verdict, "guess": guess, "best": best}


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("plume-out"))
