"""Observing: exact Doppler shift ``lambda_obs = lambda_rest (1 + z_true) / (1 + z_B)`` with
``z_B = berv / c`` from astropy for the invented site, the exposure with its truth, lamp exposures.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift._offline import offline_call
from lineshift.io import airvac
from lineshift.model import C_MS
from lineshift.sim.instrument import Instrument, _edges, _subpixel_wavelengths, _through_instrument
from lineshift.sim.noise import photon_noise_bound
from lineshift.sim.star import DEMO_LAMP, DEMO_SITE, Binary, Site, Star, _model

__all__ = ["Exposure", "barycentric_truth", "epochs", "lamp_exposure", "observe", "observe_binary", "to_spectrum"]


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


@offline_call
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


def _stellar_flux(star: Star, instrument: Instrument, sub: np.ndarray, berv: float, v: float) -> np.ndarray:
    """Pixel-averaged normalised stellar flux for a star moving at ``v`` seen with correction ``berv``."""
    ratio = (1 + berv / C_MS) / (1 + v / C_MS)   # lambda_rest = lambda_obs (1 + z_B) / (1 + z_true)
    return _model(star, instrument.resolving_power)(sub * ratio).mean(axis=2)


def epochs(n: int, rng: np.random.Generator, *, start_mjd: float = 61000.0, span: float = 160.0) -> np.ndarray:
    """Exposure start times (MJD UTC): ``n`` random nights over ``span`` days, at night-time hours."""
    nights = np.sort(rng.choice(int(span), size=min(n, int(span)), replace=False)).astype(float)
    if n > nights.size:
        nights = np.sort(rng.uniform(0, span, n)).round()
    return start_mjd + nights + 0.75 + 0.2 * rng.random(n)


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
