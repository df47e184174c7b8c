"""Nearest-neighbour (Vecchia) log-likelihood against the exact Gaussian one on demo data.

Usage: ``python examples/nn_likelihood.py``. Prints the error of the approximation for growing
numbers of neighbours m on the largest invented parcel (260 points): the error should shrink
towards zero as m grows (m = n - 1 is exact).
"""

from __future__ import annotations

import numpy as np

import bayesgeo
from bayesgeo.common.geometry import distance_matrix
from bayesgeo.gp.dense import loglik_numpy
from bayesgeo.gp.nn import nn_loglik_and_grad


def main() -> dict[int, float]:
    ds = bayesgeo.demo_data()
    part = ds.isel(obs=(ds["site"].values == "tailings-flat").nonzero()[0])
    xy = np.column_stack([part["x"].values, part["y"].values])
    z = np.log(part["value"].values)
    resid = z - z.mean()
    cov = bayesgeo.get_covariance("matern32")
    scale = cov.scale_from_range(150.0)
    exact = loglik_numpy(resid, distance_matrix(xy), cov, scale, 0.45, 0.08)
    errors = {}
    for m in (3, 5, 10, 20, len(z) - 1):
        approx = nn_loglik_and_grad(resid, xy, cov, scale, 0.45, 0.08, neighbours=m)[0]
        errors[m] = float(approx - exact)
        print(f"m = {m:3d}: Vecchia {approx:10.4f}  exact {exact:10.4f}  error {approx - exact:+.5f}")
    return errors


if __name__ == "__main__":
    main()
