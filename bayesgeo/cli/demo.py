"""``bayesgeo demo``: the whole product on the invented demo scenario, from one command.

Writes three parcels of the invented *Marrowby Works* data (:mod:`bayesgeo.data.demo`) and a study
file into a scratch folder, then runs that study (:func:`bayesgeo.study.runner.run_study`) into
``--out``: exploration per parcel, the hierarchical several-site model (Matérn 3/2, log
transform), its convergence check, a posterior predictive variogram check and maps against the
illustrative action level for every parcel, an area average on one parcel, the shrinkage table
(pooled against independent fits), the sampling-design aid for a new parcel, the report and the
manifest. The three smallest parcels keep the run to a few minutes on a two-core machine; the
settings are written in the study file (``demo_study.toml`` in the run's ``inputs/``).
"""

from __future__ import annotations

from pathlib import Path

HELP = "run a complete demo study on the invented Marrowby Works data (report.html at the end)"

#: Parcels of the demo data used by the demo study, and the rectangle on rail-siding averaged over (m, local grid).
DEMO_PARCELS = ("rail-siding", "mill-pond", "east-lot")
DEMO_AREA_PARCEL = "rail-siding"
DEMO_AREA = (431_850.0, 5_622_750.0, 431_950.0, 5_622_850.0)
#: Sampler and prediction settings of the demo (full, quick): chains, draws, tune, replicates, permutations,
#: prediction draws, grid cell (m).
DEMO_SETTINGS = {"full": (2, 1000, 1000, 100, 49, 200, 10.0), "quick": (2, 200, 300, 40, 19, 60, 20.0)}


def add_arguments(p) -> None:
    p.add_argument("--out", metavar="DIR", default="bayesgeo-demo", help="run folder (default bayesgeo-demo)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing run folder")
    p.add_argument("--quick", action="store_true",
                   help="fewer draws and replicates, a coarser grid (a smoke test of the whole run; numbers are "
                        "rough and the fit may fail its convergence check, exit 3)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")


def demo_study_text(data_file: str, *, quick: bool = False) -> str:
    """The TOML text of the demo study (data file relative to the study file)."""
    from bayesgeo.data.demo import DEMO_ACTION_LEVEL, DEMO_CRS_WKT

    chains, draws, tune, reps, perms, pdraws, cell = DEMO_SETTINGS["quick" if quick else "full"]
    a = DEMO_AREA
    parcels = ", ".join(DEMO_PARCELS)
    return f'''# bayesgeo demo study: invented data (Marrowby Works, parcels {parcels}), arsenic in topsoil.
# Several sites, hierarchical model. Settings chosen to run in a few minutes on a two-core machine
# ({"quick settings: a smoke test, numbers rough" if quick else "for a real study use 4 chains x 1000 draws"}).
title = "Marrowby Works (invented): arsenic in topsoil, parcels {parcels}"

[data]
path = "{data_file}"
x = "easting"
y = "northing"
value = "arsenic_mg_kg"
site = "parcel"
units = "mg/kg"
distance_units = "m"
coords = "xy"
crs = '{DEMO_CRS_WKT}'

[explore]
bins = 10
permutations = {perms}
seed = 1

[model]
covariance = "matern32"
transform = "log"
trend = 0
pooling = "hierarchical"

[sampler]
chains = {chains}
draws = {draws}
tune = {tune}
{f"max_draws = {draws}  # a smoke test: the chains are not continued" if quick else
 "# max_draws = 4000 by default: the chains continue while R-hat or ESS is too poor"}
target_accept = 0.95
seed = 20261202

[check]
replicates = {reps}

[prediction]
cell = {cell}            # m; one grid per parcel around its own samples
thresholds = [{DEMO_ACTION_LEVEL}]  # illustrative action level, invented for the demo (mg/kg)
area = {{{DEMO_AREA_PARCEL} = [{a[0]}, {a[1]}, {a[2]}, {a[3]}]}}
draws = {pdraws}
'''


def write_demo_inputs(folder, *, quick: bool = False) -> Path:
    """Write the demo parcels' CSV and the demo study into ``folder``; return the study path."""
    import csv

    import numpy as np

    from bayesgeo.data.demo import demo_data, value_cells

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    ds = demo_data()
    keep = np.flatnonzero(np.isin(ds["site"].values, DEMO_PARCELS))
    data = folder / "arsenic_parcels.csv"
    with data.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["sample_id", "parcel", "easting", "northing", "arsenic_mg_kg"])
        cells = value_cells(ds)
        for i in keep:
            w.writerow([f"MW-{i + 1:04d}", str(ds["site"].values[i]), f"{ds['x'].values[i]:.1f}",
                        f"{ds['y'].values[i]:.1f}", cells[i]])
    study = folder / "demo_study.toml"
    study.write_text(demo_study_text(data.name, quick=quick), encoding="utf-8")
    return study


def run(args) -> int:
    import sys
    import tempfile

    from bayesgeo.cli._common import emit_json
    from bayesgeo.cli.run import print_result, stage_logger
    from bayesgeo.common.outputs import claim
    from bayesgeo.study.runner import run_study

    claim(args.out, overwrite=args.overwrite)
    log = stage_logger(not args.json)
    if log:
        log(f"demo: invented data, parcels {', '.join(DEMO_PARCELS)} of Marrowby Works, hierarchical model"
            + (" (quick settings)" if args.quick else ""))
    with tempfile.TemporaryDirectory(prefix="bayesgeo-demo-") as scratch:
        study = write_demo_inputs(scratch, quick=args.quick)
        res = run_study(study, out=args.out, overwrite=args.overwrite, argv=["bayesgeo", *sys.argv[1:]], log=log)
    res["note"] = (f"hierarchical model on parcels {', '.join(DEMO_PARCELS)} of the invented Marrowby Works data; "
                   "the action level is illustrative, not a regulatory value")
    if args.json:
        emit_json(res)
    else:
        print_result(res, "demo")
        print(f"note: {res['note']}")
    return res["status"]
