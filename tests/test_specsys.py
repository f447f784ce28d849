"""SPECSYS (Greisen et al. 2006, FITS WCS Paper III): barycentric files get no second correction."""

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import EarthLocation, SkyCoord
from astropy.io import fits
from astropy.time import Time

from lineshift import sim
from lineshift.api import measure
from lineshift.errors import MetadataError
from lineshift.io.loaders import read_observation
from lineshift.model import C_MS

INS = sim.Instrument("t-1d-vac", "wcs-1d", 65_000, 1, 4000, 5200.0, sampling=3.0, snr=200, blaze=False)


def _astropy_berv(header):
    # outside reference: astropy's barycentric correction for the header's instant, target and site
    t = Time(header["DATE-OBS"], scale="utc") + header["EXPTIME"] / 2 * u.s
    loc = EarthLocation.from_geocentric(header["OBSGEO-X"], header["OBSGEO-Y"], header["OBSGEO-Z"], unit=u.m)
    coord = SkyCoord(header["RA"] * u.deg, header["DEC"] * u.deg)
    return coord.radial_velocity_correction(kind="barycentric", obstime=t, location=loc).to_value(u.m / u.s)


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    out = tmp_path_factory.mktemp("specsys")
    exp = sim.observe(sim.DEMO_STAR, INS, sim.DEMO_SITE, 61000.8, np.random.default_rng(5))
    topo = sim.write_observation(exp, str(out / "topo.fits"))
    with fits.open(topo) as hdul:
        header = hdul[0].header
        berv = _astropy_berv(header)
        # the same photons, their wavelengths moved to the barycentre: lambda_B = lambda (1 + berv/c)
        # (Wright & Eastman 2014 composition), as an archive's 1-D product would write them
        factor = 1 + berv / C_MS
        header["CRVAL1"] = header["CRVAL1"] * factor
        header["CDELT1"] = header["CDELT1"] * factor
        header["SPECSYS"] = "BARYCENT"
        header["VELOSYS"] = berv
        hdul.writeto(out / "bary.fits")
    mask = str(out / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    return topo, str(out / "bary.fits"), mask, berv


def test_barycentric_file_measured_once(pair):
    topo, bary, mask, berv = pair
    table = measure([topo, bary], mask)
    t_row, b_row = (table[table["file"] == p][0] for p in (topo, bary))
    assert t_row["status"] == "ok" and b_row["status"] == "ok"
    assert abs(t_row["berv"].to_value(u.m / u.s) - berv) < 0.01     # topocentric: corrected as before
    # barycentric: nothing applied, but the berv column holds the observation's BERV (astropy above)
    assert abs(b_row["berv"].to_value(u.m / u.s) - berv) < 0.01
    assert "already barycentric" in b_row["notes"]
    assert f"{berv:+.3f}" in b_row["notes"]
    # the same photons give the same barycentric velocity (a second correction would be off by |BERV|,
    # several km/s here); the residual is the resampling of the shifted grid, well under the error
    diff = (b_row["rv"] - t_row["rv"]).to_value(u.m / u.s)
    print(f"bary-file minus topo-file rv: {diff:.3f} m/s (rv_err {t_row['rv_err']:.3f}, BERV {berv:.1f} m/s)")
    assert abs(berv) > 1000
    assert abs(diff) < 0.5
    # rv_topo is the observatory-frame velocity for both: (1 + rv/c) = (1 + rv_topo/c)(1 + berv/c)
    # (Wright & Eastman 2014), not the barycentric value
    topo_diff = (b_row["rv_topo"] - t_row["rv_topo"]).to_value(u.m / u.s)
    assert abs(topo_diff) < 0.5
    rv, rv_topo = b_row["rv"].to_value(u.m / u.s), b_row["rv_topo"].to_value(u.m / u.s)
    assert (1 + rv / C_MS) == pytest.approx((1 + rv_topo / C_MS) * (1 + berv / C_MS), rel=1e-14)
    assert abs(rv - rv_topo) > 1000
    assert b_row["bjd_tdb"] == t_row["bjd_tdb"]


def test_telluric_rejection_uses_the_observations_berv(pair):
    # a barycentric file's telluric lines still sit at its observatory-frame position: the mask lines
    # dropped for it are those dropped for the same observation written topocentric
    from lineshift.io.linelists import read_mask
    from lineshift.run.pipeline import BatchReport, MeasureSettings, measure_files

    topo, bary, mask, berv = pair
    line_mask = read_mask(mask)
    settings = MeasureSettings(systemic_velocity=14_000.0)
    reports = {}
    for name, path in (("topo", topo), ("bary", bary)):
        reports[name] = BatchReport()
        rows = measure_files([path], line_mask, settings, report=reports[name])
        assert rows[0]["status"] == "ok"
    print(reports["bary"].mask_note)
    assert f"BERV {berv / 1e3:+.2f}..{berv / 1e3:+.2f} km/s" in reports["bary"].mask_note
    assert reports["bary"].n_lines_mask == reports["topo"].n_lines_mask < len(line_mask)


@pytest.mark.parametrize("specsys", ["LSRK", "SOURCE", "GEOCENTR", "NOWHERE"])
def test_other_frames_refused(tmp_path, specsys):
    hdu = fits.PrimaryHDU(np.ones(100, dtype=np.float32))
    hdu.header.update({"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "CRPIX1": 1.0, "SPECSYS": specsys})
    path = str(tmp_path / "x.fits")
    hdu.writeto(path)
    with pytest.raises(MetadataError, match=f"SPECSYS = '{specsys}'.*(not supported|not a FITS)"):
        read_observation(path)


def test_topocent_and_absent_are_topocentric(tmp_path):
    for value in ("TOPOCENT", None):
        hdu = fits.PrimaryHDU(np.ones(100, dtype=np.float32))
        hdu.header.update({"CTYPE1": "WAVE", "CRVAL1": 5000.0, "CDELT1": 0.02, "CRPIX1": 1.0})
        if value:
            hdu.header["SPECSYS"] = value
        path = str(tmp_path / f"x{value}.fits")
        hdu.writeto(path)
        assert read_observation(path).spec_frame == "topocentric"


def test_mask_builder_places_tellurics_with_the_observations_berv(pair, monkeypatch):
    # building a mask from a barycentric file: its telluric bands are where the observatory saw them,
    # so the 'BERV' range given to the line finder is the same as for the topocentric copy
    from lineshift.run import mask_builder
    from lineshift.run.pipeline import MeasureSettings

    topo, bary, _, berv = pair
    seen = {}
    real = mask_builder.find_lines

    def spy(*args, **kwargs):
        seen.setdefault(spy.name, kwargs["berv_range"])
        return real(*args, **kwargs)

    monkeypatch.setattr(mask_builder, "find_lines", spy)
    build = mask_builder.MaskBuildSettings(iterations=0)
    for name, path in (("topo", topo), ("bary", bary)):
        spy.name = name
        mask_builder.build_mask([path], MeasureSettings(), build)
    # first pass co-adds at rv = 0: the range is the observation's BERV itself (astropy, in the fixture)
    assert seen["topo"] == pytest.approx((berv, berv), abs=0.01)
    assert seen["bary"] == pytest.approx((berv, berv), abs=0.01)


def test_template_co_add_places_tellurics_in_the_observatory_frame_of_a_barycentric_file():
    """A barycentric file shows an observatory-frame telluric band at lambda (1 + BERV/c) (Doppler
    shift of the wavelength axis, Wright & Eastman 2014 composition): the co-add gives no weight there."""
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.prepare import PreparedOrder

    wave = np.linspace(5000.0, 5010.0, 2001)
    edges = np.concatenate(([wave[0] - 0.0025], 0.5 * (wave[1:] + wave[:-1]), [wave[-1] + 0.0025]))
    n = wave.size
    order = PreparedOrder(wave, edges, np.ones(n), np.full(n, 1e-4), np.ones(n), np.ones(n, bool), 0, None)
    band = np.array([[5004.0, 5005.0]])   # observatory frame, vacuum
    berv = 30_000.0
    acc = TemplateAccumulator(log_grid(4999.0, 5011.0, 200.0), bands=band)
    (_, sl, w, *_), = acc.contributions([order], 1.0, band_factor=1 + berv / C_MS)
    lam = acc.grid[sl]
    lo, hi = 5004.0 * (1 + berv / C_MS), 5005.0 * (1 + berv / C_MS)   # where the file shows the band
    assert np.all(w[(lam > lo + 0.01) & (lam < hi - 0.01)] == 0)
    assert np.all(w[(lam > 5002.0) & (lam < lo - 0.01)] > 0)          # unshifted band edge: weight kept
    from lineshift.run.pipeline import Task, _band_factor

    assert _band_factor(Task(0, "x", 0.0, 0.0, (), "", berv_obs=berv)) == pytest.approx(1 + berv / C_MS, rel=1e-15)
    assert _band_factor(Task(0, "x", berv, 0.0, (), "")) == 1.0
