"""A configurable keyword for a flux-weighted mid-exposure time (an exposure meter's), from the
config or ``--flux-time-key``; noted in ``time_source``."""

import astropy.units as u
import numpy as np
import pandas as pd
import pytest
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.io import fits
from astropy.time import Time

from lineshift import sim
from lineshift.cli import main
from lineshift.errors import ConfigError
from lineshift.io.metadata import read_time
from lineshift.run.pipeline import MeasureSettings

START = "2026-03-01T22:00:00"


def _time(key, **cards):
    return read_time(lambda k: cards.get(k), "x.fits", flux_time_key=key)


def test_flux_weighted_keyword_wins_over_the_exposure_midpoint():
    cards = {"DATE-OBS": START, "EXPTIME": 1800.0, "MJD-FLUX": 61100.9263}
    mjd, scale, source, exptime = _time("MJD-FLUX", **cards)
    assert mjd == 61100.9263 and scale == "utc" and exptime == 1800.0
    assert source == "MJD-FLUX (flux-weighted mid-exposure, MJD)"
    # without the setting the same header gives the geometric midpoint
    mjd0, _, source0, _ = read_time(lambda k: cards.get(k), "x.fits")
    assert source0 == "DATE-OBS+EXPTIME/2"
    assert mjd0 == pytest.approx(Time(START).mjd + 900 / 86400, abs=1e-9)


def test_jd_and_iso_values_and_the_time_scale():
    # MJD = JD - 2400000.5 (IAU 1973 definition of the Modified Julian Date)
    mjd, _, source, _ = _time("EXPMETJD", **{"EXPMETJD": 2461101.4263, "DATE-OBS": START, "EXPTIME": 60.0})
    assert mjd == pytest.approx(61100.9263, abs=1e-9) and "JD" in source
    # ISO date in the TIMESYS scale; GPS = TAI - 19 s (FITS standard 4.0 sect. 9.2.1)
    mjd, scale, source, _ = _time("FLUXMID", TIMESYS="GPS", FLUXMID="2026-03-01T22:14:40.5")
    ref = Time("2026-03-01T22:14:40.5", scale="tai") + 19 * u.s
    assert scale == "tai" and abs((Time(mjd, format="mjd", scale="tai") - ref).sec) < 1e-5
    assert "ISO date" in source and "GPS" in source


def test_absent_keyword_falls_back_and_says_so():
    mjd, _, source, _ = _time("MJD-FLUX", **{"DATE-OBS": START, "EXPTIME": 600.0})
    assert mjd == pytest.approx(Time(START).mjd + 300 / 86400, abs=1e-9)
    assert source == "DATE-OBS+EXPTIME/2 (MJD-FLUX absent: no flux-weighted time)"


@pytest.mark.parametrize("value", [12.0, "soon", -5.0])
def test_unusable_value_is_a_metadata_error(value):
    from lineshift.errors import MetadataError

    with pytest.raises(MetadataError, match="MJD-FLUX"):
        _time("MJD-FLUX", **{"MJD-FLUX": value})


@pytest.mark.parametrize("key", ["", "A=B", "DATE'", 3])
def test_bad_keyword_setting_is_refused(key):
    with pytest.raises(ConfigError, match="flux-weighted time keyword"):
        MeasureSettings(flux_time_key=key)


@pytest.fixture(scope="module")
def metered(tmp_path_factory):
    """A 1-D file whose exposure meter put the flux centre 400 s after the geometric midpoint."""
    out = tmp_path_factory.mktemp("fluxtime")
    ins = sim.Instrument("t-1d-meter", "wcs-1d", 65_000, 1, 4000, 5200.0, sampling=3.0, snr=150, blaze=False,
                         exptime=3600.0)
    exp = sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61100.80, np.random.default_rng(8))
    path = sim.write_observation(exp, str(out / "metered.fits"))
    flux_mid = exp.truth["mjd_mid_utc"] + 400.0 / 86400.0
    with fits.open(path, mode="update") as hdul:
        hdul[0].header["EXPMIDFW"] = (flux_mid, "flux-weighted mid-exposure MJD (UTC)")
    mask = str(out / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    return out, path, mask, flux_mid


def _astropy_bjd(header, mjd_utc):
    # outside reference: astropy's barycentric light travel time at the instant (Eastman et al. 2010)
    t = Time(mjd_utc, format="mjd", scale="utc")
    loc = EarthLocation.from_geocentric(header["OBSGEO-X"], header["OBSGEO-Y"], header["OBSGEO-Z"], unit=u.m)
    coord = SkyCoord(header["RA"] * u.deg, header["DEC"] * u.deg)
    return (t.tdb + t.light_travel_time(coord, kind="barycentric", location=loc)).jd


@pytest.mark.parametrize("how", ["option", "config"])
def test_command_line_and_config_use_the_flux_weighted_time(metered, how):
    out, path, mask, flux_mid = metered
    table = out / f"{how}.csv"
    argv = ["measure", path, "--mask", mask, "-o", str(table), "-q"]
    if how == "option":
        argv += ["--flux-time-key", "EXPMIDFW"]
    else:
        cfg = out / "cfg.toml"
        cfg.write_text('[measure]\nflux_time_key = "EXPMIDFW"\n')
        argv += ["--config", str(cfg)]
    assert main(argv) == 0
    row = pd.read_csv(table, comment="#").iloc[0]
    assert row["time_source"] == "EXPMIDFW (flux-weighted mid-exposure, MJD)"
    assert row["mjd_mid"] == pytest.approx(flux_mid, abs=1e-8)     # the CSV keeps 1e-8 d
    with fits.open(path) as hdul:
        header = hdul[0].header
        expected = _astropy_bjd(header, flux_mid)
        geometric = _astropy_bjd(header, flux_mid - 400.0 / 86400.0)
    assert abs(row["bjd_tdb"] - expected) * 86400 < 1e-3        # s
    assert abs(row["bjd_tdb"] - geometric) * 86400 > 399.0     # the 400 s moved the time
