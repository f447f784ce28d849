"""The compiled co-add and response kernels (lineshift.measure.coadd_kernels) against the plain NumPy
forms kept beside their callers, on invented echelle-like orders (lines, photon noise, bad pixels in
runs and at the ends, telluric bands).

Where the compiled form does the same operations the results must be identical; the B-spline
prefilter is a recursion of its own (checked against scipy.ndimage.spline_filter1d), so values
through it agree to ~1e-15 relative, and the response's normal equations are summed in another
order (see coadd_kernels.response_equations).
"""

from dataclasses import replace

import numpy as np
import pytest
from scipy.ndimage import spline_filter1d

from lineshift.measure import coadd, coadd_kernels
from lineshift.measure.prepare import PreparedOrder

pytest.importorskip("numba")

N = 2048


def _orders(rng, k=5, n=N, scale=3e4):
    """Normalised orders of an invented star (the same lines every call) on a common continuum of
    ``scale`` counts, noise and bad pixels from ``rng``."""
    out = []
    x = np.arange(n, dtype=float)
    for i in range(k):
        wave = 5000.0 * (1 + 0.012 * i) * np.exp(x / (110000 * 2.3))
        model = np.ones(n)
        lines = np.random.default_rng(100 + i)
        for c, d in zip(lines.uniform(0, n, 30), lines.uniform(0.1, 0.8, 30), strict=True):
            model *= 1 - d * np.exp(-0.5 * ((x - c) / 2.1) ** 2)
        level = rng.uniform(0.5, 2.0)
        var = model * level / scale
        flux = rng.normal(model * level, np.sqrt(var))
        good = rng.random(n) > 0.004
        if i == 1:
            good[:3] = False            # bad first pixels
        if i == 2:
            good[-2:] = False           # bad last pixels and a long gap
            good[300:340] = False
        if i == 3:
            good[:] = True
        flux, var = np.where(good, flux, 0.0), np.where(good, var, 0.0)
        weight = np.where(good, 1 / np.where(good, var, 1.0), 0.0)
        out.append(PreparedOrder(wave, wave, flux, var, weight, good, i, np.full(n, scale)))
    return out


def _grid(orders):
    return coadd.log_grid(4990.0, max(o.wave[-1] for o in orders) * 1.001, 0.5 * coadd.C_MS / (110000 * 2.3))


BANDS = np.array([[5010.0, 5012.0], [5100.0, 5101.5], [5250.0, 5262.0]])   # invented telluric bands


def test_prefilter_equals_scipy_spline_filter():
    # reference library: scipy.ndimage.spline_filter1d (cubic, mirror ends)
    rng = np.random.default_rng(4)
    for n in (2, 3, 5, 17, 60, 4096):
        s = rng.normal(size=n) + 3.0
        ref = spline_filter1d(s, order=3, mode="mirror")
        np.testing.assert_allclose(coadd_kernels.prefilter(s), ref, rtol=0, atol=2e-15 * np.max(np.abs(ref)))


@pytest.mark.parametrize("levelled", [False, True])
def test_compiled_contributions_equal_the_plain_form(levelled, monkeypatch):
    rng = np.random.default_rng(5)
    orders = _orders(rng)
    acc = coadd.TemplateAccumulator(_grid(orders), bands=BANDS, per_order=True, levelled=levelled)
    for factor, band_factor in ((1.0, 1.0), (1.0 + 3e-5, 1.0 - 8e-5)):
        monkeypatch.setenv("LINESHIFT_JIT", "0")
        plain = acc.contribution_list(orders, factor, band_factor)
        monkeypatch.setenv("LINESHIFT_JIT", "1")
        fast = acc.contribution_list(orders, factor, band_factor)
        assert len(plain) == len(fast)
        for p, f in zip(plain, fast, strict=True):
            assert p[0] == f[0] and p[1] == f[1]
            np.testing.assert_array_equal(f[2], p[2])           # the weights: the same operations
            np.testing.assert_array_equal(f[5], p[5])           # the flags
            np.testing.assert_array_equal(f[2] == 0, p[2] == 0)  # bands, bad pixels: the same points
            if levelled:   # var / L^2 as var x (1 / L^2): an ulp apart
                np.testing.assert_allclose(f[4], p[4], rtol=1e-15, atol=0)
            else:
                np.testing.assert_array_equal(f[4], p[4])
            # through the prefilter: ~1e-16 of the values
            np.testing.assert_allclose(f[3], p[3], rtol=1e-14, atol=1e-14 * np.max(np.abs(p[3])))
        assert any((c[2] == 0).sum() > 100 for c in plain)      # the bands did take points out


def test_compiled_accumulation_equals_the_plain_sums(monkeypatch):
    rng = np.random.default_rng(6)
    grid = None
    results = {}
    for jit in ("0", "1"):
        monkeypatch.setenv("LINESHIFT_JIT", jit)
        rng = np.random.default_rng(6)
        batches = [_orders(rng) for _ in range(3)]
        grid = _grid(batches[0]) if grid is None else grid
        acc = coadd.TemplateAccumulator(grid, bands=BANDS, per_order=True, levelled=True)
        for b, f in zip(batches, (1.0, 1 + 2e-5, 1 - 4e-5), strict=True):
            acc.add(b, f)
        results[jit] = acc
    for k, seg in results["0"].segments.items():
        other = results["1"].segments[k]
        assert seg.start == other.start
        np.testing.assert_array_equal(seg.count, other.count)
        np.testing.assert_array_equal(seg.flagged, other.flagged)
        np.testing.assert_array_equal(seg.sw, other.sw)
        for name in ("swf", "sw2v"):
            a, b = getattr(seg, name), getattr(other, name)
            np.testing.assert_allclose(b, a, rtol=1e-14, atol=1e-14 * np.max(np.abs(a)))


def test_compiled_pixel_steps_equal_the_plain_form(monkeypatch):
    rng = np.random.default_rng(12)
    orders = _orders(rng) + _orders(rng, k=2, n=N + 1)    # an even number of steps, and two lengths
    orders = [replace(o, wave=o.wave * (1 + 3e-7 * rng.normal(size=o.wave.size))) for o in orders]
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    plain = coadd.pixel_steps(orders)
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    assert coadd.pixel_steps(orders) == plain


def test_compiled_common_continuum_equals_the_plain_form(monkeypatch):
    rng = np.random.default_rng(7)
    orders = _orders(rng)
    ref = {o.index: np.full(N, 2.5e4) * (1 + 0.1 * np.sin(np.arange(N) / 300)) for o in orders}
    ref[2] = ref[2].copy()
    ref[2][1000] = -1.0                 # a good pixel with a negative ratio: the order is left as it is
    ref[3] = ref[3][:-1]                # the wrong length: left as it is
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    plain = coadd.on_common_continuum(orders, ref)
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    fast = coadd.on_common_continuum(orders, ref)
    assert fast[2] is orders[2] and fast[3] is orders[3] and plain[2] is orders[2]
    for p, f in zip(plain, fast, strict=True):
        for name in ("flux", "var", "weight", "good", "continuum"):
            np.testing.assert_array_equal(getattr(f, name), getattr(p, name))


def test_compiled_screening_equals_the_plain_form(monkeypatch):
    rng = np.random.default_rng(8)
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    acc = coadd.TemplateAccumulator(_grid(_orders(np.random.default_rng(9))), per_order=True, levelled=True)
    for _ in range(4):                  # the star at rest in every input
        acc.add(_orders(rng), 1.0)
    keys = sorted(acc.segments)
    rows, parts, off = [], [], 0
    for k in keys:
        seg = acc.segments[k]
        rows.append((k, seg.start, off, seg.sw.size))
        off += seg.sw.size
        with np.errstate(invalid="ignore", divide="ignore"):
            parts.append(np.where(seg.sw > 0, seg.swf / seg.sw, np.nan))
    segments, ref = np.array(rows), np.concatenate(parts)
    orders = []
    for o in _orders(rng):              # the same star at the template's level, with hits of 1-4 pixels
        level = np.median(o.flux[o.good])
        flux = o.flux / level
        for start in rng.integers(5, N - 10, 12 if o.index != 4 else 0):     # order 4: none
            flux[start:start + rng.integers(1, 5)] += rng.uniform(0.05, 2.0)
        orders.append(PreparedOrder(o.wave, o.edges, flux, o.var / level**2, o.weight, o.good, o.index))
    lng0, dlng = float(acc.lng[0]), float(acc.lng[1] - acc.lng[0])
    for factor in (1.0, 1 + 1e-7):     # as co-added, and shifted by a fortieth of a pixel
        monkeypatch.setenv("LINESHIFT_JIT", "0")
        plain = coadd.reject_above(orders, ref, segments, lng0, dlng, factor)
        monkeypatch.setenv("LINESHIFT_JIT", "1")
        fast = coadd.reject_above(orders, ref, segments, lng0, dlng, factor)
        rejected = 0
        for o, p, f in zip(orders, plain, fast, strict=True):
            np.testing.assert_array_equal(f.good, p.good)
            assert (f is o) == (p is o)
            rejected += int((o.good & ~p.good).sum())
        assert rejected > 20            # hits were found
        assert fast[4] is orders[4] and plain[4] is orders[4]    # and none where there are none


def _binned_residuals(rng, n=2048, width=16, nspec=10, norders=3, shift_info=True):
    """Binned relative residuals of an invented response ln R seen by spectra at different shifts
    (as tests/test_template_response.py builds them: the mismatch from its definition), with noise."""
    x = np.arange(width / 2 - 0.5, n, width)
    d = 4e-6
    shifts = np.linspace(-20.0, 20.0, nspec)

    def ln_r(p):
        return 0.2 * np.tanh((p - 0.8 * n) / 70.0) + 0.05 * np.sin(p / 90.0)

    spectra = []
    for i, si in enumerate(shifts):
        bins = {}
        for o in range(norders):
            others = np.array([x + si - sj for j, sj in enumerate(shifts) if j != i])
            inside = (others >= x[0]) & (others <= x[-1])
            cnt = inside.sum(axis=0)
            mean = np.sum(np.exp(ln_r(others)) * inside, axis=0) / np.maximum(cnt, 1)
            rho = np.where(cnt > 0, ln_r(x) - np.log(np.where(cnt > 0, mean, 1.0)), 0.0) + rng.normal(0, 1e-3, x.size)
            W = np.where(cnt > 0, 1e6, 0.0) * rng.uniform(0.5, 1.5, x.size)
            W[rng.random(x.size) < 0.03] = 0.0
            u = np.log(5000.0 * (1 + 0.02 * o)) + d * x
            if shift_info and o % 2 == 0:
                bins[o] = (x, u, rho, W, rng.normal(0, 1e3, x.size), 1e9)
            else:
                bins[o] = (x, u, rho, W)
        spectra.append((si * d, bins))
    return spectra, {o: n for o in range(norders)}


@pytest.mark.parametrize("shift_info", [False, True])
def test_compiled_response_equals_the_plain_form(shift_info, monkeypatch):
    # the normal equations summed in another order: the responses agree to ~1e-15 of their size
    from lineshift.measure.response import detector_response

    spectra, sizes = _binned_residuals(np.random.default_rng(10), shift_info=shift_info)
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    plain = detector_response(spectra, sizes)
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    fast = detector_response(spectra, sizes)
    assert sorted(plain) == sorted(fast) == sorted(sizes)
    for k in plain:
        assert np.max(np.abs(plain[k])) > 0.05
        np.testing.assert_allclose(fast[k], plain[k], rtol=0, atol=1e-13 * np.max(np.abs(plain[k])))
    # one spread of shifts only: nothing can be seen, and neither form makes anything up
    same = [(0.0, b) for _, b in spectra]
    monkeypatch.setenv("LINESHIFT_JIT", "0")
    none_plain = detector_response(same, sizes)
    monkeypatch.setenv("LINESHIFT_JIT", "1")
    assert detector_response(same, sizes) == none_plain == {}


def test_inplace_median_equals_numpy_median():
    # reference: numpy.median (the middle value, or the mean of the middle two)
    rng = np.random.default_rng(11)
    for k in (1, 2, 3, 4, 7, 50, 51, 200, 4095, 4096):
        cases = [rng.normal(size=k), rng.integers(0, 4, k).astype(float),          # ties too
                 np.r_[rng.normal(size=k - 1), 1e300][:k], np.full(k, 2.5),         # an outlier, all equal
                 np.r_[rng.normal(size=k - 1), np.inf][:k]]                         # an infinity
        for values in cases:
            buf = np.concatenate([values, rng.normal(size=5)])
            assert coadd_kernels.median_of(buf, k) == np.median(values)


def test_template_run_with_compiled_kernels_gives_the_same_rows(tmp_path, monkeypatch):
    # the whole template engine (co-adds, screening, response between passes, fits) with every compiled
    # kernel against the NumPy forms: velocities and errors within 1e-6 of the error bars (the
    # acceptance bound is 0.01)
    import os

    from conftest import SMALL
    from lineshift import sim
    from lineshift.io.linelists import read_mask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    rows = sim.simulate_set(str(tmp_path), [(SMALL["multi-order"], 6)], seed=21)
    mask = str(tmp_path / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    paths = [os.path.join(str(tmp_path), r["file"]) for r in rows]
    settings = MeasureSettings(method="template")
    out = {}
    for jit in ("0", "1"):
        monkeypatch.setenv("LINESHIFT_JIT", jit)
        out[jit] = measure_files(paths, read_mask(mask), settings, workers=1)
    assert [r["status"] for r in out["0"]] == ["ok"] * len(paths)
    for a, b in zip(out["0"], out["1"], strict=True):
        assert b["status"] == "ok"
        assert abs(a["rv"] - b["rv"]) < 1e-6 * a["rv_err"]
        assert b["rv_err"] == pytest.approx(a["rv_err"], rel=1e-6)


def test_median_bin_step_equals_numpy():
    # reference: numpy.median of numpy.diff, per spectrum and over them (an odd and an even count)
    rng = np.random.default_rng(13)
    for nspec, nb in ((5, 256), (4, 255)):
        u = [np.cumsum(rng.uniform(1e-6, 2e-6, nb)) + 8.5 for _ in range(nspec)]
        bstart = np.concatenate(([0], np.cumsum([x.size for x in u])))
        want = np.median([np.median(np.diff(x)) for x in u])
        assert coadd_kernels._load().median_bin_step(np.concatenate(u), bstart) == want


def test_remembered_common_continuum_is_the_same_and_keyed_by_identity():
    # inside remembering() the second call on the same inputs gives the first call's orders; another
    # list or another reference mapping (even with equal values) is normalised afresh
    from lineshift.measure.coadd import on_common_continuum, pixel_steps, remembering
    from lineshift.measure.prepare import _prepare_block
    from lineshift.model import Order

    rng = np.random.default_rng(31)
    n = 600
    wave = 5000.0 + 0.02 * np.arange(n)
    flux = rng.normal(3e4, 170.0, (2, n))
    orders = [o for o in _prepare_block([Order(wave + 15.0 * k, flux[k], flux[k].copy(), index=k)
                                          for k in range(2)], 2) if o is not None]
    ref = {o.index: o.continuum * 1.01 for o in orders}
    plain = on_common_continuum(orders, ref)
    with remembering():
        first = on_common_continuum(orders, ref)
        again = on_common_continuum(orders, ref)
        other = on_common_continuum(list(orders), dict(ref))
        steps = pixel_steps(orders), pixel_steps(orders)
    assert all(a is b for a, b in zip(first, again, strict=True)) and again is not first
    assert not any(a is b for a, b in zip(first, other, strict=True))
    for a, b in zip(plain, again, strict=True):
        np.testing.assert_array_equal(a.flux, b.flux)
        np.testing.assert_array_equal(a.weight, b.weight)
    assert steps[0] == steps[1] == pixel_steps(orders)
    fresh = on_common_continuum(orders, ref)               # outside the block: nothing kept
    assert not any(a is b for a, b in zip(first, fresh, strict=True))
