"""Line-profile diagnostics of a correlation profile: bisector span, per-order velocities, chromatic slope.

Bisector span (Queloz et al. 2001, A&A 379, 279): the bisector is the midpoint of the two sides of
the CCF dip at each level; levels are *fractional depths* d below the fitted continuum (d = 0 at the
continuum, 1 at the fitted minimum: flux = C0 - d A).  BIS = mean bisector velocity over the top
region d in [0.10, 0.40] minus the mean over the bottom region d in [0.55, 0.90].  A symmetric
profile gives 0; a linear bisector v = v0 + s d gives BIS = -0.475 s.

The bisector is computed on a cubic spline through the CCF points; the spline is linear in the CCF
values, so the sensitivity of each crossing to each CCF point is analytic and the error follows
from the exact pixel-variance propagation of ``CorrelationData.variance_of`` (the noise of the
fitted continuum and depth, which set the levels, is included through the fit's gain).

Per-order velocities: each order's own CCF, fitted with the global profile's width held fixed
(continuum, depth and centre free, two Gauss-Newton steps from the global solution); the
chromatic slope is the weighted straight-line slope of those velocities against ln(wavelength),
in m/s per unit ln(lambda) - an activity indicator (spots and convection shift blue and red
orders differently; a companion does not).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["BOTTOM", "TOP", "Bisector", "bisector", "not_a_knot_coefficients", "order_velocities"]

TOP = (0.10, 0.40)
BOTTOM = (0.55, 0.90)
_N_LEVELS = 31


@dataclass(frozen=True)
class Bisector:
    depth: np.ndarray          # fractional depth of each level
    velocity: np.ndarray       # bisector velocity per level, m/s
    span: float                # BIS, m/s
    sensitivity: np.ndarray    # d BIS / d CCF_i at fixed levels
    d_c0: float                # d BIS / d C0
    d_amp: float               # d BIS / d A


def _side(v, y, levels, i_min, direction):
    """For each level, the grid pair (a, b) on one side of the minimum where y first reaches it."""
    idx = np.arange(i_min, -1, -1) if direction < 0 else np.arange(i_min, v.size)
    ys = y[idx]
    above = ys[None, :] >= levels[:, None]
    found = above.any(axis=1) & (idx.size > 1)
    j = np.clip(np.argmax(above, axis=1), 1, idx.size - 1)
    return idx[j - 1], idx[j], found


def not_a_knot_coefficients(x: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Coefficients (4, n - 1, k) of the cubic splines through ``(x, Y[:, j])`` with not-a-knot ends
    (the third derivative continuous at the second and the last-but-one point; de Boor 1978,
    *A Practical Guide to Splines*, ch. IV): on ``[x_i, x_{i+1}]`` the spline of column ``j`` is
    ``((c0 t + c1) t + c2) t + c3`` with ``t = x - x_i``.

    The slopes at the points solve the usual tridiagonal system (one banded solve for every column),
    in the form scipy.interpolate.CubicSpline uses, so the result is that class's to rounding
    (tests/test_profile.py); without its set-up per call (~0.3 ms, twice per spectrum).  ``n >= 4``."""
    from scipy.linalg import solve_banded

    dx = np.diff(x)
    slope = np.diff(Y, axis=0) / dx[:, None]
    n = x.size
    A = np.zeros((3, n))
    A[1, 1:-1] = 2 * (dx[:-1] + dx[1:])
    A[0, 2:] = dx[:-1]
    A[-1, :-2] = dx[1:]
    b = np.empty(Y.shape)
    b[1:-1] = 3 * (dx[1:, None] * slope[:-1] + dx[:-1, None] * slope[1:])
    d = x[2] - x[0]
    A[1, 0], A[0, 1] = dx[1], d
    b[0] = ((dx[0] + 2 * d) * dx[1] * slope[0] + dx[0] ** 2 * slope[1]) / d
    d = x[-1] - x[-3]
    A[1, -1], A[-1, -2] = dx[-2], d
    b[-1] = (dx[-1] ** 2 * slope[-2] + (2 * d + dx[-1]) * dx[-2] * slope[-1]) / d
    s = solve_banded((1, 1), A, b, overwrite_ab=True, overwrite_b=True, check_finite=False)
    t = (s[:-1] + s[1:] - 2 * slope) / dx[:, None]
    return np.stack((t / dx[:, None], (slope - s[:-1]) / dx[:, None] - t, s[:-1], Y[:-1]))


def _bisector_velocities(v, y, c0, amp, depths, i_min):
    """Bisector velocities at fractional depths, from a cubic spline through the CCF points.

    A straight line between grid points makes a spurious span that depends on where the grid falls
    (~2 m/s for a 4.7 km/s-wide profile sampled every 0.8 km/s); the spline removes it.  The spline is
    linear in the data, ``S(x) = sum_i y_i B_i(x)``, so a crossing ``S(x*) = L`` responds as
    ``dx*/dy_i = -B_i(x*) / S'(x*)`` and ``dx*/dL = 1 / S'(x*)``.  The spline (not-a-knot, as
    scipy.interpolate.CubicSpline's default) and its basis come from one banded solve
    (:func:`not_a_knot_coefficients`); each crossing stays on its bracketing interval.
    """
    levels = c0 - depths * amp
    if v.size < 4:
        return np.full(depths.size, np.nan), np.zeros((depths.size, v.size)), np.zeros(depths.size)
    coef = not_a_knot_coefficients(v, np.column_stack((y, np.eye(v.size))))
    k = depths.size
    # both sides at once (left: the first k entries, right: the last k)
    a_l, b_l, found_l = _side(v, y, levels, i_min, -1)
    a_r, b_r, found_r = _side(v, y, levels, i_min, 1)
    a, b = np.concatenate((a_l, a_r)), np.concatenate((b_l, b_r))
    lv = np.concatenate((levels, levels))
    ok2 = np.concatenate((found_l, found_r)) & (y[b] != y[a])
    # start from the straight-line crossing, then Newton on the spline (bracketed in [v_a, v_b], so
    # on the spline's piece of that interval)
    dy = np.where(y[b] != y[a], y[b] - y[a], 1.0)
    x = v[a] + (lv - y[a]) / dy * (v[b] - v[a])
    j = np.minimum(a, b)
    lo, hi = v[j], v[j + 1]
    c3, c2, c1, c0_ = coef[0, j, 0], coef[1, j, 0], coef[2, j, 0], coef[3, j, 0]
    for _ in range(8):
        t = x - lo
        d1 = (3 * c3 * t + 2 * c2) * t + c1
        step = np.where(d1 != 0, (((c3 * t + c2) * t + c1) * t + c0_ - lv) / np.where(d1 != 0, d1, 1.0), 0.0)
        x = np.clip(x - step, lo, hi)
    t = x - lo
    d1 = (3 * c3 * t + 2 * c2) * t + c1
    ok2 &= d1 != 0
    d1 = np.where(d1 != 0, d1, 1.0)
    cb = coef[:, j, 1:]                                   # (4, crossings, n): B_i's pieces
    tt = t[:, None]
    bx = ((cb[0] * tt + cb[1]) * tt + cb[2]) * tt + cb[3]
    ok = np.ones(k, dtype=bool) & ok2[:k] & ok2[k:]
    vel = np.zeros(k) + 0.5 * x[:k] + 0.5 * x[k:]
    sens = np.zeros((k, v.size)) + 0.5 * (-bx[:k] / d1[:k, None]) + 0.5 * (-bx[k:] / d1[k:, None])
    dlevel = np.zeros(k) + 0.5 / d1[:k] + 0.5 / d1[k:]
    vel[~ok] = np.nan
    return vel, sens, dlevel


def bisector(v: np.ndarray, ccf: np.ndarray, c0: float, amp: float, *, top=TOP, bottom=BOTTOM) -> Bisector:
    """Bisector and bisector span of a CCF dip with fitted continuum ``c0`` and depth ``amp``."""
    v = np.asarray(v, dtype=float)
    y = np.asarray(ccf, dtype=float)
    if not (np.all(np.isfinite(y)) and amp > 0):
        nan = float("nan")
        return Bisector(np.zeros(0), np.zeros(0), nan, np.zeros(v.size), 0.0, 0.0)
    i_min = int(np.argmin(y))
    dt = np.linspace(*top, _N_LEVELS)
    db = np.linspace(*bottom, _N_LEVELS)
    depths = np.concatenate((dt, db))
    bis, sens, dlevel = _bisector_velocities(v, y, c0, amp, depths, i_min)
    w = np.concatenate((np.full(_N_LEVELS, 1 / _N_LEVELS), np.full(_N_LEVELS, -1 / _N_LEVELS)))
    span = float(np.sum(w * bis)) if np.all(np.isfinite(bis)) else float("nan")
    # level = c0 - d amp: d level / d c0 = 1, d level / d amp = -d
    return Bisector(depths, bis, span, w @ sens, float(np.sum(w * dlevel)), float(np.sum(w * dlevel * -depths)))


def _normal_matrix(e: np.ndarray, g: np.ndarray, m: int) -> np.ndarray:
    """``J^T J`` per order for the columns (1, -e, -g) of the fixed-width fit (orders, 3, 3)."""
    s1, s2 = -e.sum(axis=1), -g.sum(axis=1)
    s11, s12, s22 = (e * e).sum(axis=1), (e * g).sum(axis=1), (g * g).sum(axis=1)
    return np.stack((np.stack((np.full_like(s1, m), s1, s2), axis=1), np.stack((s1, s11, s12), axis=1),
                     np.stack((s2, s12, s22), axis=1)), axis=1)


def order_velocities(v: np.ndarray, order_ccfs: list[np.ndarray], c0: float, amp: float, mu: float,
                     sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Per-order velocity (m/s) with the width fixed; returns (velocities, gains).

    ``gains[k]`` is d(velocity_k)/d(CCF_k) at the solution (rows over the grid), for the error.
    Gauss-Newton steps on the columns (1, -e, -g) of the model ``c0 - a e``, ``e`` the Gaussian and
    ``g = a e z / sigma``, their normal equations summed column by column.
    """
    n = len(order_ccfs)
    Y = np.asarray(order_ccfs)
    m = Y.shape[1]
    p = np.tile([c0, amp, mu], (n, 1)).astype(float)
    eye = 1e-12 * np.eye(3)[None]
    for _ in range(3):
        z = (v[None, :] - p[:, 2:3]) / sigma
        e = np.exp(-0.5 * z * z)
        g = p[:, 1:2] * e * z / sigma
        resid = Y - (p[:, 0:1] - p[:, 1:2] * e)
        A = _normal_matrix(e, g, m)
        b = np.stack((resid.sum(axis=1), -(e * resid).sum(axis=1), -(g * resid).sum(axis=1)), axis=1)
        with np.errstate(all="ignore"):
            dp = np.linalg.solve(A + eye * np.abs(A).max(), b[..., None])[..., 0]
        p += np.where(np.isfinite(dp), dp, 0.0)
    z = (v[None, :] - p[:, 2:3]) / sigma
    e = np.exp(-0.5 * z * z)
    g = p[:, 1:2] * e * z / sigma
    J = np.stack((np.ones_like(e), -e, -g), axis=1)                 # (n, 3, m)
    with np.errstate(all="ignore"):
        G = np.linalg.solve(_normal_matrix(e, g, m), J)             # (n, 3, m)
    ok = (p[:, 1] > 0) & np.isfinite(p).all(axis=1)
    return np.where(ok, p[:, 2], np.nan), G[:, 2, :]
