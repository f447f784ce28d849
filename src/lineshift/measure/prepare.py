"""Preparation: bad pixels, continuum normalisation, photon weights, telluric rejection of lines.

Continuum
    Each order's continuum is fitted as a Legendre polynomial in pixel with iterative asymmetric
    sigma clipping (points more than ``clip_low`` sigma below the fit are absorption lines, more
    than ``clip_high`` above are cosmic rays), so the fit settles on the upper envelope (an iterative, asymmetrically
    clipped upper-envelope fit: common practice in continuum normalisation).  Sigma
    is the photon noise of each pixel combined with the robust scatter of the residuals.  When the
    file gives a blaze function the polynomial is fitted to flux/blaze and multiplied back.

Photon weighting
    The normalised flux is ``f = F / c`` with variance ``var / c^2``.  The correlation averages
    ``f`` with per-pixel weights ``q = 1 / var_f,cont``, the inverse of the variance the normalised
    flux would have at the continuum level: ``c^2 / (alpha c + beta)``, with the counts' variance at
    continuum pixels regressed linearly on the continuum (photon plus read noise).  For photon noise
    ``q`` is proportional to the continuum counts, so bright pixels count as their photons do,
    while line cores do not get extra weight from their own noisy counts.  Any smooth ``q`` leaves
    the error propagation exact; ``q`` only sets the efficiency.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from lineshift.measure import kernels
from lineshift.measure.badpixels import bad_pixels, screened_bad_pixels
from lineshift.measure.outliers import find_spikes
from lineshift.model import C_MS, LineMask, Order, Spectrum

__all__ = ["OrderBlock", "PreparedOrder", "block_rows", "fit_continuum", "joined", "pixel_edges", "prepare_order",
           "prepare_spectrum", "reject_telluric_lines", "rejected_pixels"]


@dataclass(frozen=True)
class PreparedOrder:
    """An order ready for correlation.

    Attributes
    ----------
    wave : ndarray, vacuum Angstrom, pixel centres (all pixels, bad ones included)
    edges : ndarray, pixel edges (n + 1), Angstrom
    flux : ndarray, continuum-normalised flux, 0 at bad pixels
    var : ndarray, variance of ``flux``, 0 at bad pixels
    weight : ndarray, photon weight ``q`` per pixel, 0 at bad pixels
    good : ndarray of bool, usable pixels
    index : int, order index in the file
    continuum : ndarray or None, the continuum ``flux`` was divided by (counts; every pixel)
    """

    wave: np.ndarray
    edges: np.ndarray
    flux: np.ndarray
    var: np.ndarray
    weight: np.ndarray
    good: np.ndarray
    index: int
    continuum: np.ndarray | None = None
    #: the block of orders prepared together that this order's arrays are row ``row`` of (:func:`block_rows`)
    block: OrderBlock | None = field(default=None, repr=False, compare=False)
    row: int = field(default=-1, repr=False, compare=False)


def pixel_edges(wave: np.ndarray) -> np.ndarray:
    """Pixel edges from pixel centres: midpoints inside, half a step beyond the ends (along the last
    axis: one row of pixel centres per order gives one row of edges per order)."""
    mid = 0.5 * (wave[..., 1:] + wave[..., :-1])
    return np.concatenate((wave[..., :1] - (mid[..., :1] - wave[..., :1]), mid,
                           wave[..., -1:] + (wave[..., -1:] - mid[..., -1:])), axis=-1)


class OrderBlock:
    """The 2-D arrays (one row per order) that a block of prepared orders are rows of, and the row
    arrays themselves, so that code working on all the orders of a spectrum can take a whole block
    at once instead of looping and concatenating (:func:`block_rows`)."""

    __slots__ = ("arrays", "rows")

    def __init__(self, arrays: dict[str, np.ndarray], rows: dict[str, list[np.ndarray]]):
        self.arrays = arrays
        self.rows = rows

    def __reduce__(self):
        # an order sent to another process carries its own arrays (pickled apart from any block), so a
        # block there could not recognise them: it travels empty and block_rows falls back to loops
        return (OrderBlock, ({}, {}))


def _stacked(arrays: list[np.ndarray]) -> np.ndarray:
    """``np.vstack(arrays)`` of 1-D float arrays; without a copy (read-only) when they lie end to end,
    in order, in one buffer (as a loader leaves the orders of an image)."""
    a0 = arrays[0] if arrays else None
    owner = None if a0 is None else a0.base
    if owner is not None and a0.ndim == 1 and a0.dtype == np.float64 and a0.flags.c_contiguous:
        p0, nbytes = a0.ctypes.data, a0.nbytes
        if all(a.base is owner and a.shape == a0.shape and a.dtype == a0.dtype and a.flags.c_contiguous
               and a.ctypes.data == p0 + k * nbytes for k, a in enumerate(arrays)):
            return np.lib.stride_tricks.as_strided(a0, shape=(len(arrays), a0.size), strides=(nbytes, a0.itemsize),
                                                   writeable=False)
    return np.vstack(arrays)


def block_rows(orders: list[PreparedOrder], name: str) -> np.ndarray | None:
    """The attribute ``name`` of ``orders`` as the rows of one 2-D array, without a copy, when the
    orders are consecutive rows of one :class:`OrderBlock` and still hold its arrays (an order made
    again with another ``name`` array does not); None otherwise (the caller loops instead)."""
    if not orders:
        return None
    b = orders[0].block
    if b is None or name not in b.rows:
        return None
    r0 = orders[0].row
    rows = b.rows[name]
    if r0 + len(orders) > len(rows):
        return None
    for k, o in enumerate(orders):
        if o.block is not b or o.row != r0 + k or getattr(o, name) is not rows[r0 + k]:
            return None
    return b.arrays[name][r0:r0 + len(orders)]


def rejected_pixels(orders: list[PreparedOrder]) -> int | None:
    """Pixels the file gave as usable (finite flux and variance, variance > 0) that the preparation
    masked, summed over ``orders``, as their blocks counted them; None when an order does not hold its
    block's ``good`` row (the caller counts against the file's arrays instead)."""
    n = 0
    for o in orders:
        b = o.block
        if b is None or "rejected" not in b.arrays or o.good is not b.rows["good"][o.row]:
            return None
        n += int(b.arrays["rejected"][o.row])
    return n


def joined(orders: list[PreparedOrder], name: str) -> np.ndarray:
    """``np.concatenate([o.<name> for o in orders])``, as a view of the block when :func:`block_rows`
    finds one."""
    rows = block_rows(orders, name)
    return np.concatenate([getattr(o, name) for o in orders]) if rows is None else rows.reshape(-1)


_DESIGN_CACHE: dict[tuple[int, int], np.ndarray] = {}


def _legendre_design(n: int, degree: int) -> np.ndarray:
    key = (n, degree)
    if key not in _DESIGN_CACHE:
        if len(_DESIGN_CACHE) > 32:
            _DESIGN_CACHE.clear()
        _DESIGN_CACHE[key] = np.polynomial.legendre.legvander(np.linspace(-1.0, 1.0, n), degree)
    return _DESIGN_CACHE[key]


_VV_CACHE: dict[tuple, np.ndarray] = {}


def _outer_rows(V: np.ndarray) -> np.ndarray:
    """Each row's outer product with itself, flattened (kept per design: the designs are few)."""
    key = (V.shape, V[0].tobytes(), V[-1].tobytes())
    if key not in _VV_CACHE:
        if len(_VV_CACHE) > 32:
            _VV_CACHE.clear()
        k = V.shape[1]
        _VV_CACHE[key] = (V[:, :, None] * V[:, None, :]).reshape(V.shape[0], k * k)
    return _VV_CACHE[key]


def _weighted_polyfit(V: np.ndarray, y: np.ndarray, w: np.ndarray, work: np.ndarray | None = None) -> np.ndarray:
    """Batched weighted least squares: rows of ``y`` (orders x pixels) with 0/1 weights ``w``
    (``work``: an array of y's shape to hold ``w * y``)."""
    k = V.shape[1]
    A = (w @ _outer_rows(V)).reshape(-1, k, k)
    b = np.multiply(w, y, out=work) @ V
    trace = np.trace(A, axis1=1, axis2=2)                 # >= 0: zero before the ridge iff zero after it
    A += np.eye(V.shape[1])[None] * 1e-12 * trace[:, None, None]
    A[trace == 0] = np.eye(k)   # an order with no usable pixel: coefficients 0
    return np.linalg.solve(A, b[..., None])[..., 0]


def _compiled_core(flux, var, good, V, clip_low, clip_high, max_iter, stride):
    coef, used, scatter2 = kernels.continuum_iterations(flux, var, good, V, _outer_rows(V), clip_low, clip_high,
                                                        max_iter)
    return coef, used, stride, scatter2


def _continuum_core(flux, var, good, degree, clip_low, clip_high, max_iter, n=None, compiled=None):
    """Clipping iterations on every ``stride``-th pixel; returns (coef, used, stride, scatter^2).

    With ``n`` the arrays are already that subset of orders of ``n`` pixels.  The iterations reuse
    their work arrays (the same operations, without a fresh allocation per step).  ``compiled``: the
    iterations by :func:`.kernels.continuum_iterations` (default: when the compiled kernels are in
    use) or by the array form below, which is the plain form it is tested against."""
    # a degree-4 polynomial needs no more than ~1000 points: the iterations run on a subset
    stride = max(1, (flux.shape[1] if n is None else n) // 1024)
    if n is None:
        n = flux.shape[1]
        flux, var, good = flux[:, ::stride], var[:, ::stride], good[:, ::stride]
    V = _legendre_design(n, degree)[::stride]
    fast = kernels.compiled() if compiled is None else (kernels.compiled_always() if compiled else None)
    if fast is not None:
        return _compiled_core(flux, var, good, V, clip_low, clip_high, max_iter, stride)
    VT = V.T
    g = good
    y = np.where(g, flux, 0.0)
    v0 = np.where(g, var, 0.0)
    used = g.copy()
    coef = np.zeros((flux.shape[0], degree + 1))
    scatter2 = np.zeros(flux.shape[0])
    w, work, resid, sigma = (np.empty(y.shape) for _ in range(4))
    for _ in range(max_iter):
        count = used.sum(axis=1)
        enough = count > degree + 1
        np.copyto(w, used if enough.all() else np.where(enough[:, None], used, g))
        coef = _weighted_polyfit(V, y, w, work)
        np.subtract(y, np.matmul(coef, VT, out=resid), out=resid)
        nused = np.maximum(count, 1)
        np.subtract(np.square(resid, out=work), v0, out=work)
        np.copyto(work, 0.0, where=~used)
        scatter2 = np.maximum(np.sum(work, axis=1) / nused, 0.0)
        np.sqrt(np.add(v0, scatter2[:, None], out=sigma), out=sigma)
        new = g & (resid > np.multiply(sigma, -clip_low, out=work))
        new &= resid < np.multiply(sigma, clip_high, out=work)
        changed = np.count_nonzero(new != used)
        used = new
        if changed <= 1e-3 * new.size:  # converged (a few pixels may flip back and forth)
            break
    return coef, used, stride, scatter2


def fit_continuum(flux: np.ndarray, var: np.ndarray, good: np.ndarray, *, degree: int = 4,
                  clip_low: float = 2.0, clip_high: float = 3.0, max_iter: int = 10):
    """Iterative asymmetric sigma-clipped Legendre fit to the upper envelope, for one or more orders.

    Parameters
    ----------
    flux, var : ndarray, shape (n,) or (orders, n)
        Flux and its variance per pixel.
    good : ndarray of bool, same shape
        Pixels that may be used.
    degree : int
        Legendre degree in pixel.
    clip_low, clip_high : float
        Rejection thresholds in sigma below / above the fit.  Sigma combines each pixel's photon
        noise with the rms of the residuals of the pixels in use.

    Returns
    -------
    continuum : ndarray, same shape
        The fitted continuum (NaN for an order with too few usable pixels).
    used : ndarray of bool, same shape
        Pixels the final fit rests on (continuum pixels).

    Notes
    -----
    The clipping iterations run on every ``n // 1024``-th pixel (a degree-4 polynomial needs no
    more); the final polynomial is evaluated, and the continuum pixels chosen, at every pixel.
    """
    one = flux.ndim == 1
    flux, var, good = np.atleast_2d(flux), np.atleast_2d(var), np.atleast_2d(good)
    coef, used, _, scatter2 = _continuum_core(flux, var, good, degree, clip_low, clip_high, max_iter)
    fit = coef @ _legendre_design(flux.shape[1], degree).T
    resid = np.where(good, flux, 0.0) - fit
    sigma = np.sqrt(np.where(good, var, 0.0) + scatter2[:, None])
    used_full = good & (resid > -clip_low * sigma) & (resid < clip_high * sigma)
    fit = np.where((used.sum(axis=1) > degree + 1)[:, None], fit, np.nan)
    return (fit[0], used_full[0]) if one else (fit, used_full)


def _finish_numpy(f, v, good, cont, mc, mv, alpha, floor):
    """Normalised flux and variance and the photon weight of every pixel (the plain NumPy form of
    :func:`.kernels.prepare_tail`, which does the same operations pixel by pixel)."""
    good = good & np.isfinite(cont) & (cont > 0)
    c = np.where(good, cont, 1.0)
    fn = np.where(good, f / c, 0.0)
    vn = np.where(good, v / c**2, 0.0)
    vcont = mv[:, None] + alpha[:, None] * (c - mc[:, None])
    den = np.maximum(vcont, floor[:, None])  # zero only for an order without a usable pixel
    q = np.where(good & (den > 0), c**2 / np.where(den > 0, den, 1.0), 0.0)
    return good, fn, vn, q


def _prepare_block(orders: list[Order], degree: int, compiled: bool | None = None) -> list[PreparedOrder | None]:
    """Prepare orders of equal length together (array operations across orders).

    ``compiled``: the per-pixel steps by the compiled kernels (:func:`.kernels.pixel_screen`,
    :func:`.kernels.prepare_blaze`, :func:`.kernels.prepare_tail`; default: when they are in use), or
    the array steps below (:func:`.badpixels.bad_pixels`, :func:`.outliers.find_spikes`,
    :func:`_finish_numpy`): the same pixels, values equal to ~1e-15 relative (sums in another order)."""
    flux = _stacked([o.flux for o in orders])
    var = _stacked([o.var for o in orders])
    n = flux.shape[1]
    # bad pixels grown by the reach of a reduction's interpolation, and cosmic-ray / hot-pixel
    # spikes against a running median (measure/badpixels.py, measure/outliers.py)
    if kernels.compiled() is not None if compiled is None else compiled:
        base_bad, bad, tie, cand = kernels.pixel_screen(flux, var, 3, 8.0, 0.5)   # find_spikes' defaults
        good = ~screened_bad_pixels(flux, bad, tie) & ~find_spikes(flux, var, screened=(base_bad, cand))
        given_ok = ~base_bad
    else:
        good = ~bad_pixels(flux, var) & ~find_spikes(flux, var)
        with np.errstate(invalid="ignore"):
            given_ok = np.isfinite(flux) & np.isfinite(var) & (var > 0)
    fast = kernels.compiled() is not None if compiled is None else compiled
    stride = max(1, n // 1024)   # the clipping iterations see every stride-th pixel only
    if fast:
        blaze, f, v, fs, vs = kernels.prepare_blaze(flux, var, good, [o.blaze for o in orders], stride)
    else:
        blaze = np.ones_like(flux)
        given = [k for k, o in enumerate(orders) if o.blaze is not None]
        if given:
            b = np.vstack([orders[k].blaze for k in given])
            usable = np.all((np.isfinite(b) & (b > 0)) | ~good[given], axis=1)
            rows = np.array(given)[usable]
            blaze[rows] = np.where(good[rows], b[usable], 1.0)
        f = np.where(good, flux, 0.0)
        v = np.where(good, var, 0.0)
        # divided by the blaze at the iterations' pixels alone
        bs = blaze[:, ::stride]
        fs, vs = f[:, ::stride] / bs, v[:, ::stride] / bs**2
    coef, used, stride, _ = _continuum_core(fs, vs, good[:, ::stride], degree, 2.0, 3.0, 10, n=n, compiled=compiled)
    enough = used.sum(axis=1) > degree + 1
    if fast:
        used = np.ascontiguousarray(used)
        cont, good, fn, vn, q = kernels.prepare_tail(coef, enough, _legendre_design(n, degree), blaze, good, f, v,
                                                     used, stride)
    else:
        cont = np.where(enough[:, None], coef @ _legendre_design(n, degree).T, np.nan) * blaze
        # photon weight q = 1 / var_f at continuum level = c^2 / (alpha c + beta): the variance of the
        # counts at the continuum, regressed linearly on the continuum (exact for photon + read noise),
        # on the same pixel subset as the continuum's clipping
        cs = cont[:, ::stride]
        gs = good[:, ::stride] & np.isfinite(cs) & (cs > 0)
        used &= gs
        w = used.astype(float)
        cs, vsub = np.where(gs, cs, 1.0), v[:, ::stride]
        nw = np.maximum(w.sum(axis=1), 1.0)
        mc = np.sum(w * cs, axis=1) / nw
        mv = np.sum(w * vsub, axis=1) / nw
        cov = np.sum(w * (cs - mc[:, None]) * (vsub - mv[:, None]), axis=1)
        scc = np.sum(w * (cs - mc[:, None]) ** 2, axis=1)
        alpha = np.where(scc > 0, cov / np.where(scc > 0, scc, 1.0), 0.0)
        good, fn, vn, q = _finish_numpy(f, v, good, cont, mc, mv, alpha, 0.25 * mv)
    usable = (good.sum(axis=1) >= max(32, 4 * (degree + 1))) & (used.sum(axis=1) * stride >= 10)
    keep = np.flatnonzero(usable)
    if keep.size == 0:
        return [None] * len(orders)
    every = keep.size == len(orders)
    wave = _stacked([orders[k].wave for k in keep])
    arrays = {"wave": wave, "edges": pixel_edges(wave)}
    for name, a in (("flux", fn), ("var", vn), ("weight", q), ("good", good), ("continuum", cont)):
        arrays[name] = a if every else a[keep]
    # pixels the file gives as usable (finite, positive variance) that the preparation masked
    arrays["rejected"] = np.count_nonzero(given_ok & ~good, axis=1)[keep]
    rows = {name: list(a) for name, a in arrays.items() if name != "rejected"}
    rows["wave"] = [orders[k].wave for k in keep]           # the orders keep the file's own wavelengths
    block = OrderBlock(arrays, rows)
    result: list[PreparedOrder | None] = [None] * len(orders)
    for j, k in enumerate(keep):
        result[k] = PreparedOrder(orders[k].wave, rows["edges"][j], rows["flux"][j], rows["var"][j],
                                  rows["weight"][j], rows["good"][j], orders[k].index, rows["continuum"][j], block, j)
    return result


def prepare_order(order: Order, *, degree: int = 4) -> PreparedOrder | None:
    """Prepare one order; None when too little of it is usable."""
    return _prepare_block([order], degree)[0]


def prepare_spectrum(spectrum: Spectrum, *, degree: int = 4) -> list[PreparedOrder]:
    """Prepare every usable order of a spectrum (orders with too few good pixels are skipped).

    Bad pixels (NaN flux, NaN or non-positive variance, zero inverse variance) get zero weight.
    Orders of equal length are processed together.
    """
    kernels.count_spectrum()
    by_len: dict[int, list[int]] = {}
    for k, o in enumerate(spectrum.orders):
        by_len.setdefault(o.flux.size, []).append(k)
    prepared: dict[int, PreparedOrder | None] = {}
    for idx in by_len.values():
        for k, p in zip(idx, _prepare_block([spectrum.orders[k] for k in idx], degree), strict=True):
            prepared[k] = p
    return [prepared[k] for k in sorted(prepared) if prepared[k] is not None]


def reject_telluric_lines(mask: LineMask, bands: np.ndarray, *, rv_star: float, berv_min: float,
                          berv_max: float, box_width: float, margin: float = 0.0) -> np.ndarray:
    """Which mask lines stay clear of telluric bands for every BERV in the batch's range.

    A stellar line at rest wavelength ``lambda_l`` appears in the observatory frame at
    ``lambda_l (1 + rv_star/c) / (1 + berv/c)`` (Wright & Eastman 2014 composition).  Over the batch's
    range of BERV it sweeps an interval; the line is rejected when that interval, widened by half
    the box width and ``margin`` (m/s), meets any band.

    Parameters
    ----------
    bands : ndarray, shape (n, 2)
        Vacuum wavelength intervals (Angstrom) of telluric bands, observatory frame.
    rv_star : float, m/s
        The star's approximate barycentric velocity.
    berv_min, berv_max : float, m/s
        Range of barycentric corrections over the batch.

    Returns
    -------
    keep : ndarray of bool
    """
    lam = mask.wavelength
    if bands.size == 0:
        return np.ones(lam.size, dtype=bool)
    half = 0.5 * box_width + margin
    lo = lam * (1 + rv_star / C_MS) / (1 + berv_max / C_MS) * (1 - half / C_MS)
    hi = lam * (1 + rv_star / C_MS) / (1 + berv_min / C_MS) * (1 + half / C_MS)
    start = np.sort(bands[:, 0])
    end = bands[np.argsort(bands[:, 0]), 1]
    # a line interval [lo, hi] meets band [s, e] when s <= hi and e >= lo
    idx = np.searchsorted(start, hi, side="right")  # bands with s <= hi are start[:idx]
    max_end = np.maximum.accumulate(end)
    hit = np.zeros(lam.size, dtype=bool)
    has = idx > 0
    hit[has] = max_end[idx[has] - 1] >= lo[has]
    return ~hit
