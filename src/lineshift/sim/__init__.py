"""Simulate: synthetic observations of an invented star, with the truth alongside.

May import ``lineshift.io``, ``lineshift.measure``, ``lineshift.series`` and the base modules."""
