"""Pixels a measurement must not use: NaN/inf, zero or negative counts or variance, saturation.

A reduction that resamples or interpolates spreads a bad pixel into its neighbours (a cubic or
sinc-like kernel reaches about two pixels either side), so every bad run is grown by ``grow``
pixels (common practice: dilate bad-pixel masks by the interpolation kernel's half width).  The
result is a boolean "bad" array; callers give these pixels zero weight, so a NaN can never reach
a CCF sum.
"""

from __future__ import annotations

import numpy as np

__all__ = ["bad_pixels"]


def bad_pixels(flux: np.ndarray, var: np.ndarray | None = None, *, saturation: float | None = None,
               grow: int = 2) -> np.ndarray:
    """Boolean mask of unusable pixels, each bad run widened by ``grow`` pixels on both sides.

    Bad: non-finite flux or variance, flux <= 0, variance <= 0, and (if ``saturation`` is given)
    flux >= ``saturation``.  ``flux`` and ``var`` are 1-D or 2-D (one order per row).
    """
    flux = np.asarray(flux, dtype=float)
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(flux) | (flux <= 0)
        if var is not None:
            var = np.asarray(var, dtype=float)
            bad |= ~np.isfinite(var) | (var <= 0)
        if saturation is not None:
            bad |= flux >= saturation
    if grow > 0 and bad.any():
        # widen along the last axis (each row of a 2-D array on its own)
        out = bad.copy()
        for k in range(1, grow + 1):
            out[..., :-k] |= bad[..., k:]
            out[..., k:] |= bad[..., :-k]
        bad = out
    return bad
