"""Plots: figures drawn from results (CCFs, velocity series, orbits, calibration residuals).

May import ``lineshift.io``, ``lineshift.series`` and the base modules."""
