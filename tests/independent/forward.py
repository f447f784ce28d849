"""A slow, deliberately plain forward model of echelle and 1-D observations, independent of lineshift.

Nothing here imports lineshift: line shapes, Doppler shifts, air/vacuum conversion, blaze, pixel
integration and noise are written out from their textbook forms so that a precision claim made on these
files is not a claim of the code about itself.

Pieces (each separately usable, so ``nuisances.py`` can add cosmic rays, NaN runs, tellurics, ...):

* :func:`make_lines` - seeded rest-frame (vacuum) line list with Voigt parameters.
* :class:`Setup` / :func:`echelle_setup` / :func:`single_setup` - the pixel grids (orders may overlap),
  per-order resolution (varying ~10 % order to order), blaze (tilted sinc^2, never written to the
  file), continuum slope, read noise and peak counts.
* :func:`model_counts` - noise-free expected counts per pixel for a topocentric velocity.
* :func:`draw_noise` - photon (Poisson) + read noise and the variance given / noisy / absent.
* :func:`write_echelle`, :func:`write_wcs_1d` - files in layouts fixed by the interface contract.
* :func:`efficient_estimate` - least-squares fit of the true noise-free model (shift + per-order
  amplitude) to a noisy draw: the attainable precision on that draw.

Physics, with sources:
* Voigt profile: ``scipy.special.voigt_profile`` (Gaussian sigma, Lorentzian HWHM gamma).
* Rotational broadening kernel: Gray, *The Observation and Analysis of Stellar Photospheres* (3rd ed.),
  eq. 18.14, G(dv) = [2(1-eps) sqrt(1-x^2) + (pi eps / 2)(1-x^2)] / [pi v_L (1 - eps/3)], x = dv / v_L.
* Doppler: relativistic composition of redshifts, (1 + z_obs) = (1 + z_1)(1 + z_2); barycentric
  velocities in the cz_B sense of IAU 2000 Resolution C1 (Lindegren & Dravins 2003), so the topocentric
  measure follows from (1 + rv/c) = (1 + rv_topo/c)(1 + berv/c).
* BERV: astropy ``SkyCoord.radial_velocity_correction(kind="barycentric")`` (reference library).
* Air wavelengths: specutils ``air_to_vac(method="Morton2000", scheme="iteration")`` (reference library).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.signal import fftconvolve
from scipy.special import voigt_profile

C = 299_792_458.0  # m/s, exact (SI)

# Invented site (Mount Brennick Observatory) and invented target (Vessa-12), for headers only.
SITE_LON, SITE_LAT, SITE_H = -70.4, -24.6, 2400.0
TARGET_RA, TARGET_DEC = 203.25, -31.7
DATE_AVG = "2026-03-14T04:12:30.000"


# ---------------------------------------------------------------------------------------- line list
@dataclass
class Lines:
    wave: np.ndarray     # rest vacuum wavelength, Angstrom
    depth: np.ndarray    # central optical-depth scale (line depth ~ 1 - exp(-tau) before broadening)
    sigma_v: np.ndarray  # Gaussian sigma, m/s (thermal + microturbulence)
    gamma_v: np.ndarray  # Lorentzian HWHM, m/s (damping)


def make_lines(seed: int, lo: float, hi: float, *, per_angstrom: float = 0.35, max_tau: float = 1.2,
               sigma_kms: float = 2.0, gamma_kms: float = 0.6) -> Lines:
    """Seeded random line list: uniform positions, a power-law spread of strengths."""
    rng = np.random.default_rng(seed)
    n = rng.poisson(per_angstrom * (hi - lo))
    wave = np.sort(rng.uniform(lo, hi, n))
    tau = max_tau * rng.uniform(0.0, 1.0, n) ** 2.0 + 0.02
    sig = sigma_kms * 1e3 * rng.uniform(0.8, 1.2, n)
    gam = gamma_kms * 1e3 * rng.uniform(0.5, 1.5, n)
    return Lines(wave, tau, sig, gam)


def line_depths(lines: Lines) -> np.ndarray:
    """Central depth of each unblended, unbroadened line, 1 - exp(-tau)."""
    return 1.0 - np.exp(-lines.depth)


# ---------------------------------------------------------------------------------------- set-up
@dataclass
class Setup:
    """Pixel grids and instrument of one observation.

    ``edges[k]`` holds the N+1 pixel-edge wavelengths of order k in the frame of the file (vacuum for
    echelle; the vacuum equivalent of the air grid for 1-D), ``resolution[k]`` its resolving power,
    ``blaze[k]`` its throughput per pixel (kept out of the file), ``slope[k]`` the continuum slope.
    """
    edges: list
    resolution: np.ndarray
    blaze: list
    slope: np.ndarray
    peak: float = 2.0e4         # counts per pixel at blaze peak and continuum
    read_noise: float = 4.0     # electrons
    n_sub: int = 10             # fine sub-samples per pixel (>= 8)
    vsini: float = 0.0          # m/s, rotational broadening (Gray eq. 18.14)
    epsilon: float = 0.6        # linear limb darkening
    medium: str = "vacuum"      # medium of the file's wavelengths
    air_edges: list = field(default_factory=list)  # air pixel edges (1-D air set-ups)

    @property
    def n_orders(self) -> int:
        return len(self.edges)

    def centres(self) -> list:
        return [0.5 * (e[1:] + e[:-1]) for e in self.edges]


def _sinc2_blaze(n: int, centre: float, half_width: float, tilt: float) -> np.ndarray:
    x = np.arange(n) + 0.5
    t = (x - centre) / half_width
    return np.sinc(t) ** 2 * (1.0 + tilt * (x - n / 2) / n)


def echelle_setup(seed: int, *, n_orders: int = 36, n_pix: int = 2048, lo: float = 4500.0,
                  resolution: float = 80_000.0, overlap: float = 0.15, blaze: bool = True,
                  peak: float = 2.0e4, read_noise: float = 4.0, vsini: float = 0.0) -> Setup:
    """Orders uniform in log wavelength, each overlapping its neighbours by ``overlap`` of its length.

    The blaze is a tilted sinc^2 falling to ~5 % at the order ends (``blaze=False``: flat).
    """
    rng = np.random.default_rng(seed + 1000)
    # pixel step in ln(lambda): 3.2 pixels per resolution element at the nominal R
    dln = 1.0 / (resolution * 3.2)
    span = n_pix * dln
    step = span * (1.0 - overlap)
    edges, blazes = [], []
    for k in range(n_orders):
        ln0 = np.log(lo) + k * step
        edges.append(np.exp(ln0 + dln * np.arange(n_pix + 1)))
        if blaze:
            c = n_pix * (0.5 + rng.uniform(-0.08, 0.08))
            blazes.append(_sinc2_blaze(n_pix, c, n_pix * 0.62, rng.uniform(-0.5, 0.5)))
        else:
            blazes.append(np.ones(n_pix))
    res = resolution * (1.0 + rng.uniform(-0.1, 0.1, n_orders))
    slope = rng.uniform(-0.3, 0.3, n_orders)
    return Setup(edges, res, blazes, slope, peak=peak, read_noise=read_noise, vsini=vsini)


def single_setup(seed: int, *, lo_air: float = 5000.0, hi_air: float = 5600.0, resolution: float = 65_000.0,
                 peak: float = 2.0e4, read_noise: float = 4.0, vsini: float = 0.0) -> Setup:
    """A 1-D spectrum on a grid linear in AIR wavelength (as a 1-D WCS with CTYPE1 = AWAV writes it)."""
    import astropy.units as u
    from specutils.utils.wcs_utils import air_to_vac

    rng = np.random.default_rng(seed + 2000)
    dlam = 0.5 * (lo_air + hi_air) / resolution / 3.0
    n = int((hi_air - lo_air) / dlam)
    air = lo_air + dlam * (np.arange(n + 1) - 0.5)
    vac = air_to_vac(air * u.AA, method="Morton2000", scheme="iteration").to_value(u.AA)
    slope = np.array([rng.uniform(-0.2, 0.2)])
    return Setup([vac], np.array([resolution]), [np.ones(n)], slope, peak=peak, read_noise=read_noise,
                 vsini=vsini, medium="air", air_edges=[air])


# ---------------------------------------------------------------------------------------- Doppler
def topocentric(rv_bary: float, berv: float) -> float:
    """Topocentric velocity measure from barycentric cz_B and BERV: (1+rv/c) = (1+rv_topo/c)(1+berv/c)."""
    return C * ((1.0 + rv_bary / C) / (1.0 + berv / C) - 1.0)


def berv_astropy(date_avg: str = DATE_AVG, ra: float = TARGET_RA, dec: float = TARGET_DEC,
                 lon: float = SITE_LON, lat: float = SITE_LAT, h: float = SITE_H) -> float:
    """Barycentric correction (m/s) from astropy for the header's time, target and site."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    loc = EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, h * u.m)
    coord = SkyCoord(ra * u.deg, dec * u.deg, frame="icrs")
    t = Time(date_avg, scale="utc")
    return float(coord.radial_velocity_correction(kind="barycentric", obstime=t, location=loc).to_value(u.m / u.s))


# ---------------------------------------------------------------------------------------- the model
def _rotation_kernel(dv: np.ndarray, vsini: float, eps: float) -> np.ndarray:
    """Gray eq. 18.14, on velocity offsets dv (m/s); normalised to unit sum on the grid."""
    x = dv / vsini
    inside = np.abs(x) < 1.0
    g = np.zeros_like(dv)
    one = 1.0 - x[inside] ** 2
    g[inside] = (2.0 * (1.0 - eps) * np.sqrt(one) + 0.5 * np.pi * eps * one) / (np.pi * vsini * (1.0 - eps / 3.0))
    return g / g.sum()


def _order_model(edges: np.ndarray, R: float, lines: Lines, rv_topo: float, setup: Setup) -> np.ndarray:
    """Normalised spectrum (continuum 1) integrated over each pixel of one order, at velocity rv_topo."""
    n_pix = len(edges) - 1
    lnlo, lnhi = np.log(edges[0]), np.log(edges[-1])
    pix_ln = (lnhi - lnlo) / n_pix
    d = pix_ln / setup.n_sub                      # fine step in ln(lambda), uniform
    sig_lsf = 1.0 / (R * 2.0 * np.sqrt(2.0 * np.log(2.0)))   # FWHM = lambda / R
    pad_ln = 6.0 * sig_lsf + 1.2 * setup.vsini / C + 40 * d
    npad = int(np.ceil(pad_ln / d))
    ln = lnlo - npad * d + d * np.arange(n_pix * setup.n_sub + 2 * npad + 1)
    lam_obs = np.exp(ln)
    lam_rest = lam_obs / (1.0 + rv_topo / C)       # exact Doppler factor for the cz measure
    # intrinsic spectrum at rest: exp(-sum tau_i * V(dv) / V(0)), in velocity units around each line
    tau = np.zeros_like(ln)
    lo, hi = lam_rest[0], lam_rest[-1]
    sel = (lines.wave > lo * (1 - 3e-4)) & (lines.wave < hi * (1 + 3e-4))
    for w0, t0, s, g in zip(lines.wave[sel], lines.depth[sel], lines.sigma_v[sel], lines.gamma_v[sel], strict=True):
        half = 30.0 * (s + g) / C * w0
        i0, i1 = np.searchsorted(lam_rest, [w0 - half, w0 + half])
        if i1 <= i0:
            continue
        dv = C * (lam_rest[i0:i1] / w0 - 1.0)
        tau[i0:i1] += t0 * voigt_profile(dv, s, g) / voigt_profile(0.0, s, g)
    f = np.exp(-tau)
    # rotation then instrument, both as convolutions in velocity (uniform ln grid)
    if setup.vsini > 0:
        m = int(np.ceil(setup.vsini / C / d)) + 1
        kern = _rotation_kernel(C * d * np.arange(-m, m + 1), setup.vsini, setup.epsilon)
        f = 1.0 - fftconvolve(1.0 - f, kern, mode="same")
    m = int(np.ceil(6 * sig_lsf / d))
    x = d * np.arange(-m, m + 1)
    kern = np.exp(-0.5 * (x / sig_lsf) ** 2)
    f = 1.0 - fftconvolve(1.0 - f, kern / kern.sum(), mode="same")
    # pixel integration: exact integral of the piecewise-linear fine function over each pixel
    cum = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(lam_obs))])
    at = np.interp(edges, lam_obs, cum)
    return np.diff(at) / np.diff(edges)


def model_counts(setup: Setup, lines: Lines, rv_topo: float, amplitude=None) -> list:
    """Noise-free expected counts per pixel for each order (blaze, continuum slope and peak included)."""
    out = []
    for k, e in enumerate(setup.edges):
        norm = _order_model(e, setup.resolution[k], lines, rv_topo, setup)
        x = np.linspace(-0.5, 0.5, len(e) - 1)
        cont = 1.0 + setup.slope[k] * x
        a = 1.0 if amplitude is None else amplitude[k]
        out.append(a * setup.peak * setup.blaze[k] * cont * norm)
    return out


@dataclass
class Draw:
    flux: list       # counts per order
    variance: list   # variance per order, or None when absent
    kind: str        # 'given' (true model variance), 'noisy' (from the noisy counts) or 'absent'


def draw_noise(counts: list, rng: np.random.Generator, read_noise: float, *, variance: str = "noisy") -> Draw:
    """Photon noise (Poisson on the expected electrons) plus Gaussian read noise, per pixel."""
    flux, var = [], []
    for a in counts:
        f = rng.poisson(np.maximum(a, 0.0)).astype(float) + rng.normal(0.0, read_noise, a.shape)
        flux.append(f)
        if variance == "given":
            var.append(a + read_noise**2)
        elif variance == "noisy":
            var.append(np.maximum(f, 0.0) + read_noise**2)
        elif variance == "absent":
            var.append(None)
        else:
            raise ValueError(f"variance must be given, noisy or absent, not {variance!r}")
    return Draw(flux, None if variance == "absent" else var, variance)


# ---------------------------------------------------------------------------------------- writing
def _primary_header(obj: str):
    import astropy.units as u
    from astropy.coordinates import EarthLocation
    from astropy.io import fits

    hdr = fits.Header()
    hdr["OBJECT"] = obj
    hdr["DATE-AVG"] = DATE_AVG
    hdr["TIMESYS"] = "UTC"
    hdr["RA"] = TARGET_RA
    hdr["DEC"] = TARGET_DEC
    hdr["RADESYS"] = "ICRS"
    loc = EarthLocation.from_geodetic(SITE_LON * u.deg, SITE_LAT * u.deg, SITE_H * u.m)
    hdr["OBSGEO-X"] = float(loc.x.to_value(u.m))
    hdr["OBSGEO-Y"] = float(loc.y.to_value(u.m))
    hdr["OBSGEO-Z"] = float(loc.z.to_value(u.m))
    return hdr


def write_echelle(path: str, setup: Setup, draw: Draw, *, obj: str = "Vessa-12") -> None:
    """Multi-order FITS: FLUX, WAVE (vacuum pixel centres) and, when given, ERR; no BLAZE."""
    from astropy.io import fits

    hdus = [fits.PrimaryHDU(header=_primary_header(obj)),
            fits.ImageHDU(np.array(draw.flux), name="FLUX"),
            fits.ImageHDU(np.array(setup.centres()), name="WAVE")]
    if draw.variance is not None:
        hdus.append(fits.ImageHDU(np.sqrt(np.array(draw.variance)), name="ERR"))
    fits.HDUList(hdus).writeto(path, overwrite=True)


def write_wcs_1d(path: str, setup: Setup, draw: Draw, *, obj: str = "Vessa-12") -> None:
    """1-D image with a linear spectral WCS (FITS WCS Paper III): CTYPE1 AWAV (air) or WAVE, ERR ext."""
    from astropy.io import fits

    edges = setup.air_edges[0] if setup.medium == "air" else setup.edges[0]
    hdr = _primary_header(obj)
    step = float(edges[1] - edges[0])
    hdr["CTYPE1"] = "AWAV" if setup.medium == "air" else "WAVE"
    hdr["CUNIT1"] = "Angstrom"
    hdr["CRPIX1"] = 1.0
    hdr["CRVAL1"] = float(0.5 * (edges[0] + edges[1]))
    hdr["CDELT1"] = step
    hdus = [fits.PrimaryHDU(np.asarray(draw.flux[0]), header=hdr)]
    if draw.variance is not None:
        hdus.append(fits.ImageHDU(np.sqrt(np.asarray(draw.variance[0])), name="ERR"))
    fits.HDUList(hdus).writeto(path, overwrite=True)


# ---------------------------------------------------------------------------------------- reference
@dataclass
class Reference:
    """Noise-free model and its velocity derivative at the truth, for efficient estimates."""
    model: list
    deriv: list
    read_noise: float


def reference(setup: Setup, lines: Lines, rv_topo: float, h: float = 5.0) -> Reference:
    m0 = model_counts(setup, lines, rv_topo)
    mp = model_counts(setup, lines, rv_topo + h)
    mm = model_counts(setup, lines, rv_topo - h)
    return Reference(m0, [(p - q) / (2 * h) for p, q in zip(mp, mm, strict=True)], setup.read_noise)


def efficient_estimate(ref: Reference, flux: list, good: list | None = None) -> tuple[float, float]:
    """Weighted least-squares fit of the true model: data_k = a_k (M_k + D_k dv), solving a_k and dv.

    Weights are the true variances (M + read_noise^2), so this is the efficient (minimum-variance
    unbiased) estimator of the shift for Gaussian-approximated photon noise; its scatter over draws is
    what was attainable on those draws.  The model is linear in dv over the few m/s at stake (the
    quadratic term is below 1e-4 of the linear one), so two Gauss-Newton passes converge.
    Returns (dv, sigma_dv) in m/s relative to the model's velocity.
    """
    dv = 0.0
    for _ in range(3):
        # normal equations: unknowns a_k (per order) and dv; block-eliminate the amplitudes
        s_dd, s_dy = 0.0, 0.0
        amps = []
        for k, (m, dd, y) in enumerate(zip(ref.model, ref.deriv, flux, strict=True)):
            w = 1.0 / (m + ref.read_noise**2)
            ok = np.isfinite(y) if good is None else good[k] & np.isfinite(y)
            mk = m + dd * dv
            w, mk, dk, yk = w[ok], mk[ok], dd[ok], y[ok]
            smm = np.sum(w * mk * mk)
            a = np.sum(w * mk * yk) / smm
            amps.append(a)
            # residual after amplitude, projected derivative
            g = a * dk
            g_perp = g - mk * np.sum(w * mk * g) / smm
            r = yk - a * mk
            s_dd += np.sum(w * g_perp * g_perp)
            s_dy += np.sum(w * g_perp * r)
        step = s_dy / s_dd
        dv += step
        if abs(step) < 1e-4:
            break
    return dv, 1.0 / np.sqrt(s_dd)


def photon_bound(ref: Reference) -> float:
    """Bouchy, Pepe & Queloz (2001) bound from the noise-free model: c / sqrt(sum W), with
    W_i = lambda^2 (dA/dlambda)^2 / (A + sigma_D^2) written as (dA/dv)^2 c^2 / (A + sigma_D^2)."""
    s = sum(np.sum(d**2 / (m + ref.read_noise**2)) for m, d in zip(ref.model, ref.deriv, strict=True))
    return float(1.0 / np.sqrt(s))
