"""Injection-recovery: scatter against the photon-noise bound and calibration of the errors.

Each scenario simulates 20 true velocities x 15 noise realisations (300 spectra) of the invented
star.  The bound is computed from each spectrum's noise-free model (Bouchy, Pepe & Queloz 2001);
velocities are differential (the mask's zero point is arbitrary), so the scatter is taken about the
mean.  With 300 draws the pull standard deviation is known to ~4 %.
"""

from dataclasses import replace

import numpy as np
import pytest

from injection import recover
from lineshift import sim

SCENARIOS = {
    # name: (star, instrument, bound factor from the issue)
    "echelle-R110k-snr150": (sim.DEMO_STAR, sim.Instrument("inj-echelle", "multi-order", 110_000, 8, 2048,
                                                            5000.0, snr=150), 1.15),
    "1d-air-R65k": (sim.DEMO_STAR, sim.Instrument("inj-1d", "wcs-1d", 65_000, 1, 16000, 5000.0, sampling=3.0,
                                                   snr=150, medium="air", blaze=False), 1.6),
    "table-vsini18": (replace(sim.DEMO_STAR, vsini=18_000.0),
                      sim.Instrument("inj-table", "table", 75_000, 1, 16000, 5000.0, sampling=3.0, snr=150,
                                     blaze=False), 1.8),
}


@pytest.fixture(scope="module", params=list(SCENARIOS))
def scenario(request):
    star, ins, factor = SCENARIOS[request.param]
    return request.param, recover(star, ins, n_velocities=20, n_noise=15, seed=2026), factor


@pytest.mark.slow
def test_scatter_is_close_to_the_photon_noise_bound(scenario):
    name, rec, factor = scenario
    assert rec.rms_over_bound < factor, name
    # and the bound is a bound: nothing beats it by more than the sampling noise of 300 draws
    assert rec.rms_over_bound > 0.9, name


@pytest.mark.slow
def test_errors_are_calibrated(scenario):
    name, rec, _ = scenario
    assert 0.9 <= np.std(rec.pulls) <= 1.1, name


@pytest.mark.slow
def test_no_large_velocity_dependent_bias(scenario):
    name, rec, _ = scenario
    means = rec.delta.reshape(20, 15).mean(axis=1)
    # the offset between velocities stays within 4 sigma of its noise + 0.5 sigma of systematics
    err = np.mean(rec.err)
    assert np.std(means) < 4 * err / np.sqrt(15) + 0.5 * err, name
