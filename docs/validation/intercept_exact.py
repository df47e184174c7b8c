"""Intercept ranks under its exact conditional posterior (no MCMC): the check behind item 3 of
"Intercept ranks" in docs/validation.md.

Truths come from the SBC model's prior draws, data from bayesgeo.calibration.simulation.simulate_data, and the
intercept is drawn from N(V F^T K^-1 y, V), V = (F^T K^-1 F + I / b^2)^-1, given the true
covariance parameters; a wrong prior sd (1.0) is the negative control.

Usage: python docs/validation/intercept_exact.py POINTS REPLICATES SEED NUGGET(0/1)
"""
import sys, warnings, numpy as np, pymc as pm
from bayesgeo.calibration import ranks as RK
from bayesgeo.calibration import config as C, simulation as S
from bayesgeo.gp.covariance import get_covariance
from bayesgeo.gp.dense import covariance_matrix
n_pts, reps, seed, nug = int(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3]), bool(int(sys.argv[4]))
tpl = C.generated_layout(n_pts, seed=7)
model, blocks, spec = S.sbc_model(tpl, C.SBCConfig(nugget=nug))
with warnings.catch_warnings():
    warnings.filterwarnings("ignore")
    prior = pm.sample_prior_predictive(draws=reps, model=model, random_seed=seed,
                                       var_names=S._sampled_names(model))["prior"].to_dataset()
rng = np.random.default_rng(seed + 1)
cov = get_covariance(spec.covariance)
L = 99; ranks = []; ranks_bad = []
for r in range(reps):
    items, tb = S._truth_items(prior, r, spec, "single")
    t, b = tb[0], blocks[0]
    y = S.simulate_data(t, b, spec, rng)
    tau2 = 0.0 if t["nugget_sd_z"] is None else t["nugget_sd_z"] ** 2
    K = covariance_matrix(b["dist"], cov, t["practical_range_z"] / spec.range_factor, t["sd_z"] ** 2, tau2)
    F = b["design"]
    from scipy.linalg import cho_factor, cho_solve
    cf = cho_factor(K, lower=True); KiF = cho_solve(cf, F); Kiy = cho_solve(cf, y)
    for s, out in ((spec.priors.beta_sd, ranks), (1.0, ranks_bad)):
        Vb = np.linalg.inv(F.T @ KiF + np.eye(F.shape[1]) / s**2); m = Vb @ (F.T @ Kiy)
        draws = m[0] + np.sqrt(Vb[0, 0]) * rng.standard_normal(L)
        out.append(int(np.sum(draws < t["beta_z"][0])))
for name, rk in (("model prior sd", ranks), ("wrong sd 1.0", ranks_bad)):
    u = RK.rank_uniformity(rk, L, bins=10)
    print(name, "p", u["pvalue"], u["counts"], "mean rank", np.mean(rk))
