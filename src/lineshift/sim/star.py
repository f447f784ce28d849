"""The invented stars and site: rest-frame line lists, rotational and instrumental broadening, a binary,
and the invented lamp.  Rotation: Gray 2005, *The Observation and Analysis of Stellar Photospheres*,
eq. 18.14 (linear limb darkening).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import fftconvolve

from lineshift.model import C_MS
from lineshift.series.orbit import Orbit, radial_velocity

__all__ = ["DEMO_BINARY", "DEMO_LAMP", "DEMO_SITE", "DEMO_STAR", "Binary", "Site", "Star", "StarModel",
           "invented_lamp_lines", "with_lab_lines"]


@dataclass(frozen=True)
class Site:
    """An observatory (invented)."""

    name: str
    lon: float     # degrees east
    lat: float     # degrees
    height: float  # metres

    @property
    def xyz(self) -> tuple[float, float, float]:
        from lineshift.io.metadata import geodetic_to_xyz

        return geodetic_to_xyz(self.lon, self.lat, self.height)


@dataclass(frozen=True)
class Star:
    """An invented star with an optional Keplerian companion (velocities m/s)."""

    name: str
    ra_deg: float
    dec_deg: float
    gamma: float
    orbit: Orbit | None
    vsini: float = 2000.0
    micro_sigma: float = 1300.0          # Gaussian sigma of the intrinsic line profile, m/s
    line_density: float = 0.6            # lines per Angstrom
    depth_range: tuple[float, float] = (0.03, 0.85)
    wave_range: tuple[float, float] = (3900.0, 6950.0)
    limb_darkening: float = 0.6
    line_seed: int = 20261202
    extra_lines: tuple[tuple[float, float], ...] = ()   # (vacuum wavelength, depth) added to the list
    asymmetry: float = 0.0   # intrinsic lines as split Gaussians: sigma (1 - a) blueward, sigma (1 + a) redward

    def rv(self, bjd: np.ndarray) -> np.ndarray:
        """True barycentric radial velocity (m/s) at BJD_TDB."""
        if self.orbit is None:
            return np.full(np.shape(bjd), self.gamma, dtype=float)
        return radial_velocity(bjd, self.orbit, self.gamma)

    def line_list(self) -> tuple[np.ndarray, np.ndarray]:
        """Rest vacuum wavelengths (Angstrom) and central depths of the star's lines."""
        rng = np.random.default_rng(self.line_seed)
        lo, hi = self.wave_range
        n = int(self.line_density * (hi - lo))
        lam = np.sort(rng.uniform(lo, hi, n))
        d0, d1 = self.depth_range
        depth = d0 + (d1 - d0) * rng.beta(0.9, 2.2, n)
        if self.extra_lines:
            extra = np.asarray(self.extra_lines, dtype=float)
            lam = np.concatenate((lam, extra[:, 0]))
            depth = np.concatenate((depth, extra[:, 1]))
            order = np.argsort(lam)
            lam, depth = lam[order], depth[order]
        return lam, depth


DEMO_SITE = Site("Mount Brennick Observatory", lon=35.2133, lat=-12.4418, height=1850.0)


DEMO_STAR = Star(
    name="Vessa-9", ra_deg=131.40625, dec_deg=-18.72361, gamma=14_230.0,
    orbit=Orbit(period=11.73, semi_amplitude=38.0, eccentricity=0.25, omega=1.1,
                time_periastron=2461007.3),
)


def _rotation_kernel(vsini: float, eps: float, dv: float) -> np.ndarray:
    """Rotational broadening kernel on a velocity grid (Gray 2005, eq. 18.14)."""
    if vsini <= dv:
        return np.array([1.0])
    n = int(np.ceil(vsini / dv))
    x = np.arange(-n, n + 1) * dv / vsini
    inside = np.clip(1 - x * x, 0, None)
    k = 2 * (1 - eps) * np.sqrt(inside) + 0.5 * np.pi * eps * inside
    return k / k.sum()


def _gauss_kernel(sigma: float, dv: float) -> np.ndarray:
    n = int(np.ceil(6 * sigma / dv))
    x = np.arange(-n, n + 1) * dv
    k = np.exp(-0.5 * (x / sigma) ** 2)
    return k / k.sum()


@dataclass
class StarModel:
    """The star's broadened rest-frame spectrum for one resolving power, as a spline in ln(lambda)."""

    star: Star
    resolving_power: float
    step: float = 250.0  # m/s, fine-grid step
    spline: CubicSpline = field(init=False, repr=False)

    def __post_init__(self):
        lo, hi = self.star.wave_range
        du = self.step / C_MS
        u = np.arange(np.log(lo), np.log(hi), du)
        lam, depth = self.star.line_list()
        ul = np.log(lam)
        s = self.star.micro_sigma / C_MS
        half = int(np.ceil(6 * s * (1 + abs(self.star.asymmetry)) / du))
        centre = np.round((ul - u[0]) / du).astype(int)
        idx = centre[:, None] + np.arange(-half, half + 1)[None, :]
        ok = (idx >= 0) & (idx < u.size)
        du_l = u[np.clip(idx, 0, u.size - 1)] - ul[:, None]
        a = self.star.asymmetry
        side = np.where(du_l < 0, s * (1 - a), s * (1 + a))    # a > 0: red wing wider (bisector to the red on top)
        prof = np.exp(-0.5 * (du_l / side) ** 2)
        logf = np.bincount(idx[ok], np.log1p(-(depth[:, None] * prof)[ok]), minlength=u.size)
        flux = np.exp(logf)
        kernel = _rotation_kernel(self.star.vsini, self.star.limb_darkening, self.step)
        sigma_inst = C_MS / self.resolving_power / (2 * np.sqrt(2 * np.log(2)))
        kernel = np.convolve(kernel, _gauss_kernel(sigma_inst, self.step))
        pad = kernel.size
        padded = np.concatenate((np.ones(pad), flux, np.ones(pad)))
        flux = fftconvolve(padded, kernel, mode="same")[pad:-pad]
        self.spline = CubicSpline(u, flux)

    def __call__(self, lam_rest: np.ndarray) -> np.ndarray:
        return self.spline(np.log(lam_rest))


@lru_cache(maxsize=8)
def _model(star: Star, resolving_power: float) -> StarModel:
    return StarModel(star, resolving_power)


@dataclass(frozen=True)
class Binary:
    """An invented double-lined binary: two stars on one orbit (velocities m/s, times BJD_TDB).

    The primary moves as ``orbit`` (semi-amplitude K1) about ``gamma``; the secondary opposite,
    ``v2 = gamma - (K2 / K1) (v1 - gamma)``.  ``flux_ratio`` is secondary / primary continuum flux.
    """

    primary: Star
    secondary: Star
    orbit: Orbit
    k2: float
    gamma: float
    flux_ratio: float

    def velocities(self, bjd):
        v1 = radial_velocity(bjd, self.orbit, self.gamma)
        return v1, self.gamma - self.k2 / self.orbit.semi_amplitude * (v1 - self.gamma)


#: An invented double-lined binary: Vessa-9's lines in both stars, the secondary rotating faster.
DEMO_BINARY = Binary(
    primary=replace(DEMO_STAR, name="Vessa-12", orbit=None, vsini=3000.0),
    secondary=replace(DEMO_STAR, name="Vessa-12 B", orbit=None, vsini=5000.0),
    orbit=Orbit(period=7.4, semi_amplitude=32_000.0, eccentricity=0.1, omega=1.0, time_periastron=2461003.0),
    k2=48_000.0, gamma=9_000.0, flux_ratio=0.5)


def with_lab_lines(star: Star, wavelengths, depth: float = 0.6) -> Star:
    """The star with laboratory lines (vacuum Angstrom) of the given depth added to its own lines.

    Lines are planted at exactly the laboratory wavelengths (the simulated star has no gravitational
    redshift or convective shifts), so a mask anchored to them has a known absolute zero point.
    """
    lo, hi = star.wave_range
    extra = tuple((float(w), depth) for w in wavelengths if lo < w < hi)
    return replace(star, extra_lines=star.extra_lines + extra)


DEMO_LAMP = replace(DEMO_STAR, name="LAMP", orbit=None, gamma=0.0)


def invented_lamp_lines(lo: float, hi: float, *, density: float = 0.45,
                        seed: int = 77) -> tuple[np.ndarray, np.ndarray]:
    """An invented emission-line lamp: vacuum wavelengths (Angstrom) and total counts per line."""
    rng = np.random.default_rng(seed)
    n = int(density * (hi - lo))
    lam = np.sort(rng.uniform(lo, hi, n))
    counts = 10 ** rng.uniform(4.0, 5.5, n)
    return lam, counts
