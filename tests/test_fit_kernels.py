"""The template engine's compiled kernels (:mod:`lineshift.measure.fit_kernels`) against scipy and
against the NumPy forms kept beside them in :mod:`lineshift.measure.template_engine`.

The Gaussian smoothing and the B-spline prefilter are checked against ``scipy.ndimage`` (an
outside reference library); the template arrays, the fits and the results of a whole fit against
the NumPy forms, on invented spectra of the package's simulator.
"""

import numpy as np
import pytest
from scipy.ndimage import gaussian_filter1d, spline_filter1d

from lineshift.measure import fit_kernels as fk

pytest.importorskip("numba")


@pytest.mark.parametrize("n", [1, 2, 3, 4, 7, 100, 8195])
def test_prefilter_equals_scipy_spline_filter(n):
    # outside reference: scipy.ndimage.spline_filter1d(order=3, mode="mirror") (the same recursion
    # of Unser, Aldroubi & Eden 1991, started as for a mirrored signal): equal to the last bit today
    rng = np.random.default_rng(n)
    values = rng.normal(1.0, 0.3, n)
    np.testing.assert_allclose(fk.prefilter(values), spline_filter1d(values, order=3, mode="mirror"),
                               rtol=1e-13, atol=1e-15)


def test_prefilter_of_segments_interleaved_equals_each_alone():
    # segments of one length run four at a time with their recursions interleaved; the rest alone:
    # each against scipy on its own (outside reference), in any order of the segment table
    rng = np.random.default_rng(21)
    lengths = [300, 300, 17, 300, 300, 300, 1, 17, 2, 300]
    offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    segments = np.array([[k, 0, o, n] for k, (o, n) in enumerate(zip(offsets, lengths, strict=True))])[::-1]
    values = rng.normal(1.0, 0.3, sum(lengths))
    coef = values.copy()
    fk.prefilter_segments(coef, segments)
    for o, n in zip(offsets, lengths, strict=True):
        np.testing.assert_allclose(coef[o:o + n], spline_filter1d(values[o:o + n], order=3, mode="mirror"),
                                   rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("sigma", [0.3, 0.53, 0.75, 1.0, 2.3, 10.0])   # radii 1, 2, 3, 4, 9, 40
@pytest.mark.parametrize("n", [5, 600])
def test_gaussian_smoothing_equals_scipy(sigma, n):
    # outside reference: scipy.ndimage.gaussian_filter1d(mode="constant"), its kernel truncated at
    # 4 sigma; zeros and runs of zeros in the input (the unusable points of a template), a kernel
    # wider than the array (n = 5, sigma = 10): equal to the last bit today
    rng = np.random.default_rng(int(10 * sigma) + n)
    values = rng.normal(1.0, 0.2, n)
    values[rng.uniform(size=n) < 0.1] = 0.0
    values[n // 3:n // 3 + 4] = 0.0
    np.testing.assert_allclose(fk.smooth_constant(values, sigma), gaussian_filter1d(values, sigma, mode="constant"),
                               rtol=1e-13, atol=1e-16)
    assert fk.gaussian_weights(sigma).size == 2 * int(4 * sigma + 0.5) + 1


def test_monotone_median_equals_numpy_median():
    # np.median (outside reference: NumPy) of monotone arrays, odd and even sizes, either direction;
    # NaN (so the caller takes np.median) where the array is not monotone or holds NaN
    rng = np.random.default_rng(22)
    for n in (1, 2, 3, 4096, 4097):
        w = np.sort(rng.uniform(4000.0, 7000.0, n))
        assert fk.monotone_median(w) == np.median(w)
        assert fk.monotone_median(w[::-1].copy()) == np.median(w)
    w = np.sort(rng.uniform(size=50))
    w[[10, 11]] = w[[11, 10]]
    assert np.isnan(fk.monotone_median(w))
    w[10] = np.nan
    assert np.isnan(fk.monotone_median(w))
    assert np.isnan(fk.monotone_median(np.zeros(0)))


def test_the_gate_follows_the_environment(monkeypatch):
    # LINESHIFT_JIT=0: never; 1: always (the rule of kernels.compiled)
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    assert fk.compiled() is None
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    assert fk.compiled() is not None


def _setup(n_orders=6, n_pix=2048, per_order=True, seed=11):
    """Four invented spectra of the demo star (simulator), prepared, and their co-added template."""
    from lineshift import sim
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.prepare import prepare_spectrum
    from lineshift.model import C_MS

    ins = sim.Instrument("fk-echelle", "multi-order", 110_000, n_orders, n_pix, 5000.0, snr=120)
    rng = np.random.default_rng(seed)
    exps = [sim.observe(sim.DEMO_STAR, ins, sim.DEMO_SITE, 61000.8, rng, rv_override=sim.DEMO_STAR.gamma
                        + rng.uniform(-3000, 3000), berv_bjd=(rng.uniform(-20000, 20000), 0.0)) for _ in range(4)]
    prepared = [prepare_spectrum(sim.to_spectrum(e)) for e in exps]
    factors = [(1 + e.truth["berv"] / C_MS) / (1 + e.truth["rv_true"] / C_MS) for e in exps]
    w = ins.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, ins.pixel_velocity / 2), per_order=per_order,
                              levelled=True)
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p, f)
    return ins, prepared, factors, acc


@pytest.mark.parametrize("per_order", [True, False])
@pytest.mark.parametrize("smooth", [0.0, 400.0])
def test_template_arrays_compiled_equal_the_numpy_form(smooth, per_order):
    # each segment in one compiled pass (own contribution off, flux, variance, Gaussian, prefilter)
    # against the array steps of fit_arrays; one template for all orders (per_order=False) has
    # several contributions of the spectrum in its one segment.  The same arithmetic in the same
    # order: equal to the last bit today, required to 1e-13
    from lineshift.measure.template_engine import TemplateState

    ins, prepared, factors, acc = _setup(n_orders=4, n_pix=1024, per_order=per_order, seed=13)
    state = TemplateState.from_accumulator(acc, smooth)
    state.pixel_step = ins.pixel_velocity
    for factor in (factors[0], None):
        coef, var, ok = state.fit_arrays(prepared[0], factor, compiled=True)
        coef_p, var_p, ok_p = state.fit_arrays(prepared[0], factor, compiled=False)
        np.testing.assert_array_equal(ok, ok_p)
        np.testing.assert_allclose(coef, coef_p, rtol=1e-13, atol=1e-15)
        np.testing.assert_allclose(var, var_p, rtol=1e-13, atol=0)
        assert ok.sum() > 4000          # most of what the orders cover is usable
        # the smoothing and the prefilter on their own (the lines engine's steps)
        loo = state.without(prepared[0], factor)
        fast, plain = state.smoothed(*loo, compiled=True), state.smoothed(*loo, compiled=False)
        np.testing.assert_array_equal(fast[2], plain[2])
        for a, b in zip(fast[:2], plain[:2], strict=True):
            np.testing.assert_allclose(a, b, rtol=1e-13, atol=1e-15)
        np.testing.assert_allclose(state.prefilter(plain[0], compiled=True), state.prefilter(plain[0], compiled=False),
                                   rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize(("degree", "block_pixels"), [(3, 16384), (3, 8192), (2, 16384), (4, 16384)])
@pytest.mark.parametrize("smooth", [0.0, 300.0])
def test_template_fit_compiled_equals_the_numpy_forms(monkeypatch, smooth, degree, block_pixels):
    # the compiled Gauss-Newton (sequential moment sums; 5 x 5 systems by elimination) against the
    # NumPy form (BLAS products, LAPACK) and the Jacobian form: the same least-squares problem with
    # the sums in another order, so the velocities agree to ~1e-12 of their errors (measured today:
    # 0 to 2e-12 m/s on errors of 5 m/s); 6 orders in one block, or in blocks of 4 and 2 (the
    # iterations stop per block); degree 4 takes the NumPy form
    from lineshift.measure import template_engine as te

    monkeypatch.setattr(te, "BLOCK_PIXELS", block_pixels)
    ins, prepared, factors, acc = _setup()
    state = te.TemplateState.from_accumulator(acc, smooth)
    state.pixel_step = ins.pixel_velocity
    settings = te.TemplateSettings(poly_degree=degree)
    start = -np.log(factors[0]) + 2e-8     # 6 m/s off: the iterations have work to do
    fast = te.measure_template(prepared[0], state, settings, delta0=start, factor=factors[0], compiled=True)
    plain = te.measure_template(prepared[0], state, settings, delta0=start, factor=factors[0], compiled=False)
    monkeypatch.setattr(te, "_fit_block", te._fit_block_reference)
    ref = te.measure_template(prepared[0], state, settings, delta0=start, factor=factors[0], compiled=False)
    for other, tol in ((plain, 1e-9), (ref, 1e-6)):
        assert abs(fast.rv - other.rv) < tol * other.rv_err
        assert fast.rv_err == pytest.approx(other.rv_err, rel=1e-9)
        assert fast.snr == other.snr and fast.n_orders == other.n_orders
        for a, b in zip(fast.orders, other.orders, strict=True):
            assert a["flag"] == b["flag"] and a["wavelength"] == b["wavelength"]
            assert abs(a["rv"] - b["rv"]) < tol * b["rv_err"]
            assert a["chi2_red"] == pytest.approx(b["chi2_red"], rel=1e-9)
        for k, bins in other.residuals.items():   # relative residuals are ~1e-2; cross terms sums of both signs
            for x, y in zip(fast.residuals[k], bins, strict=True):
                np.testing.assert_allclose(x, y, rtol=1e-6, atol=tol * 1e-3 * np.max(np.abs(y)))


def test_template_fit_compiled_orders_without_enough_pixels():
    # an order with fewer than 20 usable pixels has no fit in either form; the others are unchanged
    from dataclasses import replace

    from lineshift.measure import template_engine as te

    _ins, prepared, factors, acc = _setup()
    state = te.TemplateState.from_accumulator(acc, 0.0)
    orders = list(prepared[0])
    good = np.zeros_like(orders[2].good)
    good[500:515] = True
    orders[2] = replace(orders[2], good=good)
    settings = te.TemplateSettings()
    fast = te.measure_template(orders, state, settings, delta0=-np.log(factors[0]), factor=None, compiled=True)
    plain = te.measure_template(orders, state, settings, delta0=-np.log(factors[0]), factor=None, compiled=False)
    flags = {o["order"]: o["flag"] for o in fast.orders}
    assert flags[int(orders[2].index)] == "no fit"
    assert [o["flag"] for o in fast.orders] == [o["flag"] for o in plain.orders]
    assert abs(fast.rv - plain.rv) < 1e-9 * plain.rv_err


def test_template_fit_compiled_singular_system_fails_as_the_numpy_form():
    # a template of zeros: every system is singular; the compiled form hands the block to the NumPy
    # form, which fails the way it always has (LAPACK reports a singular matrix)
    from lineshift.measure import template_engine as te

    _ins, prepared, factors, acc = _setup(n_orders=2, n_pix=512)
    state = te.TemplateState.from_accumulator(acc, 0.0)
    block = list(prepared[0])
    coef, var_t, ok_t = np.zeros(state.sw.size), np.full(state.sw.size, 1e-4), np.ones(state.sw.size, bool)
    settings = te.TemplateSettings()
    with pytest.raises(np.linalg.LinAlgError):
        te._fit_block(block, coef, var_t, ok_t, state, settings, -np.log(factors[0]))
    with pytest.raises(np.linalg.LinAlgError):
        list(te._fit_compiled(block, coef, var_t, ok_t, state, settings, -np.log(factors[0])))


def test_template_batch_compiled_equals_the_numpy_forms(sample_set, monkeypatch):
    # a whole template run (co-add, two fit passes, response between them) with every compiled kernel
    # (LINESHIFT_JIT=1: also the mask engine's, tests/test_fast_kernels.py) against the NumPy forms
    # (LINESHIFT_JIT=0): the same flags, velocities far inside the 0.01 of their errors the kernels
    # may move them (measured on 16 echelle files of 36 x 4096 pixels: 1.5e-6 of the errors, per
    # order 1.3e-5, as much as the mask engine's kernels alone move them: the fits start from the
    # mask pass and stop within 1e-9 of delta)
    import os

    from lineshift.io.linelists import read_mask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    directory, mask, rows = sample_set
    paths = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    settings = MeasureSettings(method="template")
    out = {}
    for mode in ("0", "1"):
        monkeypatch.setenv("LINESHIFT_JIT", mode)
        out[mode] = measure_files(paths, read_mask(mask), settings, workers=1)
    for a, b in zip(out["1"], out["0"], strict=True):
        assert a["status"] == b["status"] == "ok"
        assert abs(a["rv"] - b["rv"]) < 1e-4 * b["rv_err"]
        assert a["rv_err"] == pytest.approx(b["rv_err"], rel=1e-6)
        assert a["snr"] == pytest.approx(b["snr"], rel=1e-12) and a["n_orders"] == b["n_orders"]
        for x, y in zip(a["_orders"], b["_orders"], strict=True):
            assert x["flag"] == y["flag"]
            if np.isfinite(y["rv"]):
                assert abs(x["rv"] - y["rv"]) < 1e-3 * y["rv_err"]


def test_work_arrays_are_per_thread_and_bounded():
    # one buffer per name in each thread, grown to the largest shape asked for: another shape is a
    # view of it (C-contiguous), another thread has its own
    import threading

    a = fk.scratch("test_buffer", (4, 100))
    b = fk.scratch("test_buffer", (3, 50))
    assert b.flags.c_contiguous and b.shape == (3, 50) and np.shares_memory(a, b)
    c = fk.scratch("test_buffer", (5, 100))
    assert c.shape == (5, 100) and not np.shares_memory(a, c)
    other = []
    t = threading.Thread(target=lambda: other.append(fk.scratch("test_buffer", (5, 100))))
    t.start()
    t.join()
    assert not np.shares_memory(other[0], c)
    assert fk.scratch("test_mask", (10,), bool).dtype == bool


def test_template_fit_compiled_orders_of_two_lengths():
    # orders of different lengths are fitted in groups of one length; a length that is not a
    # multiple of the residual bins' width has a short last bin (response.bin_residuals pads it)
    from dataclasses import replace

    from lineshift.measure import template_engine as te

    ins, prepared, factors, acc = _setup()
    state = te.TemplateState.from_accumulator(acc, 300.0)
    state.pixel_step = ins.pixel_velocity
    orders = list(prepared[0])
    for k in (1, 4):   # 1500 pixels of the middle of the order (1500 = 93 x 16 + 12)
        o = orders[k]
        orders[k] = replace(o, wave=o.wave[300:1800], edges=o.edges[300:1801], flux=o.flux[300:1800],
                            var=o.var[300:1800], weight=o.weight[300:1800], good=o.good[300:1800],
                            continuum=None if o.continuum is None else o.continuum[300:1800])
    settings = te.TemplateSettings()
    start = -np.log(factors[0]) + 2e-8
    fast = te.measure_template(orders, state, settings, delta0=start, factor=None, compiled=True)
    plain = te.measure_template(orders, state, settings, delta0=start, factor=None, compiled=False)
    assert abs(fast.rv - plain.rv) < 1e-9 * plain.rv_err
    for a, b in zip(fast.orders, plain.orders, strict=True):
        assert a["flag"] == b["flag"] and a["wavelength"] == b["wavelength"]
        assert abs(a["rv"] - b["rv"]) < 1e-9 * b["rv_err"]
    assert fast.residuals[int(orders[1].index)][0].size == 94
    for k, bins in plain.residuals.items():
        for x, y in zip(fast.residuals[k], bins, strict=True):
            np.testing.assert_allclose(x, y, rtol=1e-6, atol=1e-12 * np.max(np.abs(y)))
