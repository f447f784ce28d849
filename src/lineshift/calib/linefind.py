"""Absorption lines of a co-added template: find, fit, reject, weight.

Finding: local minima of the template (smoothed by half a line's sigma) deeper than ``min_depth``
(and than 5 sigma of the template noise).  Fitting: each line's core (+-``core_fwhm`` FWHM around
its minimum) with a Gaussian on a constant, all lines at once by batched Gauss-Newton with the
template's variances; the centre error is the fit's (sqrt of the covariance diagonal).

Rejections, each counted by reason:
  ``edge``      the line's window touches an order edge, a bad pixel, or a point without coverage;
  ``fit``       the fit did not converge to a dip of sensible width inside its window;
  ``shallow``   the fitted depth is below ``min_depth`` (the raw minimum was not);
  ``telluric``  a telluric band reaches the line for some BERV of the inputs;
  ``blend``     another minimum within ``blend_fraction`` x FWHM of the line (both are rejected), or
                a line wider than ``max_width_ratio`` x the median FWHM of lines of its depth (an
                unresolved blend), or than 1 + 3 x the robust spread of that ratio when the star's
                lines differ more among themselves;
  ``centre``    the centre error exceeds ``max_centre_error`` (m/s);
  ``absent``, ``outside``  only when re-measuring given lines (:func:`measure_lines`);
  ``inconsistent`` set by the mask builder when refining a starting mask.

Weights (velocity information, in the spirit of the quality factor of Bouchy, Pepe & Queloz 2001):
a line's photon-limited velocity information grows with its depth and its sharpness, so the weight
is ``depth x (median width / width)``, normalised to 1 for the best line.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from lineshift.linefit import batched_fit, gaussian_points
from lineshift.measure.coadd import Template
from lineshift.measure.peak import FWHM_PER_SIGMA
from lineshift.measure.prepare import PreparedOrder, reject_telluric_lines
from lineshift.model import C_MS, LineMask

__all__ = ["FoundLines", "LineSettings", "expected_error_per_snr", "find_lines", "follow_continuum",
           "measure_lines"]

REASONS = ("fit", "shallow", "blend", "edge", "telluric", "centre", "absent", "outside", "inconsistent")


@dataclass(frozen=True)
class LineSettings:
    """Options of line finding (velocities in m/s)."""

    min_depth: float = 0.05
    blend_fraction: float = 1.0
    max_width_ratio: float = 1.25
    max_centre_error: float = 100.0
    core_fwhm: float = 0.6
    min_significance: float = 5.0


@dataclass
class FoundLines:
    """Every candidate line with its fit and fate."""

    wavelength: np.ndarray      # fitted centre, Angstrom (template frame)
    centre_err: np.ndarray      # m/s
    depth: np.ndarray           # fitted depth below the local continuum (0..1)
    fwhm: np.ndarray            # m/s
    reason: np.ndarray          # '' for kept lines, else one of REASONS
    weight: np.ndarray = field(default_factory=lambda: np.zeros(0))

    @property
    def kept(self) -> np.ndarray:
        return self.reason == ""

    def counts(self) -> dict[str, int]:
        out = {"kept": int(self.kept.sum())}
        out.update({r: int(np.sum(self.reason == r)) for r in REASONS})
        return out

    def mask(self, source: str = "", provenance: tuple[str, ...] = ()) -> LineMask:
        k = self.kept
        return LineMask(self.wavelength[k], self.weight[k], (), source, provenance)


_SPLINE_CACHE: dict[tuple[int, int], tuple[np.ndarray, np.ndarray, np.ndarray]] = {}


def _spline_design(n: int, n_intervals: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cubic B-spline basis on pixels 0..n-1 with ``n_intervals`` equal knot intervals, as the four
    non-zero basis indices and values per pixel (n x 4 each), and the second-difference penalty
    matrix D^T D of the coefficients."""
    key = (n, n_intervals)
    if key not in _SPLINE_CACHE:
        from scipy.interpolate import BSpline

        if len(_SPLINE_CACHE) > 16:
            _SPLINE_CACHE.clear()
        inner = np.linspace(0.0, n - 1.0, n_intervals + 1)
        t = np.concatenate(([inner[0]] * 3, inner, [inner[-1]] * 3))
        B = BSpline.design_matrix(np.arange(n, dtype=float), t, 3).toarray()
        m = B.shape[1]
        idx = np.clip(np.argmax(B > 0, axis=1), 0, m - 4)[:, None] + np.arange(4)[None, :]
        vals = np.take_along_axis(B, idx, axis=1)
        D = np.diff(np.eye(m), 2, axis=0)
        _SPLINE_CACHE[key] = (idx, vals, D.T @ D)
    return _SPLINE_CACHE[key]


def follow_continuum(orders: list[PreparedOrder], *, knot_pixels: int = 128, clip_low: float = 2.0,
                     clip_high: float = 3.0, max_iter: int = 10) -> list[PreparedOrder]:
    """Re-normalise prepared orders by a smooth upper envelope that can follow a steep blaze.

    A low-degree polynomial continuum cannot follow a blaze that falls to a few per cent at the
    order ends when the file gives none; the normalised flux then sinks towards the ends, and a
    co-added template shows broad false dips there.  This fits the residual continuum of each
    normalised order with a cubic B-spline (knots every ``knot_pixels`` pixels, a light
    second-difference penalty so sparse stretches stay smooth: P-splines, Eilers & Marx 1996,
    Statist. Sci. 11, 89) with iterative asymmetric sigma clipping (lines below, spikes above:
    common practice in continuum normalisation), and divides it out.  Variances scale with the
    square of the correction, photon weights with the correction (photon noise: the weight is
    proportional to the continuum counts).  Pixels where the correction is below 5 % are dropped.
    """
    out: list[PreparedOrder] = []
    for o in orders:
        n = o.flux.size
        n_int = max(1, round((n - 1) / knot_pixels))
        if n < 4 * n_int + 8:
            out.append(o)
            continue
        idx, vals, P = _spline_design(n, n_int)
        m = P.shape[0]
        # normal equations by bincount over each pixel's four basis functions (no BLAS call: a
        # threaded BLAS is slow on matrices this small when the cores are shared)
        pair = (idx[:, :, None] * m + idx[:, None, :]).reshape(n, 16)
        vv = (vals[:, :, None] * vals[:, None, :]).reshape(n, 16)
        g = o.good & np.isfinite(o.flux) & np.isfinite(o.var)
        y = np.where(g, o.flux, 0.0)
        v = np.where(g, o.var, 0.0)
        used = g.copy()
        fit = np.ones(n)
        for _ in range(max_iter):
            if used.sum() < m + 2:
                break
            A = np.bincount(pair[used].ravel(), vv[used].ravel(), minlength=m * m).reshape(m, m)
            b = np.bincount(idx[used].ravel(), (vals[used] * y[used, None]).ravel(), minlength=m)
            tr = np.trace(A)
            coef = np.linalg.solve(A + 1e-3 * tr / m * P + 1e-12 * tr * np.eye(m), b)
            fit = np.sum(vals * coef[idx], axis=1)
            resid = y - fit
            scatter2 = max(float(np.mean(resid[used] ** 2 - v[used])), 0.0)
            sigma = np.sqrt(v + scatter2)
            new = g & (resid > -clip_low * sigma) & (resid < clip_high * sigma)
            changed = np.count_nonzero(new != used)
            used = new
            if changed <= max(1, n // 1000):
                break
        ok = g & np.isfinite(fit) & (fit > 0.05)
        r = np.where(ok, fit, 1.0)
        out.append(PreparedOrder(o.wave, o.edges, np.where(ok, o.flux / r, 0.0), np.where(ok, o.var / r**2, 0.0),
                                 np.where(ok, o.weight * r, 0.0), ok, o.index))
    return out


def _width_trend(depth: np.ndarray, fwhm: np.ndarray, use: np.ndarray) -> np.ndarray:
    """Typical FWHM of a line of each depth: a running median of the usable lines' FWHM ordered by
    depth (windows of a fifth of them, at least 11), interpolated at every line's depth.

    Strong lines are wider than weak ones (saturated cores, damping wings: the curve of growth,
    Gray ch. 16), so an unresolved blend shows as a width excess over lines of the same depth, not
    over all lines.  With fewer than 11 usable lines the overall median is used."""
    d, f = depth[use], fwhm[use]
    if d.size < 11:
        return np.full(depth.size, np.median(f))
    o = np.argsort(d)
    d, f = d[o], f[o]
    half = max(5, d.size // 10)
    med = np.array([np.median(f[max(0, i - half):i + half + 1]) for i in range(d.size)])
    return np.interp(depth, d, med)


def _smoothed(flux: np.ndarray, sigma_points: float) -> np.ndarray:
    """Gaussian-smoothed flux (NaN stays NaN; gaps do not leak into their neighbours' values)."""
    from scipy.ndimage import gaussian_filter1d

    if sigma_points < 0.5:
        return flux
    ok = np.isfinite(flux)
    num = gaussian_filter1d(np.where(ok, flux, 0.0), sigma_points, mode="nearest")
    den = gaussian_filter1d(ok.astype(float), sigma_points, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(ok & (den > 0.5), num / den, np.nan)


def _local_minima(flux: np.ndarray) -> np.ndarray:
    f = np.where(np.isfinite(flux), flux, np.inf)
    return np.flatnonzero((f[1:-1] < f[:-2]) & (f[1:-1] <= f[2:])) + 1


def find_lines(template: Template, settings: LineSettings, *, fwhm_guess: float,
               bands: np.ndarray | None = None, berv_range: tuple[float, float] = (0.0, 0.0),
               rv_star: float = 0.0) -> FoundLines:
    """Find, fit, reject and weight the template's absorption lines.

    Parameters
    ----------
    template : Template
    settings : LineSettings
    fwhm_guess : float, m/s
        Typical line FWHM (e.g. from a first CCF), sets the fit windows.
    bands : ndarray (n, 2), optional
        Telluric bands (vacuum Angstrom, observatory frame).
    berv_range : (min, max), m/s
        Range of BERV over the inputs, for the telluric test.
    rv_star : float, m/s
        Barycentric velocity of the template frame relative to the laboratory frame (approximate),
        for the telluric test.
    """
    _, minima, depth0, noise = _minima(template, fwhm_guess)
    cand = minima[(depth0 > settings.min_depth) & (depth0 > settings.min_significance * noise)]
    # neighbours that can still blend: half the depth limit, but clear of the noise (3 sigma)
    weak = minima[(depth0 > 0.5 * settings.min_depth) & (depth0 > 3.0 * noise)]
    return _fit_lines(template, cand, weak, settings, fwhm_guess, bands, berv_range, rv_star)


def _minima(template: Template, fwhm_guess: float):
    """Minima of the template smoothed by a Gaussian of half a line's sigma (noise can no longer
    split one line's core into two minima, which the blend test would reject; a line broadens by
    only sqrt(1.25)), with their depths and the template noise there."""
    smooth = _smoothed(template.flux, 0.5 * fwhm_guess / FWHM_PER_SIGMA / template.step)
    minima = _local_minima(smooth)
    depth0 = 1.0 - smooth[minima]
    var = template.var[minima]
    noise = np.sqrt(np.where(np.isfinite(var), var, np.inf))
    return smooth, minima, depth0, noise


def measure_lines(template: Template, wavelength: np.ndarray, settings: LineSettings, *, fwhm_guess: float,
                  bands: np.ndarray | None = None, berv_range: tuple[float, float] = (0.0, 0.0),
                  rv_star: float = 0.0) -> FoundLines:
    """Re-measure given lines (a starting mask, template frame) on the template.

    Each line is fitted in a window centred on its given wavelength, exactly as :func:`find_lines`
    fits the minima it finds, and judged by the same tests, with two more reasons:
    ``outside`` (the template does not cover the line at all) and ``absent`` (no line of the star
    there: the fit failed, the dip at the given position is shallower than ``min_significance``
    times the template noise, or the fitted centre left the given position by more than a quarter
    of the line width, i.e. it found a neighbour; of two given lines that land on the same
    template line, the farther one).
    """
    wavelength = np.asarray(wavelength, dtype=float)
    n = template.wave.size
    lnw = np.log(template.wave)
    u = np.log(wavelength)
    pos = (u - lnw[0]) / (lnw[1] - lnw[0]) if n > 1 else np.zeros(wavelength.size)
    cand = np.clip(np.rint(pos).astype(np.intp), 0, n - 1)
    covered = (pos >= 0) & (pos <= n - 1)
    covered[covered] = np.isfinite(template.flux[cand[covered]])
    _, minima, depth0, noise = _minima(template, fwhm_guess)
    weak = minima[(depth0 > 0.5 * settings.min_depth) & (depth0 > 3.0 * noise)]
    out = _fit_lines(template, cand, weak, settings, fwhm_guess, bands, berv_range, rv_star,
                     start=wavelength, covered=covered)
    return out


def _fit_lines(template, cand, weak, settings, fwhm_guess, bands, berv_range, rv_star, *, start=None,
               covered=None) -> FoundLines:
    """Fit, judge and weight lines at template indices ``cand`` (see :func:`find_lines`); with
    ``start`` (given wavelengths) also the ``outside`` and ``absent`` tests of :func:`measure_lines`."""
    flux, var = template.flux, template.var
    half = max(2, int(np.ceil(settings.core_fwhm * fwhm_guess / template.step)))
    k = np.arange(-half, half + 1)
    n = template.wave.size
    idx = np.clip(cand[:, None] + k[None, :], 0, n - 1)
    inside = (cand[:, None] + k[None, :] >= 0) & (cand[:, None] + k[None, :] < n)
    y = np.where(inside, flux[idx], 1.0)
    v = var[idx]
    good = inside & np.isfinite(y) & np.isfinite(v) & (v > 0) & ~template.flagged[idx] & (template.count[idx] > 0)
    w = np.where(good, 1.0 / np.where(good, v, 1.0), 0.0)
    y = np.where(good, y, 1.0)
    x = k * template.step
    sigma0 = fwhm_guess / FWHM_PER_SIGMA
    a0 = np.where(np.isfinite(flux[cand]), 1.0 - flux[cand], 0.1) if cand.size else np.zeros(0)
    p0 = np.column_stack((np.ones(cand.size), a0, np.zeros(cand.size), np.full(cand.size, sigma0)))
    if cand.size:
        p, cov, _, ok = batched_fit(gaussian_points(x), p0, y, w, positive=(3,))
    else:
        p, cov, ok = np.zeros((0, 4)), np.zeros((0, 4, 4)), np.zeros(0, dtype=bool)
    c0, a, mu, s = p.T if cand.size else (np.zeros(0),) * 4
    # template points are oversampled and share pixels: scale the independent-point errors
    mu_err = template.correlation_factor * np.sqrt(np.abs(cov[:, 2, 2])) if cand.size else np.zeros(0)
    lam = template.wave[cand] * (1 + mu / C_MS)
    fwhm = FWHM_PER_SIGMA * s
    depth = np.where(c0 > 0, a / np.where(c0 > 0, c0, 1.0), 0.0)
    reason = np.full(cand.size, "", dtype=object)
    # a fit far wider than the lines is not a failure but an unresolved blend (the width test below)
    fitbad = ~ok | (a <= 0) | (c0 <= 0) | (np.abs(mu) > x[-1]) | (s < 0.25 * sigma0)
    edge = ~np.all(good | ~inside, axis=1) | ~np.all(inside, axis=1)
    reason[edge] = "edge"  # a fit to a window that is not fully covered means nothing
    if start is not None:
        reason[~covered] = "outside"
        moved = np.abs(C_MS * (lam / np.where(start > 0, start, 1.0) - 1)) > 0.25 * fwhm_guess
        # the dip at the given position, as find_lines asks of a minimum: deeper than
        # min_significance x the template noise (the core fit alone cannot tell the depth's error:
        # its window does not reach the continuum)
        smooth = _smoothed(flux, 0.5 * sigma0 / template.step)
        with np.errstate(invalid="ignore"):
            dip = 1.0 - smooth[cand]
            faint = ~(dip > settings.min_significance * np.sqrt(var[cand]))
        absent = fitbad | faint | moved
        reason[(reason == "") & absent] = "absent"
        lam = np.where(reason == "absent", start, lam)
    reason[(reason == "") & fitbad] = "fit"
    reason[(reason == "") & (depth < settings.min_depth)] = "shallow"
    if bands is not None and bands.size and cand.size:
        m = LineMask(lam, np.ones(cand.size))
        keep = reject_telluric_lines(m, bands, rv_star=rv_star, berv_min=berv_range[0], berv_max=berv_range[1],
                                     box_width=2 * np.nanmedian(fwhm), margin=1000.0)
        reason[(reason == "") & ~keep] = "telluric"
    # blends: another minimum (even a weak one) within blend_fraction x FWHM of this line
    pos = np.log(template.wave)
    lnw = pos[weak]
    unfit = (reason == "fit") | (reason == "edge")
    own = np.log(np.where(unfit, template.wave[cand], lam))
    width = settings.blend_fraction * np.where(unfit, fwhm_guess, fwhm) / C_MS
    lo = np.searchsorted(lnw, own - width, side="left")
    hi = np.searchsorted(lnw, own + width, side="right")
    blend = (hi - lo) > 1
    ok_w = reason == ""
    if ok_w.any():
        # wider than lines of the same depth by more than max_width_ratio, or by more than 3x the
        # robust spread of the widths when the star's lines differ that much among themselves
        rel = fwhm / _width_trend(depth, fwhm, ok_w)
        spread = 1.4826 * np.median(np.abs(rel[ok_w] - np.median(rel[ok_w])))
        blend |= rel > max(settings.max_width_ratio, 1.0 + 3.0 * spread)
    reason[(reason == "") & blend] = "blend"
    reason[(reason == "") & ~(mu_err <= settings.max_centre_error)] = "centre"
    if start is not None:   # two given lines on one template line: the one given nearer it stays
        kept = np.flatnonzero(reason == "")
        kept = kept[np.argsort(lam[kept])]
        off = np.abs(np.log(lam / start))
        close = np.flatnonzero(np.diff(np.log(lam[kept])) < 0.25 * fwhm_guess / C_MS)
        for i in close:
            a_, b_ = kept[i], kept[i + 1]
            reason[b_ if off[b_] > off[a_] else a_] = "absent"
    kept = reason == ""
    weight = np.zeros(cand.size)
    if kept.any():
        med = np.median(fwhm[kept])
        weight[kept] = depth[kept] * med / fwhm[kept]
        weight[kept] /= weight[kept].max()
    reason = reason.astype(str)
    return FoundLines(lam, mu_err, depth, fwhm, reason, weight)


def expected_error_per_snr(template: Template, pixel_step: float | None = None) -> float:
    """Photon-limited velocity error (m/s) at SNR 1 per pixel, from the template (Bouchy et al. 2001).

    For continuum counts ``N = SNR^2`` the bound is ``1 / sqrt(sum_i (dA_i/dv)^2 / A_i)`` with
    ``A = N f``, summed over detector pixels (``pixel_step`` m/s) rather than template points; divide
    by the SNR to get the error at that SNR.  The template's own noise makes this slightly optimistic.
    """
    pixel_step = pixel_step or template.pixel_step or template.step
    f = template.flux
    ok = np.isfinite(f) & (f > 0) & ~template.flagged
    df = np.gradient(np.where(ok, f, 1.0), template.step)
    info = np.sum(np.where(ok, df * df / np.where(ok, f, 1.0), 0.0)) * template.step / pixel_step
    return float(1.0 / np.sqrt(info)) if info > 0 else float("inf")
