"""Series: combining velocity tables, flags, bins, periodogram, Keplerian orbits.

May import only ``lineshift.model``, ``lineshift.errors``, ``lineshift.linefit`` and ``lineshift._version``."""
