"""Fit of the correlation peak: inverted Gaussian on a constant continuum.

``model(v) = C0 - A exp(-(v - mu)^2 / (2 s^2))``; FWHM = 2 sqrt(2 ln 2) s, contrast = A / C0.
The fit is an unweighted least-squares fit over the fine grid.  Its errors come from linear
propagation: the fitted parameters respond to the CCF through the Gauss-Newton matrix
``G = (J^T J)^-1 J^T``, and the CCF responds to the pixels linearly, so each parameter's variance is
``sum_p h_p^2 var_p`` with ``h`` the chain of both (see ``CorrelationData.variance_of``).  This
accounts for the covariance between neighbouring CCF points, which share pixels, without any
oversampling factor (compare Boisse et al. 2010, whose diagonal formula needs one).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from lineshift.errors import MeasurementError
from lineshift.measure import kernels

__all__ = ["FWHM_PER_SIGMA", "GaussianFit", "fit_gaussian", "gaussian_profile"]

FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def gaussian_profile(v, c0, amp, mu, sigma):
    """Inverted Gaussian on a constant continuum."""
    return c0 - amp * np.exp(-0.5 * ((np.asarray(v) - mu) / sigma) ** 2)


def _jacobian(v, c0, amp, mu, sigma):
    z = (v - mu) / sigma
    e = np.exp(-0.5 * z * z)
    return np.column_stack((np.ones_like(v), -e, -amp * e * z / sigma, -amp * e * z * z / sigma))


@dataclass(frozen=True)
class GaussianFit:
    """Best-fit parameters and the linear map from CCF values to parameter changes.

    ``gain`` has shape (4, m): row k gives d(param_k)/d(CCF_i); rows are (c0, amp, mu, sigma).
    """

    c0: float
    amp: float
    mu: float
    sigma: float
    gain: np.ndarray
    model: np.ndarray

    @property
    def fwhm(self) -> float:
        return FWHM_PER_SIGMA * self.sigma

    @property
    def contrast(self) -> float:
        return self.amp / self.c0

    def sensitivities(self) -> dict[str, np.ndarray]:
        """d(quantity)/d(CCF_i) for ``rv``, ``fwhm`` and ``contrast``."""
        return {
            "rv": self.gain[2],
            "fwhm": FWHM_PER_SIGMA * self.gain[3],
            "contrast": self.gain[1] / self.c0 - self.amp * self.gain[0] / self.c0**2,
        }


def fit_gaussian(v: np.ndarray, ccf: np.ndarray, *, guess: tuple[float, float, float, float] | None = None,
                 path: str | None = None, reference: bool = False) -> GaussianFit:
    """Fit an inverted Gaussian plus constant to a CCF (velocities in m/s).

    With the compiled kernels in use the least squares run in :func:`.kernels.gauss_fit`; otherwise,
    with ``reference=True`` or when that does not converge, in scipy's ``least_squares`` (MINPACK's
    Levenberg-Marquardt, xtol = ftol = 1e-12), the plain form (tests/test_peak.py compares the two).

    Raises
    ------
    MeasurementError
        When the fit does not converge to a dip inside the window.
    """
    v = np.asarray(v, dtype=float)
    y = np.asarray(ccf, dtype=float)
    if guess is None:
        c0 = float(np.median(np.concatenate((y[:3], y[-3:]))))
        i = int(np.argmin(y))
        amp = c0 - y[i]
        below = np.flatnonzero(y < c0 - 0.5 * amp)
        if below.size:
            sigma = max((v[below[-1]] - v[below[0]]) / FWHM_PER_SIGMA, abs(v[1] - v[0]))
        else:
            sigma = (v[-1] - v[0]) / 8
        guess = (c0, amp, float(v[i]), float(sigma))
    scale = np.array([1.0, 1.0, guess[3], guess[3]])

    def resid(p):
        return gaussian_profile(v, *(p * scale)) - y

    def jac(p):
        return _jacobian(v, *(p * scale)) * scale

    found = None
    if not reference and kernels.compiled() is not None:
        x, fun, converged = kernels.gauss_fit(v, y, np.asarray(guess, dtype=float) / scale, scale)
        found = (x, fun) if converged else None      # else the plain form decides
    if found is None:
        try:
            sol = least_squares(resid, np.asarray(guess) / scale, jac=jac, method="lm", xtol=1e-12, ftol=1e-12)
        except (ValueError, np.linalg.LinAlgError) as exc:
            raise MeasurementError(f"correlation peak fit failed ({exc})", path=path,
                                   status="peak fit failed") from None
        found = (sol.x if sol.success else np.full(4, np.nan), sol.fun)
    x, fun = found
    c0, amp, mu, sigma = x * scale
    sigma = abs(sigma)
    if not (np.isfinite([c0, amp, mu, sigma]).all() and amp > 0 and c0 > 0
            and v[0] < mu < v[-1] and sigma < (v[-1] - v[0])):
        raise MeasurementError("correlation peak fit did not converge to a dip inside the window",
                               path=path, status="peak fit failed")
    rms = float(np.sqrt(np.mean(fun**2)))
    if amp < 3.0 * rms:
        raise MeasurementError(f"no correlation peak (fitted depth {amp:.2g} is within 3x the residual rms)",
                               path=path, status="no correlation peak")
    J = _jacobian(v, c0, amp, mu, sigma)
    gain = np.linalg.solve(J.T @ J, J.T)
    return GaussianFit(float(c0), float(amp), float(mu), float(sigma), gain, gaussian_profile(v, c0, amp, mu, sigma))
