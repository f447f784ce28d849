"""Air/vacuum conversion against specutils (reference library) and the conventions' sizes."""

import astropy.units as u
import numpy as np
import pytest
from numpy.testing import assert_allclose
from specutils.utils.wcs_utils import air_to_vac, refraction_index, vac_to_air

from lineshift.errors import SpectrumFormatError
from lineshift.io import airvac
from lineshift.model import C_MS

LAM = np.linspace(3000.0, 11000.0, 401)


def test_vacuum_to_air_matches_specutils_morton2000():
    # reference: specutils.utils.wcs_utils.vac_to_air(method='Morton2000') (Morton 2000, eq. 8)
    ref = vac_to_air(LAM * u.AA, method="Morton2000").to_value(u.AA)
    assert_allclose(airvac.vacuum_to_air(LAM), ref, rtol=0, atol=1e-9)


def test_air_to_vacuum_matches_specutils_iteration():
    # reference: specutils air_to_vac(scheme='iteration'), the exact inverse of the same index
    ref = air_to_vac(LAM * u.AA, scheme="iteration", method="Morton2000").to_value(u.AA)
    ours = airvac.air_to_vacuum(LAM)
    assert np.max(np.abs(ours - ref) / LAM * C_MS) < 0.01  # m/s


def test_round_trip_is_exact():
    back = airvac.vacuum_to_air(airvac.air_to_vacuum(LAM))
    assert np.max(np.abs(back - LAM) / LAM * C_MS) < 1e-6  # m/s


def test_refractive_index_matches_specutils():
    ref = refraction_index(LAM * u.AA, method="Morton2000")
    assert_allclose(airvac.refractive_index(LAM), ref, rtol=1e-14)


def test_air_vacuum_mixup_size_at_5000A():
    # science notes [calc]: an air/vacuum mix-up is ~83.6 km/s at 5000 A
    lam_vac = airvac.air_to_vacuum(np.array([5000.0]))[0]
    assert (lam_vac - 5000.0) / 5000.0 * C_MS == pytest.approx(83.6e3, abs=0.2e3)


def test_ciddor_vs_morton_differ_by_metres_per_second_only():
    # science notes: the 15 C formulas agree to a few m/s at 5000 A (specutils Ciddor1996 option)
    lam = np.array([5000.0]) * u.AA
    d = (air_to_vac(lam, scheme="iteration", method="Ciddor1996") - air_to_vac(lam, scheme="iteration",
                                                                                  method="Morton2000"))
    assert abs(d.to_value(u.AA)[0] / 5000.0 * C_MS) < 5.0


def test_far_ultraviolet_is_refused():
    with pytest.raises(SpectrumFormatError, match="2000"):
        airvac.air_to_vacuum(np.array([1500.0]))
