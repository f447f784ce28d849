"""The mask-CCF velocity engine: automatic velocity search, peak fit and propagated errors.

Search: a coarse CCF over the whole velocity range with the strongest lines (box width equal to the
coarse step, so no line can fall between samples), the dip located and its width estimated, then a
fine CCF over +-``window_fwhm`` FWHM around it with all usable lines (those whose boxes meet no
bad pixel within ``CLEAR_FWHM`` of the centre), recentred once if the fitted centre moved.  All
velocities are in the observatory frame inside this module.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift.errors import MeasurementError
from lineshift.linefit import weighted_line
from lineshift.measure import kernels
from lineshift.measure.ccf import correlate
from lineshift.measure.peak import fit_gaussian
from lineshift.measure.prepare import PreparedOrder, block_rows
from lineshift.measure.profile import bisector, order_velocities
from lineshift.measure.recentre import line_moments
from lineshift.model import C_MS, CCFResult, LineMask

__all__ = ["SearchSettings", "measure_mask"]


@dataclass(frozen=True)
class SearchSettings:
    """Options of the mask engine (velocities in m/s; ``None`` means automatic).

    Attributes
    ----------
    velocity_range : (lo, hi) or None
        Barycentric velocities to search; default -300 to +300 km/s.
    velocity_step : float or None
        Step of the fine grid; default one pixel in velocity.
    box_width : float or None
        Full velocity width of each mask box; default one pixel in velocity.
    coarse_lines : int
        Number of strongest lines used in the coarse search.
    window_fwhm : float
        Half-width of the fine grid in units of the coarse FWHM estimate (continuum on both sides).
    min_significance : float
        A coarse dip shallower than this many robust standard deviations of the CCF is no peak.
    """

    velocity_range: tuple[float, float] | None = None
    velocity_step: float | None = None
    box_width: float | None = None
    coarse_lines: int = 300
    window_fwhm: float = 3.0
    min_significance: float = 6.0


DEFAULT_RANGE = (-300_000.0, 300_000.0)
#: Lines of the fine CCF must be clear of bad pixels within this many FWHM of the dip's centre; farther
#: out (the CCF's continuum, where the fitted centre hardly responds) a bad pixel only leaves the line out
#: of the velocities its box covers it at.  Fewer lines lost to a cosmic ray than clearing the whole grid.
CLEAR_FWHM = 2.0


def pixel_velocity_width(orders: list[PreparedOrder]) -> float:
    """Median width of one pixel in velocity, m/s (from every 8th pixel: plenty for a median)."""
    # np.diff(o.edges)[::8] without the differences left out; a block's rows all at once
    E, W = block_rows(orders, "edges"), block_rows(orders, "wave")
    if E is not None and W is not None:
        return float(np.median(C_MS * (E[:, 1::8] - E[:, :-1:8]) / W[:, ::8]))
    return float(np.median(np.concatenate([C_MS * (o.edges[1::8] - o.edges[:-1:8]) / o.wave[::8] for o in orders])))


def _good_snr(orders: list[PreparedOrder]) -> np.ndarray:
    """flux / sigma at every 4th good pixel of each order (plenty for the median SNR per pixel)."""
    if kernels.compiled() is not None:
        F, V, G = (block_rows(orders, a) for a in ("flux", "var", "good"))
        if F is not None and V is not None and G is not None:
            return kernels.good_snr(F, V, G, 4)
    out = []
    for o in orders:
        at = np.flatnonzero(o.good)[::4]
        out.append(o.flux[at] / np.sqrt(o.var[at]))
    return np.concatenate(out)


def _to_topo(v_bary: float, berv: float) -> float:
    return C_MS * ((1 + v_bary / C_MS) / (1 + berv / C_MS) - 1)


@dataclass(frozen=True)
class CoarseCCF:
    """The coarse search's CCF: grid (m/s, observatory frame), values, robust level and noise."""

    grid: np.ndarray
    ccf: np.ndarray
    base: float
    noise: float
    step: float

    def half_width(self, i: int) -> float:
        """FWHM (m/s) of the dip at grid index ``i``, walking out to half its depth."""
        y, half = self.ccf, self.base - 0.5 * (self.base - self.ccf[i])
        left, right = i, i
        while left > 0 and y[left] < half:
            left -= 1
        while right < y.size - 1 and y[right] < half:
            right += 1
        return max((right - left) * self.step, 2 * self.step)


def coarse_ccf(orders, mask, settings: SearchSettings, berv: float, dv_pix: float, path, *,
               all_lines: bool = False, sums: dict | None = None) -> CoarseCCF:
    """CCF over the whole (barycentric) search range on a grid of two pixels, box = step.

    ``all_lines=False`` uses the ``coarse_lines`` strongest lines (enough to find one star);
    a faint secondary needs them all (:mod:`.sb2`).
    """
    lo, hi = settings.velocity_range or DEFAULT_RANGE
    lo, hi = _to_topo(lo, berv), _to_topo(hi, berv)
    step = max(2.0 * dv_pix, 500.0)
    grid = np.arange(lo, hi + 0.5 * step, step)
    if grid.size < 8:
        raise MeasurementError("velocity range is narrower than eight coarse steps", path=path,
                               status="velocity range too narrow")
    lines = None if all_lines else np.sort(np.argsort(mask.weight)[::-1][: settings.coarse_lines])
    data = correlate(orders, mask, grid, max(step, settings.box_width or dv_pix), lines=lines, sums=sums,
                     values_only=True)
    if not data.n_orders:
        raise MeasurementError("no mask line falls on the spectrum", path=path, status="outside mask range")
    y = data.ccf
    base = float(np.median(y))
    return CoarseCCF(grid, y, base, float(1.4826 * np.median(np.abs(y - base))), step)


def _coarse(orders, mask, settings, berv, dv_pix, path, sums=None):
    c = coarse_ccf(orders, mask, settings, berv, dv_pix, path, sums=sums)
    i = int(np.argmin(c.ccf))
    depth = c.base - c.ccf[i]
    if not np.isfinite(depth) or c.noise <= 0 or depth < settings.min_significance * c.noise:
        raise MeasurementError(
            f"no correlation peak (deepest dip {depth / c.noise if c.noise > 0 else 0:.1f} sigma)",
            path=path, status="no correlation peak")
    return float(c.grid[i]), float(c.half_width(i))


def measure_mask(orders: list[PreparedOrder], mask: LineMask, settings: SearchSettings, *,
                 berv: float = 0.0, path: str | None = None, moments: list | None = None) -> CCFResult:
    """Velocity of one prepared spectrum against a line mask (observatory frame).

    Parameters
    ----------
    orders : list of PreparedOrder
    mask : LineMask
        Rest vacuum wavelengths and weights.
    settings : SearchSettings
    berv : float, m/s
        Barycentric correction of this spectrum; only used to place the (barycentric) search range.
    moments : list, optional
        If given, the per-line offset coefficients of the final fine CCF are appended to it
        (:func:`.recentre.line_moments`), for a batch to recentre its mask on.

    Returns
    -------
    CCFResult
        ``rv`` is the topocentric velocity (``rv_topo``), with its propagated 1-sigma error.

    Raises
    ------
    MeasurementError
        No mask line on the spectrum, no significant correlation dip, or a failed peak fit.
    """
    if not orders:
        raise MeasurementError("no usable order (too few valid pixels)", path=path, status="no valid pixels")
    dv_pix = pixel_velocity_width(orders)
    box = settings.box_width or dv_pix
    sums: dict = {}   # each order's cumulative sums, shared by the coarse and the fine grids
    centre, fwhm = _coarse(orders, mask, settings, berv, dv_pix, path, sums)
    step = settings.velocity_step or dv_pix
    for _attempt in range(3):
        half = max(settings.window_fwhm * fwhm, 8 * step)
        n = int(np.ceil(half / step))
        grid = centre + step * np.arange(-n, n + 1)
        clear = (centre - CLEAR_FWHM * fwhm, centre + CLEAR_FWHM * fwhm)
        data = correlate(orders, mask, grid, box, clear_of_bad=clear, sums=sums, keep_lines=moments is not None)
        if not data.terms:
            raise MeasurementError("no mask line falls on the spectrum", path=path,
                                   status="outside mask range")
        fit = fit_gaussian(grid, data.ccf, path=path)
        moved = abs(fit.mu - centre)
        centre, fwhm = fit.mu, fit.fwhm
        if moved < 0.25 * half:
            break
    if moments is not None:
        moments.append(line_moments(data, fit.mu, fit.sigma, fit.gain[2]))
    sens = fit.sensitivities()
    bis = bisector(grid, data.ccf, fit.c0, fit.amp)
    sens["bis"] = bis.sensitivity + bis.d_c0 * fit.gain[0] + bis.d_amp * fit.gain[1]
    ccfs = [c for _, c in data.order_ccf()]
    order_rv, gains = order_velocities(grid, ccfs, fit.c0, fit.amp, fit.mu, fit.sigma)
    order_ok = np.isfinite(order_rv) & np.all(np.isfinite(gains), axis=1)
    var, order_var = data.variances(np.stack(list(sens.values())), np.where(order_ok[:, None], gains, 0.0))
    errs = {k: float(np.sqrt(v)) for k, v in zip(sens, var, strict=True)}
    order_rows, slope, slope_err = _per_order(data, order_rv, np.where(order_ok, np.sqrt(order_var), np.nan))
    good_snr = _good_snr(orders)
    return CCFResult(
        rv=fit.mu, rv_err=errs["rv"], fwhm=fit.fwhm, fwhm_err=errs["fwhm"], contrast=fit.contrast,
        contrast_err=errs["contrast"], snr=float(np.median(good_snr)), n_lines=data.n_lines,
        n_orders=len(data.terms), velocity=grid, ccf=data.ccf, model=fit.model,
        bis_span=bis.span, bis_span_err=errs["bis"] if np.isfinite(bis.span) else float("nan"),
        chromatic_slope=slope, chromatic_slope_err=slope_err, bisector=(bis.depth, bis.velocity),
        orders=tuple(order_rows))


def _per_order(data, rv, err):
    """Per-order rows, and the slope of the per-order velocities against ln(wavelength)."""
    ok = np.isfinite(rv) & np.isfinite(err)
    rows = []
    if data.terms:   # each order's weight-averaged line wavelength, every order at once
        sizes = np.array([t.lines.size for t in data.terms])
        starts = np.concatenate(([0], np.cumsum(sizes)[:-1]))
        ww = np.concatenate([t.weights for t in data.terms])
        lam_all = np.add.reduceat(np.concatenate([t.line_wavelengths for t in data.terms]) * ww, starts) / \
            np.add.reduceat(ww, starts)
    for k, t in enumerate(data.terms):
        rows.append({"order": int(t.order.index), "wavelength": float(lam_all[k]), "rv": float(rv[k]),
                     "rv_err": float(err[k]), "n_lines": int(sizes[k])})
    use = ok & np.isfinite(err) & (err > 0)
    # a velocity far outside its neighbours' (a failed order fit) would dominate the slope: drop > 10 sigma
    if use.sum() >= 3:
        med = np.median(rv[use])
        use &= np.abs(rv - med) < 10 * np.maximum(err, 1e-9) + 5 * 1.4826 * np.median(np.abs(rv[use] - med))
    if use.sum() < 3:
        return rows, float("nan"), float("nan")
    x = np.log(np.array([r["wavelength"] for r in rows])[use] / 5500.0)
    coef, cov = weighted_line(x, rv[use], err[use])
    return rows, float(coef[1]), float(np.sqrt(cov[1, 1]))
