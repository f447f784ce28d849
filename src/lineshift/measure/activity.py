"""Line-core activity indices: Ca II H and K (S-index, log R'HK), H-alpha and Na I D.

Band definitions (wavelengths in AIR, Angstrom; converted to vacuum by the caller, see
:func:`vacuum_bands`, because this floor may not import ``lineshift.io``):

* Ca II H and K, Vaughan, Preston & Wilson (1978, PASP 90, 267) and Duncan et al. (1991, ApJS 76, 383):
  triangular passbands of 1.09 A FWHM centred on K 3933.664 and H 3968.470; rectangular continuum bands
  20 A wide centred on V 3901.070 and R 4001.070.  Instrumental index
  ``S_raw = (F_H + F_K) / (F_R + F_V)`` with F the band's weighted mean flux per Angstrom; on the Mount
  Wilson scale ``S_MW = a + b S_raw`` with per-instrument coefficients (a, b) from the configuration
  (without them the index stays on the instrument's own scale and log R'HK is not formed).
* H-alpha, Gomes da Silva et al. (2011, A&A 534, A30), Table 2 [memory]: core 6562.808 A, 1.6 A wide;
  reference bands 6550.87 A (10.75 A wide) and 6580.31 A (8.75 A wide).  ``I = F_Ha / (F_L + F_R)``.
* Na I D, Gomes da Silva et al. (2011), after Diaz et al. (2007) [memory]: cores D1 5895.92 and
  D2 5889.95 A, 0.5 A wide; reference bands 5805.0 A (10 A wide) and 6090.0 A (20 A wide).
  ``I = (F_D1 + F_D2) / (F_L + F_R)``.

Where each number was checked (literature search, 2026-12-03; nothing found wrong):
  Ca II H & K centres, the 1.09 A triangles and the 20 A continuum bands at 3901.07 / 4001.07 A agree with
  Cincunegui, Diaz & Mauas (2007, A&A 469, 309: triangular profile of Vaughan et al. 1978, 20 A bands at
  3901 and 4001 A) and with the edges 3891.067-3911.069 / 3991.067-4011.067 A in public S-index code
  [paper, secondary]; D1 5895.92 and D2 5889.95 A as in Diaz, Cincunegui & Mauas (2007, arXiv:0704.0812)
  [paper]; the 1.6 A H-alpha core as in "Optimising the H-alpha index" (2022, arXiv:2210.06903: "the broader
  1.6 A, generally used in exoplanet detection") [paper]; the Na I D core widths and reference bands and
  the H-alpha reference bands [memory: the 2011 table itself was not readable]; the C_cf and R_phot
  polynomials of Noyes et al. as in several independent public implementations [secondary]; the
  0.44-0.90 validity range [memory].

Every index here is a ratio of band-MEAN fluxes (flux per Angstrom, weighted by the passband); an index
built from band-integrated fluxes differs from it by a constant ratio of band widths, which a per-instrument
calibration absorbs.

log R'HK follows Noyes et al. (1984, ApJ 279, 763): ``R_HK = 1.340e-4 C_cf S_MW`` with
``log C_cf = 1.13 x^3 - 3.91 x^2 + 2.84 x - 0.47`` (x = B-V; Middelkoop 1982, Rutten 1984), and
``R'_HK = R_HK - R_phot`` with ``log R_phot = -4.898 + 1.918 x^2 - 2.893 x^3``.  Formed only for
0.44 <= B-V <= 0.90 (the range the photospheric correction was fitted over, as recorded in the project's
science notes); outside it the value is NaN with a note.

Bands are placed in the star's rest frame: a rest wavelength lambda appears at ``lambda (1 + v/c)`` in the
spectrum, v being the star's velocity in the spectrum's own wavelength frame.  A band that no order covers
completely, or that overlaps a telluric band, gives NaN and a note -- never a number from part of a band.

Errors come from the pixel variances: each band mean is linear in the fluxes, so its variance is
``sum W_i^2 var_i / (sum W_i)^2``; the ratio's error is first-order propagation (bands do not share pixels).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from lineshift.model import C_MS, Order

__all__ = [
    "BANDS_AIR", "BV_RANGE", "ActivityIndices", "Band", "band_mean", "log_rhk", "measure_activity",
    "vacuum_bands",
]


@dataclass(frozen=True)
class Band:
    """A passband: centre (Angstrom), full width (rectangle) or FWHM (triangle), and its shape."""

    name: str
    centre: float
    width: float
    shape: str = "rect"  # "rect" or "triangle"

    @property
    def limits(self) -> tuple[float, float]:
        """(lo, hi) wavelengths where the passband is non-zero."""
        half = self.width if self.shape == "triangle" else 0.5 * self.width
        return self.centre - half, self.centre + half


#: Published band definitions, air wavelengths (see the module docstring for the papers).
BANDS_AIR: dict[str, tuple[Band, ...]] = {
    "s_index": (Band("CaII_H", 3968.470, 1.09, "triangle"), Band("CaII_K", 3933.664, 1.09, "triangle"),
                Band("CaII_R", 4001.070, 20.0), Band("CaII_V", 3901.070, 20.0)),
    "halpha_index": (Band("Halpha", 6562.808, 1.6), Band("Halpha_L", 6550.87, 10.75),
                     Band("Halpha_R", 6580.31, 8.75)),
    "nad_index": (Band("NaI_D1", 5895.92, 0.5), Band("NaI_D2", 5889.95, 0.5), Band("NaD_L", 5805.0, 10.0),
                  Band("NaD_R", 6090.0, 20.0)),
}
#: How many leading bands of each index form its numerator (the rest are the reference bands).
_N_CORE = {"s_index": 2, "halpha_index": 1, "nad_index": 2}

#: B-V range over which log R'HK is formed (Noyes et al. 1984 photospheric correction).
BV_RANGE = (0.44, 0.90)


def vacuum_bands(air_to_vacuum: Callable[[np.ndarray], np.ndarray]) -> dict[str, tuple[Band, ...]]:
    """The published bands with centres moved to vacuum by ``air_to_vacuum`` (e.g. lineshift.io.airvac).

    Widths are converted with the local dispersion of the conversion (n varies slowly: the change is ~1e-7).
    """
    out = {}
    for key, bands in BANDS_AIR.items():
        c = np.array([b.centre for b in bands])
        cv = np.asarray(air_to_vacuum(c), dtype=float)
        out[key] = tuple(Band(b.name, float(v), b.width * float(v / b.centre), b.shape)
                         for b, v in zip(bands, cv, strict=True))
    return out


def _pixel_edges(wave: np.ndarray) -> np.ndarray:
    mid = 0.5 * (wave[1:] + wave[:-1])
    return np.concatenate(([wave[0] - (mid[0] - wave[0])], mid, [wave[-1] + (wave[-1] - mid[-1])]))


def _cumulative_weight(band: Band, x: np.ndarray) -> np.ndarray:
    """Integral of the passband from -inf to x (exact for the rectangle and the triangle)."""
    lo, hi = band.limits
    if band.shape == "rect":
        return np.clip(x, lo, hi) - lo
    h = band.width  # triangle: half-base = FWHM
    t = np.clip(x - band.centre, -h, h)
    left = 0.5 * (h + np.minimum(t, 0.0)) ** 2 / h
    right = np.where(t > 0, t - 0.5 * t * t / h, 0.0)
    return left + right


def band_mean(band: Band, wave: np.ndarray, flux: np.ndarray, var: np.ndarray) -> tuple[float, float]:
    """Passband-weighted mean flux and its standard error, or (nan, nan) if not fully covered by good pixels.

    Each pixel is a constant flux over its extent (edges halfway to its neighbours); its weight is the exact
    integral of the passband over that extent.
    """
    lo, hi = band.limits
    edges = _pixel_edges(wave)
    if lo < edges[0] or hi > edges[-1]:
        return math.nan, math.nan
    cw = _cumulative_weight(band, edges)
    w = np.diff(cw)
    use = w > 0
    if not np.all(np.isfinite(flux[use])) or not np.all(np.isfinite(var[use]) & (var[use] > 0)):
        return math.nan, math.nan
    wsum = float(w[use].sum())
    mean = float(np.dot(w[use], flux[use]) / wsum)
    err = float(math.sqrt(np.dot(w[use] ** 2, var[use])) / wsum)
    return mean, err


def log_rhk(s_mw: float, bv: float, s_err: float = math.nan) -> tuple[float, float]:
    """log10 R'HK and its error from a Mount Wilson S-index and B-V (Noyes et al. 1984; see module docstring).

    Returns (nan, nan) outside :data:`BV_RANGE` or when R'HK <= 0.
    """
    if not (BV_RANGE[0] <= bv <= BV_RANGE[1]) or not math.isfinite(s_mw):
        return math.nan, math.nan
    log_ccf = 1.13 * bv**3 - 3.91 * bv**2 + 2.84 * bv - 0.47
    k = 1.340e-4 * 10.0**log_ccf
    r_phot = 10.0 ** (-4.898 + 1.918 * bv**2 - 2.893 * bv**3)
    r = k * s_mw - r_phot
    if r <= 0:
        return math.nan, math.nan
    return math.log10(r), k * s_err / (math.log(10.0) * r)


@dataclass
class ActivityIndices:
    """Activity indices of one spectrum (NaN where a band was missing; ``notes`` says why)."""

    s_index: float = math.nan
    s_index_err: float = math.nan
    s_scale: str = "instrument"  # "instrument" or "mount_wilson"
    log_rhk: float = math.nan
    log_rhk_err: float = math.nan
    halpha_index: float = math.nan
    halpha_index_err: float = math.nan
    nad_index: float = math.nan
    nad_index_err: float = math.nan
    notes: list[str] = field(default_factory=list)

    def as_row(self) -> dict:
        """Column name -> value, for the measure table."""
        return {k: getattr(self, k) for k in ("s_index", "s_index_err", "log_rhk", "log_rhk_err",
                                              "halpha_index", "halpha_index_err", "nad_index",
                                              "nad_index_err")}


def _order_flux(o: Order) -> tuple[np.ndarray, np.ndarray]:
    if o.blaze is None:
        return o.flux, o.var
    b = np.where(np.asarray(o.blaze) > 0, o.blaze, np.nan)
    return o.flux / b, o.var / b**2


def _measure_band(band: Band, orders: Sequence[Order], shift: float) -> tuple[float, float]:
    """Best (smallest relative error) fully covering order's band mean, with the band moved by ``shift``."""
    moved = Band(band.name, band.centre * shift, band.width * shift, band.shape)
    best = (math.nan, math.nan)
    for o in orders:
        lo, hi = moved.limits
        if o.wave[0] > lo or o.wave[-1] < hi:
            continue
        f, v = _order_flux(o)
        m, e = band_mean(moved, np.asarray(o.wave, float), np.asarray(f, float), np.asarray(v, float))
        if not (math.isfinite(m) and m > 0):
            continue
        if not math.isfinite(best[0]) or e / m < best[1] / best[0]:
            best = (m, e)
    return best


def _ratio(num: list[tuple[float, float]], den: list[tuple[float, float]]) -> tuple[float, float]:
    n = sum(m for m, _ in num)
    d = sum(m for m, _ in den)
    r = n / d
    var = (sum(e * e for _, e in num) + r * r * sum(e * e for _, e in den)) / (d * d)
    return r, math.sqrt(var)


def measure_activity(orders: Sequence[Order], velocity: float, bands: dict[str, tuple[Band, ...]], *,
                     telluric_bands: np.ndarray | None = None, calibration: tuple[float, float] | None = None,
                     bv: float | None = None) -> ActivityIndices:
    """All activity indices of one spectrum.

    Parameters
    ----------
    orders : the spectrum's orders (vacuum wavelengths, the spectrum's own frame)
    velocity : the star's velocity in that frame, m/s (the measured, uncorrected velocity)
    bands : rest-frame VACUUM bands, as from :func:`vacuum_bands`
    telluric_bands : (n, 2) vacuum intervals in the spectrum's frame; a band touching one gives NaN
    calibration : (a, b) with ``S_MW = a + b S_raw``; without it S stays instrumental and log R'HK is NaN
    bv : B-V colour for log R'HK
    """
    out = ActivityIndices()
    if not math.isfinite(velocity):
        out.notes.append("activity: no velocity to place the bands")
        return out
    shift = 1.0 + velocity / C_MS
    tell = np.zeros((0, 2)) if telluric_bands is None else np.asarray(telluric_bands, float).reshape(-1, 2)
    for key, group in bands.items():
        vals, missing = [], []
        for b in group:
            lo, hi = (x * shift for x in b.limits)
            if tell.size and np.any((tell[:, 0] < hi) & (tell[:, 1] > lo)):
                missing.append(f"{b.name} in a telluric band")
                continue
            m, e = _measure_band(b, orders, shift)
            if not math.isfinite(m):
                missing.append(f"{b.name} not covered")
                continue
            vals.append((m, e))
        if missing:
            out.notes.append(f"{key}: " + ", ".join(missing))
            continue
        r, e = _ratio(vals[: _N_CORE[key]], vals[_N_CORE[key]:])
        setattr(out, key, r)
        setattr(out, key + "_err", e)
    if math.isfinite(out.s_index) and calibration is not None:
        a, b = calibration
        out.s_index, out.s_index_err, out.s_scale = a + b * out.s_index, abs(b) * out.s_index_err, "mount_wilson"
    if math.isfinite(out.s_index) and bv is not None:
        if out.s_scale != "mount_wilson":
            out.notes.append("log_rhk: needs the S-index on the Mount Wilson scale (calibration not configured)")
        else:
            out.log_rhk, out.log_rhk_err = log_rhk(out.s_index, bv, out.s_index_err)
            if not math.isfinite(out.log_rhk):
                out.notes.append(f"log_rhk: B-V {bv} outside {BV_RANGE[0]}-{BV_RANGE[1]} or R'HK <= 0")
    return out
