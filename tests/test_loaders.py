"""Loaders: every layout, the FITS WCS wavelength rules (checked against astropy.wcs), metadata
rules, uncertainty conventions and bad input."""

import gzip
import os

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import Angle, EarthLocation
from astropy.io import fits
from astropy.time import Time
from astropy.wcs import WCS
from numpy.testing import assert_allclose

from lineshift import sim
from lineshift.errors import MetadataError, SpectrumFormatError
from lineshift.io import airvac
from lineshift.io.loaders import load_spectrum, read_observation, wcs_wavelengths
from lineshift.model import C_MS

BASE = {"OBJECT": "Vessa-9", "DATE-OBS": "2026-03-01T22:00:00", "EXPTIME": 600.0, "RA": 131.40625,
        "DEC": -18.72361, "OBSGEO-X": 5090896.6, "OBSGEO-Y": 3593002.6, "OBSGEO-Z": -1365567.2}


def write_1d(path, flux, header, *, err=None, ext="ERR"):
    hdu = fits.PrimaryHDU(np.asarray(flux, dtype=np.float32))
    for k, v in {**BASE, **header}.items():
        if v is not None:
            hdu.header[k] = v
    hdus = [hdu]
    if err is not None:
        hdus.append(fits.ImageHDU(np.asarray(err, dtype=np.float32), name=ext))
    fits.HDUList(hdus).writeto(path, overwrite=True)
    return str(path)


WCS_CASES = [
    {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "CRPIX1": 1.0, "CUNIT1": "Angstrom"},
    {"CTYPE1": "WAVE", "CRVAL1": 500.0, "CD1_1": 0.002, "CRPIX1": 10.5, "CUNIT1": "nm"},
    {"CTYPE1": "WAVE-LOG", "CRVAL1": 5000.0, "CDELT1": 5000.0 * 2.5e-6, "CRPIX1": 1.0, "CUNIT1": "Angstrom"},
    {"CTYPE1": "AWAV", "CRVAL1": 0.5, "CDELT1": 2e-6, "CRPIX1": 1.0, "CUNIT1": "um"},
    {"CTYPE1": "AWAV-LOG", "CRVAL1": 6000.0, "CDELT1": 6000.0 * 3e-6, "CRPIX1": 100.0, "CUNIT1": "Angstrom"},
    # FITS WCS Paper I sect. 2.1.2: PC1_1 scales CDELT1
    {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.01, "PC1_1": 2.5, "CRPIX1": 3.0, "CUNIT1": "Angstrom"},
]


@pytest.mark.parametrize("card", WCS_CASES, ids=[c["CTYPE1"] + "-" + c["CUNIT1"] for c in WCS_CASES])
def test_wcs_wavelengths_match_astropy_wcs(card):
    # reference: astropy.wcs (WCSLIB) on the same header, FITS WCS Paper III (Greisen et al. 2006)
    header = fits.Header()
    header["NAXIS"] = 1
    header["NAXIS1"] = 500
    for k, v in card.items():
        header[k] = v
    ours, medium = wcs_wavelengths(header, 500)
    w = WCS(header)
    ref = w.pixel_to_world_values(np.arange(500))  # SI metres after WCSLIB's unit fix
    ref_aa = (np.asarray(ref) * u.Unit(w.wcs.cunit[0])).to_value(u.AA)
    assert np.max(np.abs(ours - ref_aa) / ref_aa) * C_MS < 1e-3  # m/s
    assert medium == ("air" if card["CTYPE1"].startswith("AWAV") else "vacuum")


def test_cd_wins_over_cdelt():
    # FITS WCS Paper I (Greisen & Calabretta 2002) sect. 2.1.2: with CDi_j present, CDELTi is ignored
    header = fits.Header()
    for k, v in {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.5, "CD1_1": 0.02, "CRPIX1": 1.0}.items():
        header[k] = v
    wave, _ = wcs_wavelengths(header, 100)
    assert_allclose(wave, 5000.0 + 0.02 * np.arange(100), rtol=1e-14)


def test_air_wcs_is_converted_to_vacuum(tmp_path):
    card = {"CTYPE1": "AWAV", "CRVAL1": 6000.0, "CDELT1": 0.03, "CRPIX1": 1.0, "CUNIT1": "Angstrom"}
    path = write_1d(tmp_path / "air.fits", np.full(300, 100.0), card, err=np.full(300, 10.0))
    sp = load_spectrum(path)
    air = 6000.0 + 0.03 * np.arange(300)
    assert sp.obs.medium == "air"
    assert_allclose(sp.orders[0].wave, airvac.air_to_vacuum(air), rtol=1e-15)


@pytest.mark.parametrize("layout", ["multi-order", "wcs-1d", "table", "text"])
def test_each_layout_loads_with_vacuum_wavelengths(sample_set, layout):
    directory, _, rows = sample_set
    row = next(r for r in rows if r["layout"] == layout)
    sp = load_spectrum(os.path.join(directory, row["file"]))
    assert sp.obs.layout == layout
    from conftest import SMALL

    ins = SMALL[layout]
    wave = ins.wavelengths()
    wave = airvac.air_to_vacuum(wave) if ins.medium == "air" else wave
    assert sp.n_orders == ins.n_orders
    for k, order in enumerate(sp.orders):
        # text keeps 7 decimals; FITS WCS and float64 arrays are exact to rounding
        assert np.max(np.abs(order.wave - wave[k]) / wave[k]) * C_MS < 0.01
        assert np.all(order.var > 0)
    assert sp.obs.object == "Vessa-9"
    assert sp.obs.mjd_mid == pytest.approx(row["mjd_mid_utc"], abs=0.01 / 86400)
    assert sp.obs.missing == ()


def test_gzip_is_detected_by_content_not_name(sample_set, tmp_path):
    directory, _, rows = sample_set
    src = os.path.join(directory, rows[0]["file"])  # a .fits.gz
    renamed = tmp_path / "spectrum.dat"
    with open(src, "rb") as fh:
        raw = fh.read()
    renamed.write_bytes(raw)
    plain = tmp_path / "spectrum_plain.fits"
    plain.write_bytes(gzip.decompress(raw))
    a, b = load_spectrum(str(renamed)), load_spectrum(str(plain))
    assert_allclose(a.orders[0].flux, b.orders[0].flux)


@pytest.mark.parametrize(("cards", "expected", "source"), [
    ({"DATE-AVG": "2026-03-01T22:05:00", "DATE-OBS": None}, "2026-03-01T22:05:00", "DATE-AVG"),
    ({"MJD-AVG": 61100.25, "DATE-OBS": None}, "mjd:61100.25", "MJD-AVG"),
    ({"DATE-BEG": "2026-03-01T22:00:00", "DATE-END": "2026-03-01T22:20:00", "DATE-OBS": None},
     "2026-03-01T22:10:00", "(DATE-BEG+DATE-END)/2"),
    ({}, "2026-03-01T22:05:00", "DATE-OBS+EXPTIME/2"),
    ({"DATE-OBS": None, "MJD-OBS": 61100.0, "EXPTIME": None, "XPOSURE": 1200.0}, "mjd:61100.0069444444",
     "MJD-OBS+EXPTIME/2"),
    ({"DATE-OBS": "2026-03-01", "TIME-OBS": "22:00:00"}, "2026-03-01T22:05:00", "DATE-OBS+TIME-OBS+EXPTIME/2"),
])
def test_mid_exposure_time_rules(tmp_path, cards, expected, source):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, **cards}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    want = (float(expected[4:]) if expected.startswith("mjd:")
            else Time(expected, scale="utc").mjd)
    assert obs.mjd_mid == pytest.approx(want, abs=1e-3 / 86400)  # 1 ms
    assert obs.time_source == source


def test_start_time_without_exposure_time_is_missing(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "EXPTIME": None}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    assert obs.mjd_mid is None
    assert "time" in obs.missing
    assert "EXPTIME" in obs.time_source


def test_time_scale_from_timesys(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "TIMESYS": "TT"}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    assert obs.time_scale == "tt"


def test_sexagesimal_target_matches_astropy_angle(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "RA": "08:45:37.50", "DEC": "-18:43:25.0"}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    # reference: astropy.coordinates.Angle
    assert obs.ra_deg == pytest.approx(Angle("08h45m37.50s").deg, abs=1e-10)
    assert obs.dec_deg == pytest.approx(Angle("-18d43m25.0s").deg, abs=1e-10)


def test_geodetic_site_matches_astropy(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "OBSGEO-X": None, "OBSGEO-Y": None,
            "OBSGEO-Z": None, "OBSGEO-L": 35.2133, "OBSGEO-B": -12.4418, "OBSGEO-H": 1850.0}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    ref = EarthLocation.from_geodetic(35.2133 * u.deg, -12.4418 * u.deg, 1850.0 * u.m)  # WGS84
    assert_allclose(obs.site_xyz, [ref.x.to_value(u.m), ref.y.to_value(u.m), ref.z.to_value(u.m)], atol=1e-6)


def test_missing_target_and_site_are_reported(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "RA": None, "DEC": None,
            "OBSGEO-X": None, "OBSGEO-Y": None, "OBSGEO-Z": None}
    obs = read_observation(write_1d(tmp_path / "t.fits", np.ones(64), card))
    assert obs.missing == ("target", "site")


@pytest.mark.parametrize(("ext", "transform"), [("ERR", np.sqrt), ("SIGMA", np.sqrt), ("VAR", lambda v: v),
                                                ("VARIANCE", lambda v: v), ("IVAR", lambda v: 1 / v)])
def test_uncertainty_conventions(tmp_path, ext, transform):
    var = np.linspace(4.0, 9.0, 64)
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02}
    sp = load_spectrum(write_1d(tmp_path / "u.fits", np.full(64, 50.0), card, err=transform(var), ext=ext))
    assert_allclose(sp.orders[0].var, var, rtol=1e-6)


def test_no_uncertainty_assumes_poisson_and_says_so(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02}
    sp = load_spectrum(write_1d(tmp_path / "p.fits", np.full(64, 400.0), card))
    assert_allclose(sp.orders[0].var, 400.0)
    assert any("Poisson" in n for n in sp.obs.notes)


def test_text_with_order_column_and_decreasing_wavelengths(tmp_path):
    lines = ["# OBJECT = Vessa-9", "# MJD-AVG = 61100.5", "# medium: vacuum", "order,wavelength,flux,err"]
    for k in range(2):
        for w in np.linspace(5100 + 100 * k, 5000 + 100 * k, 50):  # decreasing within each order
            lines.append(f"{k},{w:.4f},100.0,10.0")
    path = tmp_path / "o.csv"
    path.write_text("\n".join(lines))
    sp = load_spectrum(str(path))
    assert sp.n_orders == 2
    assert np.all(np.diff(sp.orders[0].wave) > 0)
    assert any("flipped" in n for n in sp.obs.notes)
    assert sp.obs.mjd_mid == 61100.5


# --------------------------------------------------------------------------- bad input

def _bad(tmp_path, kind):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02}
    good = write_1d(tmp_path / "good.fits", np.full(64, 50.0), card, err=np.full(64, 5.0))
    path = tmp_path / f"{kind}.fits"
    if kind == "truncated":
        with open(good, "rb") as fh:
            path.write_bytes(fh.read()[:4000])
    elif kind == "empty":
        path.write_bytes(b"")
    elif kind == "not-fits":
        path.write_bytes(bytes(range(256)) * 20)
    elif kind == "all-nan":
        write_1d(path, np.full(64, np.nan), card, err=np.full(64, 5.0))
    elif kind == "zero-dispersion":
        write_1d(path, np.ones(64), {**card, "CDELT1": 0.0}, err=np.ones(64))
    elif kind == "reversed-dispersion":
        write_1d(path, np.ones(64), {**card, "CDELT1": -0.02}, err=np.ones(64))
    elif kind == "bad-errors":
        write_1d(path, np.ones(64), card, err=np.where(np.arange(64) % 2, 0.0, np.nan))
    elif kind == "non-monotonic":
        w = 5000 + 0.02 * np.arange(64)
        w[30] = w[10]
        cols = [fits.Column("WAVE", "D", array=w), fits.Column("FLUX", "E", array=np.ones(64)),
                fits.Column("ERR", "E", array=np.ones(64))]
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    elif kind == "no-spectrum":
        fits.HDUList([fits.PrimaryHDU(np.ones((3, 3, 3)))]).writeto(path)
    return str(path)


@pytest.mark.parametrize(("kind", "message"), [
    ("truncated", "truncated"), ("empty", "empty"), ("not-fits", "neither FITS nor a text table"),
    ("all-nan", "all flux values are NaN"), ("zero-dispersion", "zero dispersion"),
    ("reversed-dispersion", "reversed dispersion"), ("bad-errors", "no valid uncertainties"),
    ("non-monotonic", "non-monotonic"), ("no-spectrum", "has no spectrum"),
])
def test_bad_input_is_one_clear_error_naming_the_file(tmp_path, kind, message):
    path = _bad(tmp_path, kind)
    with pytest.raises(SpectrumFormatError) as info:
        load_spectrum(path)
    text = str(info.value)
    assert text.startswith(path)
    assert message in text
    assert "\n" not in text
    assert info.value.status


def test_malformed_keyword_is_a_metadata_error(tmp_path):
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "DEC": "ninety"}
    with pytest.raises(MetadataError, match="DEC"):
        read_observation(write_1d(tmp_path / "m.fits", np.ones(64), card))


def test_missing_file(tmp_path):
    with pytest.raises(SpectrumFormatError, match="cannot be read"):
        load_spectrum(str(tmp_path / "nope.fits"))


def test_simulated_exposure_round_trips_through_every_writer(tmp_path):
    rng = np.random.default_rng(3)
    from conftest import SMALL

    for layout, ins in SMALL.items():
        exp = sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61000.8, rng)
        path = sim.write_observation(exp, str(tmp_path / f"x_{layout}.fits"), style=1)
        sp = load_spectrum(path)
        mem = sim.to_spectrum(exp)
        for a, b in zip(sp.orders, mem.orders, strict=True):
            assert_allclose(a.flux, b.flux, rtol=1e-3 if layout == "text" else 1e-6)


def test_log10_dispersion_with_dc_flag():
    # the older convention (DC-FLAG = 1): CRVAL1, CDELT1 in log10 Angstrom
    header = fits.Header()
    for k, v in {"CTYPE1": "LINEAR", "CRVAL1": np.log10(5000.0), "CDELT1": 1e-5, "CRPIX1": 1.0, "DC-FLAG": 1}.items():
        header[k] = v
    wave, medium = wcs_wavelengths(header, 100)
    assert_allclose(wave, 5000.0 * 10 ** (1e-5 * np.arange(100)), rtol=1e-14)
    assert medium == "vacuum"


def test_harmless_fits_warning_is_a_note_not_an_error(tmp_path):
    # outside reference: FITS standard 4.0 sect. 4.4.2.5: BLANK applies only to integer arrays, so on a
    # float image it is meaningless (astropy warns and ignores it); the data are intact
    card = {"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "CRPIX1": 1.0}
    good = write_1d(tmp_path / "good.fits", np.full(64, 50.0), card, err=np.full(64, 5.0))
    with fits.open(good) as hdul:
        hdul[0].header["BLANK"] = -32768
        hdul.writeto(tmp_path / "blank.fits", output_verify="ignore")
    sp = load_spectrum(str(tmp_path / "blank.fits"))
    assert_allclose(sp.orders[0].flux, 50.0)
    assert any("BLANK" in n for n in sp.obs.notes)
    assert any("BLANK" in n for n in read_observation(str(tmp_path / "blank.fits")).notes)
