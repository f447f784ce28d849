"""Cosmic rays and hot pixels: short positive spikes far above a smooth local model.

A cosmic-ray hit or a hot pixel is narrower than the instrumental profile (one to a few pixels)
and stands many noise sigma *and* a sizeable fraction of the counts above what its neighbours say
the spectrum should be.  Requiring both a significance and a contrast is the rule of the Laplacian
cosmic-ray finder of van Dokkum (2001, PASP 113, 1420; its ``sigclip`` and ``objlim``), used here in
one dimension: stellar lines are resolved, so no real feature of a spectrum is both that sharp and
that bright.

The reference model is either given (the shifted template, for the template engine and the
co-add) or a running median over ``2 * max_width + 1`` pixels (mask engine).  A running median of
that length passes any monotonic stretch of a resolved line unchanged and removes any spike up to
``max_width`` pixels wide (common practice for 1-D spike removal).  The search is iterated: found
pixels are left out of the median and the residuals recomputed until nothing new is found.

The threshold (default 8 sigma, contrast 0.5 of the local counts) is chosen so it does not bite on
clean data: with Gaussian noise the one-sided probability of 8 sigma is ~6e-16 per pixel.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

__all__ = ["find_spikes", "running_median"]


def running_median(flux: np.ndarray, bad: np.ndarray, half: int) -> np.ndarray:
    """Median of the good pixels within ``half`` pixels of each pixel (NaN where none)."""
    x = np.where(bad, np.nan, np.asarray(flux, dtype=float))
    padded = np.pad(x, half, mode="constant", constant_values=np.nan)
    win = sliding_window_view(padded, 2 * half + 1)
    # windows with no bad pixel (nearly all): scipy's C median filter; the rest: nanmedian of the good ones
    from scipy.ndimage import median_filter

    out = median_filter(np.where(np.isfinite(x), x, 0.0), size=2 * half + 1, mode="nearest")
    gappy = ~np.isfinite(win).all(axis=1)
    out[gappy] = np.nan
    some = gappy & np.isfinite(win).any(axis=1)
    if some.any():
        out[some] = np.nanmedian(win[some], axis=1)
    return out


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) of each run of True in a 1-D boolean array."""
    d = np.diff(np.concatenate([[0], flags.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1), strict=True))


def _steep(flux, var, bad, a, b, nsigma, contrast) -> bool:
    """True if the run [a, b) stands above both of its outer neighbours by the same margins.

    A narrow maximum between two deep blended lines can exceed a running median, but not the
    pixels right beside it: a resolved feature changes by a fraction of itself per pixel.
    """
    side = [flux[i] for i in (a - 1, b) if 0 <= i < flux.size and not bad[i]]
    if not side:
        return True
    top = max(side)
    low = flux[a:b].min()
    return bool(low - top > max(nsigma * np.sqrt(var[a:b].max()), contrast * abs(top)))


def find_spikes(flux: np.ndarray, var: np.ndarray, good: np.ndarray | None = None, *,
                model: np.ndarray | None = None, max_width: int = 3, nsigma: float = 8.0,
                contrast: float = 0.5, grow: int = 1, max_iter: int = 5) -> np.ndarray:
    """Boolean array marking cosmic-ray / hot-pixel pixels (plus ``grow`` neighbours each side).

    ``model`` is the expected flux in the same units as ``flux`` (e.g. the scaled, shifted
    template); without it a running median of ``2 * max_width + 1`` good pixels is used and the
    search is iterated.  Only runs of at most ``max_width`` pixels that are all more than
    ``nsigma`` noise sigma and ``contrast`` times the model above the model, and by the same
    margins above both pixels just outside the run, are flagged: wider or gentler excesses are
    real spectrum (or a model mismatch), not spikes.
    """
    flux = np.asarray(flux, dtype=float)
    var = np.asarray(var, dtype=float)
    n = flux.size
    base_bad = ~np.isfinite(flux) | ~np.isfinite(var) | (var <= 0)
    if good is not None:
        base_bad |= ~np.asarray(good, dtype=bool)
    spikes = np.zeros(n, dtype=bool)
    for _ in range(max_iter if model is None else 1):
        ref = (running_median(flux, base_bad | spikes, max_width) if model is None
               else np.asarray(model, dtype=float))
        with np.errstate(invalid="ignore", divide="ignore"):
            excess = flux - ref
            high = ((excess > nsigma * np.sqrt(var)) & (excess > contrast * np.abs(ref))
                    & ~base_bad & np.isfinite(ref))
        new = np.zeros(n, dtype=bool)
        for a, b in _runs(high):
            if b - a <= max_width and _steep(flux, var, base_bad | spikes, a, b, nsigma, contrast):
                new[a:b] = True
        if not (new & ~spikes).any():
            break
        spikes |= new
    if grow > 0 and spikes.any():
        idx = np.flatnonzero(spikes)
        for k in range(1, grow + 1):
            spikes[np.clip(idx - k, 0, n - 1)] = True
            spikes[np.clip(idx + k, 0, n - 1)] = True
    return spikes
