"""Preparation: continuum fit, bad pixels, telluric rejection of mask lines."""

import numpy as np
import pytest

from lineshift.io.linelists import DEFAULT_TELLURIC, read_telluric_bands
from lineshift.measure.prepare import fit_continuum, prepare_spectrum, reject_telluric_lines
from lineshift.model import C_MS, LineMask, Order, Spectrum
from lineshift.model import Observation as Obs


def test_continuum_fit_follows_upper_envelope_under_lines():
    rng = np.random.default_rng(2)
    n = 4096
    x = np.linspace(-1, 1, n)
    cont = 1e4 * (1 + 0.3 * x - 0.2 * x**2)
    lines = np.ones(n)
    for c in rng.uniform(-1, 1, 80):
        lines *= 1 - 0.5 * np.exp(-0.5 * ((x - c) / 0.002) ** 2)
    flux = cont * lines + rng.normal(size=n) * np.sqrt(cont)
    fit, used = fit_continuum(flux, cont, np.ones(n, bool))
    # 1 % noise per pixel, 80 lines of depth 0.5: line wings shallower than the 2-sigma clip stay in
    # the fit, so the envelope may sit a few tenths of a percent low; half a percent is the bound
    assert np.max(np.abs(fit / cont - 1)) < 0.005
    assert used.mean() > 0.5


def test_bad_pixels_get_zero_weight():
    n = 512
    wave = 5000 + 0.02 * np.arange(n)
    flux = np.full(n, 1e4)
    var = np.full(n, 1e4)
    flux[10], var[20], var[30] = np.nan, 0.0, -1.0
    var[40] = np.inf
    flux[50] = np.inf
    sp = Spectrum(Obs("x", "text"), (Order(wave, flux, var),))
    (p,) = prepare_spectrum(sp)
    for i in (10, 20, 30, 40, 50):
        # each bad pixel is masked with the two neighbours on either side that a reduction's
        # interpolation reaches (measure/badpixels.py)
        assert not p.good[i - 2:i + 3].any()
        assert (p.weight[i - 2:i + 3] == 0.0).all()
    assert p.good.sum() == n - 25


def test_telluric_rejection_covers_the_batch_berv_range():
    bands = np.array([[6000.0, 6010.0]])
    lam = np.array([5990.0, 5999.5, 6005.0, 6010.5, 6020.0])
    mask = LineMask(lam, np.ones(5))
    # no shift: only lines inside the band (box 1 km/s) are hit
    keep = reject_telluric_lines(mask, bands, rv_star=0, berv_min=0, berv_max=0, box_width=1000)
    assert keep.tolist() == [True, True, False, True, True]
    # the star's line at 5999.5 A moves into the band for BERV down to -30 km/s:
    # observed = rest (1 + rv)/(1 + berv) > 6000 when berv < -25 km/s
    keep = reject_telluric_lines(mask, bands, rv_star=0, berv_min=-30e3, berv_max=30e3, box_width=1000)
    assert keep.tolist() == [True, False, False, False, True]
    shift = 5999.5 / (1 - 30e3 / C_MS)
    assert shift > 6000.0


def test_shipped_telluric_list_is_the_packaged_copy():
    here = __file__.rsplit("/tests/", 1)[0]
    with open(f"{here}/line_lists/telluric_bands.csv") as a, open(DEFAULT_TELLURIC) as b:
        assert a.read() == b.read()
    bands = read_telluric_bands()
    # O2 A band head near 7594 A in air (from memory), listed in air and read as vacuum
    a_band = bands[(bands[:, 0] > 7590) & (bands[:, 0] < 7600)]
    assert a_band.shape == (1, 2)
    assert a_band[0, 0] == pytest.approx(7590.0 * 1.000276, abs=0.05)
