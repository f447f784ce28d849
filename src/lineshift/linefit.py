"""Batched least squares for many small independent fits (line profiles).

All lines are fitted at once: parameters (n, p), data and inverse variances (n, k).  Gauss-Newton
with a per-fit Levenberg-Marquardt damping that adapts to whether each step lowered that fit's
chi-square, so one hard line neither stalls nor breaks the others.  Two models:

* :func:`gaussian_points` - ``c0 - a exp(-(x - mu)^2 / (2 s^2))`` sampled at points;
* :func:`gaussian_pixels` - a Gaussian of area-normalised amplitude integrated over pixel bins,
  on a linear background: ``b0 + b1 u + A * mean_over_pixel(exp(-(x - mu)^2 / (2 s^2)))``, the
  model a centroid fit to undersampled lamp lines needs (the pixel integral uses erf).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy.special import erf

__all__ = ["batched_fit", "gaussian_pixels", "gaussian_points", "weighted_line"]

Model = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


def gaussian_points(x: np.ndarray) -> Model:
    """Model ``c0 - a exp(-(x-mu)^2/(2 s^2))`` at points ``x`` (shape (k,) or (n, k)); params (c0, a, mu, s)."""

    def model(p):
        c0, a, mu, s = (p[:, i:i + 1] for i in range(4))
        z = (x - mu) / s
        e = np.exp(-0.5 * z * z)
        f = c0 - a * e
        J = np.stack((np.ones_like(e), -e, -a * e * z / s, -a * e * z * z / s), axis=2)
        return f, J

    return model


def gaussian_pixels(lo: np.ndarray, hi: np.ndarray, u: np.ndarray) -> Model:
    """Pixel-integrated Gaussian on a linear background; params (b0, b1, A, mu, s).

    ``lo``, ``hi`` : (n, k) pixel edges (same unit as mu, s); ``u`` : (n, k) background abscissa.
    The profile term is the mean of the Gaussian ``A exp(-(x-mu)^2/(2 s^2))`` over each pixel.
    """
    width = hi - lo
    r2 = np.sqrt(2.0)
    sqrt_pi_2 = np.sqrt(np.pi / 2)

    def model(p):
        b0, b1, A, mu, s = (p[:, i:i + 1] for i in range(5))
        za, zb = (lo - mu) / s, (hi - mu) / s
        ea, eb = np.exp(-0.5 * za * za), np.exp(-0.5 * zb * zb)
        integral = s * sqrt_pi_2 * (erf(zb / r2) - erf(za / r2))       # int exp(-(x-mu)^2/2s^2) dx
        g = integral / width
        f = b0 + b1 * u + A * g
        dg_dmu = -(eb - ea) / width                                      # d/dmu of the mean
        dg_ds = (integral / s - (zb * eb - za * ea)) / width
        J = np.stack((np.ones_like(f), u, g, A * dg_dmu, A * dg_ds), axis=2)
        return f, J

    return model


def batched_fit(model: Model, p0: np.ndarray, y: np.ndarray, w: np.ndarray, *, n_iter: int = 40,
                positive: tuple[int, ...] = ()) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Fit every row of ``y`` (weights ``w``) with ``model``; returns (params, covariances, chi2, ok).

    ``positive`` lists parameter indices kept positive (widths).  A fit whose normal matrix is
    singular (no data) gets ``ok = False`` without affecting the others.
    """
    p = np.array(p0, dtype=float)
    n, npar = p.shape
    lam = np.full(n, 1e-3)
    f, J = model(p)
    chi2 = np.sum(w * (y - f) ** 2, axis=1)
    eye = np.eye(npar)[None]
    for _ in range(n_iter):
        JW = J * w[:, :, None]
        A = np.einsum("nki,nkj->nij", JW, J)
        b = np.einsum("nki,nk->ni", JW, y - f)
        diag = np.einsum("nii->ni", A)
        damp = lam[:, None, None] * (diag[:, :, None] * eye + 1e-300 * eye)
        dp = np.linalg.solve(A + damp + 1e-12 * np.abs(diag).max(axis=1)[:, None, None] * eye, b[..., None])[..., 0]
        dp = np.where(np.isfinite(dp), dp, 0.0)
        trial = p + dp
        for i in positive:
            trial[:, i] = np.abs(trial[:, i])
        ft, Jt = model(trial)
        chi2t = np.sum(w * (y - ft) ** 2, axis=1)
        better = np.isfinite(chi2t) & (chi2t <= chi2)
        p = np.where(better[:, None], trial, p)
        f = np.where(better[:, None], ft, f)
        J = np.where(better[:, None, None], Jt, J)
        done = better & (chi2 - chi2t <= 1e-10 * (chi2 + 1e-300))
        chi2 = np.where(better, chi2t, chi2)
        lam = np.where(better, lam * 0.3, lam * 10.0)
        if np.all(done | (lam > 1e10)):
            break
    JW = J * w[:, :, None]
    A = np.einsum("nki,nkj->nij", JW, J)
    with np.errstate(all="ignore"):
        cov = np.linalg.pinv(A)
    ok = np.all(np.isfinite(p), axis=1) & np.all(np.isfinite(np.einsum("nii->ni", cov)), axis=1)
    ok &= np.einsum("nii->ni", A).min(axis=1) > 0
    return p, cov, chi2, ok


def weighted_line(x: np.ndarray, y: np.ndarray, err: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted straight line ``y = a + b x`` (weights 1/err^2); returns ([a, b], covariance)."""
    w = 1 / np.asarray(err, dtype=float) ** 2
    X = np.column_stack((np.ones_like(x, dtype=float), x))
    A = X.T @ (X * w[:, None])
    return np.linalg.solve(A, X.T @ (w * np.asarray(y, dtype=float))), np.linalg.inv(A)
