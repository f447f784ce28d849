"""lineshift: barycentric line-of-sight velocities with calibrated uncertainties from reduced spectra.

Importing the package configures astropy for offline use (see :mod:`lineshift._offline`).
"""

from ._offline import configure_offline

configure_offline()

__version__ = "0.1.0"

__all__ = ["__version__"]
