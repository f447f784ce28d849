"""Co-adding spectra in the star's frame: a high-SNR template on a fine log-wavelength grid.

Each prepared order (continuum-normalised flux, variance, photon weights) is shifted to the star's
rest frame by ``lambda_rest = lambda_obs * factor`` with ``factor = (1 + z_B) / (1 + z_star)``
(Wright & Eastman 2014 composition of the barycentric and the star's own shift), interpolated
linearly onto a common grid uniform in ``ln lambda``, and averaged with the photon weights.  The
template keeps its own variance, the number of contributions per point, and flags for points near
an order edge or touched by a bad pixel, so later stages can avoid them.  Points that fall in a
telluric band in a spectrum's own (observatory) frame get no weight from that spectrum.

Shared by ``lineshift mask`` (line finding) and the template-matching engine.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .model import C_MS
from .prepare import PreparedOrder

__all__ = ["Template", "TemplateAccumulator", "log_grid"]


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


def log_grid(lo: float, hi: float, step: float) -> np.ndarray:
    """Wavelengths from ``lo`` to ``hi`` (Angstrom) uniform in ln(lambda) with ``step`` m/s."""
    du = np.log1p(step / C_MS)
    return np.exp(np.arange(np.log(lo), np.log(hi), du))


class TemplateAccumulator:
    """Accumulates orders onto a fixed grid; :meth:`result` gives the :class:`Template`.

    Streaming: one spectrum at a time is enough (memory is that of the grid).
    """

    def __init__(self, grid: np.ndarray, *, edge_margin: int = 8, bands: np.ndarray | None = None):
        self.grid = grid
        self.lng = np.log(grid)
        self.step = float(C_MS * np.expm1(self.lng[1] - self.lng[0]))
        self.sw = np.zeros(grid.size)
        self.swf = np.zeros(grid.size)
        self.sw2v = np.zeros(grid.size)
        self.count = np.zeros(grid.size, dtype=np.int64)
        self.flagged = np.zeros(grid.size, dtype=bool)
        self.edge_margin = edge_margin
        self.bands = bands if bands is not None else np.zeros((0, 2))
        self.n_spectra = 0
        self._pixel_steps: list[float] = []

    def add(self, orders: list[PreparedOrder], factor: float, *, exclude=None) -> None:
        """Add one spectrum's orders, shifted by ``lambda_rest = lambda_obs * factor``.

        ``exclude`` (optional) is a boolean array over the grid of points this spectrum must not
        contribute to (unused by default).
        """
        self.n_spectra += 1
        lnf = np.log(factor)
        for o in orders:
            self._pixel_steps.append(float(np.median(C_MS * np.diff(o.wave) / o.wave[1:])))
            u = np.log(o.wave) + lnf
            i0 = np.searchsorted(self.lng, u[0], side="left")
            i1 = np.searchsorted(self.lng, u[-1], side="right")
            if i1 <= i0:
                continue
            pts = self.lng[i0:i1]
            j = np.clip(np.searchsorted(u, pts, side="right") - 1, 0, u.size - 2)
            t = (pts - u[j]) / (u[j + 1] - u[j])
            ok = o.good[j] & o.good[j + 1]
            f = (1 - t) * o.flux[j] + t * o.flux[j + 1]
            v = (1 - t) * o.var[j] + t * o.var[j + 1]   # per-pixel noise level here (see Template)
            w = np.where(ok, (1 - t) * o.weight[j] + t * o.weight[j + 1], 0.0)
            if self.bands.size:
                lam_obs = np.exp(pts - lnf)
                inband = np.zeros(pts.size, dtype=bool)
                for lo, hi in self.bands:
                    inband |= (lam_obs >= lo) & (lam_obs <= hi)
                w = np.where(inband, 0.0, w)
            if exclude is not None:
                w = np.where(exclude[i0:i1], 0.0, w)
            sl = slice(i0, i1)
            self.sw[sl] += w
            self.swf[sl] += w * f
            self.sw2v[sl] += w * w * v
            self.count[sl] += (w > 0).astype(np.int64)
            near_edge = (j < self.edge_margin) | (j > o.flux.size - 2 - self.edge_margin)
            self.flagged[sl] |= near_edge | ~ok

    def result(self) -> Template:
        with np.errstate(invalid="ignore", divide="ignore"):
            flux = np.where(self.sw > 0, self.swf / self.sw, np.nan)
            var = np.where(self.sw > 0, self.sw2v / self.sw**2, np.nan)
        pixel = float(np.median(self._pixel_steps)) if self._pixel_steps else 0.0
        return Template(self.grid, flux, var, self.count.copy(), self.flagged.copy(), self.step, self.n_spectra,
                        pixel)
