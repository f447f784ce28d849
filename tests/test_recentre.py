"""Line offsets measured over a batch and taken out of the mask (lineshift.measure.recentre)."""

from __future__ import annotations

import numpy as np

from lineshift.measure.ccf import correlate
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import PreparedOrder, pixel_edges
from lineshift.measure.recentre import line_moments, recentred_mask
from lineshift.model import C_MS, LineMask

SIG = 3000.0     # m/s, Gaussian line sigma


def _order(true_wave, depth, bad=()):
    # noise-free normalised spectrum of Gaussian lines (invented data for injection-recovery)
    wave = 5000.0 * np.exp(np.arange(6000) / 300_000.0)
    f = np.ones_like(wave)
    for w0, d in zip(true_wave, depth, strict=True):
        f -= d * np.exp(-0.5 * (C_MS * (wave / w0 - 1) / SIG) ** 2)
    good = np.ones(wave.size, dtype=bool)
    good[list(bad)] = False
    return PreparedOrder(wave, pixel_edges(wave), np.where(good, f, 0.0), np.full(wave.size, 1e-4),
                         good.astype(float), good, 0)


def test_line_offset_recovered():
    # a line centred d from the summed CCF's centre gives d (first-order shift of a Gaussian, from
    # memory: c0 - A g(v - d) = c0 - A g - A d dg/dmu + O(d^2)); d/sigma = 0.05 -> error ~ (d/sigma)^2
    true = np.array([5003.0, 5010.0, 5017.0])
    d = 150.0
    mask = LineMask(true * np.array([1.0, 1 - d / C_MS, 1.0]), np.ones(3))
    o = _order(true, [0.5, 0.5, 0.5])
    grid = np.arange(-15000.0, 15001.0, 200.0)
    data = correlate([o], mask, grid, 200.0, keep_lines=True)
    m = line_moments(data, 0.0, SIG, np.zeros(grid.size))
    off = m.e / m.b
    assert abs(off[1] - d) < 0.05 * d and np.all(np.abs(off[[0, 2]]) < 0.05 * d)


def test_lost_line_no_longer_moves_velocity():
    # lines with offsets of hundreds of m/s (mask positions wrong): dropping one (bad pixel in its box)
    # moves the CCF centre by about its share of the offsets; against the recentred mask it does not
    rng = np.random.default_rng(5)
    true = np.sort(rng.uniform(5004.0, 5095.0, 40))
    true = true[np.concatenate(([True], np.diff(true) > 0.3))]
    depth = rng.uniform(0.2, 0.7, true.size)
    mask = LineMask(true * (1 + rng.normal(0, 400.0, true.size) / C_MS), depth)
    clean = _order(true, depth)
    px = int(np.searchsorted(clean.wave, true[true.size // 2]))
    hit = _order(true, depth, bad=range(px - 1, px + 2))
    st = SearchSettings(velocity_range=(-50_000.0, 50_000.0))
    moments = []
    for _ in range(4):
        measure_mask([clean], mask, st, moments=moments)
    measure_mask([hit], mask, st, moments=moments)
    assert moments[-1].n_cleared >= 1 and moments[0].n_cleared == 0
    before = measure_mask([hit], mask, st).rv - measure_mask([clean], mask, st).rv
    rmask, _ = recentred_mask(mask, moments)
    after = measure_mask([hit], rmask, st).rv - measure_mask([clean], rmask, st).rv
    assert abs(before) > 5.0
    assert abs(after) < 0.2 * abs(before)


def test_clear_window_only_near_the_centre():
    # a bad pixel ~6 km/s from line 1 meets its box only far out on a +-10 km/s grid: the whole-grid
    # rule drops the line, the +-3 km/s core rule keeps it (interval arithmetic, from memory)
    from lineshift.measure.ccf import select_lines

    wave = 5000.0 * np.exp(np.arange(1000) / 250_000.0)      # 1.2 km/s pixels
    good = np.ones(1000, dtype=bool)
    good[505] = False
    o = PreparedOrder(wave, pixel_edges(wave), np.ones(1000), np.ones(1000), good.astype(float), good, 0)
    mask = LineMask(np.array([wave[300], wave[500], wave[700]]), np.ones(3))
    assert list(select_lines(o, mask, -10e3, 10e3, 1000.0, clear_of_bad=True)) == [0, 2]
    assert list(select_lines(o, mask, -10e3, 10e3, 1000.0, clear_of_bad=(-3e3, 3e3))) == [0, 1, 2]
    assert list(select_lines(o, mask, -10e3, 10e3, 1000.0, clear_of_bad=(-3e3, 8e3))) == [0, 2]
