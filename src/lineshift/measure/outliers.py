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

__all__ = ["find_spikes", "find_spikes_reference", "median_of_finite", "running_median"]


def median_of_finite(win: np.ndarray) -> np.ndarray:
    """Median of the finite values of each row of ``win`` (NaN where none), as ``np.nanmedian``
    gives it, through one sort (NaN sorts last) instead of a masked-array median."""
    s = np.sort(win, axis=-1)
    k = np.isfinite(s).sum(axis=-1)
    top = s.shape[-1] - 1
    lo = np.take_along_axis(s, np.clip((k - 1) // 2, 0, top)[:, None], axis=-1)[:, 0]
    hi = np.take_along_axis(s, np.clip(k // 2, 0, top)[:, None], axis=-1)[:, 0]
    out = np.where(k % 2 == 1, lo, (lo + hi) / 2)
    out[k == 0] = np.nan
    return out


class _RunningMedian:
    """Running median over ``2 * half + 1`` pixels of the good pixels of each row, for a bad set
    that may grow between calls.

    Windows with no bad pixel (nearly all) come from scipy's C median filter, computed once per
    array; only windows that touch a bad pixel or an end of the row are recomputed, all together."""

    def __init__(self, flux: np.ndarray, half: int):
        from scipy.ndimage import median_filter

        self.flux, self.half = flux, half
        self.finite = np.isfinite(flux)
        # the rows end to end through the 1-D filter (far faster than a 2-D footprint): windows that
        # straddle two rows reach beyond a row's end, so they are among the recomputed ones
        filled = np.where(self.finite, flux, 0.0)
        self.clean = median_filter(filled.ravel(), size=2 * half + 1, mode="nearest").reshape(flux.shape)

    def __call__(self, bad: np.ndarray) -> np.ndarray:
        h, (rows, n) = self.half, self.flux.shape
        width = 2 * h + 1
        bad = bad | ~self.finite
        # a window is gappy when it holds a bad pixel or reaches beyond its row (padding counts as bad)
        padded = np.ones((rows, n + width), dtype=np.int32)
        padded[:, 0] = 0
        padded[:, h + 1:h + 1 + n] = bad
        cum = np.cumsum(padded, axis=1)
        gappy = (cum[:, width:] - cum[:, :n]) > 0
        out = self.clean.copy()
        r, i = np.nonzero(gappy)
        if r.size:
            x = np.pad(np.where(bad, np.nan, self.flux), ((0, 0), (h, h)), constant_values=np.nan)
            out[r, i] = median_of_finite(x[r[:, None], i[:, None] + np.arange(width)[None, :]])
        return out


def running_median(flux: np.ndarray, bad: np.ndarray, half: int) -> np.ndarray:
    """Median of the good pixels within ``half`` pixels of each pixel (NaN where none).

    ``flux`` and ``bad`` are 1-D, or 2-D with one spectrum (order) per row."""
    x = np.where(bad, np.nan, np.asarray(flux, dtype=float))
    one = x.ndim == 1
    x2 = np.atleast_2d(x)
    out = _RunningMedian(x2, half)(np.zeros(x2.shape, dtype=bool))
    return out[0] if one else out


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


def find_spikes_reference(flux: np.ndarray, var: np.ndarray, good: np.ndarray | None = None, *,
                          model: np.ndarray | None = None, max_width: int = 3, nsigma: float = 8.0,
                          contrast: float = 0.5, grow: int = 1, max_iter: int = 5) -> np.ndarray:
    """The plain, one-spectrum form of :func:`find_spikes` (a loop over runs; nanmedian windows).

    Kept as the reference the vectorised kernel is tested against (tests/test_fast_kernels.py)."""
    flux = np.asarray(flux, dtype=float)
    var = np.asarray(var, dtype=float)
    n = flux.size
    base_bad = ~np.isfinite(flux) | ~np.isfinite(var) | (var <= 0)
    if good is not None:
        base_bad |= ~np.asarray(good, dtype=bool)

    def median(bad):
        x = np.where(bad, np.nan, flux)
        win = sliding_window_view(np.pad(x, max_width, constant_values=np.nan), 2 * max_width + 1)
        out = np.full(n, np.nan)
        ok = np.isfinite(win).any(axis=1)
        out[ok] = np.nanmedian(win[ok], axis=1)
        return out

    spikes = np.zeros(n, dtype=bool)
    for _ in range(max_iter if model is None else 1):
        ref = median(base_bad | spikes) if model is None else np.asarray(model, dtype=float)
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


def _running_min(a: np.ndarray, width: int) -> np.ndarray:
    """Minimum over ``width`` (odd) neighbours of each element of the 1-D ``a``, the ends extended by
    their own values (``scipy.ndimage.minimum_filter1d(a, width, mode="nearest")``), by doubling spans:
    a few ``np.minimum`` over the whole array instead of ``width`` comparisons per element."""
    h = width // 2
    p = np.concatenate((np.full(h, a[0]), a, np.full(h, a[-1])))
    span = 1
    while 2 * span <= width:
        p = np.minimum(p[:-span], p[span:])     # p[i] = min of the original p[i : i + 2 span]
        span *= 2
    return np.minimum(p[:a.size], p[width - span:width - span + a.size]) if span < width else p


def _spike_runs(flux, var, bad, spikes, high, max_width, nsigma, contrast) -> tuple[np.ndarray, np.ndarray]:
    """(rows, columns) of the pixels in runs of ``high`` (sorted flat indices into the 2-D arrays) of at
    most ``max_width`` pixels that pass :func:`_steep`, all runs at once; ``bad | spikes`` are the
    pixels that cannot serve as a run's outer neighbours."""
    n = flux.shape[1]
    if high.size == 0:
        return high, high
    col = high % n
    new = np.ones(high.size, dtype=bool)        # a run starts where the previous pixel is not high
    new[1:] = (high[1:] != high[:-1] + 1) | (col[1:] == 0)
    first = np.flatnonzero(new)
    last = np.concatenate((first[1:], [high.size])) - 1
    r, a, b = high[first] // n, col[first], col[last] + 1
    short = (b - a) <= max_width
    r, a, b = r[short], a[short], b[short]
    if r.size == 0:
        return r, r
    # the pixels just outside each run that exist and are good, and their maximum
    la, rb = np.maximum(a - 1, 0), np.minimum(b, n - 1)
    left_ok = (a - 1 >= 0) & ~(bad[r, la] | spikes[r, la])
    right_ok = (b < n) & ~(bad[r, rb] | spikes[r, rb])
    top = np.maximum(np.where(left_ok, flux[r, la], -np.inf), np.where(right_ok, flux[r, rb], -np.inf))
    # minimum flux and maximum variance inside each run (at most max_width pixels)
    j = a[:, None] + np.arange(max_width)[None, :]
    inside = j < b[:, None]
    jc = np.minimum(j, n - 1)
    low = np.where(inside, flux[r[:, None], jc], np.inf).min(axis=1)
    vmax = np.where(inside, var[r[:, None], jc], -np.inf).max(axis=1)
    with np.errstate(invalid="ignore"):
        steep = low - top > np.maximum(nsigma * np.sqrt(vmax), contrast * np.abs(top))
    steep |= ~(left_ok | right_ok)        # no usable neighbour: nothing to compare with
    sel = steep[:, None] & inside
    return np.broadcast_to(r[:, None], j.shape)[sel], j[sel]


def find_spikes(flux: np.ndarray, var: np.ndarray, good: np.ndarray | None = None, *,
                model: np.ndarray | None = None, max_width: int = 3, nsigma: float = 8.0,
                contrast: float = 0.5, grow: int = 1, max_iter: int = 5,
                screened: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Boolean array marking cosmic-ray / hot-pixel pixels (plus ``grow`` neighbours each side).

    ``model`` is the expected flux in the same units as ``flux`` (e.g. the scaled, shifted
    template); without it a running median of ``2 * max_width + 1`` good pixels is used and the
    search is iterated.  Only runs of at most ``max_width`` pixels that are all more than
    ``nsigma`` noise sigma and ``contrast`` times the model above the model, and by the same
    margins above both pixels just outside the run, are flagged: wider or gentler excesses are
    real spectrum (or a model mismatch), not spikes.

    The arrays are 1-D (one spectrum) or 2-D (one order per row, each row searched on its own).
    Vectorised over rows and runs; :func:`find_spikes_reference` is the plain form it must equal.
    ``screened`` = (``base_bad``, candidates) of :func:`.kernels.pixel_screen` on the same 2-D arrays
    (no ``good``, no ``model``, the same ``max_width``, ``nsigma``, ``contrast``) replaces the first,
    whole-array step below with the compiled pass that gives the same pixels.
    """
    flux = np.asarray(flux, dtype=float)
    one = flux.ndim == 1
    flux = np.atleast_2d(flux)
    var = np.atleast_2d(np.asarray(var, dtype=float))
    if screened is not None:
        if good is not None or model is not None:
            raise ValueError("screened candidates are for a search without good or model")
        base_bad, cand = screened
    else:
        base_bad = ~np.isfinite(flux) | ~np.isfinite(var) | (var <= 0)
        if good is not None:
            base_bad |= ~np.atleast_2d(np.asarray(good, dtype=bool))
    spikes = np.zeros(flux.shape, dtype=bool)
    n = flux.shape[1]
    if model is None:
        # The median of a window's good pixels is at least their minimum, so a pixel can only stand
        # out of its running median if it stands out of the running minimum by the same margins.
        # The minimum (over the good pixels at the start, a superset of those left later, and
        # across row ends, a superset again) is cheap; the median is taken only where it can matter,
        # and only there can a pixel be high (the reference is NaN elsewhere).
        if screened is None:
            with np.errstate(invalid="ignore", divide="ignore"):
                sig = nsigma * np.sqrt(var)
            low = _running_min(np.where(base_bad, np.inf, flux).ravel(), 2 * max_width + 1).reshape(flux.shape)
            with np.errstate(invalid="ignore"):
                lift = flux - low
                cand = np.flatnonzero((lift > sig) & (lift > contrast * np.maximum(low, 0.0)) & ~base_bad)
        cand_r, cand_i = cand // n, cand % n
        sig_c = nsigma * np.sqrt(var[cand_r, cand_i])
        # each candidate's window of good pixels (NaN for bad ones and beyond the row's ends)
        src = cand_i[:, None] + np.arange(-max_width, max_width + 1)[None, :]
        inside = (src >= 0) & (src < n)
        src = np.clip(src, 0, n - 1)
        win = np.where(inside & ~base_bad[cand_r[:, None], src], flux[cand_r[:, None], src], np.nan)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            sig = nsigma * np.sqrt(var)
    for _ in range(max_iter if model is None else 1):
        if model is None:
            if cand.size == 0:
                break
            ref = median_of_finite(np.where(spikes[cand_r[:, None], src] & inside, np.nan, win))
            with np.errstate(invalid="ignore"):
                excess = flux[cand_r, cand_i] - ref
                high = cand[(excess > sig_c) & (excess > contrast * np.abs(ref)) & np.isfinite(ref)]
        else:
            ref = np.atleast_2d(np.asarray(model, dtype=float))
            with np.errstate(invalid="ignore", divide="ignore"):
                excess = flux - ref
                high = np.flatnonzero((excess > sig) & (excess > contrast * np.abs(ref)) & ~base_bad
                                      & np.isfinite(ref))
        nr, ni = _spike_runs(flux, var, base_bad, spikes, high, max_width, nsigma, contrast)
        if not (~spikes[nr, ni]).any():
            break
        spikes[nr, ni] = True
    if grow > 0 and spikes.any():
        grown = spikes.copy()
        for k in range(1, grow + 1):
            grown[:, :-k] |= spikes[:, k:]
            grown[:, k:] |= spikes[:, :-k]
        spikes = grown
    return spikes[0] if one else spikes
