"""Calibrate: barycentric correction and BJD_TDB, wavelength-calibration check, line finding.

May import ``lineshift.io``, ``lineshift.measure``, ``lineshift.series`` and the base modules."""
