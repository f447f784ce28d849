"""The invented instruments: wavelength grids of their orders, blaze, continuum slope, resolving
power, pixel integration of the shifted stellar flux.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from lineshift.model import C_MS
from lineshift.sim.noise import _peak_counts

__all__ = ["INSTRUMENTS", "Instrument", "replace_instrument"]


@dataclass(frozen=True)
class Instrument:
    """How the star is observed and written.

    ``layout`` is one of ``multi-order``, ``wcs-1d``, ``table``, ``text``.  Single-order layouts use
    ``n_orders = 1``.  ``dispersion`` is ``log`` (constant velocity per pixel) or ``linear``.
    """

    name: str
    layout: str
    resolving_power: float
    n_orders: int
    n_pixels: int
    wave_start: float
    sampling: float = 3.3                 # pixels per resolution element
    snr: float = 150.0                    # per pixel at the blaze peak
    read_noise: float = 3.0               # electrons
    medium: str = "vacuum"
    dispersion: str = "log"
    order_overlap: float = 0.1
    blaze: bool = True
    exptime: float = 900.0

    @property
    def pixel_velocity(self) -> float:
        return C_MS / self.resolving_power / self.sampling

    def wavelengths(self) -> np.ndarray:
        """Pixel-centre wavelengths (orders x pixels), in the instrument's medium, Angstrom."""
        dlnl = self.pixel_velocity / C_MS
        out = np.empty((self.n_orders, self.n_pixels))
        start = np.log(self.wave_start)
        p = np.arange(self.n_pixels, dtype=float)
        for k in range(self.n_orders):
            if self.dispersion == "log":
                # a mild quadratic term makes the echelle solution non-trivial
                curv = 0.02 * dlnl * (p - self.n_pixels / 2) ** 2 / self.n_pixels if self.n_orders > 1 else 0.0
                out[k] = np.exp(start + dlnl * p + curv)
            else:
                lam0 = np.exp(start)
                out[k] = lam0 + lam0 * dlnl * p
            start += (1 - self.order_overlap) * dlnl * self.n_pixels
        return out


INSTRUMENTS = {
    # name: the demo's instrument set (small, so the shipped sample stays a few MB)
    "echelle": Instrument("echelle", "multi-order", 110_000, 36, 4096, 4400.0),
    "demo-echelle": Instrument("demo-echelle", "multi-order", 110_000, 6, 1536, 5000.0, snr=120),
    "demo-1d": Instrument("demo-1d", "wcs-1d", 65_000, 1, 6000, 5200.0, sampling=3.0, snr=150,
                          medium="air", blaze=False),
    "demo-table": Instrument("demo-table", "table", 75_000, 1, 6000, 5200.0, sampling=3.0, snr=150,
                             blaze=False),
    "demo-text": Instrument("demo-text", "text", 65_000, 1, 4000, 5500.0, sampling=3.0, snr=150,
                            blaze=False, dispersion="linear"),
}


def _blaze(n: int) -> np.ndarray:
    x = np.linspace(-0.5, 0.5, n)
    return np.sinc(1.2 * x) ** 2


def _subpixel_wavelengths(wave_vac: np.ndarray, nsub: int = 5) -> np.ndarray:
    edges = np.concatenate([_edges(w)[None, :] for w in wave_vac])
    frac = (np.arange(nsub) + 0.5) / nsub
    return edges[:, :-1, None] + (edges[:, 1:, None] - edges[:, :-1, None]) * frac[None, None, :]


def _through_instrument(instrument: Instrument, wave_vac: np.ndarray, star_flux: np.ndarray,
                        rng: np.random.Generator, *, noise: bool):
    n = instrument.n_pixels
    blaze = np.tile(_blaze(n), (instrument.n_orders, 1)) if instrument.blaze else np.ones((instrument.n_orders, n))
    A = _peak_counts(instrument.snr, instrument.read_noise) * blaze * (wave_vac / 5500.0) ** -1.0 * star_flux
    rn2 = instrument.read_noise**2
    observed = A + rng.normal(size=A.shape) * np.sqrt(A + rn2) if noise else A.copy()
    err = np.sqrt(np.maximum(observed, 0.0) + rn2)
    return A, observed, err, (blaze if instrument.blaze else None)


def _edges(w: np.ndarray) -> np.ndarray:
    mid = 0.5 * (w[1:] + w[:-1])
    return np.concatenate(([w[0] - (mid[0] - w[0])], mid, [w[-1] + (w[-1] - mid[-1])]))


def replace_instrument(ins: Instrument, **changes) -> Instrument:
    """A copy of an instrument with some settings changed."""
    return replace(ins, **changes)
