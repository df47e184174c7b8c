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
from bayesgeo.data.demo import DEMO_ACTION_LEVEL
from bayesgeo.predict.figures import write_map_figures

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"


def main(out: Path) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    ds = bayesgeo.demo_data()
    parcel = ds.isel(obs=(ds["site"].values == "rail-siding").nonzero()[0]).drop_vars("site")
    chains, draws = (2, 500) if QUICK else (4, 1000)
    fit = bayesgeo.Fit.sample(parcel, covariance="matern32", transform="log", chains=chains, draws=draws,
                              tune=draws, seed=7)
    print(fit.convergence)
    print(fit.summary()[["parameter", "q05", "q50", "q95", "units"]].to_string(index=False))
    bayesgeo.write_diagnostic_figures(fit.tree, out / "diagnostics")
    pred = bayesgeo.predict_map(fit, cell=15.0 if QUICK else 6.0, thresholds=[DEMO_ACTION_LEVEL], draws=50 if QUICK else 300,
                       allow_unconverged=True)  # a failed check still maps here, marked NOT CONVERGED
    xy = np.column_stack([parcel["x"].values, parcel["y"].values])
    not_converged = pred.attrs["convergence_verdict"] == "fail"
    write_map_figures(pred, out, samples_xy=xy, caution="Illustration on invented data; decisions follow local "
                      "regulation and licensed professional judgement.", not_converged=not_converged)
    share = float(np.nanmean(pred["p_exceed"].values[0] > 0.5))
    verdict = fit.convergence.verdict
    print(f"verdict {verdict}; {100 * share:.1f}% of cells with P(arsenic > {DEMO_ACTION_LEVEL:g} mg/kg) > 0.5")
    return {"verdict": verdict, "share": share}


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("fit-demo-out"))
