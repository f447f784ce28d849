"""lineshift: barycentric line-of-sight velocities with calibrated uncertainties from reduced spectra.

Importing the package changes no global state: astropy is switched offline only around lineshift's
own work (see :mod:`lineshift._offline`).
"""

from lineshift._version import __version__

__all__ = ["__version__"]
