"""Nuisances of real spectra on the independent generator (tests/independent/nuisances.py).

Each exposure is made once from its noise deviates and written clean and with one nuisance (or all
of them); both sets are measured and scored against the efficient estimator on the clean draw (see
tests/nuisance_run.py).  The cost of a nuisance is the damaged/clean ratio of scatter / efficient
estimator; targets with all nuisances on: mask engine <= 1.3, template engine <= 1.15, pull std
0.95-1.05.  Tolerances from the number of draws N: a standard deviation from N draws is uncertain by
1/sqrt(2 (N - 1)) (common practice).  Targets not met are strict xfails with the figure measured.
"""

from __future__ import annotations

import numpy as np
import pytest

import nuisance_run as nr
from independent import forward as fwd
from independent import nuisances as nzm
from lineshift.io.loaders import load_spectrum
from lineshift.measure.badpixels import bad_pixels, clipped_pixels
from lineshift.measure.ccf import select_lines
from lineshift.measure.prepare import prepare_spectrum
from lineshift.measure.tellurics import band_pixels, drop_bands, merge_intervals
from lineshift.model import LineMask

N_DRAWS, N_ORDERS = 12, 8
CASES = {
    "cosmics": nzm.Nuisances(cosmics=True),
    "hot_pixels": nzm.Nuisances(hot_pixels=True),
    "tellurics": nzm.Nuisances(tellurics=True),
    "nan_runs": nzm.Nuisances(nan_runs=True),
    "nonpositive": nzm.Nuisances(nonpositive=True),
    "saturation_flagged": nzm.Nuisances(saturation="flagged"),
    "saturation_unflagged": nzm.Nuisances(saturation="unflagged"),
    "mask": nzm.Nuisances(mask=True),
    "all": nzm.Nuisances.all(),
}
TARGET = {"mask": 1.3, "template": 1.15}


# ------------------------------------------------------------------------------------ fast checks
def test_flat_top_is_saturation():
    # a full well clips to one value while counts carry noise (common practice): the clipped pixels
    # and only they are found; unclipped noisy counts, a constant array and a noise-free line are not
    rng = np.random.default_rng(3)
    f = 2e4 * (1 + 0.3 * np.sin(np.linspace(0, 3, 2048))) + rng.normal(0, 140, 2048)
    level = np.quantile(f, 0.97)
    assert np.array_equal(clipped_pixels(np.minimum(f, level)), f >= level)
    assert not clipped_pixels(f).any()
    assert not clipped_pixels(np.ones(500)).any()
    assert not clipped_pixels(1 - 0.5 * np.exp(-0.5 * (np.arange(200) - 100.0) ** 2 / 9)).any()
    bad = bad_pixels(np.minimum(f, level), np.full(2048, 2e4))
    idx = np.flatnonzero(f >= level)
    assert bad[np.clip(idx + 2, 0, 2047)].all() and bad[np.clip(idx - 2, 0, 2047)].all()   # neighbours too


def test_saturate_keyword_is_read(tmp_path):
    # SATURATE header keyword (common practice for a detector's saturation level): pixels at or above
    # it are unusable, with their two neighbours either side, and the notes say how many
    s = fwd.echelle_setup(2, n_orders=2, n_pix=512, lo=6000.0)
    m = fwd.model_counts(s, nr.LINES, 1e4)
    rng = np.random.default_rng(4)
    level = nzm.saturation_level(m, 0.05)
    flux = nzm.saturate([a + rng.normal(0, 140, a.shape) for a in m], level)
    # break the flat top's ties so only the keyword can tell: the loader must not rely on clipping
    flux = [np.where(f >= level, f + rng.uniform(0, 1, f.shape), f) for f in flux]
    draw = fwd.Draw(flux, nzm.noisy_variance(flux, 4.0), "noisy")
    p = str(tmp_path / "sat.fits")
    nzm.write_exposure(p, s, draw, fwd.DATE_AVG, level)
    sp = load_spectrum(p)
    hit = np.concatenate([f >= level for f in flux])
    assert hit.sum() > 10
    assert np.all(~np.isfinite(np.concatenate([o.var for o in sp.orders])[hit]))
    assert any("SATURATE" in n for n in sp.obs.notes)
    for o, f in zip(prepare_spectrum(sp), flux, strict=True):
        i = np.flatnonzero(f >= level)
        assert not o.good[i].any() and not o.good[np.clip(i + 2, 0, f.size - 1)].any()


def test_lines_clear_of_bad_pixels():
    # a box that meets a bad pixel anywhere on the grid is dropped; one clear of it is kept; with no
    # bad pixel the choice is the plain one (clean data are measured exactly as before)
    from lineshift.measure.prepare import PreparedOrder, pixel_edges

    wave = 5000.0 * np.exp(np.arange(1000) / 250_000.0)
    good = np.ones(1000, dtype=bool)
    o = PreparedOrder(wave, pixel_edges(wave), np.ones(1000), np.ones(1000), np.ones(1000), good, 0)
    mask = LineMask(np.array([wave[300], wave[500], wave[700]]), np.ones(3))
    plain = select_lines(o, mask, -5000.0, 5000.0, 1000.0)
    assert np.array_equal(plain, select_lines(o, mask, -5000.0, 5000.0, 1000.0, clear_of_bad=True))
    good = good.copy()
    good[505] = False   # 5 pixels (~6 km/s) redward of line 1: inside its 5 km/s sweep + half box
    bad = PreparedOrder(wave, o.edges, o.flux, o.var, np.where(good, 1.0, 0.0), good, 0)
    assert list(select_lines(bad, mask, -5000.0, 5000.0, 1000.0, clear_of_bad=True)) == [0, 2]
    assert list(select_lines(bad, mask, -5000.0, 5000.0, 1000.0)) == [0, 1, 2]


def test_band_pixels_dropped_in_own_frame():
    # interval arithmetic (from memory): pixels whose centres lie in [lo, hi) of any band, no others
    from lineshift.measure.prepare import PreparedOrder, pixel_edges

    wave = np.linspace(6000.0, 6010.0, 101)
    bands = np.array([[6002.0, 6003.0], [6100.0, 6200.0], [6009.95, 6020.0]])
    inb = band_pixels(wave, bands)
    assert np.array_equal(inb, ((wave >= 6002.0) & (wave < 6003.0)) | (wave >= 6009.95))
    o = PreparedOrder(wave, pixel_edges(wave), np.ones(101), np.ones(101), np.ones(101), np.ones(101, bool), 3)
    d = drop_bands(o, bands)
    assert np.array_equal(d.good, ~inb) and np.all(d.weight[inb] == 0) and np.all(d.weight[~inb] == 1)
    assert drop_bands(o, np.zeros((0, 2))) is o
    assert np.array_equal(merge_intervals(np.array([[3, 4], [1, 2], [1.5, 3.5]])), [[1, 4]])


def test_clean_forward_data_untouched(tmp_path):
    # clean-data precision unchanged: on a clean generator file no pixel is taken for saturation and
    # the fine-grid line choice equals the plain one, so the mask engine's arithmetic is the same
    s = fwd.echelle_setup(3, n_orders=6)
    ref = fwd.reference(s, nr.LINES, 0.0)
    d = fwd.draw_noise(ref.model, np.random.default_rng(8), s.read_noise)
    p = str(tmp_path / "c.fits")
    fwd.write_echelle(p, s, d)
    w, dep = nr.true_mask()
    mask = LineMask(w, dep)
    for o in prepare_spectrum(load_spectrum(p)):
        assert o.good[1:-1].all()
        assert np.array_equal(select_lines(o, mask, -20e3, 20e3, 1200.0),
                              select_lines(o, mask, -20e3, 20e3, 1200.0, clear_of_bad=True))


# ------------------------------------------------------------------------------------ precision
@pytest.fixture(scope="module")
def batch():
    return nr.make_batch(n=N_DRAWS, n_orders=N_ORDERS)


_CACHE: dict = {}


def _measure(batch, tmp_path_factory, name):
    if name not in _CACHE:
        nz = nzm.Nuisances() if name == "clean" else CASES[name]
        _CACHE[name] = nr.measure_batch(batch, tmp_path_factory.mktemp(name), nz)
    return _CACHE[name]


def _cost(batch, tmp_path_factory, name, method):
    clean = _measure(batch, tmp_path_factory, "clean")[method]
    dmg = _measure(batch, tmp_path_factory, name)[method]
    return dmg.ratio() / clean.ratio(), dmg


# Figures measured with 12 draws, 8 orders (the reasons quote them).
XFAIL = {
    ("mask_zero_point", "mask"): "mismatched mask moves the mask-engine zero point by -11.2 m/s "
                                 "(error per spectrum 4.9 m/s); wrong weights alone moved it by ~-70 m/s "
                                 "on a batch of this set-up: the weighted mean of the lines' blend offsets "
                                 "changes",
    ("mask_zero_point", "template"): "template zero point follows the first (mask) pass: -11.2 m/s "
                                     "with the mismatched mask (error per spectrum 4.9 m/s)",
}


@pytest.mark.slow
@pytest.mark.parametrize("method", ["mask", "template"])
@pytest.mark.parametrize("name", list(CASES))
def test_nuisance_cost(batch, tmp_path_factory, name, method, request):
    if (name, method) in XFAIL:
        request.applymarker(pytest.mark.xfail(strict=True, reason=XFAIL[(name, method)]))
    cost, dmg = _cost(batch, tmp_path_factory, name, method)
    r = dmg.ratio()
    # the damaged ratio may exceed target x clean by two standard errors of a ratio from N draws
    assert cost <= TARGET[method] + nr.ratio_tolerance(r, dmg.n) / _measure(batch, tmp_path_factory, "clean")[
        method].ratio()
    assert abs(dmg.pull() - 1.0) <= nr.pull_tolerance(dmg.n)
    # issue target 0.95-1.05, on the paired pull (efficient estimator as control variate)
    assert abs(dmg.paired_pull() - 1.0) <= nr.paired_pull_tolerance(r, dmg.n)


@pytest.mark.slow
@pytest.mark.parametrize("method", ["mask", "template"])
def test_clean_paired_pulls(batch, tmp_path_factory, method):
    # error calibration on the clean set: the band 0.95-1.05 within the draws' tolerance
    c = _measure(batch, tmp_path_factory, "clean")[method]
    assert abs(c.paired_pull() - 1.0) <= nr.paired_pull_tolerance(c.ratio(), c.n)


def _shift(batch, tmp_path_factory, name, method):
    """Per exposure (rv with the nuisance - rv without it) / rv_err: the same noise draw, so what is
    left is the nuisance's own effect."""
    c = _measure(batch, tmp_path_factory, "clean")[method]
    d = _measure(batch, tmp_path_factory, name)[method]
    return (d.rv - c.rv) / c.err


@pytest.mark.slow
@pytest.mark.parametrize("method", ["mask", "template"])
def test_tellurics_bias_below_a_fifth_of_the_error(batch, tmp_path_factory, method, request):
    # issue target: weak telluric lines outside the shipped bands (and the strong band) move velocities
    # by less than 0.2 of the error over a year of BERV; measured on the same noise draws
    if ("tellurics_bias", method) in XFAIL:
        request.applymarker(pytest.mark.xfail(strict=True, reason=XFAIL[("tellurics_bias", method)]))
    dz = _shift(batch, tmp_path_factory, "tellurics", method)
    assert np.sqrt(np.mean(dz**2)) < 0.2


@pytest.mark.slow
@pytest.mark.parametrize("method", ["mask", "template"])
def test_mismatched_mask_zero_point(batch, tmp_path_factory, method, request):
    # issue target: a mask that does not match the star must not move the zero point beyond the errors
    if ("mask_zero_point", method) in XFAIL:
        request.applymarker(pytest.mark.xfail(strict=True, reason=XFAIL[("mask_zero_point", method)]))
    c = _measure(batch, tmp_path_factory, "clean")[method]
    d = _measure(batch, tmp_path_factory, "mask")[method]
    assert abs(d.zero_point() - c.zero_point()) < np.median(c.err)


@pytest.mark.slow
def test_report_nuisance_figures(batch, tmp_path_factory, capsys):
    # not a check: prints the figures (run with -s) for the record
    with capsys.disabled():
        for name in ["clean", *CASES]:
            for m in ("mask", "template"):
                r = _measure(batch, tmp_path_factory, name)[m]
                c = _measure(batch, tmp_path_factory, "clean")[m]
                dz = (r.rv - c.rv) / c.err
                print(f"{name:22s} {m:8s} ratio {r.ratio():.3f} x{r.ratio() / c.ratio():.3f} pull {r.pull():.2f} "
                      f"paired pull {r.paired_pull():.3f} "
                      f"zp {r.zero_point():+.1f}+-{r.zero_point_err():.1f} rejected {r.rejected.mean():.0f} "
                      f"shift/err rms {np.sqrt(np.mean(dz**2)):.2f} err {np.median(c.err):.1f}")
