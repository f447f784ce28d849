"""Gaussian peak fit: recovery of known parameters and its propagated errors."""

import numpy as np
import pytest

from lineshift.errors import MeasurementError
from lineshift.measure.peak import FWHM_PER_SIGMA, fit_gaussian, gaussian_profile


def test_fwhm_constant():
    # FWHM = 2 sqrt(2 ln 2) sigma = 2.3548 sigma (science notes, standard)
    assert pytest.approx(2.3548, abs=1e-4) == FWHM_PER_SIGMA


def test_noise_free_profile_is_recovered_exactly():
    v = np.arange(-30e3, 30e3, 800.0) + 123.0
    y = gaussian_profile(v, 0.99, 0.4, 1234.5, 7000.0 / FWHM_PER_SIGMA)
    fit = fit_gaussian(v, y)
    assert fit.mu == pytest.approx(1234.5, abs=1e-6)
    assert fit.fwhm == pytest.approx(7000.0, abs=1e-6)
    assert fit.contrast == pytest.approx(0.4 / 0.99, abs=1e-10)


def test_gain_predicts_response_to_small_changes():
    v = np.arange(-30e3, 30e3, 800.0)
    y = gaussian_profile(v, 1.0, 0.4, 0.0, 3000.0)
    fit = fit_gaussian(v, y)
    bump = 1e-6 * np.sin(v / 5e3)
    moved = fit_gaussian(v, y + bump)
    assert moved.mu - fit.mu == pytest.approx(fit.gain[2] @ bump, rel=1e-3)


def test_pure_noise_is_not_a_peak():
    rng = np.random.default_rng(4)
    v = np.linspace(-10e3, 10e3, 41)
    with pytest.raises(MeasurementError, match=r"no correlation peak|did not converge"):
        fit_gaussian(v, 1.0 + 1e-3 * rng.normal(size=v.size))


def test_compiled_fit_equals_scipys_least_squares(monkeypatch):
    # reference library: scipy.optimize.least_squares (MINPACK LM, xtol = ftol = 1e-12), the plain form
    # kept in fit_gaussian; the compiled Marquardt loop must land on the same minimum: every parameter
    # within 1e-4 of its propagated error (the issue allows 0.01), the same refusals, on noisy dips
    pytest.importorskip("numba")
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    rng = np.random.default_rng(12)
    compared = refused = 0
    for _ in range(150):
        v = np.arange(-25e3, 25e3, 820.0) + rng.uniform(-400, 400)
        noise = rng.choice([1e-5, 1e-4, 1e-3, 3e-2])
        y = gaussian_profile(v, 1.0, rng.uniform(0.02, 0.5), rng.uniform(-3000, 3000), rng.uniform(2000, 6000))
        y = y + rng.normal(0, noise, v.size)
        try:
            fast = fit_gaussian(v, y)
        except MeasurementError as exc:
            with pytest.raises(MeasurementError, match=str(exc.args[0]).split("(")[0].strip()):
                fit_gaussian(v, y, reference=True)
            refused += 1
            continue
        ref = fit_gaussian(v, y, reference=True)
        for k, name in enumerate(("c0", "amp", "mu", "sigma")):
            err = noise * np.sqrt(np.sum(ref.gain[k] ** 2))
            assert abs(getattr(fast, name) - getattr(ref, name)) < 1e-4 * err, name
        compared += 1
    assert compared > 100


def test_compiled_fit_recovers_a_noise_free_profile(monkeypatch):
    pytest.importorskip("numba")
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    v = np.arange(-30e3, 30e3, 800.0) + 123.0
    fit = fit_gaussian(v, gaussian_profile(v, 0.99, 0.4, 1234.5, 7000.0 / FWHM_PER_SIGMA))
    assert fit.mu == pytest.approx(1234.5, abs=1e-6)
    assert fit.fwhm == pytest.approx(7000.0, abs=1e-6)
