"""Each fast kernel against the plain, obvious form kept beside it in the code.

The plain forms use only the textbook operations (a loop over runs, ``np.nanmedian`` over every
window, one spectrum at a time); the fast ones must give the same pixels exactly.
"""

import numpy as np
import pytest

from lineshift.measure.badpixels import bad_pixels
from lineshift.measure.outliers import find_spikes, find_spikes_reference


def _orders(rng, rows=6, n=1500):
    """Lined spectra with photon noise, cosmic rays of 1-5 pixels, NaN runs and bad edges (invented)."""
    x = np.arange(n, dtype=float)
    model = np.full((rows, n), 3e4)
    for r in range(rows):
        for c, d in zip(rng.uniform(0, n, 40), rng.uniform(0.1, 0.9, 40), strict=True):
            model[r] *= 1 - d * np.exp(-0.5 * ((x - c) / 1.7) ** 2)
    flux = rng.normal(model, np.sqrt(model))
    var = model.copy()
    for r in range(rows):
        for start in rng.integers(0, n - 5, 25):      # spikes, some touching each other or the edges
            w = rng.integers(1, 6)
            flux[r, start:start + w] += rng.uniform(2, 40) * model[r, start:start + w]
        flux[r, rng.integers(0, n, 4)] = np.nan
        var[r, rng.integers(0, n, 3)] = 0.0
    flux[0, :3] += 5e5                                   # a spike at the very first pixels
    flux[1, -2:] += 5e5                                  # and at the last
    flux[2, 100:140] = np.nan                            # a long gap
    return flux, var, model


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_find_spikes_vectorised_equals_the_plain_loop(seed):
    rng = np.random.default_rng(seed)
    flux, var, model = _orders(rng)
    good = rng.random(flux.shape) > 0.01
    for kwargs in ({}, {"good": good}, {"model": model}, {"max_width": 1, "grow": 2},
                   {"nsigma": 3.0, "contrast": 0.05, "max_iter": 2}):
        fast = find_spikes(flux, var, **{k: v for k, v in kwargs.items()})
        for r in range(flux.shape[0]):
            row = {k: (v[r] if isinstance(v, np.ndarray) else v) for k, v in kwargs.items()}
            plain = find_spikes_reference(flux[r], var[r], **row)
            np.testing.assert_array_equal(fast[r], plain, err_msg=f"row {r}, {sorted(kwargs)}")
            np.testing.assert_array_equal(find_spikes(flux[r], var[r], **row), plain)
    assert fast.any()   # the comparison saw spikes


def test_bad_pixels_on_a_block_equals_each_row():
    rng = np.random.default_rng(4)
    flux = rng.normal(100.0, 30.0, (5, 300))
    flux[rng.random(flux.shape) < 0.01] = np.nan
    var = np.abs(rng.normal(100.0, 50.0, (5, 300)))
    block = bad_pixels(flux, var, saturation=180.0, grow=2)
    # the obvious definition: a pixel is bad when any raw-bad pixel of its row lies within 2 of it
    raw = ~np.isfinite(flux) | (np.nan_to_num(flux) <= 0) | (var <= 0) | (np.nan_to_num(flux) >= 180.0)
    for r in range(5):
        plain = [raw[r, max(i - 2, 0):i + 3].any() for i in range(300)]
        np.testing.assert_array_equal(block[r], plain)
        np.testing.assert_array_equal(bad_pixels(flux[r], var[r], saturation=180.0, grow=2), plain)
    # the growth does not leak from the end of one row into the next
    f = np.full((2, 10), 5.0)
    f[0, -1] = np.nan
    assert not bad_pixels(f, grow=2)[1].any()


def _prepared(seed, n=400, lam0=5000.0, index=0):
    from lineshift.measure.prepare import PreparedOrder, pixel_edges

    rng = np.random.default_rng(seed)
    wave = lam0 + 0.02 * np.arange(n) + 1e-6 * np.arange(n) ** 2      # non-uniform dispersion
    flux = 1.0 - 0.3 * np.exp(-0.5 * ((wave - wave[n // 2]) / 0.05) ** 2) + 0.01 * rng.normal(size=n)
    var = rng.uniform(0.5e-4, 2e-4, n)
    weight = 1.0 + 0.5 * np.linspace(0, 1, n)
    return PreparedOrder(wave, pixel_edges(wave), flux, var, weight, np.ones(n, bool), index)


@pytest.mark.parametrize("width", [300.0, 1000.0, 2000.0])   # 1000/2000: whole grid steps (shared edges)
def test_error_propagation_matrix_product_equals_the_row_by_row_adjoint(width):
    from lineshift.measure.ccf import CorrelationData, correlate
    from lineshift.model import LineMask

    orders = [_prepared(1), _prepared(2, lam0=5008.0, index=1)]
    mask = LineMask(np.array([5001.0, 5002.5, 5003.0, 5009.2, 5011.9, 5013.0]),
                    np.array([0.5, 1.0, 0.3, 0.8, 0.6, 0.9]))
    v = np.linspace(-10e3, 10e3, 21)
    data = correlate(orders, mask, v, width)
    sens = np.random.default_rng(7).normal(size=(5, v.size))
    for t in data.terms:
        fast = CorrelationData._term_variance(t, sens)
        plain = CorrelationData._term_variance_reference(t, sens)
        np.testing.assert_allclose(fast, plain, rtol=1e-10)


def test_bspline_written_out_equals_the_basis_product():
    from scipy.interpolate import make_interp_spline
    from scipy.ndimage import spline_filter1d

    from lineshift.measure.coadd import bspline, bspline_reference

    rng = np.random.default_rng(9)
    values = rng.normal(size=200)
    coef = spline_filter1d(values, order=3, mode="mirror")
    x = rng.uniform(1.0, 196.0, 5000)
    fast, plain = bspline(coef, x), bspline_reference(coef, x)
    for a, b in zip(fast, plain, strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12)
    # outside reference: scipy's interpolating cubic spline through the same values agrees away
    # from the ends (the boundary conditions differ there)
    inner = (x > 20) & (x < 180)
    sp = make_interp_spline(np.arange(200.0), values, k=3)
    np.testing.assert_allclose(fast[0][inner], sp(x[inner]), atol=1e-6)


def test_template_run_with_kept_spectra_equals_reading_each_time(sample_set, monkeypatch):
    import os

    from lineshift.io.linelists import read_mask
    from lineshift.run import reuse
    from lineshift.run.pipeline import MeasureSettings, measure_files

    directory, mask, rows = sample_set
    paths = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    settings = MeasureSettings(method="template", telluric_bands=False)
    kept = measure_files(paths, read_mask(mask), settings, workers=1)
    monkeypatch.setattr(reuse, "BUDGET_BYTES", 0)           # nothing kept: every pass reads the files
    read = measure_files(paths, read_mask(mask), settings, workers=1)
    assert [r["status"] for r in kept] == ["ok"] * len(paths)
    for a, b in zip(kept, read, strict=True):
        assert {k: v for k, v in a.items() if k != "_span"} == {k: v for k, v in b.items() if k != "_span"}
    assert reuse._KEPT is None                               # dropped at the end of the batch


def _holed_orders():
    """Three prepared orders of different lengths, one with bad pixels inside its good span (invented)."""
    from dataclasses import replace

    a, b, c = _prepared(11), _prepared(12, lam0=5008.0, index=1), _prepared(13, n=300, lam0=5003.0, index=2)
    good = a.good.copy()
    good[[57, 58, 203]] = False
    a = replace(a, good=good, weight=np.where(good, a.weight, 0.0), flux=np.where(good, a.flux, 0.0))
    return [a, b, c]


@pytest.mark.parametrize("width", [300.0, 1000.0, 2000.0])
def test_compiled_ccf_equals_the_numpy_form_to_the_last_bit(width):
    pytest.importorskip("numba")
    from lineshift.measure.ccf import correlate
    from lineshift.model import LineMask

    orders = _holed_orders()
    # lines inside one order, in two overlapping ones, near the ends (boxes leave the order) and outside
    mask = LineMask(np.array([4999.0, 5000.4, 5001.0, 5002.5, 5003.0, 5004.1, 5008.1, 5009.2, 5011.9, 5013.0,
                              5015.9, 5020.0]), np.linspace(0.2, 1.0, 12))
    v = np.linspace(-10e3, 10e3, 21)
    for kwargs in ({}, {"keep_lines": True, "clear_of_bad": True}, {"keep_lines": True, "clear_of_bad": (-3e3, 3e3)},
                   {"lines": np.array([1, 3, 7, 8])}):
        fast = correlate(orders, mask, v, width, compiled=True, **kwargs)
        plain = correlate(orders, mask, v, width, compiled=False, **kwargs)
        assert fast.n_cleared == plain.n_cleared and len(fast.terms) == len(plain.terms) > 0
        for tf, tp in zip(fast.terms, plain.terms, strict=True):
            np.testing.assert_array_equal(tf.lines, tp.lines)
            for name in ("edges_x", "num", "den", "line_num", "line_den"):
                if getattr(tp, name) is None:
                    assert getattr(tf, name) is None
                else:
                    np.testing.assert_array_equal(getattr(tf, name), getattr(tp, name), err_msg=name)
    # outside reference for both: the explicit overlap-fraction loop (test_ccf.py does the same)
    from lineshift.measure.ccf import reference_ccf

    np.testing.assert_allclose(correlate(orders, mask, v, width, compiled=True).ccf,
                               reference_ccf(orders, mask, v, width), rtol=1e-12)


@pytest.mark.parametrize("width", [300.0, 1000.0])
def test_compiled_error_propagation_equals_the_row_by_row_adjoint(width):
    pytest.importorskip("numba")
    from lineshift.measure.ccf import CorrelationData, correlate
    from lineshift.model import LineMask

    orders = _holed_orders()
    mask = LineMask(np.array([5001.0, 5002.5, 5003.0, 5004.1, 5009.2, 5011.9, 5013.0]), np.linspace(0.3, 1.0, 7))
    v = np.linspace(-10e3, 10e3, 21)
    data = correlate(orders, mask, v, width, compiled=True)
    assert data.compiled and len(data.terms) == 3
    rng = np.random.default_rng(8)
    sens = rng.normal(size=(4, v.size))
    own = rng.normal(size=(3, v.size))
    total, per_order = data.variances(sens, own)
    plain_total = sum(CorrelationData._term_variance_reference(t, sens / data.denominator) for t in data.terms)
    plain_own = [CorrelationData._term_variance_reference(t, own[k:k + 1] / t.den)[0] for k, t in enumerate(data.terms)]
    np.testing.assert_allclose(total, plain_total, rtol=1e-12)
    np.testing.assert_allclose(per_order, plain_own, rtol=1e-12)
    np.testing.assert_allclose(data.variance_of(sens[0]), plain_total[0], rtol=1e-12)


def test_all_orders_line_selection_equals_select_lines_order_by_order():
    from lineshift.measure.ccf import _inside, _Orders, select_lines
    from lineshift.model import LineMask

    orders = _holed_orders()
    mask = LineMask(np.linspace(4999.0, 5016.0, 60), np.ones(60))
    info = _Orders(orders, compiled=False)
    for clear in (False, True, (-2e3, 1e3)):
        inside = _inside(info, mask, -8e3, 9e3, 1000.0, clear, orders)
        for k, o in enumerate(orders):
            np.testing.assert_array_equal(np.flatnonzero(inside[k]),
                                          select_lines(o, mask, -8e3, 9e3, 1000.0, clear_of_bad=clear))
    held = _inside(info, mask, -8e3, 9e3, 1000.0, True, orders)[0].sum()
    assert held < select_lines(orders[0], mask, -8e3, 9e3, 1000.0).size   # the holes cost lines


def test_compiled_cumulative_sums_equal_numpy_cumsum_exactly():
    pytest.importorskip("numba")
    from lineshift.measure import kernels

    rng = np.random.default_rng(10)
    parts = [rng.normal(size=n) * 10.0 ** rng.uniform(-3, 6, n) for n in (5, 1000, 1)]
    estart = np.concatenate(([0], np.cumsum([p.size + 1 for p in parts])))
    expect = np.concatenate([np.concatenate(([0.0], np.cumsum(p))) for p in parts])
    np.testing.assert_array_equal(kernels.cumsums(np.concatenate(parts), estart), expect)


@pytest.mark.parametrize("width", [1, 3, 5, 7, 9, 15])
def test_running_minimum_by_doubling_equals_scipy_minimum_filter(width):
    from scipy.ndimage import minimum_filter1d

    from lineshift.measure.outliers import _running_min

    rng = np.random.default_rng(width)
    a = rng.normal(size=500)
    a[rng.random(500) < 0.05] = np.inf
    np.testing.assert_array_equal(_running_min(a, width), minimum_filter1d(a, width, mode="nearest"))


def test_flat_top_search_on_a_block_equals_each_row():
    from lineshift.measure.badpixels import clipped_pixels

    rng = np.random.default_rng(12)
    flux = np.round(rng.normal(1000.0, 30.0, (6, 400)))       # integer counts: ties are common
    flux[1, 100:106] = flux[1].max() + 5                       # a clipped top
    flux[2] = rng.normal(1000.0, 30.0, 400)                    # no tie at all
    flux[3, 50:53] = np.nan
    block = clipped_pixels(flux)
    for r in range(6):
        np.testing.assert_array_equal(block[r], clipped_pixels(flux[r]))
    assert block[1, 100:106].all()


def test_compiled_preparation_equals_the_numpy_form():
    # the same pixels; the values (whose continuum iterations and regressions sum in another order)
    # to rounding: rtol 1e-12 (from memory, a few eps times ~1000 terms); blazes given, refused, absent
    pytest.importorskip("numba")
    from lineshift.measure.prepare import _prepare_block, pixel_edges
    from lineshift.model import Order

    rng = np.random.default_rng(14)
    flux, var, _ = _orders(rng, rows=5, n=1200)
    wave = 5000.0 + 0.02 * np.arange(1200)
    blaze = 0.5 + np.sin(np.linspace(0.3, 2.8, 1200))
    orders = [Order(wave + 30.0 * k, flux[k], var[k], index=k, blaze=blaze if k % 2 else None) for k in range(5)]
    orders[3] = Order(orders[3].wave, np.full(1200, np.nan), var[3], index=3)       # nothing usable
    bad_blaze = blaze.copy()
    bad_blaze[600] = np.nan                  # at a good pixel: the order's blaze is not used
    orders[4] = Order(orders[4].wave, flux[4], var[4], index=4, blaze=bad_blaze)
    fast = _prepare_block(orders, 4, compiled=True)
    plain = _prepare_block(orders, 4, compiled=False)
    assert fast[3] is None and plain[3] is None and sum(p is not None for p in fast) == 4
    assert plain[4].good[600]                # the refused blaze's NaN sits at a usable pixel
    for a, b in zip(fast, plain, strict=True):
        if a is not None:
            for name in ("good", "edges"):
                np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
            for name in ("flux", "var", "weight", "continuum"):
                np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-12, atol=0, err_msg=name)
    np.testing.assert_array_equal(pixel_edges(np.vstack([wave, wave + 1])), [pixel_edges(wave), pixel_edges(wave + 1)])


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_compiled_pixel_screen_gives_the_same_pixels(seed):
    # the one compiled pass of the screening against bad_pixels and find_spikes' array steps: the
    # same bad pixels and spikes exactly, on hostile orders (spikes at the ends, NaN runs, zero
    # variance) with non-positive counts and a clipped flat top added
    pytest.importorskip("numba")
    from lineshift.measure import kernels
    from lineshift.measure.badpixels import bad_pixels, screened_bad_pixels

    rng = np.random.default_rng(seed)
    flux, var, _ = _orders(rng, rows=6, n=1500)
    flux[4, 200:205] = -3.0                              # non-positive counts
    top = np.nanmax(flux[5]) * 1.01
    flux[5, 700:706] = top                               # a saturated run clipped to one value
    flux[5, 900:903] = top
    base_bad, bad, tie, cand = kernels.pixel_screen(flux, var, 3, 8.0, 0.5)
    assert tie[5] and bad.shape == flux.shape
    np.testing.assert_array_equal(screened_bad_pixels(flux, bad.copy(), tie), bad_pixels(flux, var))
    np.testing.assert_array_equal(find_spikes(flux, var, screened=(base_bad, cand)), find_spikes(flux, var))
    assert find_spikes(flux, var).sum() > 20             # the check has spikes to find


def test_template_run_with_kept_contributions_equals_recomputing_them(sample_set, monkeypatch):
    # the co-add keeps each input's screening and contribution for its leave-one-out fit; recomputed
    # (nothing kept) they are the same numbers, so every row is the same
    import os

    from lineshift.io.linelists import read_mask
    from lineshift.measure import template_engine
    from lineshift.run.pipeline import MeasureSettings, measure_files

    directory, mask, rows = sample_set
    paths = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    settings = MeasureSettings(method="template", telluric_bands=False)
    kept = measure_files(paths, read_mask(mask), settings, workers=1)
    monkeypatch.setattr(template_engine, "KEEP_BYTES", 0)
    recomputed = measure_files(paths, read_mask(mask), settings, workers=1)
    assert [r["status"] for r in kept] == ["ok"] * len(paths)
    for a, b in zip(kept, recomputed, strict=True):
        assert {k: v for k, v in a.items() if k != "_span"} == {k: v for k, v in b.items() if k != "_span"}


def test_template_fit_by_moments_equals_the_jacobian_form(monkeypatch):
    # the fit's normal equations from moment sums against the plain form that builds the Jacobian:
    # the same least-squares problem, so velocities agree far below their errors
    from lineshift import sim
    from lineshift.measure import template_engine as te
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.prepare import prepare_spectrum
    from lineshift.model import C_MS

    ins = sim.Instrument("fk-echelle", "multi-order", 110_000, 6, 2048, 5000.0, snr=120)
    rng = np.random.default_rng(11)
    exps = [sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61000.8, rng, rv_override=sim.DEMO_STAR.gamma
                        + rng.uniform(-3000, 3000), berv_bjd=(rng.uniform(-20000, 20000), 0.0)) for _ in range(4)]
    prepared = [prepare_spectrum(sim.to_spectrum(e)) for e in exps]
    factors = [(1 + e.truth["berv"] / C_MS) / (1 + e.truth["rv_true"] / C_MS) for e in exps]
    w = ins.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, ins.pixel_velocity / 2), per_order=True,
                              levelled=True)
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p, f)
    state = te.TemplateState.from_accumulator(acc, 300.0)
    settings = te.TemplateSettings()
    start = -np.log(factors[0]) + 2e-8     # 6 m/s off: the iterations have work to do
    # the NumPy forms both (the compiled one: tests/test_fit_kernels.py)
    fast = te.measure_template(prepared[0], state, settings, delta0=start, factor=factors[0], compiled=False)
    monkeypatch.setattr(te, "_fit_block", te._fit_block_reference)
    plain = te.measure_template(prepared[0], state, settings, delta0=start, factor=factors[0], compiled=False)
    assert abs(fast.rv - plain.rv) < 1e-6 * plain.rv_err
    assert fast.rv_err == pytest.approx(plain.rv_err, rel=1e-9)
    for a, b in zip(fast.orders, plain.orders, strict=True):
        assert a["flag"] == b["flag"]
        assert abs(a["rv"] - b["rv"]) < 1e-6 * b["rv_err"]
        assert a["chi2_red"] == pytest.approx(b["chi2_red"], rel=1e-9)
    for k, bins in plain.residuals.items():
        for x, y in zip(fast.residuals[k], bins, strict=True):
            np.testing.assert_allclose(x, y, rtol=1e-6, atol=1e-9)   # relative residuals are ~1e-2


def test_bspline_value_equals_the_plain_form():
    # the value alone, its power-basis coefficients formed per interval, against the plain gather and
    # 4x4 basis product (coadd.bspline_reference), ends included (clipped intervals extrapolate)
    from scipy.ndimage import spline_filter1d

    from lineshift.measure.coadd import bspline, bspline_reference, bspline_value

    rng = np.random.default_rng(12)
    coef = spline_filter1d(rng.normal(size=300), order=3, mode="mirror")
    x = np.concatenate([rng.uniform(0.0, 299.0, 4000), [0.0, 0.5, 298.5, 299.0]])
    np.testing.assert_allclose(bspline_value(coef, x), bspline_reference(coef, x)[0], rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(bspline_value(coef, x), bspline(coef, x)[0])


@pytest.mark.parametrize("smooth", [0.0, 400.0])
def test_template_fit_arrays_equal_the_three_steps(smooth):
    # one segment at a time, the template without a spectrum, smoothed and prefiltered: the same
    # numbers as without(), smoothed() and prefilter() over the whole template
    from lineshift import sim
    from lineshift.measure import template_engine as te
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.prepare import prepare_spectrum
    from lineshift.model import C_MS

    ins = sim.Instrument("fk-echelle", "multi-order", 110_000, 4, 1024, 5000.0, snr=80)
    rng = np.random.default_rng(13)
    exps = [sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61000.8, rng, rv_override=sim.DEMO_STAR.gamma,
                        berv_bjd=(rng.uniform(-20000, 20000), 0.0)) for _ in range(3)]
    prepared = [prepare_spectrum(sim.to_spectrum(e)) for e in exps]
    factors = [(1 + e.truth["berv"] / C_MS) / (1 + e.truth["rv_true"] / C_MS) for e in exps]
    w = ins.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, ins.pixel_velocity / 2), per_order=True,
                              levelled=True)
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p, f)
    state = te.TemplateState.from_accumulator(acc, smooth)
    state.pixel_step = ins.pixel_velocity
    for factor in (factors[0], None):
        flux, var, ok = state.smoothed(*state.without(prepared[0], factor), compiled=False)
        ok = ok & np.isfinite(var)
        coef, var_t, ok_t = state.fit_arrays(prepared[0], factor, compiled=False)   # compiled: test_fit_kernels.py
        np.testing.assert_array_equal(ok_t, ok)
        np.testing.assert_array_equal(var_t, np.where(ok, var, 0.0))
        np.testing.assert_array_equal(coef, state.prefilter(flux, compiled=False))


def test_kept_screening_of_a_wide_hit_equals_recomputing_it(tmp_path, monkeypatch):
    # a 6-pixel double hit (wider than the spike finder's runs) is left out by the co-add's screening;
    # what the co-add keeps for the fits (the changed order's mask and recomputed contribution, the
    # unscreened contributions of the others) gives the rows that recomputing everything gives
    from lineshift import sim
    from lineshift.measure import coadd, template_engine
    from lineshift.model import LineMask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    ins = sim.Instrument("fk-echelle", "multi-order", 110_000, 4, 1024, 5000.0, snr=120)
    rng = np.random.default_rng(14)
    paths = []
    for k in range(4):
        exp = sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61010.8 + 40.0 * k, rng)
        if k == 1:
            exp.flux[2, 500:506] *= 4.0
        paths.append(sim.write_observation(exp, str(tmp_path / f"s{k}.fits")))
    lam, depth = sim.DEMO_STAR.line_list()
    w = ins.wavelengths()
    keep = (depth >= 0.05) & (lam > w.min()) & (lam < w.max())
    mask = LineMask(lam[keep], depth[keep], (), "test")
    settings = MeasureSettings(method="template", telluric_bands=False)
    hits = []
    screen = coadd.reject_above

    def counted(*args, **kwargs):
        out = screen(*args, **kwargs)
        hits.append(sum(a is not b for a, b in zip(args[0], out, strict=True)))
        return out

    monkeypatch.setattr(template_engine, "reject_above", counted)
    kept = measure_files(paths, mask, settings, workers=1)
    assert sum(hits) >= 2                       # the hit's order changed in both passes' co-adds
    monkeypatch.setattr(template_engine, "KEEP_BYTES", 0)
    recomputed = measure_files(paths, mask, settings, workers=1)
    assert [r["status"] for r in kept] == ["ok"] * len(paths)
    for a, b in zip(kept, recomputed, strict=True):
        assert {k: v for k, v in a.items() if k != "_span"} == {k: v for k, v in b.items() if k != "_span"}


@pytest.mark.parametrize("seed", [21, 22])
def test_compiled_continuum_iterations_equal_the_array_form(seed):
    # the continuum's clipping iterations compiled (normal equations updated by the pixels that change)
    # against the array form: the same pixels kept; coefficients and scatter to rounding (rtol 1e-12,
    # from memory: a few eps times the ~1000 terms summed in another order)
    pytest.importorskip("numba")
    from lineshift.measure.prepare import _continuum_core

    rng = np.random.default_rng(seed)
    flux, var, _ = _orders(rng, rows=6, n=4096)
    good = np.isfinite(flux) & (var > 0)
    good[4, :] = False                                   # an order without a usable pixel
    good[5, 40:] = False                                 # and one with too few for the clipped fit
    fast = _continuum_core(flux, var, good, 4, 2.0, 3.0, 10, compiled=True)
    plain = _continuum_core(flux, var, good, 4, 2.0, 3.0, 10, compiled=False)
    np.testing.assert_array_equal(fast[1], plain[1])
    assert fast[2] == plain[2] == 4
    # the polynomials where they rest on data (coefficients of an order fitted on a short stretch are
    # ill-conditioned: their rounding differences say nothing about the continuum)
    design = np.polynomial.legendre.legvander(np.linspace(-1.0, 1.0, 4096), 4)[::4]
    at = good[:, ::4]
    cf, cp = fast[0] @ design.T, plain[0] @ design.T
    np.testing.assert_allclose(cf[:4][at[:4]], cp[:4][at[:4]], rtol=1e-12, atol=0)
    # the short stretch (10 points for 5 coefficients): rounding grows with the condition number
    np.testing.assert_allclose(cf[5][at[5]], cp[5][at[5]], rtol=1e-8, atol=0)
    np.testing.assert_allclose(fast[3][:4], plain[3][:4], rtol=1e-12, atol=0)
    np.testing.assert_allclose(fast[3][5], plain[3][5], rtol=1e-6, atol=0)   # its residuals' square: twice the digits
    assert 0 < plain[1].sum() < good[:, ::4].sum()        # clipping did remove pixels
    np.testing.assert_array_equal(fast[0][4], 0.0)


def test_block_rows_only_for_consecutive_orders_that_still_hold_the_block():
    # numpy.concatenate of the orders' own arrays is the reference; anything that is not consecutive
    # rows of the block (a gap, another order, an order made again with a new array, one that crossed
    # a process) must be left to the loop (None)
    import pickle
    from dataclasses import replace

    from lineshift.measure.prepare import _prepare_block, block_rows, joined
    from lineshift.model import Order

    rng = np.random.default_rng(22)
    flux, var, _ = _orders(rng, rows=4, n=800)
    wave = 5000.0 + 0.02 * np.arange(800)
    orders = _prepare_block([Order(wave + 20.0 * k, flux[k], var[k], index=k) for k in range(4)], 4)
    for name in ("wave", "edges", "flux", "var", "weight", "good", "continuum"):
        np.testing.assert_array_equal(joined(orders, name), np.concatenate([getattr(o, name) for o in orders]))
        np.testing.assert_array_equal(block_rows(orders[1:3], name), np.vstack([getattr(o, name) for o in orders[1:3]]))
    assert block_rows([orders[0], orders[2]], "flux") is None             # a gap
    assert block_rows([orders[1], orders[0]], "flux") is None             # out of order
    assert block_rows([orders[0], replace(orders[1], flux=orders[1].flux * 2)], "flux") is None
    assert block_rows([orders[0], replace(orders[1], flux=orders[1].flux * 2)], "var") is not None
    other = _prepare_block([Order(wave, flux[1], var[1], index=1)], 4)
    assert block_rows([orders[0], other[0]], "flux") is None              # another block
    sent = pickle.loads(pickle.dumps(orders))
    assert block_rows(sent, "flux") is None
    np.testing.assert_array_equal(joined(sent, "flux"), joined(orders, "flux"))


def test_compiled_snr_sample_and_pixel_width_equal_the_per_order_forms(monkeypatch):
    # the per-order loops (np.flatnonzero(good)[::4], np.concatenate) are the plain forms
    pytest.importorskip("numba")
    from lineshift.measure import kernels
    from lineshift.measure.mask_engine import _good_snr, pixel_velocity_width
    from lineshift.measure.prepare import _prepare_block
    from lineshift.model import Order

    rng = np.random.default_rng(21)
    flux, var, _ = _orders(rng, rows=5, n=1200)
    wave = np.vstack([5000.0 + 30.0 * k + 0.02 * np.arange(1200) * (1 + 1e-3 * k) for k in range(5)])
    orders = _prepare_block([Order(wave[k], flux[k], var[k], index=k) for k in range(5)], 4)
    from lineshift.measure.prepare import block_rows

    assert all(block_rows(orders, a) is not None for a in ("flux", "var", "good", "edges", "wave"))
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    fast_snr, fast_width = _good_snr(orders), pixel_velocity_width(orders)
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    copies = [type(o)(o.wave.copy(), o.edges.copy(), o.flux.copy(), o.var.copy(), o.weight, o.good.copy(), o.index)
              for o in orders]                                   # no longer rows of one block
    np.testing.assert_array_equal(fast_snr, _good_snr(copies))
    assert fast_width == pixel_velocity_width(copies)
    assert kernels.good_snr(np.ones((1, 9)), np.ones((1, 9)), np.ones((1, 9), dtype=bool), 4).size == 3


@pytest.mark.parametrize("compiled", [True, False])
def test_rejected_pixel_count_of_the_blocks_equals_counting_against_the_file(compiled):
    # the count the output's n_rejected_pixels reports, against the plain count over the file's arrays
    if compiled:
        pytest.importorskip("numba")
    from lineshift.measure.prepare import _prepare_block, rejected_pixels
    from lineshift.model import Order

    rng = np.random.default_rng(23)
    flux, var, _ = _orders(rng, rows=5, n=900)
    raw = [Order(5000.0 + 20.0 * k + 0.02 * np.arange(900), flux[k], var[k], index=k) for k in range(5)]
    orders = [o for o in _prepare_block(raw, 4, compiled=compiled) if o is not None]
    plain = 0
    for p in orders:
        o = raw[p.index]
        plain += int(np.count_nonzero(np.isfinite(o.flux) & np.isfinite(o.var) & (o.var > 0) & ~p.good))
    assert plain > 50 and rejected_pixels(orders) == plain


@pytest.mark.parametrize("compiled", [True, False])
def test_ccf_values_alone_equal_the_full_correlation(compiled):
    # the search's short form against the full result's ccf, to the last bit (and no order: empty)
    if compiled:
        pytest.importorskip("numba")
    from lineshift.measure.ccf import correlate
    from lineshift.model import LineMask

    orders = _holed_orders()
    mask = LineMask(np.array([4999.0, 5000.4, 5001.0, 5002.5, 5003.0, 5004.1, 5008.1, 5009.2, 5011.9]),
                    np.linspace(0.2, 1.0, 9))
    v = np.linspace(-10e3, 10e3, 41)
    for lines in (None, np.array([1, 3, 7])):
        full = correlate(orders, mask, v, 500.0, lines=lines, compiled=compiled)
        short = correlate(orders, mask, v, 500.0, lines=lines, compiled=compiled, values_only=True)
        assert short.n_orders == len(full.terms) > 0
        np.testing.assert_array_equal(short.ccf, full.ccf)
    far = LineMask(np.array([7000.0]), np.array([1.0]))
    assert correlate(orders, far, v, 500.0, compiled=compiled, values_only=True).n_orders == 0


def test_line_pulls_equal_the_gradient_of_every_line():
    # the plain form: np.gradient of each line's own CCF, weighted, over the summed denominator, times
    # the fit's gain on the centre (what line_moments computed before the transpose)
    from lineshift.measure.ccf import correlate
    from lineshift.measure.recentre import line_moments
    from lineshift.model import LineMask

    orders = _holed_orders()
    mask = LineMask(np.array([5001.0, 5002.5, 5003.0, 5004.1, 5009.2, 5011.9]), np.linspace(0.3, 1.0, 6))
    v = np.linspace(-10e3, 10e3, 41)
    data = correlate(orders, mask, v, 500.0, keep_lines=True)
    gain = np.random.default_rng(3).normal(size=v.size)
    mom = line_moments(data, 0.0, 3000.0, gain)
    num = np.concatenate([t.line_num for t in data.terms])
    w = np.concatenate([t.weights for t in data.terms])
    den = np.concatenate([t.line_den for t in data.terms])
    lines = np.concatenate([t.lines for t in data.terms])
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = np.all(np.isfinite(num / den) & (den > 0), axis=1)       # the rows line_moments uses
    plain = -(np.gradient(num, v, axis=1) * w[:, None] / data.denominator) @ gain
    expect = np.array([plain[(lines == u) & ok].sum() for u in mom.lines])
    np.testing.assert_allclose(mom.a, expect, rtol=1e-10, atol=1e-12 * np.abs(expect).max())


def test_stacked_rows_are_vstack_and_a_view_only_of_rows_end_to_end():
    # numpy.vstack is the reference; a view only when the arrays lie end to end in one buffer, in order
    from lineshift.measure.prepare import _stacked

    a = np.arange(24.0).reshape(4, 6)
    rows = list(a)
    got = _stacked(rows)
    np.testing.assert_array_equal(got, np.vstack(rows))
    assert np.shares_memory(got, a) and not got.flags.writeable
    assert np.shares_memory(_stacked(rows[1:3]), a)
    for other in ([a[0], a[1], a[3], a[2]], [a[0], a[2]], [a[0].copy(), a[1], a[2], a[3]]):
        out = _stacked(other)
        np.testing.assert_array_equal(out, np.vstack(other))
        assert not np.shares_memory(out, a)
