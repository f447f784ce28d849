"""Pixels a measurement must not use: NaN/inf, zero or negative counts or variance, saturation.

Saturation is read from the file where it says so (the loader turns pixels at or above a ``SATURATE``
header level into bad pixels) and otherwise recognised by its flat top (:func:`clipped_pixels`):
a full well clips every saturated pixel to the same value, while real counts carry noise, so
neighbouring pixels among an order's brightest that share one value exactly are saturated.

A reduction that resamples or interpolates spreads a bad pixel into its neighbours (a cubic or
sinc-like kernel reaches about two pixels either side), so every bad run is grown by ``grow``
pixels (common practice: dilate bad-pixel masks by the interpolation kernel's half width).  The
result is a boolean "bad" array; callers give these pixels zero weight, so a NaN can never reach
a CCF sum.
"""

from __future__ import annotations

import numpy as np

__all__ = ["bad_pixels", "clipped_pixels", "screened_bad_pixels"]


def clipped_pixels(flux: np.ndarray, *, top: float = 0.99, max_fraction: float = 0.5) -> np.ndarray:
    """Pixels on a flat top: every pixel at a value that two *adjacent* pixels share exactly, when that
    value is at or above the ``top`` quantile of the finite pixels and held by at least three and
    fewer than ``max_fraction`` of them (a constant or noise-free continuum is not a clipped one).

    A full well clips every saturated pixel, a saturated cosmic-ray hit included, to one value, and
    the reduction may still push a few pixels above it (interpolation next to a bad run), so the
    clipped value need not be the maximum.  Real counts carry noise: that two neighbours among the
    brightest one per cent tie exactly is improbable even for integer counts (a tie between two
    values with a spread of sigma has a chance of about 1 / (2 sqrt(pi) sigma): common practice).
    """
    flux = np.asarray(flux, dtype=float)
    if flux.ndim > 1:   # one order per row; only rows where two finite neighbours tie can have a flat top
        out = np.zeros(flux.shape, dtype=bool)
        with np.errstate(invalid="ignore"):
            tie = ((flux[..., 1:] == flux[..., :-1]) & np.isfinite(flux[..., 1:])).any(axis=-1)
        for k in zip(*np.nonzero(tie), strict=True):
            out[k] = clipped_pixels(flux[k], top=top, max_fraction=max_fraction)
        return out
    finite = np.isfinite(flux)
    out = np.zeros(flux.size, dtype=bool)
    if finite.sum() < 8:
        return out
    level = np.quantile(flux[finite], top)
    pair = finite[1:] & finite[:-1] & (flux[1:] == flux[:-1]) & (flux[1:] >= level)
    if not pair.any():
        return out
    for v in np.unique(flux[1:][pair]):
        at = finite & (flux == v)
        # three or more: a noise-free curve can tie two neighbours at its top by symmetry alone
        if 3 <= at.sum() <= max_fraction * finite.sum():
            out |= at
    return out


def bad_pixels(flux: np.ndarray, var: np.ndarray | None = None, *, saturation: float | None = None,
               clipped: bool = True, grow: int = 2) -> np.ndarray:
    """Boolean mask of unusable pixels, each bad run widened by ``grow`` pixels on both sides.

    Bad: non-finite flux or variance, flux <= 0, variance <= 0, flux >= ``saturation`` (if given),
    and with ``clipped`` the flat top of unflagged saturation (:func:`clipped_pixels`).
    ``flux`` and ``var`` are 1-D or 2-D (one order per row).
    """
    flux = np.asarray(flux, dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(flux) | (flux <= 0)
        if var is not None:
            var = np.asarray(var, dtype=float)
            bad |= ~np.isfinite(var) | (var <= 0)
        if saturation is not None:
            bad |= flux >= saturation
        if clipped:
            bad |= clipped_pixels(flux)
    return _grown(bad, grow)


def _grown(bad: np.ndarray, grow: int) -> np.ndarray:
    """``bad`` widened by ``grow`` pixels on both sides along the last axis (each row on its own)."""
    if grow > 0 and bad.any():
        out = bad.copy()
        for k in range(1, grow + 1):
            out[..., :-k] |= bad[..., k:]
            out[..., k:] |= bad[..., :-k]
        bad = out
    return bad


def screened_bad_pixels(flux: np.ndarray, bad: np.ndarray, tie: np.ndarray, *, grow: int = 2) -> np.ndarray:
    """:func:`bad_pixels` ``(flux, var)`` (defaults) of a block of orders from the compiled screen of
    :func:`.kernels.pixel_screen`: its ``bad`` (before growing) and ``tie`` rows, the only rows
    :func:`clipped_pixels` can mark."""
    for k in np.flatnonzero(tie):
        bad[k] |= clipped_pixels(flux[k])
    return _grown(bad, grow)
