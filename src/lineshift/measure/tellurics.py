"""Telluric pixels in each spectrum's own (observatory) frame, from a band list.

Absorption by the Earth's atmosphere is fixed in the observatory frame while the star moves by the
barycentric correction (BERV) over the year.  Listed intervals (the shipped strong bands, or a user's
``--telluric-bands`` file), vacuum, observatory frame: :func:`band_pixels` marks a spectrum's pixels
inside them and :func:`drop_bands` gives them no weight in a prepared order, so the template fit
ignores them in that spectrum's own frame as the co-add already does (:mod:`.coadd`).  Weak lines
outside the list are not found here (see docs/nuisances.md for what they cost).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from lineshift.measure.prepare import PreparedOrder

__all__ = ["band_pixels", "drop_bands", "merge_intervals"]


def band_pixels(wave: np.ndarray, bands: np.ndarray) -> np.ndarray:
    """Pixels (centres ``wave``, observatory frame) inside any of the (n, 2) ``bands``."""
    wave = np.asarray(wave, dtype=float)
    out = np.zeros(wave.size, dtype=bool)
    if bands is None or np.size(bands) == 0:
        return out
    bands = np.asarray(bands, dtype=float).reshape(-1, 2)
    near = bands[(bands[:, 1] >= wave[0]) & (bands[:, 0] <= wave[-1])]
    for lo, hi in near:
        a, b = np.searchsorted(wave, [lo, hi], side="left")
        out[a:b] = True
    return out


def drop_bands(order: PreparedOrder, bands: np.ndarray) -> PreparedOrder:
    """The order with its pixels inside ``bands`` (observatory frame) given no weight."""
    hit = band_pixels(order.wave, bands) & order.good
    if not hit.any():
        return order
    good = order.good & ~hit
    return replace(order, good=good, weight=np.where(good, order.weight, 0.0),
                   flux=np.where(good, order.flux, 0.0), var=np.where(good, order.var, 0.0))


def merge_intervals(intervals: np.ndarray) -> np.ndarray:
    """Union of (n, 2) intervals as sorted, disjoint intervals."""
    iv = np.asarray(intervals, dtype=float).reshape(-1, 2)
    if iv.shape[0] == 0:
        return iv
    iv = iv[np.argsort(iv[:, 0])]
    out = [list(iv[0])]
    for lo, hi in iv[1:]:
        if lo <= out[-1][1]:
            out[-1][1] = max(out[-1][1], hi)
        else:
            out.append([lo, hi])
    return np.array(out)

