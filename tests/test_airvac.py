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


# Morton 2003 (ApJS 149, 205), vacuum wavelengths (from memory): Na I D2 5891.5833, D1 5897.5581;
# Ca II K 3934.777, H 3969.591.  Air values (NIST ASD, from memory): 5889.951, 5895.924, 3933.663,
# 3968.469.  The published vacuum values are the outside reference, not a second run of our formula.
MORTON_2003_VACUUM = {"NaI_D2": (5889.951, 5891.5833), "NaI_D1": (5895.924, 5897.5581),
                      "CaII_K": (3933.663, 3934.777), "CaII_H": (3968.469, 3969.591)}


@pytest.mark.parametrize("line", list(MORTON_2003_VACUUM))
def test_lab_lines_reach_the_published_vacuum_wavelengths(line):
    air, vacuum = MORTON_2003_VACUUM[line]
    # 1 mA: the last digit of the published air and vacuum values (about 50-80 m/s here)
    assert airvac.air_to_vacuum(np.array([air]))[0] == pytest.approx(vacuum, abs=1e-3)
    assert airvac.vacuum_to_air(np.array([vacuum]))[0] == pytest.approx(air, abs=1e-3)


def test_activity_band_centres_in_vacuum_match_morton_2003():
    # the bands the activity indices use, after our conversion, against the published vacuum values;
    # allowed: half a last digit of the centre as given in air (0.01 A for Na I D, 0.001 A for Ca II)
    # plus the 1 mA of the published values
    from lineshift.measure.activity import BANDS_AIR, vacuum_bands

    given = {b.name: b.centre for group in BANDS_AIR.values() for b in group}
    bands = {b.name: b.centre for group in vacuum_bands(airvac.air_to_vacuum).values() for b in group}
    for name, (_, vacuum) in MORTON_2003_VACUUM.items():
        decimals = len(repr(given[name]).split(".")[1])
        assert bands[name] == pytest.approx(vacuum, abs=0.5 * 10.0 ** -decimals + 1e-3), name
