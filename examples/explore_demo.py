"""Explore one parcel of the invented demo data: semivariogram, correlogram and quick fits.

Usage: ``python examples/explore_demo.py [OUT_DIR]`` (default ``explore-demo-out``). Set
``BAYESGEO_EXAMPLE_QUICK=1`` for fewer permutations (used by the tests).
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import bayesgeo
from bayesgeo.data.points import apply_transform
from bayesgeo.explore.figures import save_figure

QUICK = os.environ.get("BAYESGEO_EXAMPLE_QUICK") == "1"


def main(out: Path) -> dict:
    out.mkdir(parents=True, exist_ok=True)
    ds = bayesgeo.demo_data()
    parcel = ds.isel(obs=(ds["site"].values == "rail-siding").nonzero()[0]).drop_vars("site")
    logs = apply_transform(parcel, "log")  # arsenic is right-skewed: explore log(mg/kg)
    perms = 19 if QUICK else 199
    vg = bayesgeo.semivariogram(logs, bins=12, permutations=perms, seed=1)
    cg = bayesgeo.correlogram(logs, bins=12, permutations=perms, seed=1)
    fits = bayesgeo.quick_fits(logs, vg, ["exponential", "matern32"])
    save_figure(bayesgeo.semivariogram_figure(vg, fits), out / "semivariogram.png")
    save_figure(bayesgeo.correlogram_figure(cg), out / "correlogram.png")
    wls = fits.sel({"method": "wls"})
    summary = {str(f): float(wls["practical_range"].sel({"family": f})) for f in wls["family"].values}
    print(f"{parcel.sizes['obs']} samples; WLS practical range (m): {summary}")
    print(f"figures in {out}/")
    return summary


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("explore-demo-out"))
