"""Deformation monitoring: epochs compared by the congruence test, and time series per mark."""
