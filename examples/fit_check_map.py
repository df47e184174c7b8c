"""Fit the Bayesian GP model to one invented parcel, check convergence and map exceedance probabilities.

Usage: ``python examples/fit_check_map.py [OUT_DIR]`` (default ``fit-demo-out``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for two short chains (used by the tests; numbers are rougher).
The same steps as ``bayesgeo fit``, ``bayesgeo check`` and ``bayesgeo map``, through the Python API.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np

import bayesgeo
from bayesgeo.demo import DEMO_ACTION_LEVEL
from bayesgeo.diagnostics import check_convergence
from bayesgeo.map_figures import write_map_figures
from bayesgeo.posterior import fit, fit_report, fit_spec, summary_text, with_diagnostics
from bayesgeo.predict import make_basis, posterior_parameters, predict_targets
from bayesgeo.targets import grid_targets

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"


def main(out: Path) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    ds = bayesgeo.demo_data()
    parcel = ds.isel(obs=(ds["site"].values == "rail-siding").nonzero()[0]).drop_vars("site")
    chains, draws = (2, 500) if QUICK else (4, 1000)
    tree = fit(parcel, covariance="matern32", transform="log", chains=chains, draws=draws, tune=draws, seed=7)
    conv = check_convergence(tree)
    tree = with_diagnostics(tree, conv.to_json())
    print(summary_text(fit_report(tree)), end="")
    bayesgeo.write_diagnostic_figures(tree, out / "diagnostics")

    spec = fit_spec(tree)
    params = posterior_parameters(tree["posterior"].to_dataset(), spec, draws=50 if QUICK else 300)
    xy = np.column_stack([parcel["x"].values, parcel["y"].values])
    basis = make_basis(xy, np.log(parcel["value"].values), tree["constant_data"]["design"].values,
                       covariance=spec.covariance, scale=params["scale"].values,
                       partial_sill=params["partial_sill"].values, nugget=params["nugget"].values,
                       beta=params["beta"].values, transform="log")
    targets = grid_targets(xy, cell=15.0 if QUICK else 6.0)
    pred = predict_targets(basis, targets, thresholds=[DEMO_ACTION_LEVEL], design_attrs=spec.design_attrs,
                           units=spec.value_units)
    write_map_figures(pred, out, samples_xy=xy, caution="Illustration on invented data; decisions follow local "
                      "regulation and licensed professional judgement.", not_converged=conv.verdict == "fail")
    share = float(np.nanmean(pred["p_exceed"].values[0] > 0.5))
    print(f"verdict {conv.verdict}; {100 * share:.1f}% of cells with P(arsenic > {DEMO_ACTION_LEVEL:g} mg/kg) > 0.5")
    return {"verdict": conv.verdict, "share": share}


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("fit-demo-out"))
