"""Spectral WCS: FITS headers of every kind against astropy.wcs itself, and IRAF multispec headers
written here from the definitions of the IRAF spectral WCS document (Valdes 1993, "The IRAF/NOAO
Spectral World Coordinate Systems"), evaluated in the test with numpy.polynomial and scipy."""

import itertools

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from numpy.polynomial import chebyshev, legendre
from numpy.testing import assert_allclose
from scipy.interpolate import BSpline

from lineshift.errors import SpectrumFormatError
from lineshift.io.loaders import load_spectrum
from lineshift.io.wcs import angstrom_factor, multispec_orders, wat_string, wcs_wavelengths

N = 400


def _header(cards, n=N):
    h = fits.Header()
    h["NAXIS"] = 1
    h["NAXIS1"] = n
    for k, v in cards.items():
        h[k] = v
    return h


def _astropy_angstrom(header, hdul=None):
    # outside reference: astropy.wcs (WCSLIB) directly on the header, spectral sub-WCS, pixel_to_world
    w = WCS(header, fobj=hdul)
    world = w.spectral.pixel_to_world(np.arange(header["NAXIS1"]))
    return np.asarray(u.Quantity(world).to_value(u.AA))


FITS_CASES = {
    "linear": {"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 5000.0, "CDELT1": 0.02, "CRPIX1": 1.0},
    # FITS WCS Paper I sect. 2.1.2: CD wins over CDELT when both are given
    "cd-and-cdelt": {"CTYPE1": "WAVE", "CUNIT1": "nm", "CRVAL1": 500.0, "CD1_1": 0.003, "CDELT1": 0.5,
                     "CRPIX1": 20.0},
    # PC multiplies CDELT; CRPIX absent defaults to 0 (Paper I sect. 2.1.2 and table 1)
    "pc-times-cdelt": {"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 6000.0, "CDELT1": 0.01, "PC1_1": 3.0},
    "log": {"CTYPE1": "WAVE-LOG", "CUNIT1": "Angstrom", "CRVAL1": 5500.0, "CDELT1": 5500.0 * 3e-6, "CRPIX1": 50.0},
    "air-log-um": {"CTYPE1": "AWAV-LOG", "CUNIT1": "um", "CRVAL1": 0.65, "CDELT1": 0.65 * 2e-6, "CRPIX1": 1.0},
    "air-m": {"CTYPE1": "AWAV", "CUNIT1": "m", "CRVAL1": 6.5e-7, "CDELT1": 1.5e-12, "CRPIX1": 1.0},
}


@pytest.mark.filterwarnings("ignore:cdelt will be ignored")
@pytest.mark.parametrize("name", list(FITS_CASES))
def test_fits_spectral_wcs_matches_astropy_wcs(name):
    header = _header(FITS_CASES[name])
    ours, medium = wcs_wavelengths(header, N)
    ref = _astropy_angstrom(header)
    assert_allclose(ours, ref, rtol=1e-13)
    assert medium == ("air" if header["CTYPE1"].startswith("AWAV") else "vacuum")


def test_cd_wins_and_pc_applies_by_value():
    # FITS WCS Paper I sect. 2.1.2, by hand: CD1_1 = 0.003 nm = 0.03 A per pixel from CRPIX1 = 20
    # (CDELT1 = 0.5 nm would give 5 A per pixel)
    ours, _ = wcs_wavelengths(_header(FITS_CASES["cd-and-cdelt"]), N)
    assert_allclose(ours, 5000.0 + 0.03 * (np.arange(1, N + 1) - 20.0), rtol=1e-14)
    # CDELT1 * PC1_1 = 0.03 A, CRPIX1 = 0: the first pixel (p = 1) is one step above CRVAL1
    ours, _ = wcs_wavelengths(_header(FITS_CASES["pc-times-cdelt"]), N)
    assert_allclose(ours[:2], [6000.03, 6000.06], rtol=1e-14)


def _tab_file(path, lam, *, ctype="WAVE-TAB", unit="Angstrom", flux=None):
    n = lam.size
    prim = fits.PrimaryHDU(np.ones(n, dtype=np.float32) * 100 if flux is None else flux)
    prim.header.update({"CTYPE1": ctype, "CUNIT1": unit, "CRVAL1": 1.0, "CDELT1": 1.0, "CRPIX1": 1.0,
                        "PS1_0": "WCS-TAB", "PS1_1": "COORDS", "PV1_3": 1})
    # FITS WCS Paper III sect. 6: the coordinate array is one row, TDIM (M=1, K=n)
    col = fits.Column(name="COORDS", format=f"{n}D", dim=f"(1,{n})", array=lam.reshape(1, n, 1), unit=unit)
    hdus = [prim, fits.BinTableHDU.from_columns([col], name="WCS-TAB"),
            fits.ImageHDU(np.full(n, 10.0, dtype=np.float32), name="ERR")]
    fits.HDUList(hdus).writeto(path, overwrite=True)
    return str(path)


def test_tab_axis_matches_astropy_wcs_and_loads(tmp_path):
    p = np.arange(N, dtype=float)
    lam = 5000.0 + 0.05 * p + 2e-5 * p ** 2          # a non-linear dispersion only a table can hold
    path = _tab_file(tmp_path / "tab.fits", lam)
    with fits.open(path) as hdul:
        ref = _astropy_angstrom(hdul[0].header, hdul)
        ours, medium = wcs_wavelengths(hdul[0].header, N, hdul=hdul)
    assert_allclose(ours, ref, rtol=1e-13)
    assert_allclose(ours, lam, rtol=1e-12)            # the table's own values, by construction
    sp = load_spectrum(path)
    assert sp.obs.layout == "wcs-1d" and medium == "vacuum"
    assert_allclose(sp.orders[0].wave, lam, rtol=1e-12)
    assert_allclose(sp.orders[0].var, 100.0)


def test_tab_axis_in_nm_and_air(tmp_path):
    from lineshift.io import airvac

    lam_nm = np.linspace(600.0, 610.0, N)
    path = _tab_file(tmp_path / "tab_air.fits", lam_nm, ctype="AWAV-TAB", unit="nm")
    with fits.open(path) as hdul:
        assert_allclose(wcs_wavelengths(hdul[0].header, N, hdul=hdul)[0], _astropy_angstrom(hdul[0].header, hdul),
                        rtol=1e-13)
    sp = load_spectrum(path)
    assert sp.obs.medium == "air"
    assert_allclose(sp.orders[0].wave, airvac.air_to_vacuum(lam_nm * 10.0), rtol=1e-13)


@pytest.mark.parametrize(("unit", "factor"), [("Angstrom", 1.0), ("nm", 10.0), ("um", 1e4), ("m", 1e10),
                                          ("0.1nm", 1.0), ("angstroms", 1.0), ("nanometers", 10.0)])
def test_units_through_astropy(unit, factor):
    # FITS standard 4.0 table 6 (Angstrom, m with SI prefixes) and IRAF's plural names; 1 A = 0.1 nm
    assert angstrom_factor(unit) == pytest.approx(factor, rel=1e-15)


def test_unit_that_is_not_a_length_is_refused():
    with pytest.raises(SpectrumFormatError, match="not a wavelength unit"):
        angstrom_factor("Hz", "x.fits", "CUNIT1")


def test_iraf_linear_with_units_attribute():
    # IRAF 1-D form (specwcs sect. 4): CTYPE1 = 'LINEAR', unit in WAT1_001
    header = _header({"CTYPE1": "LINEAR", "CRVAL1": 500.0, "CDELT1": 0.002, "CRPIX1": 1.0,
                      "WAT0_001": "system=equispec", "WAT1_001": "wtype=linear label=Wavelength units=nanometers"})
    ours, _ = wcs_wavelengths(header, N)
    assert_allclose(ours, 5000.0 + 0.02 * np.arange(N), rtol=1e-14)


# --------------------------------------------------------------------------- IRAF multispec

def _split_wat(header, axis, text):
    """Write an attribute string over WAT<axis>_nnn cards at 68 characters, as IRAF does."""
    chunks = [text[i:i + 68] for i in range(0, len(text), 68)]
    for k, chunk in enumerate(chunks, 1):
        header[f"WAT{axis}_{k:03d}"] = chunk
    return chunks


def _multispec_header(specs, n_pix, *, units="angstroms", pad=0, extra=None):
    h = fits.Header()
    h["NAXIS"] = 2
    h["NAXIS1"] = n_pix
    h["NAXIS2"] = len(specs)
    h["CTYPE1"] = "MULTISPE"
    h["CTYPE2"] = "MULTISPE"
    h["WAT0_001"] = "system=multispec"
    h["WAT1_001"] = f"wtype=multispec label=Wavelength units={units}"
    text = "wtype=multispec" + " " * (1 + pad) + " ".join(f'spec{i} = "{s}"' for i, s in enumerate(specs, 1))
    chunks = _split_wat(h, 2, text)
    for k, v in (extra or {}).items():
        h[k] = v
    return h, chunks


def _fmt(values):
    return " ".join(repr(float(v)) for v in values)


def test_wat_string_keeps_the_trailing_blanks_of_each_card():
    # a card that ends in a blank: astropy strips it when reading; the string must keep it
    spec = "1 1 0 5000.0 0.05 300 0.0 10.0 20.0"
    for pad in range(68):
        h, chunks = _multispec_header([spec, spec.replace("5000.0", "5200.125")], 300, pad=pad)
        if any(c.endswith(" ") for c in chunks[:-1]) and any(c[-1].isdigit() and n[0].isdigit()
                                                             for c, n in itertools.pairwise(chunks)):
            break
    else:
        pytest.fail("no padding gave both a blank at a card's end and a number split across cards")
    with_blank = next(k for k, c in enumerate(chunks[:-1], 1) if c.endswith(" "))
    assert str(h[f"WAT2_{with_blank:03d}"]).endswith(" ") is False     # astropy dropped it ...
    assert wat_string(h, 2) == "".join(chunks).ljust(68 * len(chunks))  # ... and we put it back
    orders, _ = multispec_orders(h, 300, 2)
    assert_allclose(orders[0].wave, 5000.0 + 0.05 * np.arange(300), rtol=1e-14)
    assert_allclose(orders[1].wave, 5200.125 + 0.05 * np.arange(300), rtol=1e-14)


def test_linear_and_log_linear_with_redshift():
    # specwcs sect. 5.1: w = (w1 + dw (p - 1)) / (1 + z); log-linear w = 10**(w1 + dw (p - 1)) / (1 + z)
    n, z = 500, 2.5e-4
    specs = [f"3 103 0 5000.0 0.04 {n} {z} 1.0 9.0",
             f"4 104 1 {float(np.log10(5300.0))!r} 3e-6 {n - 20} 0.0 1.0 9.0"]
    h, _ = _multispec_header(specs, n)
    orders, _ = multispec_orders(h, n, 2)
    p = np.arange(1, n + 1)
    assert_allclose(orders[0].wave, (5000.0 + 0.04 * (p - 1)) / (1 + z), rtol=1e-14)
    assert orders[1].wave.size == n - 20                  # nw: only the valid pixels
    assert_allclose(orders[1].wave, 10 ** (np.log10(5300.0) + 3e-6 * (p[:n - 20] - 1)), rtol=1e-13)
    assert (orders[0].aperture, orders[0].beam, orders[1].dtype) == (3, 103, 1)


def test_chebyshev_and_legendre_summed_with_weights_and_zero_points():
    # specwcs sect. 5: w = sum_i wt_i (w0_i + W_i(p)) / (1 + z), n = (2p - (pmax + pmin)) / (pmax - pmin)
    n, pmin, pmax, z = 1000, 1.0, 1000.0, 1e-4
    c_cheb = [5512.3, 47.1, -0.62, 0.013, -4e-4]
    c_leg = [2.0, 0.5, -0.03]
    funcs = f"1.0 0.0 1 {len(c_cheb)} {pmin} {pmax} {_fmt(c_cheb)} 0.5 12.0 2 {len(c_leg)} {pmin} {pmax} {_fmt(c_leg)}"
    spec = f"1 1 2 5465.0 0.095 {n} {z} 0.0 0.0 {funcs}"
    h, _ = _multispec_header([spec], n)
    orders, _ = multispec_orders(h, n, 1)
    p = np.arange(1, n + 1, dtype=float)
    x = (2 * p - (pmax + pmin)) / (pmax - pmin)
    expected = (1.0 * (0.0 + chebyshev.chebval(x, c_cheb)) + 0.5 * (12.0 + legendre.legval(x, c_leg))) / (1 + z)
    assert_allclose(orders[0].wave, expected, rtol=1e-14)


def test_cubic_spline_is_six_times_the_uniform_cubic_b_spline():
    # specwcs sect. 5.5: s = (p - pmin)/(pmax - pmin) npieces; x0 = a^3, x1 = 1 + 3a(1 + ab),
    # x2 = 1 + 3b(1 + ab), x3 = b^3 on piece j.  These are 6 times the uniform cubic B-spline basis
    # (de Boor 1978), so scipy's BSpline on knots -3..npieces+3 with coefficients 6 c is the reference.
    n, npieces, pmin, pmax = 800, 5, 1.0, 800.0
    rng = np.random.default_rng(3)
    c = 6000.0 / 6 + np.cumsum(rng.uniform(5.0, 6.0, npieces + 3))
    spec = f"1 1 2 6000.0 0.1 {n} 0.0 0.0 0.0 1.0 0.0 3 {npieces} {pmin} {pmax} {_fmt(c)}"
    h, _ = _multispec_header([spec], n)
    orders, _ = multispec_orders(h, n, 1)
    s = (np.arange(1, n + 1) - pmin) / (pmax - pmin) * npieces
    ref = BSpline(np.arange(-3, npieces + 4, dtype=float), 6 * c, 3)(s)
    assert_allclose(orders[0].wave, ref, rtol=1e-13)
    # and by hand at the knots: W(s = j) = c_j + 4 c_{j+1} + c_{j+2} (a = 1, b = 0)
    knots = np.arange(1, npieces) * (pmax - pmin) / npieces + pmin
    for j, pk in enumerate(knots, 1):
        if float(pk).is_integer():
            assert orders[0].wave[int(pk) - 1] == pytest.approx(c[j] + 4 * c[j + 1] + c[j + 2], rel=1e-13)


def test_linear_spline_pixel_array_and_sampled_array():
    # specwcs sect. 5.4: W = c_j a + c_{j+1} b, i.e. straight lines between the values at the knots;
    # 5.6: the coefficients are the wavelengths of pixels 1..npts; 5.7: (pixel, wavelength) pairs
    n, npieces, pmin, pmax = 401, 4, 1.0, 401.0
    c = [5000.0, 5010.0, 5021.0, 5030.5, 5041.0]
    pix = 5000.0 + 0.05 * np.arange(n) + 1e-5 * np.arange(n) ** 2
    samples = [(1.0, 5000.0), (101.0, 5004.0), (301.0, 5013.0), (401.0, 5018.0)]
    specs = [f"1 1 2 0 0 {n} 0.0 0 0 1.0 0.0 4 {npieces} {pmin} {pmax} {_fmt(c)}",
             f"2 2 2 0 0 {n} 0.0 0 0 1.0 0.0 5 {n} {_fmt(pix)}",
             f"3 3 2 0 0 {n} 0.0 0 0 1.0 0.0 6 {len(samples)} {_fmt(np.ravel(samples))}"]
    h, _ = _multispec_header(specs, n)
    orders, _ = multispec_orders(h, n, 3)
    knots = pmin + np.arange(npieces + 1) * (pmax - pmin) / npieces      # 1, 101, 201, 301, 401
    for k, pk in enumerate(knots):
        assert orders[0].wave[int(pk) - 1] == pytest.approx(c[k], rel=1e-14)
    assert orders[0].wave[50] == pytest.approx(0.5 * (c[0] + c[1]), rel=1e-14)   # pixel 51, midway
    assert_allclose(orders[1].wave, pix, rtol=1e-15)
    assert orders[2].wave[100] == pytest.approx(5004.0, rel=1e-15)
    assert orders[2].wave[200] == pytest.approx(5008.5, rel=1e-15)          # midway between 101 and 301
    assert orders[2].wave[350] == pytest.approx(5015.5, rel=1e-15)


def test_physical_pixels_of_an_image_section():
    # IRAF logical -> physical: l = LTM1_1 p + LTV1, so a section starting at pixel 101 has LTV1 = -100
    n = 300
    h, _ = _multispec_header([f"1 1 0 5000.0 0.05 {n} 0.0 0 0"], n, extra={"LTV1": -100.0, "LTM1_1": 1.0})
    orders, _ = multispec_orders(h, n, 1)
    assert orders[0].wave[0] == pytest.approx(5000.0 + 0.05 * 100, rel=1e-14)


@pytest.mark.parametrize(("spec", "message"), [
    ("1 1 2 0 0 100 0.0 0 0 1.0 0.0 7 3", "not an IRAF type"),
    ("1 1 2 0 0 100 0.0 0 0 1.0 0.0 1 4 1 100 1.0 2.0", "wrong number of parameters"),
    ("1 1 5 5000 0.05 100 0.0 0 0", "dispersion type 5"),
    ("1 1 0 5000", "needs at least 9"),
])
def test_malformed_multispec_is_a_clear_error(spec, message):
    h, _ = _multispec_header([spec], 100)
    with pytest.raises(SpectrumFormatError, match=message):
        multispec_orders(h, 100, 1, "ms.fits")


def test_three_dimensional_form_takes_the_sigma_band(tmp_path):
    # IRAF apextract with variance weighting: bands spectrum, raw, background, sigma (BANDID1..4)
    n, n_orders = 256, 3
    specs = [f"{k} {k} 0 {5000.0 + 20 * k} 0.05 {n} 0.0 0 0" for k in range(1, n_orders + 1)]
    h, _ = _multispec_header(specs, n)
    flux = np.full((n_orders, n), 400.0)
    sigma = np.full((n_orders, n), 20.0)
    cube = np.stack([flux, flux * 1.1, np.zeros_like(flux), sigma]).astype(np.float32)
    hdu = fits.PrimaryHDU(cube)
    for card in h.cards:
        if not card.keyword.startswith("NAXIS"):
            hdu.header[card.keyword] = card.value
    hdu.header["CTYPE3"] = "LINEAR"
    for k, text in enumerate(["spectrum - background fit, weights variance, clean no", "raw - background fit",
                              "background - background fit", "sigma - background fit, weights variance"], 1):
        hdu.header[f"BANDID{k}"] = text
    hdu.header.update({"DATE-OBS": "2026-03-01T22:00:00", "EXPTIME": 600.0})
    path = str(tmp_path / "ms3d.fits")
    hdu.writeto(path)
    sp = load_spectrum(path)
    assert sp.obs.layout == "multispec" and sp.n_orders == n_orders
    for k, o in enumerate(sp.orders):
        assert_allclose(o.wave, 5000.0 + 20 * (k + 1) + 0.05 * np.arange(n), rtol=1e-14)
        assert_allclose(o.flux, 400.0)
        assert_allclose(o.var, 400.0)                 # sigma 20 squared, not the raw band
    assert any("band 4" in note for note in sp.obs.notes)
    assert any("vacuum assumed" in note for note in sp.obs.notes)


# --------------------------------------------------------------------------- end to end

def test_multispec_echelle_measured_end_to_end(tmp_path):
    """A simulated echelle written as an IRAF 3-D multispec image (Chebyshev, Legendre, a weighted
    sum of both, and a redshifted solution) gives the velocity the simulator put in, and the same
    velocity as the same exposure in the multi-order layout."""
    from numpy.polynomial import Chebyshev, Legendre

    from lineshift import sim
    from lineshift.api import measure

    ins = sim.Instrument("t-echelle-ms", "multi-order", 110_000, 4, 1024, 5000.0, snr=150)
    exp = sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61010.9, np.random.default_rng(11))
    mo_path = sim.write_observation(exp, str(tmp_path / "echelle_mo.fits"))
    n = ins.n_pixels
    p = np.arange(1, n + 1, dtype=float)
    dom = [1.0, float(n)]
    z = 3e-5

    def coeffs(kind, y):
        return (Chebyshev if kind == 1 else Legendre).fit(p, y, 9, domain=dom).coef

    def func(wt, w0, kind, y):
        c = coeffs(kind, y)
        return f"{wt} {w0} {kind} {c.size} 1.0 {float(n)} {_fmt(c)}"

    specs = []
    for k in range(ins.n_orders):
        w = exp.wave[k]
        mid = float(np.round(w.mean(), 1))
        if k == 0:
            body, zk = func(1.0, 0.0, 1, w), 0.0
        elif k == 1:
            body, zk = func(1.0, mid, 2, w - mid), 0.0
        elif k == 2:   # two halves of the solution, weight 0.5 each
            body, zk = f"{func(0.5, 0.0, 1, w)} {func(0.5, mid, 2, w - mid)}", 0.0
        else:          # written for a redshifted frame: the reader divides by 1 + z
            body, zk = func(1.0, 0.0, 1, w * (1 + z)), z
        specs.append(f"{k + 1} {k + 1} 2 {float(w[0])!r} {float(np.mean(np.diff(w)))!r} {n} {zk} 0.0 0.0 {body}")
    h, _ = _multispec_header(specs, n)
    cube = np.stack([exp.flux, exp.flux, np.zeros_like(exp.flux), exp.err]).astype(np.float32)
    hdu = fits.PrimaryHDU(cube)
    with fits.open(mo_path) as hdul:
        for card in hdul[0].header.cards:
            if card.keyword not in ("SIMPLE", "BITPIX", "EXTEND") and not card.keyword.startswith("NAXIS"):
                hdu.header[card.keyword] = (card.value, card.comment)
    for card in h.cards:
        if not card.keyword.startswith("NAXIS"):
            hdu.header[card.keyword] = card.value
    for k, text in enumerate(["spectrum", "raw", "background", "sigma"], 1):
        hdu.header[f"BANDID{k}"] = text
    ms_path = str(tmp_path / "echelle_ms.fits")
    hdu.writeto(ms_path)

    sp = load_spectrum(ms_path)
    for k, o in enumerate(sp.orders):   # the dispersion functions reproduce the simulator's grid
        assert np.max(np.abs(o.wave / exp.wave[k] - 1)) * 299_792_458.0 < 0.01   # m/s
    mask = str(tmp_path / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    table = measure([ms_path, mo_path], mask)
    ms, mo = table[0], table[1]
    assert ms["status"] == "ok" and mo["status"] == "ok" and ms["layout"] == "multispec"
    rv, err = ms["rv"].to_value(u.m / u.s), ms["rv_err"].to_value(u.m / u.s)
    truth = exp.truth["rv_true"]
    print(f"multispec rv - truth = {rv - truth:+.2f} m/s (rv_err {err:.2f}); "
          f"multispec - multi-order = {rv - mo['rv'].to_value(u.m / u.s):+.3f} m/s")
    assert abs(rv - truth) < 4 * err                       # injection-recovery: the velocity put in
    assert abs(rv - mo["rv"].to_value(u.m / u.s)) < 0.5 * err
    assert abs(ms["berv"].to_value(u.m / u.s) - exp.truth["berv"]) < 0.01


@pytest.mark.filterwarnings("ignore:Flux unit was not provided")
def test_multispec_agrees_with_specutils_iraf_reader(tmp_path):
    # outside reference: specutils' IRAF reader (astropy.modeling Chebyshev1D / Legendre1D on the
    # same header); it reads one function of weight 1 and zero point 0, and linear lines
    from specutils import SpectrumCollection

    n = 600
    specs = [f"{k} {k} 2 5465.0 0.095 {n} 0.0 0.0 0.0 1.0 0.0 {ft} {len(c)} 1.0 {float(n)} {_fmt(c)}"
             for k, (ft, c) in enumerate([(1, [5512.3, 47.1, -0.62, 0.013]),
                                          (2, [5602.0, 45.0, -0.5, 0.02, 1e-3])], 1)]
    specs.append(f"3 3 0 5700.0 0.05 {n} 0.0 0.0 0.0")
    h, _ = _multispec_header(specs, n)
    hdu = fits.PrimaryHDU(np.ones((3, n), dtype=np.float32))
    for card in h.cards:
        if not card.keyword.startswith("NAXIS"):
            hdu.header[card.keyword] = card.value
    hdu.header.update({"WCSDIM": 2, "CD1_1": 1.0, "CD2_2": 1.0})
    path = str(tmp_path / "ms_specutils.fits")
    hdu.writeto(path)
    ref = SpectrumCollection.read(path, format="iraf")
    sp = load_spectrum(path)
    for k in range(3):
        assert_allclose(sp.orders[k].wave, ref.spectral_axis[k].to_value(u.AA), rtol=1e-14)
