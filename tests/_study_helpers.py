"""A tiny synthetic study for the pipeline, report and example tests (simulated, no real data)."""

from __future__ import annotations

import numpy as np

from bayesgeo.data.demo import simulate_field

TINY_STUDY = """\
title = "Tiny synthetic study (test)"

[data]
path = "tiny.csv"
units = "mg/kg"
distance_units = "m"
coords = "xy"

[explore]
bins = 8
permutations = 9

[model]
covariance = {families}
transform = "log"
nugget = false

[sampler]
chains = 2
draws = {draws}
tune = {tune}
seed = 11

[check]
replicates = 20

[prediction]
cell = 25.0
thresholds = [15.0]
area = [50.0, 50.0, 150.0, 150.0]
draws = 40
"""


def write_tiny_study(folder, *, n: int = 40, families=("exponential",), draws: int = 600, tune: int = 400,
                     name: str = "study.toml"):
    """Write ``tiny.csv`` (an exponential field, log-normal values) and a study file; return its path."""
    rng = np.random.default_rng(5)
    xy = np.round(rng.random((n, 2)) * 200.0, 1)
    z = simulate_field(xy, covariance="exponential", practical_range=90.0, partial_sill=0.4, nugget=0.05,
                       mean=np.log(12.0), rng=rng)
    lines = ["x,y,conc"] + [f"{a:.1f},{b:.1f},{np.exp(v):.3f}" for (a, b), v in zip(xy, z)]
    (folder / "tiny.csv").write_text("\n".join(lines) + "\n")
    fams = "[" + ", ".join(f'"{f}"' for f in families) + "]"
    path = folder / name
    path.write_text(TINY_STUDY.format(families=fams, draws=draws, tune=tune))
    return path


SITES_STUDY = """\
title = "Tiny synthetic several-site study (test)"

[data]
path = "sites.csv"
site = "parcel"
units = "mg/kg"
distance_units = "m"
coords = "xy"

[explore]
bins = 6
permutations = 9

[model]
covariance = {families}
transform = "log"
pooling = "{pooling}"

[sampler]
chains = 2
draws = {draws}
tune = {tune}
target_accept = 0.95
seed = 7

[check]
replicates = 20

[prediction]
cell = 40.0
thresholds = [15.0]
draws = 30
"""


def write_sites_study(folder, *, n: int = 30, families=("matern32",), pooling: str = "hierarchical",
                      draws: int = 100, tune: int = 150, name: str = "sites.toml", extra: str = ""):
    """Write ``sites.csv`` (two simulated sites "a-yard" and "b-pit", ``n`` points each, log-normal values
    from Matérn 3/2 fields) and a several-site study file; return the study path."""
    rng = np.random.default_rng(8)
    rows = ["parcel,x,y,conc"]
    for label, x0, prange, mean in (("a-yard", 0.0, 80.0, 12.0), ("b-pit", 1000.0, 120.0, 20.0)):
        xy = np.round(rng.random((n, 2)) * 200.0, 1)
        z = simulate_field(xy, covariance="matern32", practical_range=prange, partial_sill=0.4, nugget=0.06,
                           mean=np.log(mean), rng=rng)
        rows += [f"{label},{x0 + a:.1f},{b:.1f},{np.exp(v):.3f}" for (a, b), v in zip(xy, z)]
    (folder / "sites.csv").write_text("\n".join(rows) + "\n")
    fams = "[" + ", ".join(f'"{f}"' for f in families) + "]"
    path = folder / name
    path.write_text(SITES_STUDY.format(families=fams, pooling=pooling, draws=draws, tune=tune) + extra)
    return path


_SITE_RUNS: dict = {}


#: Settings of the cached several-site run (slow tests): enough for the convergence check on these data.
SITE_RUN = {"draws": 1000, "tune": 800, "pooling": "complete"}


def sites_run(folder_factory, *, draws: int = SITE_RUN["draws"], tune: int = SITE_RUN["tune"],
              pooling: str = SITE_RUN["pooling"]):
    """Run the tiny several-site study once per test process (cached); return (run folder, result).

    ``folder_factory`` is pytest's ``tmp_path_factory``. 2 chains x ``draws`` (tune ``tune``, target
    acceptance 0.95) with complete pooling, so that the convergence check passes or warns and every later
    stage runs (2 x 400 draws failed it; the hierarchical model's between-site sds need still more draws
    with two sites; the demo runs that model).
    """
    from bayesgeo.study.runner import run_study

    key = (draws, tune, pooling)
    if key not in _SITE_RUNS:
        folder = folder_factory.mktemp("sites")
        study = write_sites_study(folder, draws=draws, tune=tune, pooling=pooling)
        _SITE_RUNS[key] = (folder / "run", run_study(study, out=folder / "run"))
    return _SITE_RUNS[key]
