"""Convergence diagnostics of MCMC draws (R-hat, ESS, trace autocorrelation) and their figures."""
