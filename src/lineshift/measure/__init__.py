"""Measure: preparation (continuum, weights, tellurics), CCF, peak fit, mask and template engines,
co-add, line profiles and two-star fits.

May import only ``lineshift.model``, ``lineshift.errors``, ``lineshift.linefit`` and ``lineshift._version``."""
