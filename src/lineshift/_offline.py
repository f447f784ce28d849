"""Run lineshift's astropy work offline, without changing the host's settings.

The IERS Earth-orientation tables come from the bundled ``astropy-iers-data`` package.  Without
this, astropy tries to download a fresh IERS-A table once the bundled one is about 30 days old and,
with no network, the barycentric computation fails.  Dates beyond the bundled predictions then
degrade gracefully (polar motion falls back to a mean; effect <= 3 cm/s on the correction) with a
warning instead of an error.  Site names are never looked up (``EarthLocation.of_site`` needs the
network): sites come from headers, the config or ``--site``.
"""

from __future__ import annotations

import contextlib
import functools


@contextlib.contextmanager
def offline():
    """Run the enclosed work with astropy offline, restoring the caller's settings afterwards.

    Uses astropy's ``conf.set_temp``, so nothing outside the ``with`` block changes.  Re-entrant.
    """
    from astropy.utils import data, iers

    with contextlib.ExitStack() as stack:
        stack.enter_context(iers.conf.set_temp("auto_download", False))
        stack.enter_context(iers.conf.set_temp("auto_max_age", None))
        stack.enter_context(iers.conf.set_temp("iers_degraded_accuracy", "warn"))
        stack.enter_context(data.conf.set_temp("allow_internet", False))
        yield


def offline_call(func):
    """Decorator: ``func`` runs inside :func:`offline`."""

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        with offline():
            return func(*args, **kwargs)

    return wrapper
