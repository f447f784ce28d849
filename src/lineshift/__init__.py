"""lineshift: barycentric line-of-sight velocities with calibrated uncertainties from reduced spectra.

Importing the package configures astropy for offline use (see :mod:`lineshift._offline`).
"""

from lineshift._offline import configure_offline
from lineshift._version import __version__

configure_offline()

__all__ = ["__version__"]
