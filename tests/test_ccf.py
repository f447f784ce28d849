"""The CCF kernel against its slow reference, the adjoint used for errors, and the photon limit."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lineshift import sim
from lineshift.measure.ccf import box_adjoint, box_integrals, correlate, reference_ccf
from lineshift.measure.prepare import PreparedOrder, pixel_edges, prepare_order
from lineshift.model import C_MS, LineMask, Order


def _order(n=300, lam0=5000.0, step=0.02, seed=0, index=0):
    rng = np.random.default_rng(seed)
    wave = lam0 + step * np.arange(n) + 1e-6 * np.arange(n) ** 2  # non-uniform dispersion
    flux = 1.0 - 0.3 * np.exp(-0.5 * ((wave - wave[n // 2]) / 0.05) ** 2) + 0.01 * rng.normal(size=n)
    var = np.full(n, 1e-4)
    weight = 1.0 + 0.5 * np.linspace(0, 1, n)
    good = np.ones(n, dtype=bool)
    return PreparedOrder(wave, pixel_edges(wave), flux, var, weight, good, index)


def test_fast_ccf_equals_slow_reference():
    orders = [_order(seed=1), _order(lam0=5010.0, seed=2, index=1)]
    lines = np.array([5001.0, 5002.5, 5003.0, 5011.2, 5013.9])
    mask = LineMask(lines, np.array([0.5, 1.0, 0.3, 0.8, 0.6]))
    v = np.linspace(-20e3, 20e3, 23)
    step = v[1] - v[0]
    # boxes narrower and wider than a pixel (~1.2 km/s); whole numbers of grid steps share edges
    for width in (300.0, 820.0, 2500.0, step, 2 * step):
        fast = correlate(orders, mask, v, width).ccf
        slow = reference_ccf(orders, mask, v, width)
        assert_allclose(fast, slow, rtol=1e-12)


@pytest.mark.parametrize("seed", range(5))
def test_adjoint_identity(seed):
    rng = np.random.default_rng(seed)
    n = 57
    g = rng.normal(size=n)
    xa = rng.uniform(0, n - 3, size=(7, 4))
    xb = xa + rng.uniform(0, 3, size=xa.shape)
    a = rng.normal(size=xa.shape)
    h = box_adjoint(a, xa, xb, n)
    assert np.sum(a * box_integrals(g, xa, xb)) == pytest.approx(h @ g, rel=1e-12)


def test_box_integral_is_exact_pixel_fraction():
    g = np.array([1.0, 2.0, 4.0, 8.0])
    # from the middle of pixel 0 to a quarter into pixel 2: 0.5*1 + 2 + 0.25*4
    assert box_integrals(g, np.array([0.5]), np.array([2.25]))[0] == pytest.approx(3.5)


def test_propagated_ccf_variance_matches_monte_carlo():
    rng = np.random.default_rng(5)
    base = _order(n=400)
    mask = LineMask(np.array([5002.0, 5004.0, 5006.0]), np.array([1.0, 0.5, 0.7]))
    v = np.linspace(-5e3, 5e3, 11)
    sens = rng.normal(size=v.size)
    data = correlate([base], mask, v, 1000.0)
    predicted = data.variance_of(sens)
    samples = []
    for _ in range(3000):
        noisy = PreparedOrder(base.wave, base.edges, base.flux + rng.normal(size=400) * np.sqrt(base.var),
                              base.var, base.weight, base.good, 0)
        samples.append(sens @ correlate([noisy], mask, v, 1000.0).ccf)
    # 3000 draws: the sample variance is good to ~2.6 %
    assert np.var(samples) == pytest.approx(predicted, rel=0.08)


def test_lines_whose_box_leaves_the_order_are_not_used():
    order = _order()
    lo, hi = order.wave[0], order.wave[-1]
    mask = LineMask(np.array([lo + 0.01, (lo + hi) / 2, hi - 0.01]), np.ones(3))
    data = correlate([order], mask, np.linspace(-3e3, 3e3, 7), 800.0)
    assert data.n_lines == 1


def test_photon_noise_bound_check_value():
    # science notes [calc], recomputed here from Bouchy, Pepe & Queloz 2001 eq. 6-8 directly: one
    # Gaussian line at 5000 A, sigma 0.05 A, depth 0.5, 1e4 e-/pixel, 0.02 A pixels, no read noise
    lam = 4990.0 + 0.02 * np.arange(1000)
    A = 1e4 * (1 - 0.5 * np.exp(-0.5 * ((lam - 5000.0) / 0.05) ** 2))
    dA_dlam = 1e4 * 0.5 * np.exp(-0.5 * ((lam - 5000.0) / 0.05) ** 2) * -(lam - 5000.0) / 0.05**2
    W = lam**2 * dA_dlam**2 / A
    bouchy = C_MS / np.sqrt(W.sum())
    assert bouchy == pytest.approx(33.9, abs=0.1)
    # the simulator's function takes dA/dv = lambda dA/dlambda / c
    assert sim.photon_noise_bound(A, lam * dA_dlam / C_MS) == pytest.approx(bouchy, rel=1e-12)


def test_photon_weighting_follows_the_counts():
    # with pure photon noise the weight of a pixel is proportional to its continuum counts
    n = 2048
    wave = 5000 + 0.02 * np.arange(n)
    cont = 1e4 * (1 + 0.8 * np.sin(np.linspace(0, np.pi, n)))
    p = prepare_order(Order(wave, cont.copy(), cont.copy()))
    ratio = p.weight / cont
    assert np.ptp(ratio) / np.mean(ratio) < 0.05
