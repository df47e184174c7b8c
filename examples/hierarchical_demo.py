"""Several-site (hierarchical) fit of three invented parcels: parcel and population ranges and sills.

Usage: ``python examples/hierarchical_demo.py [OUT_DIR]`` (default ``sites-demo-out``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for two short chains (used by the tests).
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import numpy as np

import bayesgeo
from bayesgeo.hier_outputs import save_site_fit, site_report
from bayesgeo.hierarchical import fit_sites

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"


def main(out: Path) -> dict:
    ds = bayesgeo.demo_data()
    keep = np.isin(ds["site"].values, ["rail-siding", "mill-pond", "east-lot"]).nonzero()[0]
    part = ds.isel(obs=keep)
    chains, draws = (2, 300) if QUICK else (4, 1000)
    tree = fit_sites(part, covariance="matern32", transform="log", pooling="hierarchical", chains=chains,
                     draws=draws, tune=draws, seed=3)
    report = site_report(tree)
    save_site_fit(tree, out, overwrite=True)
    for site, block in report["sites"].items():
        pr = block["parameters"]["practical_range"]
        print(f"{site:>12}: n = {block['n']:3d}, practical range median {pr['q50']:.4g} {pr['units']} "
              f"(90% interval {pr['q05']:.4g} to {pr['q95']:.4g})")
    print(f"population ({report['parameters_note']}):")
    print(json.dumps(report["parameters"], indent=1, default=str))
    print(f"wrote {out}/")
    return report


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("sites-demo-out"))
