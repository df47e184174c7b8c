"""Gaussian-process kernels: the covariance families and the two likelihood engines (dense and
nearest-neighbour) with their kriging, simulation and accuracy checks."""
