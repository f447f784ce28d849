"""Two-component correlation profiles: double-lined binaries (``--components 2``).

The CCF of a double-lined binary shows two dips.  The coarse search finds the deepest dip, then
the deepest one outside +-1.5 of its FWHM (all mask lines are used, so that chance coincidences of
lines stay below a faint secondary); when the second is significant the fine grid spans both
and two inverted Gaussians on one continuum are fitted jointly.  The primary is the deeper profile
(the same star across a series is kept by :func:`assign_components`).  Errors come from the exact
propagation of the pixel variances through the CCF and the fit's gain, as for one component.

Errors combine that photon noise with the disturbance of each dip by the other star's CCF background
(chance coincidences of its lines with the mask), estimated from the fit residuals; at SNR 150 the
latter dominates the secondary's error.

When the dips cannot be separated — no significant second dip, a failed fit, or centres closer than
``min_separation`` x the mean FWHM — the spectrum is reported as blended (no velocities).

The flux ratio is estimated as the ratio of the two profiles' areas (equivalent widths of the
CCF dips), which equals the stars' flux ratio when their lines are intrinsically equally strong
(similar spectral types); otherwise it is only indicative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from lineshift.errors import MeasurementError
from lineshift.measure.ccf import correlate
from lineshift.measure.mask_engine import SearchSettings, coarse_ccf, pixel_velocity_width
from lineshift.measure.peak import FWHM_PER_SIGMA
from lineshift.measure.prepare import PreparedOrder
from lineshift.model import LineMask

__all__ = ["BLENDED", "TwoComponents", "assign_components", "measure_two"]

BLENDED = "components blended"


@dataclass(frozen=True)
class TwoComponents:
    """Both stars' profiles (observatory frame, m/s); index 0 is the deeper (primary)."""

    rv: tuple[float, float]
    rv_err: tuple[float, float]
    fwhm: tuple[float, float]
    fwhm_err: tuple[float, float]
    contrast: tuple[float, float]
    contrast_err: tuple[float, float]
    flux_ratio: float
    snr: float
    n_lines: int
    n_orders: int
    velocity: np.ndarray
    ccf: np.ndarray
    model: np.ndarray


def _two_gauss(v, p):
    c0, a1, m1, s1, a2, m2, s2 = p
    e1 = np.exp(-0.5 * ((v - m1) / s1) ** 2)
    e2 = np.exp(-0.5 * ((v - m2) / s2) ** 2)
    return c0 - a1 * e1 - a2 * e2, e1, e2


def _jac(v, p):
    _, a1, m1, s1, a2, m2, s2 = p
    _, e1, e2 = _two_gauss(v, p)
    z1, z2 = (v - m1) / s1, (v - m2) / s2
    return np.column_stack((np.ones_like(v), -e1, -a1 * e1 * z1 / s1, -a1 * e1 * z1 * z1 / s1,
                            -e2, -a2 * e2 * z2 / s2, -a2 * e2 * z2 * z2 / s2))


def measure_two(orders: list[PreparedOrder], mask: LineMask, settings: SearchSettings, *, berv: float = 0.0,
                path: str | None = None, min_separation: float = 1.0, min_significance: float = 5.0) -> TwoComponents:
    """Velocities of both components of a double-lined spectrum (observatory frame).

    Raises
    ------
    MeasurementError
        ``status = "components blended"`` when the two dips cannot be separated; the usual
        reasons (no line on the spectrum, no peak at all) otherwise.
    """
    if not orders:
        raise MeasurementError("no usable order (too few valid pixels)", path=path, status="no valid pixels")
    dv_pix = pixel_velocity_width(orders)
    box = settings.box_width or dv_pix
    # all lines: the background of chance line coincidences, against which a faint secondary must
    # stand out, falls as more lines are used
    c = coarse_ccf(orders, mask, settings, berv, dv_pix, path, all_lines=True)
    grid, y, base, noise = c.grid, c.ccf, c.base, c.noise
    i1 = int(np.argmin(y))
    d1 = base - y[i1]
    if noise <= 0 or d1 < settings.min_significance * noise:
        raise MeasurementError("no correlation peak", path=path, status="no correlation peak")
    fwhm1 = c.half_width(i1)
    far = np.abs(grid - grid[i1]) > 1.5 * fwhm1
    minima = np.flatnonzero((y[1:-1] < y[:-2]) & (y[1:-1] <= y[2:])) + 1
    minima = minima[far[minima]]
    if minima.size == 0 or base - y[minima].min() < min_significance * noise:
        raise MeasurementError("only one correlation dip: the components are blended", path=path, status=BLENDED)
    i2 = int(minima[np.argmin(y[minima])])
    d2 = base - y[i2]
    v1, v2 = grid[i1], grid[i2]
    step = settings.velocity_step or dv_pix
    width = settings.window_fwhm * fwhm1
    fine = np.arange(min(v1, v2) - width, max(v1, v2) + width + step / 2, step)
    data = correlate(orders, mask, fine, box, clear_of_bad=True)
    ccf = data.ccf
    c0 = float(np.median(np.concatenate((ccf[:3], ccf[-3:]))))
    s0 = fwhm1 / FWHM_PER_SIGMA
    p0 = np.array([c0, d1, v1, s0, d2, v2, s0])
    sol = least_squares(lambda p: _two_gauss(fine, p)[0] - ccf, p0, jac=lambda p: _jac(fine, p), method="lm",
                        x_scale=np.array([1, 0.1, s0, s0, 0.1, s0, s0]))
    c0, a1, m1, s1, a2, m2, s2 = sol.x
    s1, s2 = abs(s1), abs(s2)
    if not (sol.success and a1 > 0 and a2 > 0 and fine[0] < m1 < fine[-1] and fine[0] < m2 < fine[-1]):
        raise MeasurementError("the two-profile fit failed: the components are blended", path=path, status=BLENDED)
    if abs(m1 - m2) < min_separation * 0.5 * FWHM_PER_SIGMA * (s1 + s2):
        raise MeasurementError("the two dips are closer than their widths: the components are blended",
                               path=path, status=BLENDED)
    p = np.array([c0, a1, m1, s1, a2, m2, s2])
    J = _jac(fine, p)
    gain = np.linalg.solve(J.T @ J, J.T)
    comps = [(a1, m1, s1, 1), (a2, m2, s2, 4)]
    comps.sort(key=lambda c: -c[0])            # primary = deeper
    sens = []
    for a, _, _, k in comps:
        sens += [gain[k + 1], FWHM_PER_SIGMA * gain[k + 2], gain[k] / c0 - a * gain[0] / c0**2]
    photon = data.variance_of(np.stack(sens))
    # the other star's CCF background (chance line coincidences) is no photon noise but moves each dip
    # like correlated noise: least-squares error from the fit residuals, scaled by their correlation
    # length (about half the mean FWHM) over the grid step.  Each star makes a background in
    # proportion to its own depth, and each dip is disturbed by the *other* star's: the residual
    # variance is shared out as a_other^2 / (a1^2 + a2^2).
    res_var = float(np.sum(sol.fun**2) / max(sol.fun.size - 7, 1))
    corr = max(1.0, 0.25 * FWHM_PER_SIGMA * (s1 + s2) / step)
    a_p, a_s = comps[0][0], comps[1][0]
    share = np.repeat([a_s**2, a_p**2], 3) / (a_p**2 + a_s**2)
    background = res_var * corr * share * np.sum(np.stack(sens) ** 2, axis=1)
    err = np.sqrt(photon + background)
    (ap, mp, sp, _), (as_, ms, ss, _) = comps
    good_snr = np.concatenate([o.flux[o.good][::4] / np.sqrt(o.var[o.good][::4]) for o in orders])
    return TwoComponents(
        rv=(float(mp), float(ms)), rv_err=(float(err[0]), float(err[3])),
        fwhm=(float(FWHM_PER_SIGMA * sp), float(FWHM_PER_SIGMA * ss)), fwhm_err=(float(err[1]), float(err[4])),
        contrast=(float(ap / c0), float(as_ / c0)), contrast_err=(float(err[2]), float(err[5])),
        flux_ratio=float(as_ * ss / (ap * sp)), snr=float(np.median(good_snr)), n_lines=data.n_lines,
        n_orders=len(data.terms), velocity=fine, ccf=ccf, model=_two_gauss(fine, p)[0])


def assign_components(rows: list[dict]) -> int:
    """Keep each star's identity across a series by its profile (width and depth); returns swaps made.

    The primary is the deeper profile on average: the references are the batch medians of the
    (contrast, FWHM) of the deeper and of the shallower component, and each row keeps or swaps its
    two components to match them best (distances in units of the batch's spread).
    """
    ok = [r for r in rows if r.get("status") == "ok" and r.get("rv2") is not None and np.isfinite(r["rv2"])]
    if len(ok) < 2:
        return 0
    c1 = np.array([r["contrast"] for r in ok])
    c2 = np.array([r["contrast2"] for r in ok])
    f1 = np.array([r["fwhm"] for r in ok])
    f2 = np.array([r["fwhm2"] for r in ok])
    deeper = c1 >= c2
    ref_a = (np.median(np.where(deeper, c1, c2)), np.median(np.where(deeper, f1, f2)))
    ref_b = (np.median(np.where(deeper, c2, c1)), np.median(np.where(deeper, f2, f1)))
    sc = max(abs(ref_a[0] - ref_b[0]), 1e-3)
    sf = max(abs(ref_a[1] - ref_b[1]), 0.05 * ref_a[1])

    def dist(c, f, ref):
        return ((c - ref[0]) / sc) ** 2 + ((f - ref[1]) / sf) ** 2

    swaps = 0
    for r, a, b, fa, fb in zip(ok, c1, c2, f1, f2, strict=True):
        keep = dist(a, fa, ref_a) + dist(b, fb, ref_b)
        swap = dist(b, fb, ref_a) + dist(a, fa, ref_b)
        if swap < keep:
            for x, y in (("rv", "rv2"), ("rv_err", "rv2_err"), ("fwhm", "fwhm2"), ("contrast", "contrast2"),
                         ("rv_topo", "rv2_topo"), ("fwhm_err", "fwhm2_err"), ("contrast_err", "contrast2_err")):
                r[x], r[y] = r[y], r[x]
            r["flux_ratio"] = 1 / r["flux_ratio"] if r.get("flux_ratio") else r.get("flux_ratio")
            swaps += 1
    return swaps
