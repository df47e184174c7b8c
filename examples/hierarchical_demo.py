"""Several-site (hierarchical) fit of three invented parcels: fit, check, map each parcel, new parcel.

Usage: ``python examples/hierarchical_demo.py [OUT_DIR]`` (default ``sites-demo-out``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for two short chains and coarse maps (used by the tests).

Steps, with the Python API (the command-line equivalents are in docs/hierarchical.md, "The demo
parcels end to end"):

1. fit three parcels of the invented Marrowby Works demo together (hierarchical pooling);
2. check convergence: one verdict for the whole posterior and one block per parcel and for the
   population (:func:`bayesgeo.convergence.sites.site_convergence`);
3. map each parcel: kriging predictions and the probability of exceeding the demo's invented
   action level, from that parcel's draws (``fit.site(name)``, :func:`bayesgeo.predict_map`);
4. the new-parcel predictive: what range and sill to expect at a parcel of the same kind not yet
   sampled.

The action level is an illustration, not a regulatory value; results that bear on contamination
decisions are for review by a licensed professional under local regulation.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import numpy as np

import bayesgeo
from bayesgeo.common.outputs import add_to_folder
from bayesgeo.convergence.sites import site_convergence
from bayesgeo.data.demo import DEMO_ACTION_LEVEL
from bayesgeo.fitting.hier_outputs import site_report

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"
PARCELS = ["rail-siding", "mill-pond", "east-lot"]


def main(out: Path) -> dict:
    ds = bayesgeo.demo_data()
    part = ds.isel(obs=np.isin(ds["site"].values, PARCELS).nonzero()[0])
    chains, draws = (2, 300) if QUICK else (4, 1000)

    # 1. fit: data with several sites get the several-site model; the convergence check is attached
    fit = bayesgeo.Fit.sample(part, covariance="matern32", transform="log", pooling="hierarchical", chains=chains,
                              draws=draws, tune=draws, seed=3)

    # 2. check: the whole posterior, then each parcel and the population
    conv = fit.convergence
    blocks = site_convergence(fit.tree, conv)
    print(f"convergence, whole posterior: {conv.verdict.upper()}")
    for name, b in [*blocks["sites"].items(), ("population", blocks["population"])]:
        print(f"  {name:>12}: {b['verdict']:<4}  worst R-hat {b['worst_rhat']:.3f}, "
              f"min bulk ESS {b['min_ess_bulk']:.0f}, min tail ESS {b['min_ess_tail']:.0f}")
    flag = ""
    if conv.verdict == "fail":  # predict_map refuses such a fit unless told; then it marks the maps
        flag = " [NOT CONVERGED]"
        print("NOT CONVERGED: run longer (more tuning and draws) before using any number below"
              + (" (quick settings are deliberately short)" if QUICK else ""))
    fit.save(out, overwrite=True)
    report = site_report(fit.tree)

    # 3. map each parcel from its own draws (they carry the strength borrowed from the others)
    print(f"\nper parcel{flag} (practical range in m; P(arsenic > {DEMO_ACTION_LEVEL:g} mg/kg) on a grid):")
    for parcel in PARCELS:
        pred = bayesgeo.predict_map(fit.site(parcel), cell=40.0 if QUICK else 10.0, thresholds=[DEMO_ACTION_LEVEL],
                                    draws=50 if QUICK else 300, allow_unconverged=True,
                                    scheduler="synchronous" if QUICK else "threads")
        with add_to_folder(out, f"predictions_{parcel}.nc", overwrite=True) as tmp:
            pred.to_netcdf(tmp, engine="netcdf4")
        pr = report["sites"][parcel]["parameters"]["practical_range"]
        share = float(np.nanmean(pred["p_exceed"].values[0] > 0.5))
        print(f"  {parcel:>12}: n = {report['sites'][parcel]['n']:3d}, practical range {pr['q50']:.4g} "
              f"(90% interval {pr['q05']:.4g} to {pr['q95']:.4g}); {100 * share:.0f}% of cells more likely "
              "above than below the level")

    # 4. population and a new parcel of the same kind
    print(f"\npopulation{flag} ({report['parameters_note']}):")
    print(json.dumps({k: {q: round(v[q], 4) for q in ("q05", "q50", "q95")} for k, v in report["parameters"].items()},
                     indent=1))
    new = report["new_site"]["practical_range"]
    print(f"new parcel{flag}: practical range {new['q50']:.4g} m (90% predictive interval {new['q05']:.4g} to "
          f"{new['q95']:.4g} m)")
    print("\ncaution: " + " ".join(report["cautions"][:2]))
    print(f"wrote {out}/")
    return report


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("sites-demo-out"))
