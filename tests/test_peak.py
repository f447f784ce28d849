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
