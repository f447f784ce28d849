"""Absorption lines of a co-added template: find, fit, reject, weight.

Finding: local minima of the template deeper than ``min_depth`` (and than 5 sigma of the template
noise).  Fitting: each line's core (+-``core_fwhm`` FWHM around its minimum) with a Gaussian on a
constant, all lines at once by batched Gauss-Newton with the template's variances; the centre error
is the fit's (sqrt of the covariance diagonal).

Rejections, each counted by reason:
  ``edge``      the line's window touches an order edge, a bad pixel, or a point without coverage;
  ``fit``       the fit did not converge to a dip of sensible width inside its window;
  ``shallow``   the fitted depth is below ``min_depth`` (the raw minimum was not);
  ``telluric``  a telluric band reaches the line for some BERV of the inputs;
  ``blend``     another minimum within ``blend_fraction`` x FWHM of the line (both are rejected), or
                a line wider than ``max_width_ratio`` x the median FWHM (an unresolved blend);
  ``centre``    the centre error exceeds ``max_centre_error`` (m/s).

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
from lineshift.measure.prepare import reject_telluric_lines
from lineshift.model import C_MS, LineMask

__all__ = ["FoundLines", "LineSettings", "expected_error_per_snr", "find_lines"]

REASONS = ("fit", "shallow", "blend", "edge", "telluric", "centre")


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
    flux, var = template.flux, template.var
    minima = _local_minima(flux)
    depth0 = 1.0 - flux[minima]
    noise = np.sqrt(np.where(np.isfinite(var[minima]), var[minima], np.inf))
    cand = minima[(depth0 > settings.min_depth) & (depth0 > settings.min_significance * noise)]
    weak = minima[depth0 > 0.5 * settings.min_depth]  # neighbours that can still blend
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
    p0 = np.column_stack((np.ones(cand.size), 1.0 - flux[cand], np.zeros(cand.size), np.full(cand.size, sigma0)))
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
        blend |= fwhm > settings.max_width_ratio * np.median(fwhm[ok_w])
    reason[(reason == "") & blend] = "blend"
    reason[(reason == "") & ~(mu_err <= settings.max_centre_error)] = "centre"
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
