"""The demo scenario: an invented one, simulated from known parameters.

*Marrowby Works* is a fictional former ore-processing plant. Arsenic in topsoil (mg/kg, 0-15 cm)
was sampled on five fictional parcels of the plant. Values are log-normal: on the log scale each
parcel is a constant mean plus a zero-mean Gaussian field with a Matérn 3/2 covariance plus
independent noise (nugget). Parcel parameters are drawn from a population, so the set suits a
hierarchical model. The laboratory reported results below a reporting limit as non-detects: the
samples went to two batches with limits of 6 and 10 mg/kg, so about one value in six is written
``<6`` or ``<10`` (from a few percent to nearly a third of a parcel). Every true parameter is recorded
with the data, so tests and tutorials can check what a fit recovers. Names, places and numbers are invented; the action level is an
illustration, not a regulatory value.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import points_dataset
from bayesgeo.common.geometry import distance_matrix
from bayesgeo.common.outputs import new_files

__all__ = ["DEMO_SEED", "DEMO_ACTION_LEVEL", "DEMO_REPORTING_LIMITS", "DEMO_CRS_WKT", "demo_data", "write_demo_data",
           "simulate_field", "value_cells"]

DEMO_SEED = 20261202
#: Illustrative action level for the demo (mg/kg): invented, not taken from any regulation.
DEMO_ACTION_LEVEL = 40.0
#: Reporting limits (mg/kg) of the demo's two invented laboratory batches.
DEMO_REPORTING_LIMITS = (6.0, 10.0)
#: The demo's coordinate reference system: a local site grid in metres (an engineering CRS, WKT2), invented
#: like the site, so that no real place is named while every output is georeferenced.
DEMO_CRS_WKT = ('ENGCRS["Marrowby Works site grid (invented)",EDATUM["Marrowby Works site datum (invented)"],'
                'CS[Cartesian,2],AXIS["easting (E)",east,ORDER[1],LENGTHUNIT["metre",1]],'
                'AXIS["northing (N)",north,ORDER[2],LENGTHUNIT["metre",1]]]')

# parcel label, points, side of the sampled square (m), south-west corner (local grid, m)
_PARCELS = (
    ("north-yard", 180, 420.0, (431_200.0, 5_622_900.0)),
    ("rail-siding", 90, 300.0, (431_800.0, 5_622_700.0)),
    ("tailings-flat", 260, 560.0, (430_500.0, 5_622_100.0)),
    ("mill-pond", 60, 240.0, (431_300.0, 5_622_300.0)),
    ("east-lot", 120, 360.0, (432_200.0, 5_622_250.0)),
)

#: Population of parcel parameters (log scale of mg/kg): the truth behind the demo data.
_POPULATION = {
    "covariance": "matern32",
    "log_mean_mu": np.log(18.0),
    "log_mean_sd": 0.35,
    "log_practical_range_mu": np.log(150.0),
    "log_practical_range_sd": 0.30,
    "log_partial_sill_mu": np.log(0.45),
    "log_partial_sill_sd": 0.25,
    "nugget_fraction": 0.15,
}


def simulate_field(
    xy: np.ndarray,
    *,
    covariance: str,
    practical_range: float,
    partial_sill: float,
    nugget: float,
    mean: float = 0.0,
    rng: np.random.Generator,
    metric: str = "euclidean",
) -> np.ndarray:
    """One draw of mean + Gaussian field + nugget noise at locations ``xy`` (dense Cholesky)."""
    cov = get_covariance(covariance)
    d = distance_matrix(xy, metric)
    k = partial_sill * cov.correlation(d, cov.scale_from_range(practical_range))
    k[np.diag_indices_from(k)] += nugget + 1e-10 * partial_sill
    chol = np.linalg.cholesky(k)
    return mean + chol @ rng.standard_normal(len(xy))


def demo_data(seed: int = DEMO_SEED) -> xr.Dataset:
    """The demo data set: arsenic in topsoil at five invented parcels.

    Returns
    -------
    xarray.Dataset
        Along ``obs`` with coordinates ``x``, ``y`` (m, local grid), ``site``; variable ``value``
        (mg/kg). ``attrs["truth"]`` is a JSON string of the parameters used per parcel (log
        scale of mg/kg, practical range in m) and of the population they were drawn from.
    """
    rng = np.random.default_rng(seed)
    pop = _POPULATION
    xs, ys, vals, sites, truth = [], [], [], [], {}
    for label, n, side, (x0, y0) in _PARCELS:
        xy = np.column_stack([x0 + side * rng.random(n), y0 + side * rng.random(n)])
        xy = np.round(xy, 1)
        prange = float(np.exp(rng.normal(pop["log_practical_range_mu"], pop["log_practical_range_sd"])))
        psill = float(np.exp(rng.normal(pop["log_partial_sill_mu"], pop["log_partial_sill_sd"])))
        nugget = pop["nugget_fraction"] / (1.0 - pop["nugget_fraction"]) * psill
        mu = float(rng.normal(pop["log_mean_mu"], pop["log_mean_sd"]))
        logz = simulate_field(
            xy, covariance=pop["covariance"], practical_range=prange, partial_sill=psill,
            nugget=nugget, mean=mu, rng=rng,
        )
        xs.append(xy[:, 0])
        ys.append(xy[:, 1])
        vals.append(np.round(np.exp(logz), 2))
        sites += [label] * n
        truth[label] = {
            "n": n, "log_mean": mu, "practical_range": prange, "partial_sill": psill,
            "nugget": nugget, "total_sill": psill + nugget,
        }
    values = np.concatenate(vals)
    # two laboratory batches (a stream of its own, so the simulated values do not depend on it)
    limit = np.asarray(DEMO_REPORTING_LIMITS)[np.random.default_rng([seed, 7]).integers(0, 2, values.size)]
    censored = values < limit
    attrs = {
        "title": "Marrowby Works (invented): arsenic in topsoil, 0-15 cm",
        "source": "bayesgeo demo (simulated)",
        "x_column": "easting", "y_column": "northing", "value_column": "arsenic_mg_kg",
        "site_column": "parcel", "covariates": [], "coords": "xy", "distance_units": "m",
        "value_units": "mg/kg", "crs": DEMO_CRS_WKT, "crs_name": "Marrowby Works site grid (invented), metres", "duplicates": "error",
        "seed": seed, "action_level": DEMO_ACTION_LEVEL, "non_detects": int(censored.sum()),
        "truth": json.dumps({
            "scale": "log of mg/kg; practical range in m",
            "covariance": pop["covariance"],
            "population": {k: float(v) for k, v in pop.items() if k != "covariance"},
            "sites": truth,
            "reporting_limits": list(DEMO_REPORTING_LIMITS),
        }),
    }
    return points_dataset(np.concatenate(xs), np.concatenate(ys), np.where(censored, limit, values),
                          site=np.array(sites), attrs=attrs, censored=censored)


def value_cells(ds: xr.Dataset) -> list[str]:
    """The value column as a laboratory writes it: 2 decimals, a non-detect as ``<limit``."""
    cens = ds["censored"].values if "censored" in ds else np.zeros(ds.sizes["obs"], bool)
    return [f"<{v:g}" if c else f"{v:.2f}" for v, c in zip(ds["value"].values, cens)]


def write_demo_data(path: str | Path, *, seed: int = DEMO_SEED, overwrite: bool = False) -> dict:
    """Write the demo data as CSV (columns sample_id, parcel, easting, northing, arsenic_mg_kg)
    and the true parameters beside it as ``<stem>.truth.json``. Returns the truth dictionary.

    Both files are written or neither (:func:`bayesgeo.common.outputs.new_files`); the truth file records
    the CSV's SHA-256, and ``overwrite`` replaces only files so recorded and unchanged."""
    path = Path(path)
    ds = demo_data(seed)
    truth = json.loads(ds.attrs["truth"])
    truth_path = path.with_name(path.stem + ".truth.json")
    with new_files([path, truth_path], overwrite=overwrite, record=truth_path) as (tmp, ttmp):
        with tmp.open("w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(["sample_id", "parcel", "easting", "northing", "arsenic_mg_kg"])
            cells = value_cells(ds)
            for i in range(ds.sizes["obs"]):
                w.writerow([f"MW-{i + 1:04d}", str(ds["site"].values[i]), f"{ds['x'].values[i]:.1f}",
                            f"{ds['y'].values[i]:.1f}", cells[i]])
        ttmp.write_text(json.dumps(truth, indent=2) + "\n")
    return truth
