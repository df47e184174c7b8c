"""Data intake: sample points, prediction targets, covariate design and the invented demo data."""
