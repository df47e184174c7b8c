"""Prediction: kriging from posterior draws onto grids, points and areas, and map figures."""
