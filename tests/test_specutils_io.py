"""specutils in and out: lineshift.api.load returns specutils objects with the observation in .meta,
and lineshift.api.measure takes Spectrum / Spectrum1D / SpectrumCollection objects (and lists)."""

import os

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.nddata import InverseVariance, StdDevUncertainty
from astropy.utils.exceptions import AstropyDeprecationWarning
from astropy.wcs import WCS
from numpy.testing import assert_allclose
from specutils import Spectrum, Spectrum1D, SpectrumCollection, SpectrumList

from lineshift import sim
from lineshift.api import load, measure
from lineshift.io.loaders import load_spectrum
from lineshift.io.specutils_bridge import write_as_fits

ECHELLE = sim.Instrument("t-su-echelle", "multi-order", 65_000, 3, 2048, 5000.0, sampling=3.0, snr=150)
ONE_D = sim.Instrument("t-su-1d", "wcs-1d", 65_000, 1, 4000, 5200.0, sampling=3.0, snr=150, blaze=False)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    out = tmp_path_factory.mktemp("specutils")
    rng = np.random.default_rng(21)
    echelle = sim.write_observation(sim.observe(sim.DEMO_STAR, ECHELLE, sim.DEMO_SITE, 61020.8, rng),
                                    str(out / "echelle.fits"))
    one_d = sim.write_observation(sim.observe(sim.DEMO_STAR, ONE_D, sim.DEMO_SITE, 61021.8, rng),
                                  str(out / "one_d.fits"), style=1)
    mask = str(out / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    return echelle, one_d, mask


def test_load_echelle_gives_a_collection_with_the_files_arrays(files):
    echelle, _, _ = files
    coll = load(echelle)
    assert isinstance(coll, SpectrumCollection) and coll.shape == (ECHELLE.n_orders,)
    # outside reference: the file's own extensions read with astropy.io.fits
    with fits.open(echelle) as hdul:
        wave, flux, err = (np.asarray(hdul[k].data, dtype=float) for k in ("WAVE", "FLUX", "ERR"))
        header = hdul[0].header
    assert_allclose(coll.spectral_axis.to_value(u.AA), wave, rtol=1e-15)
    assert_allclose(coll.flux.value, flux, rtol=1e-15)
    assert_allclose(coll.uncertainty.array, err ** 2, rtol=1e-6)
    assert not coll.mask.any()
    meta = coll.meta
    assert meta["layout"] == "multi-order" and meta["object"] == header["OBJECT"]
    assert meta["ra_deg"] == header["RA"] and meta["site_xyz"] == tuple(header[f"OBSGEO-{c}"] for c in "XYZ")
    assert meta["mjd_mid"] == pytest.approx(61020.8 + ECHELLE.exptime / 2 / 86400, abs=1e-9)


@pytest.mark.filterwarnings("ignore::astropy.wcs.FITSFixedWarning")   # WCSLIB filling MJD/OBSGEO
def test_load_one_order_gives_a_spectrum_on_the_astropy_wcs_axis(files):
    _, one_d, _ = files
    spec = load(one_d)
    assert isinstance(spec, Spectrum) and spec.flux.ndim == 1
    with fits.open(one_d) as hdul:   # outside reference: astropy.wcs on the header
        w = WCS(hdul[0].header)
        sw = w.spectral   # values, not SpectralCoord: its observer needs an MJD-AVG this header lacks
        ref = (sw.pixel_to_world_values(np.arange(hdul[0].header["NAXIS1"])) * u.Unit(sw.wcs.cunit[0])).to_value(u.AA)
    assert_allclose(spec.spectral_axis.to_value(u.AA), ref, rtol=1e-13)
    assert spec.meta["time_source"] == "(DATE-BEG+DATE-END)/2"


def test_loaded_objects_measure_exactly_like_their_files(files):
    echelle, one_d, mask = files
    from_files = measure([echelle, one_d], mask)
    from_objects = measure([load(echelle), load(one_d)], mask)
    for a, b in zip(from_files, from_objects, strict=True):
        assert a["status"] == "ok" and b["status"] == "ok"
        assert abs((a["rv"] - b["rv"]).to_value(u.m / u.s)) < 1e-6
        assert abs((a["rv_err"] - b["rv_err"]).to_value(u.m / u.s)) < 1e-6
        assert abs((a["bjd_tdb"] - b["bjd_tdb"]).to_value(u.s)) < 1e-4
        assert b["file"] == f"{a['file']} (specutils object {list(from_files['file']).index(a['file'])})"


def test_user_built_objects_with_uncertainty_mask_and_header(files, tmp_path):
    """What a notebook holds: nm axis, standard-deviation or inverse-variance uncertainty, a mask,
    and the FITS header in meta['header'] (as specutils' readers leave it)."""
    echelle, one_d, mask = files
    with fits.open(one_d) as hdul:
        head = hdul[0].header.copy()
        flux = np.asarray(hdul[0].data, dtype=float)
    loaded = load_spectrum(one_d).orders[0]
    wave, sigma = loaded.wave, np.sqrt(loaded.var)
    bad = np.zeros(flux.size, dtype=bool)
    bad[1000:1003] = True
    flux_hit = np.where(bad, 1e6, flux)     # a spike the mask must hide
    spec = Spectrum(flux=flux_hit * u.electron, spectral_axis=(wave / 10) * u.nm,
                    uncertainty=StdDevUncertainty(sigma), mask=bad, meta={"header": head})
    with fits.open(echelle) as hdul:
        ivar = 1.0 / np.asarray(hdul["ERR"].data, dtype=float) ** 2
        coll = SpectrumCollection(flux=np.asarray(hdul["FLUX"].data, dtype=float) * u.electron,
                                  spectral_axis=np.asarray(hdul["WAVE"].data, dtype=float) * u.AA,
                                  uncertainty=InverseVariance(ivar),
                                  meta={"header": hdul[0].header.copy(), "blaze": np.asarray(hdul["BLAZE"].data)})
    with pytest.warns(AstropyDeprecationWarning):
        old = Spectrum1D(flux=flux * u.electron, spectral_axis=wave * u.AA, meta={"header": head})
    # the same bad pixels given the file's way: a copy of the file with no variance there
    flagged = str(tmp_path / "flagged.fits")
    with fits.open(one_d) as hdul:
        hdul[0].data = flux_hit.astype(np.float32)
        hdul["ERR"].data = np.where(bad, np.nan, hdul["ERR"].data).astype(np.float32)
        hdul.writeto(flagged)
    table = measure([*SpectrumList([spec, coll]), old, one_d, flagged], mask)
    assert list(table["status"]) == ["ok"] * 5
    ref, ref_flagged = table[3], table[4]
    # the mask hides the spike exactly as bad pixels in a file do
    assert abs((table[0]["rv"] - ref_flagged["rv"]).to_value(u.m / u.s)) < 1e-3
    assert abs((table[0]["bjd_tdb"] - ref["bjd_tdb"]).to_value(u.s)) < 1e-4   # time from the header
    # no uncertainty given: Poisson variance, said in the notes
    assert "Poisson" in table[2]["notes"]
    assert abs((table[2]["rv"] - ref["rv"]).to_value(u.m / u.s)) < 0.5 * ref["rv_err"].to_value(u.m / u.s)
    # inverse variance, Angstrom axis, header metadata and blaze in .meta: as the file itself, in the
    # same batch (bad pixels in a batch recentre the mask on its line offsets: measure/recentre.py)
    same = measure([spec, load(echelle), old, one_d, flagged], mask)
    assert abs((same[1]["rv"] - table[1]["rv"]).to_value(u.m / u.s)) < 1e-3


def test_mask_becomes_bad_pixels_in_the_written_file(tmp_path):
    wave = np.linspace(5000.0, 5010.0, 64)
    mask = np.zeros(64, dtype=bool)
    mask[[3, 40]] = True
    spec = Spectrum(flux=np.full(64, 100.0) * u.ct, spectral_axis=wave * u.AA,
                    uncertainty=StdDevUncertainty(np.full(64, 10.0)), mask=mask)
    path = str(tmp_path / "obj.fits")
    write_as_fits(spec, path, "object")
    order = load_spectrum(path).orders[0]
    assert np.isnan(order.var[[3, 40]]).all() and np.isnan(order.flux[[3, 40]]).all()
    assert_allclose(np.delete(order.var, [3, 40]), 100.0)


def test_frequency_axis_is_turned_into_wavelengths(tmp_path):
    # outside reference: lambda = c / nu (astropy's spectral equivalency), checked by hand for one pixel
    nu = np.linspace(6.0e14, 5.9e14, 64) * u.Hz
    spec = Spectrum(flux=np.full(64, 100.0) * u.ct, spectral_axis=nu, uncertainty=StdDevUncertainty(np.full(64, 10.0)))
    path = str(tmp_path / "nu.fits")
    write_as_fits(spec, path, "object")
    order = load_spectrum(path).orders[0]
    assert order.wave[0] == pytest.approx(299_792_458.0 / 6.0e14 * 1e10, rel=1e-14)


def test_object_without_metadata_is_a_row_not_an_exception(files):
    _, _, mask = files
    spec = Spectrum(flux=np.full(500, 100.0) * u.ct, spectral_axis=np.linspace(5200.0, 5210.0, 500) * u.AA,
                    uncertainty=StdDevUncertainty(np.full(500, 10.0)))
    table = measure(spec, mask)
    assert len(table) == 1 and table[0]["status"] != "ok"
    assert table[0]["file"] == "specutils object 0"
    assert "lineshift-specutils-" not in str(table[0]["notes"])
    assert not any(p.startswith("lineshift-specutils-") for p in os.listdir(os.environ.get("TMPDIR", "/tmp")))
