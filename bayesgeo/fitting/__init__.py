"""The Bayesian fit: priors, PyMC models (single- and several-site), sampling and the fit object."""
