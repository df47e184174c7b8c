"""Simulation-based calibration of the fitting stage."""
