"""Independent forward model for validating lineshift's precision (test and benchmark code only).

Imports nothing from lineshift's measurement, simulation, air/vacuum or Doppler code.
"""
