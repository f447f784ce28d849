"""Co-adding spectra in the star's frame: a high-SNR template on a fine log-wavelength grid.

Each prepared order (continuum-normalised flux, variance, photon weights) is shifted to the star's
rest frame by ``lambda_rest = lambda_obs * factor`` with ``factor = (1 + z_B) / (1 + z_star)``
(Wright & Eastman 2014 composition of the barycentric and the star's own shift), interpolated onto
a common grid uniform in ``ln lambda`` with a cubic B-spline in pixel-index space (exact at the
pixels, accurate to fourth order between them: linear interpolation would distort line profiles by
amounts that move velocities at the 0.1 m/s level), and averaged with the photon weights.  The
template keeps its own variance, the number of contributions per point, and flags for points near
an order edge or touched by a bad pixel, so later stages can avoid them.  Points that fall in a
telluric band in a spectrum's own (observatory) frame get no weight from that spectrum.

With ``per_order=True`` each order index gets a template of its own, co-added only from that same
order of every spectrum (kept as segments of the grid).  Where echelle orders overlap, the same
stellar lines sit in two orders whose continuum estimates differ (a steep blaze that the file does
not give leaves each order's normalisation wrong by a smooth, order-specific amount, the same in
every spectrum); a template mixing both orders there carries the mean of two continuum errors that
no order's own smooth polynomial can follow, so the fit of either order against it is biased.  Per
order, spectrum and template share their order's continuum error, and the multiplicative
polynomial of the template fit absorbs it.

Shared by ``lineshift mask`` (line finding, one template) and the template-matching engine (per order).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, replace

import numpy as np
from scipy.ndimage import spline_filter1d

from lineshift.measure import coadd_kernels
from lineshift.measure.prepare import PreparedOrder
from lineshift.model import C_MS

__all__ = ["Template", "TemplateAccumulator", "bspline", "bspline_reference", "bspline_value", "log_grid",
           "on_common_continuum", "pixel_steps", "reference_coefficients", "reject_above", "remembering",
           "value_tables"]

_BAD_REACH = 4  # pixels around a bad one that the spline prefilter's tail reaches (decays 0.27x per pixel)


#: Cubic B-spline basis in powers of t: weight of coefficient c[i-1+k] is sum_p _BSPLINE[p, k] t^p.
_BSPLINE = np.array([[1.0, 4.0, 1.0, 0.0], [-3.0, 0.0, 3.0, 0.0], [3.0, -6.0, 3.0, 0.0],
                     [-1.0, 3.0, -3.0, 1.0]]) / 6.0
_OFFSETS = np.array([-1, 0, 1, 2])


def bspline(coef: np.ndarray, x: np.ndarray, *, second: bool = False):
    """Uniform cubic B-spline value and derivative (per grid step) at fractional indices ``x``
    (and the second derivative with ``second=True``).

    ``coef`` are prefiltered coefficients (``scipy.ndimage.spline_filter1d(values, order=3)``), so
    the spline passes through the values at integer ``x``.  One gather of the four coefficients, a
    4x4 product into the power basis, then Horner's rule.
    """
    i = np.clip(np.floor(x).astype(np.intp), 1, coef.size - 3)
    t = x - i
    # the product with _BSPLINE written out (four gathers, no (..., 4) temporaries)
    c0, c1, c2, c3 = coef[i - 1], coef[i], coef[i + 1], coef[i + 2]
    q0 = (c0 + 4.0 * c1 + c2) / 6.0
    q1 = (c2 - c0) / 2.0
    q2 = (c0 - 2.0 * c1 + c2) / 2.0
    q3 = (3.0 * (c1 - c2) + c3 - c0) / 6.0
    value = q0 + t * (q1 + t * (q2 + t * q3))
    deriv = q1 + t * (2 * q2 + 3 * t * q3)
    if second:
        return value, deriv, 2 * q2 + 6 * t * q3
    return value, deriv


def value_tables(coef: np.ndarray) -> tuple[np.ndarray, ...]:
    """The power-basis coefficients of :func:`bspline` per interval of ``coef`` (interval i - 1 holds
    the cubic between points i and i + 1), for :func:`bspline_value`."""
    c0, c1, c2, c3 = coef[:-3], coef[1:-2], coef[2:-1], coef[3:]
    return ((c0 + 4.0 * c1 + c2) / 6.0, (c2 - c0) / 2.0, (c0 - 2.0 * c1 + c2) / 2.0,
            (3.0 * (c1 - c2) + c3 - c0) / 6.0)


def bspline_value(coef: np.ndarray, x: np.ndarray, tables: tuple | None = None) -> np.ndarray:
    """The value of :func:`bspline` alone (no derivative), the same numbers: the power-basis
    coefficients are formed once per interval of ``coef`` (or given: :func:`value_tables`) and
    gathered, which is cheaper where there are more points than intervals or many evaluations."""
    q0, q1, q2, q3 = value_tables(coef) if tables is None else tables
    i = np.clip(np.floor(x).astype(np.intp), 1, coef.size - 3)
    t = x - i
    k = i - 1
    return q0[k] + t * (q1[k] + t * (q2[k] + t * q3[k]))


def bspline_reference(coef: np.ndarray, x: np.ndarray):
    """Plain form of :func:`bspline` (value, derivative): the gather and the 4x4 basis product."""
    i = np.clip(np.floor(x).astype(np.intp), 1, coef.size - 3)
    t = x - i
    q = coef[i[..., None] + _OFFSETS] @ _BSPLINE.T
    powers = t[..., None] ** np.arange(4)
    return np.sum(q * powers, axis=-1), np.sum(q[..., 1:] * np.arange(1, 4) * powers[..., :3], axis=-1)


@dataclass(frozen=True)
class Template:
    """A co-added spectrum in the star's frame.

    Attributes
    ----------
    wave : ndarray, vacuum Angstrom (star's frame), uniform in ln(lambda)
    flux : ndarray, weighted mean normalised flux (NaN where nothing contributed)
    var : ndarray, variance of ``flux``
    count : ndarray of int, contributions (order-spectra) per point
    flagged : ndarray of bool, within ``edge_margin`` pixels of an order edge, or next to a bad pixel,
        in at least one contribution
    step : float, grid step in velocity (m/s)
    n_spectra : int
    pixel_step : float, median detector pixel width of the inputs in velocity (m/s)

    Notes
    -----
    ``var`` is the noise level a detector pixel at that point would have in the co-add (the
    interpolated per-pixel variances, averaged over the spectra), not the variance of the
    interpolated value: neighbouring template points share pixels, so a fit to template points
    must scale its errors by ``sqrt(pixel_step / step)`` (:attr:`correlation_factor`).
    """

    wave: np.ndarray
    flux: np.ndarray
    var: np.ndarray
    count: np.ndarray
    flagged: np.ndarray
    step: float
    n_spectra: int
    pixel_step: float = 0.0

    @property
    def correlation_factor(self) -> float:
        """Error inflation for fits that treat the oversampled template points as independent."""
        return float(np.sqrt(max(self.pixel_step / self.step, 1.0))) if self.pixel_step else 1.0


#: What :func:`on_common_continuum` and :func:`pixel_steps` gave for inputs they have seen, while
#: :func:`remembering` is on (the template engine's passes apply them to the same prepared orders
#: up to five times); keyed by the inputs' identity and holding them, so a key cannot be reused.
_MEMO: dict | None = None
_MEMO_BYTES = 0
#: Upper bound of the arrays the memo holds.
MEMO_BUDGET = 256 * 2**20


@contextmanager
def remembering() -> Iterator[None]:
    """Within the block, :func:`on_common_continuum` and :func:`pixel_steps` of the same inputs (the
    same list of orders, the same reference mapping) are made once; everything is dropped at its end."""
    global _MEMO, _MEMO_BYTES
    outer = _MEMO is not None
    if not outer:
        _MEMO, _MEMO_BYTES = {}, 0
    try:
        yield
    finally:
        if not outer:
            _MEMO, _MEMO_BYTES = None, 0


def _remembered(kind: str, inputs: tuple, make):
    global _MEMO_BYTES
    if _MEMO is None:
        return make()
    key = (kind, *map(id, inputs))
    hit = _MEMO.get(key)
    if hit is not None and all(a is b for a, b in zip(hit[0], inputs, strict=True)):
        return list(hit[1])
    out = make()
    size = sum(a.nbytes for o in out if isinstance(o, PreparedOrder) for a in (o.flux, o.var, o.weight))
    if _MEMO_BYTES + size <= MEMO_BUDGET:
        _MEMO[key] = (inputs, list(out))
        _MEMO_BYTES += size
    return out


def on_common_continuum(orders: list[PreparedOrder], reference: dict[int, np.ndarray] | None) -> list[PreparedOrder]:
    """The orders normalised by a continuum common to every spectrum instead of each one's own.

    Each spectrum's continuum fit carries its own noise, largest in relative terms where the counts
    are low (the ends of an order under a steep blaze).  Between two spectra each normalised by its
    own fit, that noise is a ratio of polynomials that the template fit's low-order polynomial
    cannot absorb, and broad lines (a fast rotator) turn it into velocity.  Dividing every spectrum
    of an order by the same ``reference[index]`` (counts per pixel, e.g. one spectrum's continuum)
    leaves between spectra only their true ratio of counts, which is smooth.  Flux and variance are
    scaled by ``r = continuum / reference``, the photon weight by ``1 / r^2``.  Orders without a
    reference of their length (or without a continuum) are returned as they are.  Whatever the
    reference misses of the true response (a steep blaze) is then common to every spectrum in the
    detector frame; :mod:`.response` estimates it, and the pipeline multiplies it into the reference.
    """
    if not reference:
        return orders
    return _remembered("common", (orders, reference), lambda: _on_common_continuum(orders, reference))


def _on_common_continuum(orders: list[PreparedOrder], reference: dict[int, np.ndarray]) -> list[PreparedOrder]:
    fast = coadd_kernels.active()
    out = []
    for o in orders:
        ref = reference.get(int(o.index))
        if ref is None or o.continuum is None or ref.size != o.flux.size:
            out.append(o)
            continue
        if fast is not None:   # the same operations in one loop (coadd_kernels)
            ok, flux, var, weight = fast.common_continuum(o.continuum, ref, o.good, o.flux, o.var, o.weight)
            out.append(replace(o, flux=flux, var=var, weight=weight, continuum=ref) if ok else o)
            continue
        with np.errstate(invalid="ignore", divide="ignore"):
            r = o.continuum / ref
        if not np.all(np.isfinite(r[o.good]) & (r[o.good] > 0)):
            out.append(o)
            continue
        r = np.where(o.good, r, 1.0)
        out.append(replace(o, flux=o.flux * r, var=o.var * r * r, weight=o.weight / (r * r), continuum=ref))
    return out


def pixel_steps(orders: list[PreparedOrder]) -> list[float]:
    """Median pixel width (m/s) of each order, in their order (orders of one length at once)."""
    return _remembered("steps", tuple(o.wave for o in orders), lambda: _pixel_steps(orders))


def _pixel_steps(orders: list[PreparedOrder]) -> list[float]:
    out = [0.0] * len(orders)
    fast = coadd_kernels.active()
    if fast is not None:   # order by order, the median by selection (coadd_kernels)
        buf = np.empty(max((o.wave.size for o in orders), default=1))
        return [float(fast.pixel_step(o.wave, C_MS, buf)) if o.wave.size > 1 else float("nan") for o in orders]
    by_len: dict[int, list[int]] = {}
    for pos, o in enumerate(orders):
        by_len.setdefault(o.wave.size, []).append(pos)
    for rows in by_len.values():
        w = np.vstack([orders[r].wave for r in rows])
        for r, step in zip(rows, np.median(C_MS * np.diff(w, axis=1) / w[:, 1:], axis=1), strict=True):
            out[r] = float(step)
    return out


def log_grid(lo: float, hi: float, step: float) -> np.ndarray:
    """Wavelengths from ``lo`` to ``hi`` (Angstrom) uniform in ln(lambda) with ``step`` m/s."""
    du = np.log1p(step / C_MS)
    return np.exp(np.arange(np.log(lo), np.log(hi), du))


class _Segment:
    """Sums over a contiguous part of the grid, from ``start``; grows to take what is added.

    The arrays are views of buffers with room on either side, so a segment that grows by a few
    points with each spectrum (their barycentric shifts differ) is copied only a few times."""

    _NAMES = ("sw", "swf", "sw2v", "count", "flagged")
    _TYPES = (float, float, float, np.int64, bool)

    def __init__(self, start: int, stop: int):
        self.start = self._base = start
        self._bufs = [np.zeros(stop - start, dtype=t) for t in self._TYPES]
        self._view(stop - start)

    def _view(self, n: int) -> None:
        off = self.start - self._base
        for name, buf in zip(self._NAMES, self._bufs, strict=True):
            setattr(self, name, buf[off:off + n])

    def cover(self, i0: int, i1: int) -> None:
        lo, hi = min(i0, self.start), max(i1, self.start + self.sw.size)
        if lo == self.start and hi == self.start + self.sw.size:
            return
        if lo < self._base or hi > self._base + self._bufs[0].size:
            room = max(64, (hi - lo) // 16)
            base = lo - room
            bufs = [np.zeros(hi - lo + 2 * room, dtype=t) for t in self._TYPES]
            off = self.start - base
            for new, name in zip(bufs, self._NAMES, strict=True):
                new[off:off + self.sw.size] = getattr(self, name)
            self._bufs, self._base = bufs, base
        self.start = lo
        self._view(hi - lo)


class TemplateAccumulator:
    """Accumulates orders onto a fixed grid; :meth:`result` gives the :class:`Template`.

    Streaming: one spectrum at a time is enough (memory is that of the grid).  With ``per_order``
    the sums are kept per order index (:attr:`segments`, each covering only that order's part of the
    grid) so that each order has a template of its own; :meth:`result` still gives their co-add.

    With ``levelled`` each order's contribution is divided by its median flux first (weights by its
    square), so spectra of different exposure levels (on a common continuum, flux is counts) enter at
    one level: a point where one spectrum is left out (a bad pixel, a cosmic ray) then shows no step
    of the level difference, and such points are not flagged (only order edges are).  Otherwise a
    point touched by a bad pixel of any contribution is flagged, which with many cosmic-ray hits in
    a batch takes a quarter of the template from every fit.
    """

    def __init__(self, grid: np.ndarray, *, edge_margin: int = 8, bands: np.ndarray | None = None,
                 per_order: bool = False, levelled: bool = False):
        self.grid = grid
        self.levelled = levelled
        self.lng = np.log(grid)
        self.step = float(C_MS * np.expm1(self.lng[1] - self.lng[0]))
        self.per_order = per_order
        self.segments: dict[int, _Segment] = {}
        if not per_order:
            self.segments[-1] = _Segment(0, grid.size)
        self.edge_margin = edge_margin
        self.bands = bands if bands is not None else np.zeros((0, 2))
        self._band_edges = (np.ascontiguousarray(self.bands[:, 0], dtype=float),
                            np.ascontiguousarray(self.bands[:, 1], dtype=float))
        self.n_spectra = 0
        self._pixel_steps: list[float] = []

    def _sums(self) -> _Segment:
        """All segments summed onto the whole grid."""
        if not self.per_order:
            return self.segments[-1]
        total = _Segment(0, self.grid.size)
        for seg in self.segments.values():
            sl = slice(seg.start, seg.start + seg.sw.size)
            for name in ("sw", "swf", "sw2v", "count"):
                getattr(total, name)[sl] += getattr(seg, name)
            total.flagged[sl] |= seg.flagged
        return total

    def contributions(self, orders: list[PreparedOrder], factor: float, band_factor: float = 1.0):
        """Per order: (order index, slice of the grid, weight, weight x flux, weight^2 x variance, flags)
        that :meth:`add` would accumulate for this spectrum.  Used to remove a spectrum from a template.

        ``band_factor`` is file-frame / observatory-frame wavelength (1 for a topocentric file,
        ``1 + BERV/c`` for a barycentric one): the telluric bands are placed in the observatory frame."""
        for c in self.contribution_list(orders, factor, band_factor):
            if c is not None:
                yield c

    def contribution_list(self, orders: list[PreparedOrder], factor: float, band_factor: float = 1.0) -> list:
        """:meth:`contributions` as a list aligned with ``orders`` (None for an order off the grid)."""
        lnf = np.log(factor)
        if coadd_kernels.active() is not None:
            return [self._contribution_fast(o, lnf, band_factor) for o in orders]
        return [self._contribution(o, lnf, band_factor) for o in orders]

    def _contribution_fast(self, o: PreparedOrder, lnf: float, band_factor: float):
        """:meth:`_contribution` by one compiled pass (:func:`.coadd_kernels.contribution`)."""
        if not o.good.any():   # nothing to fill the bad pixels from: as the plain form has it
            return self._contribution(o, lnf, band_factor)
        i0, i1, w, wf, w2v, flags = coadd_kernels.contribution(o, self.lng, lnf, self.edge_margin, self.levelled,
                                                               _BAD_REACH, self._band_edges, band_factor)
        if i1 <= i0:
            return None
        return o.index, slice(int(i0), int(i1)), w, wf, w2v, flags

    def _contribution(self, o: PreparedOrder, lnf: float, band_factor: float):
        """One order's contribution (plain form of :meth:`_contribution_fast`)."""
        u = np.log(o.wave) + lnf
        i0 = np.searchsorted(self.lng, u[0], side="left")
        i1 = np.searchsorted(self.lng, u[-1], side="right")
        if i1 <= i0:
            return None
        pts = self.lng[i0:i1]
        # fractional pixel index of each grid point (linear in ln lambda within a pixel)
        fidx = np.interp(pts, u, np.arange(u.size, dtype=float))
        j = np.minimum(fidx.astype(np.intp), u.size - 2)
        t = fidx - j
        good = o.good
        if not good.all():   # bad pixels: fill for the prefilter, keep clear of their reach
            idx = np.arange(good.size)
            filled = np.interp(idx, idx[good], o.flux[good])
            reach = np.convolve(~good, np.ones(2 * _BAD_REACH + 1), mode="same") > 0
            clean = good & ~reach
            ok = (clean[:-1] & clean[1:])[j]    # both pixels around the point good and out of reach
        else:
            filled, ok = o.flux, None
        coef = spline_filter1d(filled, order=3, mode="mirror")
        f = bspline_value(coef, fidx)
        v = (1 - t) * o.var[j] + t * o.var[j + 1]   # per-pixel noise level here (see Template)
        w = (1 - t) * o.weight[j] + t * o.weight[j + 1]
        if ok is not None:
            w = np.where(ok, w, 0.0)
        if self.levelled:   # on a common level: f / L, var / L^2, weight * L^2
            level = float(np.median(o.flux[good])) if good.any() else 1.0
            if np.isfinite(level) and level > 0:
                f, v, w = f / level, v / level**2, w * level**2
        if self.bands.size:
            near = self.bands[(self.bands[:, 1] >= o.wave[0]) & (self.bands[:, 0] <= o.wave[-1])]
            if near.size:
                lam_obs = np.exp(pts - lnf) / band_factor
                inband = np.zeros(pts.size, dtype=bool)
                for lo, hi in near:
                    inband |= (lam_obs >= lo) & (lam_obs <= hi)
                w = np.where(inband, 0.0, w)
        # j never decreases along the grid: the points near an order edge are a prefix and a suffix
        near_edge = np.ones(pts.size, dtype=bool)
        near_edge[np.searchsorted(j, self.edge_margin):np.searchsorted(j, o.flux.size - 2 - self.edge_margin,
                                                                         side="right")] = False
        if not self.levelled and ok is not None:
            near_edge |= ~ok
        return o.index, slice(i0, i1), w, w * f, w * w * v, near_edge

    def add(self, orders: list[PreparedOrder], factor: float, band_factor: float = 1.0, *,
            contributions: list | None = None) -> None:
        """Add one spectrum's orders, shifted by ``lambda_rest = lambda_obs * factor`` (``band_factor``:
        see :meth:`contributions`).  ``contributions``: what :meth:`contribution_list` gives for
        them, when it is at hand already."""
        self.n_spectra += 1
        self._pixel_steps.extend(pixel_steps(orders))
        if contributions is None:
            contributions = self.contribution_list(orders, factor, band_factor)
        fast = coadd_kernels.active()
        for c in contributions:
            if c is None:
                continue
            index, sl, w, wf, w2v, flags = c
            if self.per_order:
                seg = self.segments.get(index)
                if seg is None:
                    seg = self.segments[index] = _Segment(sl.start, sl.stop)
                seg.cover(sl.start, sl.stop)
                sl = slice(sl.start - seg.start, sl.stop - seg.start)
            else:
                seg = self.segments[-1]
            if fast is not None:   # the same sums in one loop
                fast.accumulate(seg.sw, seg.swf, seg.sw2v, seg.count, seg.flagged, sl.start, w, wf, w2v, flags)
                continue
            seg.sw[sl] += w
            seg.swf[sl] += wf
            seg.sw2v[sl] += w2v
            seg.count[sl] += (w > 0).astype(np.int64)
            seg.flagged[sl] |= flags

    def result(self) -> Template:
        s = self._sums()
        with np.errstate(invalid="ignore", divide="ignore"):
            flux = np.where(s.sw > 0, s.swf / s.sw, np.nan)
            var = np.where(s.sw > 0, s.sw2v / s.sw**2, np.nan)
        pixel = float(np.median(self._pixel_steps)) if self._pixel_steps else 0.0
        return Template(self.grid, flux, var, s.count.copy(), s.flagged.copy(), self.step, self.n_spectra,
                        pixel)


def reject_above(orders: list[PreparedOrder], ref: np.ndarray, segments: np.ndarray, lng0: float, dlng: float,
                 factor: float, *, nsigma: float = 8.0, half: int = 25, grow: int = 1,
                 coef: np.ndarray | None = None, tables: tuple | None = None) -> list[PreparedOrder]:
    """The orders with pixels far ABOVE a reference template marked bad (a cosmic-ray hit the spike
    finder missed, e.g. a double hit wider than its run limit).

    ``ref`` is a template's flux laid out as ``segments`` (rows: order index, first grid index,
    offset, length; index -1 serves every order) on the grid ``exp(lng0 + dlng * i)``, NaN where
    nothing contributed.  Each order is compared with the reference shifted by ``factor`` (as
    :meth:`TemplateAccumulator.add`) and scaled by the medians of their ratio in blocks of
    ``2 * half + 1`` pixels (interpolated between the blocks), which follows the smooth difference
    of counts and response between the spectrum and the co-add; a pixel more than ``nsigma`` noise
    sigma above that model is rejected, with ``grow`` neighbours each side.  Only excesses are
    rejected: cosmic rays are positive, and an absorption feature the reference lacks is spectrum,
    not a hit.  The rule is the significance test of :mod:`.outliers` against a given model (van
    Dokkum 2001, PASP 113, 1420) without its run limit: the reference is the star itself, so no real
    feature stands that far above it.
    Deterministic in its inputs, so a fit that removes a spectrum's own contribution recomputes
    exactly what the co-add used.  ``coef`` (:func:`reference_coefficients`) and ``tables``
    (:func:`value_tables` of them) can be given when the same reference serves many spectra.
    """
    if coef is None:
        coef = reference_coefficients(ref, segments)
    table = {int(k): (int(a), int(b), int(n)) for k, a, b, n in segments}
    ok_ref = np.isfinite(ref)
    lnf = np.log(factor)
    out = list(orders)
    if coadd_kernels.active() is not None:   # each order in one compiled pass (coadd_kernels.reject_order)
        coef = np.ascontiguousarray(coef, dtype=float)
        for pos, o in enumerate(orders):
            seg = table.get(-1, table.get(int(o.index)))
            if seg is None:
                continue
            start, off, n = seg
            hit, grown = coadd_kernels.reject_order(o, coef, ok_ref, lnf, lng0, dlng, start, off, n, half, nsigma,
                                                    grow)
            if hit:
                out[pos] = replace(o, good=o.good & ~grown)
        return out
    if tables is None:
        tables = value_tables(coef)
    todo: dict[int, list[tuple[int, np.ndarray, np.ndarray]]] = {}   # by length: (position, model, usable)
    for pos, o in enumerate(orders):
        seg = table.get(-1, table.get(int(o.index)))
        if seg is None:
            continue
        start, off, n = seg
        xi = (np.log(o.wave) + lnf - lng0) / dlng - start      # index within the segment
        inside = (xi > 1) & (xi < n - 3)
        xc = np.clip(xi, 1, n - 3) + off
        i0 = np.floor(xc).astype(np.intp)
        T = bspline_value(coef, xc, tables)
        usable = o.good & inside & ok_ref[i0] & ok_ref[i0 + 1] & (T > 0)
        if usable.sum() >= 2 * half + 1:
            todo.setdefault(o.flux.size, []).append((pos, T, usable))
    for rows in _blocks(todo.values()):   # the running medians of several orders of one length at once
        T = np.vstack([r[1] for r in rows])
        usable = np.vstack([r[2] for r in rows])
        flux = np.vstack([orders[r[0]].flux for r in rows])
        var = np.vstack([orders[r[0]].var for r in rows])
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(usable, flux / np.where(usable, T, 1.0), np.nan)
            scale = _block_median(ratio, 2 * half + 1)
            hit = usable & (flux - scale * T > nsigma * np.sqrt(var))
        grown = hit.copy()
        for k in range(1, grow + 1):
            grown[:, :-k] |= hit[:, k:]
            grown[:, k:] |= hit[:, :-k]
        for (pos, _, _), g in zip(rows, grown, strict=True):
            if g.any():
                out[pos] = replace(orders[pos], good=orders[pos].good & ~g)
    return out


#: Pixels per block of orders screened at once: temporaries below the size (128 KB) from which the C
#: allocator maps each new array afresh (page faults cost more than the arithmetic on them).
BLOCK_PIXELS = 16384


def _blocks(groups):
    """The lists in ``groups`` (items of one length: (position, model, usable)) cut into lists of at
    most :data:`BLOCK_PIXELS` pixels."""
    for rows in groups:
        step = max(BLOCK_PIXELS // rows[0][1].size, 1)
        for start in range(0, len(rows), step):
            yield rows[start:start + step]


def _block_median(x: np.ndarray, width: int) -> np.ndarray:
    """Per row, the medians of the finite values in blocks of ``width`` pixels, interpolated
    linearly between the block centres (a smooth curve through a slowly varying ratio)."""
    from lineshift.measure.outliers import median_of_finite

    rows, n = x.shape
    nb = max(n // width, 1)
    width = n // nb
    med = median_of_finite(x[:, :nb * width].reshape(rows * nb, width)).reshape(rows, nb)
    centre = (np.arange(nb) + 0.5) * width - 0.5
    out = np.full(x.shape, np.nan)
    for r in range(rows):
        ok = np.isfinite(med[r])
        if ok.any():
            out[r] = np.interp(np.arange(n), centre[ok], med[r, ok])
    return out


def reference_coefficients(ref: np.ndarray, segments: np.ndarray) -> np.ndarray:
    """Cubic B-spline coefficients of a reference template (:func:`reject_above`), each segment on
    its own, with the points where nothing contributed filled from their neighbours."""
    coef = np.ones_like(ref, dtype=float)
    for _, _, off, n in segments:
        f = ref[off:off + n]
        ok = np.isfinite(f)
        if ok.sum() < 4:
            continue
        idx = np.arange(n)
        coef[off:off + n] = spline_filter1d(np.interp(idx, idx[ok], f[ok]), order=3, mode="mirror")
    return coef
