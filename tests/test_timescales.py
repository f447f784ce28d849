"""TIMESYS: every time scale of the FITS standard 4.0 (sect. 9.2.1) handled or refused."""

import numpy as np
import pytest
from astropy.time import Time

from lineshift.errors import MetadataError
from lineshift.io.metadata import read_time


def _time(**cards):
    return read_time(lambda k: cards.get(k), "x.fits")


def _instant(mjd, scale):
    return Time(mjd, format="mjd", scale=scale)


def test_gps_is_tai_minus_19_s():
    # outside reference: GPS = TAI - 19 s (FITS standard 4.0 sect. 9.2.1), and GPS - UTC = 18 s
    # from 2017-01-01 (IERS Bulletin C 52); astropy's 'gps' format counts SI seconds from 1980-01-06 UTC
    mjd, scale, source, _ = _time(TIMESYS="GPS", **{"DATE-AVG": "2020-01-01T00:00:18"})
    t = _instant(mjd, scale)
    assert abs((t - Time("2020-01-01T00:00:00", scale="utc")).sec) < 1e-6
    gps_seconds = (Time("2020-01-01T00:00:00", scale="tai") - Time("1980-01-06T00:00:00", scale="tai")).sec + 18
    assert abs((t - Time(gps_seconds, format="gps")).sec) < 1e-6
    assert "GPS" in source


def test_gps_mjd_keyword():
    # outside reference: GPS - UTC = 18 s in 2020 (IERS Bulletin C)
    utc = Time("2020-06-01T12:00:00", scale="utc")
    mjd, scale, _, _ = _time(TIMESYS="GPS", **{"MJD-AVG": utc.mjd + 18 / 86400})
    assert abs((_instant(mjd, scale) - utc).sec) < 1e-5


@pytest.mark.parametrize(("timesys", "offset_s"), [
    # outside reference: TT = TAI + 32.184 s (IAU 1991); TAI - UTC = 37 s since 2017-01-01 (IERS Bulletin C)
    ("UTC", 0.0), ("TAI", -37.0), ("TT", -69.184), ("IAT", -37.0), ("TDT", -69.184), ("ET", -69.184),
    ("GMT", 0.0), ("TT(TAI)", -69.184), ("UTC(NIST)", 0.0), ("UT(UTC)", 0.0),
])
def test_scale_offsets(timesys, offset_s):
    mjd, scale, _, _ = _time(TIMESYS=timesys, **{"DATE-AVG": "2020-01-01T00:00:00"})
    dt = (_instant(mjd, scale) - Time("2020-01-01T00:00:00", scale="utc")).sec
    assert dt == pytest.approx(offset_s, abs=1e-5)


def test_tdb_tcg_tcb_ut1_accepted():
    # outside reference: TDB - TT stays within 1.7 ms (Fairhead & Bretagnon 1990); |UT1 - UTC| < 0.9 s
    # (IERS); TCG - TT = L_G (t - 1977.0) = 6.969290134e-10 * ~1.36e9 s ~ 0.95 s in 2020 (IAU 2000 B1.9)
    ref = Time("2020-01-01T00:00:00", scale="tt")
    for timesys, lo, hi in (("TDB", -0.0017, 0.0017), ("TCG", -1.0, -0.9), ("UT1", 69.184 - 0.9, 69.184 + 0.9)):
        mjd, scale, _, _ = _time(TIMESYS=timesys, **{"DATE-AVG": "2020-01-01T00:00:00"})
        assert scale == timesys.lower()
        assert lo < (_instant(mjd, scale) - ref).sec < hi, timesys
    mjd, scale, _, _ = _time(TIMESYS="TCB", **{"DATE-AVG": "2020-01-01T00:00:00"})
    assert scale == "tcb"


@pytest.mark.parametrize(("timesys", "reason"), [("LOCAL", "free-running"), ("MARS", "not a FITS time scale")])
def test_refused_with_reason(timesys, reason):
    with pytest.raises(MetadataError, match=reason):
        _time(TIMESYS=timesys, **{"DATE-AVG": "2020-01-01T00:00:00"})


def test_fast_iso_dates_equal_astropy_time():
    # reference library: astropy.time.Time (isot / iso formats) for the same strings and scales, to the
    # last bit; a leap second of UTC (2016-12-31T23:59:60.5, IERS Bulletin C 52) included, and what
    # astropy warns about or refuses left to astropy (None)
    import warnings

    from lineshift.io.metadata import _iso_fast

    rng = np.random.default_rng(2)
    texts = ["2016-12-31T23:59:60.5", "2000-01-01", "1999-12-31T23:59:59.999999", "2026-03-04 05:06",
             "2025-11-20T03:04:05.6"]
    texts += [Time(m, format="mjd", scale="tai").isot for m in rng.uniform(48000, 61500, 60)]
    checked = 0
    for scale in ("utc", "tai", "tt", "tdb"):
        for text in texts:
            fast = _iso_fast(text, scale)
            with warnings.catch_warnings():
                warnings.simplefilter("error")
                try:
                    ref = Time(text, format="isot" if "T" in text else "iso", scale=scale).mjd
                except Exception:
                    assert fast is None, (text, scale)
                    continue
            assert fast == ref, (text, scale)
            checked += 1
    assert checked > 250
    assert _iso_fast("2026-13-01", "utc") is None and _iso_fast("2026-02-30T00:00:00", "utc") is None
    assert _iso_fast("2026-01-01T00:00:00Z", "utc") is None        # not a form this path reads
