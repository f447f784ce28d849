"""Configure astropy so that lineshift never touches the network.

The IERS Earth-orientation tables come from the bundled ``astropy-iers-data`` package.  Without
this, astropy tries to download a fresh IERS-A table once the bundled one is about 30 days old and,
with no network, the barycentric computation fails.  Dates beyond the bundled predictions then
degrade gracefully (polar motion falls back to a mean; effect <= 3 cm/s on the correction) with a
warning instead of an error.  Site names are never looked up (``EarthLocation.of_site`` needs the
network): sites come from headers, the config or ``--site``.
"""

from __future__ import annotations


def configure_offline() -> None:
    """Set astropy's configuration for offline use.  Idempotent; called on package import."""
    from astropy.utils import data, iers

    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    iers.conf.iers_degraded_accuracy = "warn"
    data.conf.allow_internet = False
