"""What real spectra carry, on top of the independent forward model (:mod:`forward`); imports nothing
from lineshift.

Each nuisance has its own switch in :class:`Nuisances` and its own seeded function, applied to the
expected counts (tellurics) or to a noisy draw (everything else), so a test can turn one on at a time
and compare with the very same noise draw without it.

* cosmic rays: 1-3 pixel hits, 3-30x the local counts, a few per order per exposure, at random places;
  hot pixels: fixed detector pixels (the same in every exposure) with an excess of 2-10x the counts.
* tellurics, fixed in the observatory frame: a strong band of many deep lines inside one of the
  shipped bands (O2 gamma, 6270-6330 A air) and weak lines (1-4 % deep) everywhere *outside* the
  shipped bands.  Each line is a Gaussian in optical depth, broadened by the order's instrumental
  profile (sigma_total^2 = sigma_intrinsic^2 + sigma_LSF^2, the Gaussian convolution identity); the
  transmission multiplies the expected counts at the pixel centres (the product of a narrow telluric
  line and the convolved stellar spectrum approximates the convolution of the product to the order of
  the line depths times the LSF curvature: common practice in telluric forward models at this depth).
  Dates over a year give BERV from astropy (``forward.berv_astropy``).
* NaN runs: at both order ends (5-40 pixels) and 1-2 runs of 2-8 pixels inside each order; the
  reduction's interpolation spreads them: the 2 pixels either side are corrupted by up to 30 %.
* zero / negative counts: dead runs of 0 counts and over-subtracted runs of negative counts inside
  orders, with the same 2-pixel corruption on either side.
* saturation: counts above a full-well level clipped to the level (flat tops), the level chosen so the
  brightest ~3 % of each exposure's pixels clip; with ``flag`` the level is written to the ``SATURATE``
  header keyword (common practice for a detector's saturation level), without it nothing says so.
* mismatched mask: a fraction of lines dropped, rest wavelengths jittered by tens of m/s, weights
  multiplied by a log-normal factor, spurious lines added where the star has none.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from independent import forward as fwd

# shipped O2 gamma band (air, from memory: common practice) and a margin; vacuum = air * (1 + 2.77e-4)
GAMMA_BAND_AIR = (6270.0, 6330.0)
SHIPPED_BANDS_AIR = ((6270.0, 6330.0), (6860.0, 6940.0), (7160.0, 7350.0), (7590.0, 7700.0),
                     (8120.0, 8360.0), (8920.0, 9800.0))
AIR_TO_VAC = 1.000277   # refractive index of standard air near 6000 A (Morton 2000), enough for band edges


@dataclass
class Nuisances:
    """Switches, each independent of the others."""

    cosmics: bool = False
    hot_pixels: bool = False
    tellurics: bool = False          # strong band + weak lines, observatory frame
    nan_runs: bool = False
    nonpositive: bool = False
    saturation: str | None = None    # None, 'flagged' or 'unflagged'
    mask: bool = False               # mismatched mask (applies to the mask, see mismatch_mask)

    @classmethod
    def all(cls, saturation: str = "unflagged") -> Nuisances:
        return cls(True, True, True, True, True, saturation, True)

    def any_pixel(self) -> bool:
        return any((self.cosmics, self.hot_pixels, self.tellurics, self.nan_runs, self.nonpositive,
                    self.saturation is not None))


# ---------------------------------------------------------------------------------------- tellurics
@dataclass
class TelluricLines:
    wave: np.ndarray     # vacuum, observatory frame, Angstrom
    tau: np.ndarray      # central optical depth
    sigma_v: np.ndarray  # intrinsic Gaussian sigma, m/s


def telluric_lines(seed: int, lo: float, hi: float, *, weak_per_angstrom: float = 0.08,
                   weak_depth: tuple[float, float] = (0.01, 0.04), band_per_angstrom: float = 0.6,
                   band_depth: tuple[float, float] = (0.1, 0.8)) -> TelluricLines:
    """Seeded weak lines outside every shipped band and deep lines inside the O2 gamma band."""
    rng = np.random.default_rng(seed + 7000)
    bands = np.array(SHIPPED_BANDS_AIR) * AIR_TO_VAC
    n = rng.poisson(weak_per_angstrom * (hi - lo))
    w = rng.uniform(lo, hi, n)
    margin = 2.0    # Angstrom: weak lines stay clearly outside the shipped bands
    outside = ~np.any((w[:, None] > bands[None, :, 0] - margin) & (w[:, None] < bands[None, :, 1] + margin), axis=1)
    w = w[outside]
    d = rng.uniform(*weak_depth, w.size)
    g0, g1 = np.array(GAMMA_BAND_AIR) * AIR_TO_VAC
    # the band's lines fill its middle, clear of its listed edges by a few Angstrom (the list is generous)
    nb = rng.poisson(band_per_angstrom * (g1 - g0 - 8.0)) if lo < g1 and hi > g0 else 0
    wb = rng.uniform(g0 + 4.0, g1 - 4.0, nb)
    db = rng.uniform(*band_depth, nb)
    wave = np.concatenate([w, wb])
    depth = np.concatenate([d, db])
    order = np.argsort(wave)
    tau = -np.log1p(-depth[order])
    return TelluricLines(wave[order], tau, rng.uniform(400.0, 800.0, wave.size)[order])


def transmission(setup: fwd.Setup, lines: TelluricLines) -> list:
    """Telluric transmission at the pixel centres of each order (observatory frame)."""
    out = []
    for k, lam in enumerate(setup.centres()):
        sig_lsf = fwd.C / (setup.resolution[k] * 2.0 * np.sqrt(2.0 * np.log(2.0)))
        tau = np.zeros(lam.size)
        sel = (lines.wave > lam[0] - 2.0) & (lines.wave < lam[-1] + 2.0)
        for w0, t0, s in zip(lines.wave[sel], lines.tau[sel], lines.sigma_v[sel], strict=True):
            st = np.hypot(s, sig_lsf)
            dv = fwd.C * (lam / w0 - 1.0)
            near = np.abs(dv) < 8 * st
            # optical depth broadened with its area kept: tau0 * s / st at the centre
            tau[near] += t0 * (s / st) * np.exp(-0.5 * (dv[near] / st) ** 2)
        out.append(np.exp(-tau))
    return out


def with_tellurics(counts: list, trans: list) -> list:
    return [c * t for c, t in zip(counts, trans, strict=True)]


def year_dates(n: int, seed: int, *, start: str = "2025-01-10T04:00:00") -> list[str]:
    """``n`` observing dates spread over a year (random nights, ISO UTC), in time order."""
    from astropy.time import Time, TimeDelta

    rng = np.random.default_rng(seed + 8000)
    days = np.sort(rng.integers(0, 365, n) + rng.uniform(0.0, 0.3, n))   # nights, a few hours long
    t0 = Time(start, scale="utc")
    return [(t0 + TimeDelta(float(d) * 86400.0, format="sec")).isot for d in days]


# ---------------------------------------------------------------------------------------- pixel damage
def _corrupt_neighbours(f: np.ndarray, a: int, b: int, rng, reach: int = 2, amount: float = 0.3) -> None:
    """The reduction's interpolation spreads a bad run [a, b) into ``reach`` pixels on each side."""
    for i in list(range(a - reach, a)) + list(range(b, b + reach)):
        if 0 <= i < f.size and np.isfinite(f[i]):
            f[i] *= 1.0 + rng.uniform(-amount, amount)


def add_cosmics(flux: list, rng, *, per_order: float = 3.0) -> list:
    """Cosmic-ray hits: 1-3 pixels each, 3-30x the local counts above them."""
    out = []
    for f in flux:
        f = f.copy()
        for _ in range(rng.poisson(per_order)):
            width = int(rng.integers(1, 4))
            i = int(rng.integers(0, f.size - width))
            local = max(np.median(f[max(i - 10, 0): i + 10]), 10.0)
            f[i:i + width] += local * rng.uniform(3.0, 30.0) * rng.uniform(0.3, 1.0, width)
        out.append(f)
    return out


def hot_pixel_map(setup: fwd.Setup, seed: int, *, per_order: int = 2) -> list:
    """Fixed detector pixels (indices per order) and their excess in units of the local counts."""
    rng = np.random.default_rng(seed + 9000)
    n = setup.edges[0].size - 1
    return [(rng.integers(20, n - 20, per_order), rng.uniform(2.0, 10.0, per_order)) for _ in range(setup.n_orders)]


def add_hot_pixels(flux: list, hot: list) -> list:
    out = []
    for f, (idx, excess) in zip(flux, hot, strict=True):
        f = f.copy()
        for i, x in zip(idx, excess, strict=True):
            f[i] += x * max(np.median(f[max(i - 10, 0): i + 10]), 10.0)
        out.append(f)
    return out


def add_nan_runs(flux: list, var: list, rng) -> tuple[list, list]:
    """NaN at both order ends and inside each order, neighbours corrupted by the interpolation."""
    fo, vo = [], []
    for f, v in zip(flux, var, strict=True):
        f, v = f.copy(), v.copy()
        n = f.size
        runs = [(0, int(rng.integers(5, 41))), (n - int(rng.integers(5, 41)), n)]
        for _ in range(int(rng.integers(1, 3))):
            a = int(rng.integers(50, n - 60))
            runs.append((a, a + int(rng.integers(2, 9))))
        for a, b in runs:
            f[a:b] = np.nan
            v[a:b] = np.nan
            _corrupt_neighbours(f, a, b, rng)
        fo.append(f)
        vo.append(v)
    return fo, vo


def add_nonpositive(flux: list, rng, *, per_order: int = 2) -> list:
    """Runs of exactly zero counts (dead pixels) and negative counts (over-subtracted background)."""
    out = []
    for f in flux:
        f = f.copy()
        n = f.size
        for j in range(per_order):
            a = int(rng.integers(50, n - 60))
            b = a + int(rng.integers(1, 6))
            f[a:b] = 0.0 if j % 2 == 0 else -rng.uniform(10.0, 500.0, b - a)
            _corrupt_neighbours(f, a, b, rng)
        out.append(f)
    return out


def saturation_level(expected: list, fraction: float = 0.03) -> float:
    """Full-well level at which the brightest ``fraction`` of expected pixels clip."""
    return float(np.quantile(np.concatenate(expected), 1.0 - fraction))


def saturate(flux: list, level: float) -> list:
    return [np.minimum(f, level) for f in flux]


def noisy_variance(flux: list, read_noise: float) -> list:
    """Variance as a reduction estimates it from the (damaged) counts: max(counts, 0) + read noise^2."""
    return [np.where(np.isfinite(f), np.maximum(f, 0.0) + read_noise**2, np.nan) for f in flux]


# ---------------------------------------------------------------------------------------- masks
@dataclass
class MismatchedMask:
    wave: np.ndarray
    weight: np.ndarray
    spurious: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))


def mismatch_mask(wave: np.ndarray, weight: np.ndarray, seed: int, *, drop: float = 0.2,
                  jitter_ms: float = 30.0, weight_sigma: float = 0.5, spurious: float = 0.1) -> MismatchedMask:
    """Drop ``drop`` of the lines, jitter the rest by N(0, jitter_ms) in velocity, multiply weights by
    exp(N(0, weight_sigma)), add ``spurious`` x n lines at random wavelengths with typical weights."""
    rng = np.random.default_rng(seed + 10000)
    keep = rng.uniform(0, 1, wave.size) >= drop
    w = wave[keep] * (1.0 + rng.normal(0.0, jitter_ms, keep.sum()) / fwd.C)
    wt = weight[keep] * np.exp(rng.normal(0.0, weight_sigma, keep.sum()))
    ns = round(spurious * wave.size)
    ws = rng.uniform(wave.min(), wave.max(), ns)
    wts = rng.choice(weight, ns)
    allw = np.concatenate([w, ws])
    allwt = np.concatenate([wt, wts])
    flag = np.concatenate([np.zeros(w.size, bool), np.ones(ns, bool)])
    o = np.argsort(allw)
    return MismatchedMask(allw[o], allwt[o], flag[o])


# ---------------------------------------------------------------------------------------- one exposure
@dataclass
class Exposure:
    clean: fwd.Draw          # the noise draw without any pixel nuisance (tellurics excluded too)
    damaged: fwd.Draw        # the same draw with the switched-on nuisances
    saturate: float | None   # the SATURATE keyword to write (flagged saturation), else None


def expose(expected_star: list, trans: list | None, z: list, rng, read_noise: float, nz: Nuisances,
           hot: list | None, level: float | None) -> Exposure:
    """One exposure from the standard normal deviates ``z`` (one array per order), with and without
    the nuisances; ``rng`` draws only the nuisances, so the clean draw does not depend on them.

    Tellurics change the expected counts, so both draws are built from the same deviates:
    f = m + sqrt(m + rn^2) z (the Gaussian approximation of Poisson counts at >= 20 counts, common
    practice), and the two draws share their noise exactly.
    """
    clean = [m + np.sqrt(np.maximum(m, 0.0) + read_noise**2) * zk for m, zk in zip(expected_star, z, strict=True)]
    exp_d = with_tellurics(expected_star, trans) if (nz.tellurics and trans is not None) else expected_star
    flux = [m + np.sqrt(np.maximum(m, 0.0) + read_noise**2) * zk for m, zk in zip(exp_d, z, strict=True)]
    if nz.cosmics:
        flux = add_cosmics(flux, rng)
    if nz.hot_pixels and hot is not None:
        flux = add_hot_pixels(flux, hot)
    if nz.saturation is not None and level is not None:
        flux = saturate(flux, level)
    if nz.nonpositive:
        flux = add_nonpositive(flux, rng)
    var = noisy_variance(flux, read_noise)
    if nz.nan_runs:
        flux, var = add_nan_runs(flux, var, rng)
    return Exposure(fwd.Draw(clean, noisy_variance(clean, read_noise), "noisy"), fwd.Draw(flux, var, "noisy"),
                    level if nz.saturation == "flagged" else None)


def write_exposure(path: str, setup: fwd.Setup, draw: fwd.Draw, date: str, saturate: float | None = None) -> None:
    """Multi-order FITS as :func:`forward.write_echelle`, with this exposure's date (and SATURATE)."""
    from astropy.io import fits

    fwd.write_echelle(path, setup, draw)
    with fits.open(path, mode="update") as h:
        h[0].header["DATE-AVG"] = date
        if saturate is not None:
            h[0].header["SATURATE"] = (float(saturate), "counts: pixels at or above are saturated")
