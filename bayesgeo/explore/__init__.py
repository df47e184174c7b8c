"""Exploratory stage: binned semivariograms and correlograms, trend surfaces, quick
maximum-likelihood fits and their figures."""
