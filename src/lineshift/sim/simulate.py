"""Synthetic observations of an invented star, with the truth alongside.

Everything here is invented: the star *Vessa-9*, its companion, and the *Mount Brennick
Observatory*.  The simulator builds a rest-frame stellar spectrum from a seeded random line list
(Gaussian intrinsic profiles combined multiplicatively), broadens it by rotation (Gray 2005, *The
Observation and Analysis of Stellar Photospheres*, eq. 18.14, linear limb darkening) and by a
Gaussian instrumental profile of resolving power R, and observes it through an instrument: blaze,
continuum slope, exact Doppler shift ``lambda_obs = lambda_rest (1 + z_true) / (1 + z_B)`` with
``z_B = berv / c`` computed by astropy for the invented site, pixel integration, photon (Poisson,
Gaussian approximation) and read noise.

The photon-noise bound of each spectrum is computed from its *noise-free* model (Bouchy, Pepe &
Queloz 2001, eq. 6-8; Connes 1985): ``sigma_RV = 1 / sqrt(sum_i (dA_i/dv)^2 / (A_i + sigma_D^2))``,
with ``dA/dv`` the change of the pixel counts with the star's velocity (blaze held fixed).
"""

from __future__ import annotations

import csv
import gzip
import os
from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import fftconvolve

from lineshift.io import airvac
from lineshift.model import C_MS
from lineshift.series.orbit import Orbit, radial_velocity

__all__ = [
    "DEMO_BINARY",
    "DEMO_SITE",
    "DEMO_STAR",
    "INSTRUMENTS",
    "Binary",
    "Exposure",
    "Instrument",
    "Site",
    "Star",
    "StarModel",
    "invented_lamp_lines",
    "lamp_exposure",
    "observe",
    "observe_binary",
    "photon_noise_bound",
    "to_spectrum",
    "with_lab_lines",
    "write_mask",
    "write_observation",
]


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


DEMO_SITE = Site("Mount Brennick Observatory", lon=35.2133, lat=-12.4418, height=1850.0)

DEMO_STAR = Star(
    name="Vessa-9", ra_deg=131.40625, dec_deg=-18.72361, gamma=14_230.0,
    orbit=Orbit(period=11.73, semi_amplitude=38.0, eccentricity=0.25, omega=1.1,
                time_periastron=2461007.3),
)

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


def _blaze(n: int) -> np.ndarray:
    x = np.linspace(-0.5, 0.5, n)
    return np.sinc(1.2 * x) ** 2


def _peak_counts(snr: float, read_noise: float) -> float:
    s2 = snr * snr
    return 0.5 * (s2 + np.sqrt(s2 * s2 + 4 * s2 * read_noise**2))


@dataclass(frozen=True)
class Exposure:
    """One simulated exposure: arrays (orders x pixels) plus what is true about it."""

    instrument: Instrument
    star: Star
    site: Site
    mjd_start_utc: float
    wave: np.ndarray          # in the instrument's medium
    flux: np.ndarray          # counts (electrons), blaze included when the instrument has one
    err: np.ndarray           # 1-sigma, from the observed counts
    blaze: np.ndarray | None
    truth: dict


def barycentric_truth(star: Star, site: Site, mjd_mid_utc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """BERV (m/s) and BJD_TDB (days) straight from astropy, for the truth table."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    loc = EarthLocation.from_geodetic(site.lon * u.deg, site.lat * u.deg, site.height * u.m)
    t = Time(np.atleast_1d(mjd_mid_utc), format="mjd", scale="utc")
    coord = SkyCoord(star.ra_deg * u.deg, star.dec_deg * u.deg, frame="icrs")
    berv = coord.radial_velocity_correction(kind="barycentric", obstime=t, location=loc).to_value(u.m / u.s)
    bjd = (t.tdb + t.light_travel_time(coord, kind="barycentric", location=loc)).jd
    return np.asarray(berv), np.asarray(bjd)


def observe(star: Star, instrument: Instrument, site: Site, mjd_start_utc: float,
            rng: np.random.Generator, *, rv_override: float | None = None, berv_bjd=None,
            noise: bool = True) -> Exposure:
    """Simulate one exposure starting at ``mjd_start_utc`` (UTC)."""
    mjd_mid = mjd_start_utc + 0.5 * instrument.exptime / 86400.0
    berv, bjd = berv_bjd if berv_bjd is not None else barycentric_truth(star, site, np.array([mjd_mid]))
    berv, bjd = float(np.ravel(berv)[0]), float(np.ravel(bjd)[0])
    rv = float(star.rv(np.array([bjd]))[0]) if rv_override is None else float(rv_override)
    wave = instrument.wavelengths()
    wave_vac = airvac.air_to_vacuum(wave) if instrument.medium == "air" else wave
    sub = _subpixel_wavelengths(wave_vac)
    star_flux = _stellar_flux(star, instrument, sub, berv, rv)
    dv = 5.0
    dflux = (_stellar_flux(star, instrument, sub, berv, rv + dv)
             - _stellar_flux(star, instrument, sub, berv, rv - dv)) / (2 * dv)
    A, observed, err, blaze = _through_instrument(instrument, wave_vac, star_flux, rng, noise=noise)
    bound = photon_noise_bound(A, A / star_flux * dflux, instrument.read_noise)
    truth = {
        "mjd_mid_utc": mjd_mid, "bjd_tdb": bjd, "berv": berv, "rv_true": rv,
        "rv_topo_true": C_MS * ((1 + rv / C_MS) / (1 + berv / C_MS) - 1),
        "rv_bound": float(bound), "snr_peak": instrument.snr,
    }
    return Exposure(instrument, star, site, mjd_start_utc, wave, observed, err, blaze, truth)


def photon_noise_bound(counts: np.ndarray, dcounts_dv: np.ndarray, read_noise: float = 0.0) -> float:
    """Photon-noise limit on the velocity (m/s) from a noise-free model (Bouchy, Pepe & Queloz 2001).

    ``sigma_RV = 1 / sqrt(sum_i (dA_i/dv)^2 / (A_i + sigma_D^2))`` with ``A`` in electrons per pixel
    and ``dA/dv`` per m/s.  Since ``lambda dA/dlambda = c dA/dv`` for a Doppler shift this is their
    ``c / sqrt(sum W_i)`` with ``W_i = lambda_i^2 (dA/dlambda)_i^2 / (A_i + sigma_D^2)`` (eq. 6-8).
    """
    A = np.asarray(counts, dtype=float)
    dA = np.asarray(dcounts_dv, dtype=float)
    return float(1.0 / np.sqrt(np.sum(dA * dA / (A + read_noise**2))))


def to_spectrum(exp: Exposure, path: str = "<simulated>"):
    """The in-memory :class:`~lineshift.model.Spectrum` a loader would make of this exposure."""
    from lineshift.model import Observation as ObsRecord
    from lineshift.model import Order, Spectrum

    wave = airvac.air_to_vacuum(exp.wave) if exp.instrument.medium == "air" else exp.wave
    orders = tuple(Order(wave[k], exp.flux[k], exp.err[k] ** 2,
                         None if exp.blaze is None else exp.blaze[k], k) for k in range(wave.shape[0]))
    obs = ObsRecord(path=path, layout=exp.instrument.layout, object=exp.star.name,
                    mjd_mid=exp.truth["mjd_mid_utc"], ra_deg=exp.star.ra_deg, dec_deg=exp.star.dec_deg,
                    site_xyz=exp.site.xyz, medium=exp.instrument.medium)
    return Spectrum(obs, orders)


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


def observe_binary(binary: Binary, instrument: Instrument, site: Site, mjd_start_utc: float,
                   rng: np.random.Generator, *, berv_bjd=None) -> Exposure:
    """Simulate a double-lined exposure: ``(F1(v1) + r F2(v2)) / (1 + r)`` through the instrument."""
    mjd_mid = mjd_start_utc + 0.5 * instrument.exptime / 86400.0
    berv, bjd = berv_bjd if berv_bjd is not None else barycentric_truth(binary.primary, site, np.array([mjd_mid]))
    berv, bjd = float(np.ravel(berv)[0]), float(np.ravel(bjd)[0])
    v1, v2 = (float(np.ravel(x)[0]) for x in binary.velocities(np.array([bjd])))
    wave = instrument.wavelengths()
    wave_vac = airvac.air_to_vacuum(wave) if instrument.medium == "air" else wave
    sub = _subpixel_wavelengths(wave_vac)
    r = binary.flux_ratio
    star_flux = (_stellar_flux(binary.primary, instrument, sub, berv, v1)
                 + r * _stellar_flux(binary.secondary, instrument, sub, berv, v2)) / (1 + r)
    _, observed, err, blaze = _through_instrument(instrument, wave_vac, star_flux, rng, noise=True)
    truth = {"mjd_mid_utc": mjd_mid, "bjd_tdb": bjd, "berv": berv, "rv_true": v1, "rv2_true": v2,
             "rv_topo_true": C_MS * ((1 + v1 / C_MS) / (1 + berv / C_MS) - 1),
             "rv2_topo_true": C_MS * ((1 + v2 / C_MS) / (1 + berv / C_MS) - 1), "snr_peak": instrument.snr}
    return Exposure(instrument, binary.primary, site, mjd_start_utc, wave, observed, err, blaze, truth)


def _subpixel_wavelengths(wave_vac: np.ndarray, nsub: int = 5) -> np.ndarray:
    edges = np.concatenate([_edges(w)[None, :] for w in wave_vac])
    frac = (np.arange(nsub) + 0.5) / nsub
    return edges[:, :-1, None] + (edges[:, 1:, None] - edges[:, :-1, None]) * frac[None, None, :]


def _stellar_flux(star: Star, instrument: Instrument, sub: np.ndarray, berv: float, v: float) -> np.ndarray:
    """Pixel-averaged normalised stellar flux for a star moving at ``v`` seen with correction ``berv``."""
    ratio = (1 + berv / C_MS) / (1 + v / C_MS)   # lambda_rest = lambda_obs (1 + z_B) / (1 + z_true)
    return _model(star, instrument.resolving_power)(sub * ratio).mean(axis=2)


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


# --------------------------------------------------------------------------- writers

def _meta_cards(obs: Exposure, style: int) -> list[tuple[str, object, str]]:
    """Header keywords; ``style`` varies how time, target and site are written across files."""
    from astropy.time import Time

    ins, star, site = obs.instrument, obs.star, obs.site
    start = Time(obs.mjd_start_utc, format="mjd", scale="utc")
    end = Time(obs.mjd_start_utc + ins.exptime / 86400.0, format="mjd", scale="utc")
    cards: list[tuple[str, object, str]] = [("OBJECT", star.name, "invented demo star"),
                                            ("TIMESYS", "UTC", "time scale")]
    if style % 3 == 0:
        cards += [("DATE-OBS", start.isot, "exposure start"), ("EXPTIME", ins.exptime, "[s]")]
    elif style % 3 == 1:
        cards += [("DATE-BEG", start.isot, "exposure start"), ("DATE-END", end.isot, "exposure end"),
                  ("XPOSURE", ins.exptime, "[s]")]
    else:
        cards += [("MJD-OBS", float(start.mjd), "exposure start [d]"), ("EXPTIME", ins.exptime, "[s]")]
    if style % 2 == 0:
        cards += [("RA", star.ra_deg, "[deg] ICRS"), ("DEC", star.dec_deg, "[deg] ICRS")]
    else:
        from astropy.coordinates import Angle

        cards += [("RA", Angle(star.ra_deg / 15.0, "hourangle").to_string(sep=":", precision=4), "ICRS hms"),
                  ("DEC", Angle(star.dec_deg, "deg").to_string(sep=":", precision=3, alwayssign=True), "ICRS dms")]
    cards.append(("RADESYS", "ICRS", ""))
    if style % 2 == 0:
        x, y, z = site.xyz
        cards += [("OBSGEO-X", x, "[m]"), ("OBSGEO-Y", y, "[m]"), ("OBSGEO-Z", z, "[m]")]
    else:
        cards += [("OBSGEO-L", site.lon, "[deg] east"), ("OBSGEO-B", site.lat, "[deg]"),
                  ("OBSGEO-H", site.height, "[m]")]
    cards += [("OBSERVAT", site.name, "invented site"), ("INSTRUME", ins.name, "simulated"),
              ("ORIGIN", "lineshift simulate", "synthetic data")]
    return cards


def write_observation(obs: Exposure, path: str, *, style: int = 0) -> str:
    """Write a simulated exposure in its instrument's layout; returns the path written."""
    from astropy.io import fits

    ins = obs.instrument
    cards = _meta_cards(obs, style)
    if ins.layout == "text":
        return _write_text(obs, path, cards)
    primary = fits.PrimaryHDU()
    for key, value, comment in cards:
        primary.header[key] = (value, comment)
    if ins.layout == "multi-order":
        hdus = [primary,
                fits.ImageHDU(obs.flux.astype(np.float32), name="FLUX"),
                fits.ImageHDU(obs.wave.astype(np.float64), name="WAVE"),
                fits.ImageHDU(obs.err.astype(np.float32), name="ERR")]
        hdus[2].header["BUNIT"] = "Angstrom"
        if obs.blaze is not None:
            hdus.append(fits.ImageHDU(obs.blaze.astype(np.float32), name="BLAZE"))
    elif ins.layout == "wcs-1d":
        w = obs.wave[0]
        primary.data = obs.flux[0].astype(np.float32)
        base = "AWAV" if ins.medium == "air" else "WAVE"
        if ins.dispersion == "log":
            primary.header["CTYPE1"] = f"{base}-LOG"
            primary.header["CDELT1"] = float(w[0] * np.log(w[1] / w[0]))
        else:
            primary.header["CTYPE1"] = base
            primary.header["CDELT1"] = float(w[1] - w[0])
        primary.header["CRVAL1"] = float(w[0])
        primary.header["CRPIX1"] = 1.0
        primary.header["CUNIT1"] = "Angstrom"
        hdus = [primary, fits.ImageHDU(obs.err[0].astype(np.float32), name="ERR")]
    elif ins.layout == "table":
        cols = [fits.Column("WAVE", "D", unit="Angstrom", array=obs.wave[0]),
                fits.Column("FLUX", "E", array=obs.flux[0]),
                fits.Column("ERR", "E", array=obs.err[0])]
        hdus = [primary, fits.BinTableHDU.from_columns(cols, name="SPECTRUM")]
    else:
        raise ValueError(f"unknown layout {ins.layout!r}")
    tmp = f"{path}.tmp"
    if path.endswith(".gz"):
        with gzip.open(tmp, "wb", compresslevel=6) as fh:
            fits.HDUList(hdus).writeto(fh)
    else:
        fits.HDUList(hdus).writeto(tmp, overwrite=True)
    os.replace(tmp, path)
    return path


def _write_text(obs: Exposure, path: str, cards) -> str:
    tmp = f"{path}.tmp"
    opener = gzip.open if path.endswith(".gz") else open
    with opener(tmp, "wt", newline="") as fh:
        for key, value, _comment in cards:
            fh.write(f"# {key} = {value}\n")
        fh.write(f"# medium: {obs.instrument.medium}\n")
        writer = csv.writer(fh)
        writer.writerow(["wavelength", "flux", "error"])
        for w, f, e in zip(obs.wave[0], obs.flux[0], obs.err[0], strict=True):
            writer.writerow([f"{w:.7f}", f"{f:.3f}", f"{e:.3f}"])
    os.replace(tmp, path)
    return path


def with_lab_lines(star: Star, wavelengths, depth: float = 0.6) -> Star:
    """The star with laboratory lines (vacuum Angstrom) of the given depth added to its own lines.

    Lines are planted at exactly the laboratory wavelengths (the simulated star has no gravitational
    redshift or convective shifts), so a mask anchored to them has a known absolute zero point.
    """
    lo, hi = star.wave_range
    extra = tuple((float(w), depth) for w in wavelengths if lo < w < hi)
    return replace(star, extra_lines=star.extra_lines + extra)


def write_mask(star: Star, path: str, *, min_depth: float = 0.05) -> str:
    """Write the star's own line list as a mask (weights = line depth)."""
    lam, depth = star.line_list()
    keep = depth >= min_depth
    tmp = f"{path}.tmp"
    with open(tmp, "w", newline="") as fh:
        fh.write(f"# Line mask of the invented demo star {star.name}, written by `lineshift simulate`.\n")
        fh.write(f"# Provenance: the simulator's own seeded line list (seed {star.line_seed}), lines deeper\n")
        fh.write(f"# than {min_depth}; weight = central depth before broadening. Vacuum rest wavelengths,\n")
        fh.write("# Angstrom. Synthetic: no real star or laboratory data went into it.\n")
        fh.write("# medium: vacuum\n")
        fh.write("wavelength,weight\n")
        for w, d in zip(lam[keep], depth[keep], strict=True):
            fh.write(f"{w:.6f},{d:.4f}\n")
    os.replace(tmp, path)
    return path


def epochs(n: int, rng: np.random.Generator, *, start_mjd: float = 61000.0, span: float = 160.0) -> np.ndarray:
    """Exposure start times (MJD UTC): ``n`` random nights over ``span`` days, at night-time hours."""
    nights = np.sort(rng.choice(int(span), size=min(n, int(span)), replace=False)).astype(float)
    if n > nights.size:
        nights = np.sort(rng.uniform(0, span, n)).round()
    return start_mjd + nights + 0.75 + 0.2 * rng.random(n)


def simulate_set(outdir: str, plan: list[tuple[Instrument, int]], *, star: Star = DEMO_STAR,
                 site: Site = DEMO_SITE, seed: int = 1, compress: bool = True, progress=None,
                 binary: Binary | None = None) -> list[dict]:
    """Write a set of observations; returns the truth rows (one per file).

    The truth table goes to ``OUTDIR/truth/truth.csv`` (a subdirectory, so that measuring the
    directory does not try to read it as a spectrum).
    """
    os.makedirs(outdir, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows = []
    total = sum(n for _, n in plan)
    starts = epochs(total, rng)
    mids = starts + np.concatenate([np.full(n, ins.exptime) for ins, n in plan]) / 2 / 86400.0
    berv, bjd = barycentric_truth(binary.primary if binary else star, site, mids)
    k = 0
    ext = {"multi-order": ".fits", "wcs-1d": ".fits", "table": ".fits", "text": ".csv"}
    for ins, n in plan:
        for j in range(n):
            if binary is not None:
                obs = observe_binary(binary, ins, site, float(starts[k]), rng, berv_bjd=(berv[k], bjd[k]))
            else:
                obs = observe(star, ins, site, float(starts[k]), rng, berv_bjd=(berv[k], bjd[k]))
            stem = (binary.primary.name if binary else star.name).lower().replace(" ", "_")
            name = f"{stem}_{ins.name}_{j:03d}{ext[ins.layout]}" + (".gz" if compress else "")
            path = os.path.join(outdir, name)
            write_observation(obs, path, style=k)
            rows.append({"file": name, "layout": ins.layout, "instrument": ins.name, **obs.truth})
            k += 1
            if progress is not None:
                progress(1)
    os.makedirs(os.path.join(outdir, "truth"), exist_ok=True)
    write_truth(rows, os.path.join(outdir, "truth", "truth.csv"), binary.primary if binary else star)
    return rows


def write_truth(rows: list[dict], path: str, star: Star) -> None:
    tmp = f"{path}.tmp"
    with open(tmp, "w", newline="") as fh:
        fh.write(f"# Truth of the simulated observations of the invented star {star.name}.\n")
        if star.orbit is not None:
            o = star.orbit
            fh.write(f"# orbit: P={o.period} d, K={o.semi_amplitude} m/s, e={o.eccentricity}, "
                     f"omega={o.omega} rad, T_peri={o.time_periastron} BJD_TDB; gamma={star.gamma} m/s\n")
        fh.write("# rv_true: barycentric cz_B (m/s); berv, bjd_tdb: astropy; rv_bound: photon-noise bound\n")
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    os.replace(tmp, path)


def replace_instrument(ins: Instrument, **changes) -> Instrument:
    """A copy of an instrument with some settings changed."""
    return replace(ins, **changes)


# --------------------------------------------------------------------------- lamp exposures

DEMO_LAMP = replace(DEMO_STAR, name="LAMP", orbit=None, gamma=0.0)


def invented_lamp_lines(lo: float, hi: float, *, density: float = 0.45,
                        seed: int = 77) -> tuple[np.ndarray, np.ndarray]:
    """An invented emission-line lamp: vacuum wavelengths (Angstrom) and total counts per line."""
    rng = np.random.default_rng(seed)
    n = int(density * (hi - lo))
    lam = np.sort(rng.uniform(lo, hi, n))
    counts = 10 ** rng.uniform(4.0, 5.5, n)
    return lam, counts


def lamp_exposure(instrument: Instrument, lines_vac: np.ndarray, counts: np.ndarray, rng: np.random.Generator, *,
                  mjd_start: float = 61000.7, distortion: dict[int, tuple[float, float]] | None = None,
                  drift: float = 0.0, background: float = 30.0, noise: bool = True,
                  absorption: bool = False) -> Exposure:
    """An emission-line exposure whose wavelength solution is wrong by a known amount.

    The file gets the instrument's nominal wavelengths, but the lamp is imaged as if pixel ``p`` of
    order ``k`` saw ``lambda_nominal / (1 + r_k(p)/c)`` with ``r_k(p) = offset_k + tilt_k (p/(n-1) - 1/2)
    + drift`` (m/s; ``distortion = {k: (offset_k, tilt_k)}``).  A line of laboratory wavelength
    ``lambda`` is then measured at ``lambda (1 + r/c)``: its residual is ``r``, the order's offset is
    ``offset_k + drift`` and its edge-to-edge slope is ``tilt_k``.  Lines are Gaussians of FWHM
    lambda/R integrated over the pixels; photon and read noise.  With ``absorption=True`` the lines
    are taken out of a continuum of ``background`` counts per pixel instead (lines fixed in the
    observatory frame, like telluric lines in a science exposure); ``counts`` are then the counts
    each line removes.
    """
    distortion = distortion or {}
    wave = instrument.wavelengths()
    wave_vac = airvac.air_to_vacuum(wave) if instrument.medium == "air" else wave
    n = instrument.n_pixels
    flux = np.full(wave.shape, background, dtype=float)
    from scipy.special import erf

    for k in range(instrument.n_orders):
        edges = _edges(wave_vac[k])
        p = np.arange(n + 1) - 0.5
        off, tilt = distortion.get(k, (0.0, 0.0))
        r = off + tilt * (p / (n - 1) - 0.5) + drift
        true_edges = edges / (1 + r / C_MS)
        sel = (lines_vac > true_edges[0] - 1) & (lines_vac < true_edges[-1] + 1)
        lam = lines_vac[sel]
        sig = lam / instrument.resolving_power / (2 * np.sqrt(2 * np.log(2)))
        cdf = 0.5 * (1 + erf((true_edges[None, :] - lam[:, None]) / (np.sqrt(2) * sig[:, None])))
        profile = np.sum(counts[sel, None] * np.diff(cdf, axis=1), axis=0)
        flux[k] += -profile if absorption else profile
    rn2 = instrument.read_noise**2
    observed = flux + rng.normal(size=flux.shape) * np.sqrt(flux + rn2) if noise else flux.copy()
    err = np.sqrt(np.maximum(observed, 0.0) + rn2)
    truth = {"mjd_mid_utc": mjd_start + 0.5 * instrument.exptime / 86400, "drift": drift,
             "distortion": dict(distortion)}
    return Exposure(instrument, DEMO_LAMP, DEMO_SITE, mjd_start, wave, observed, err, None, truth)
