"""Simulate: synthetic observations of invented stars, with the truth alongside.

May import ``lineshift.io``, ``lineshift.measure``, ``lineshift.series`` and the base modules.

Everything here is invented: the star *Vessa-9*, its companion, the binary *Vessa-12* and the *Mount
Brennick Observatory*.  The simulator builds a rest-frame stellar spectrum from a seeded random line list
(``star``), observes it through an instrument (``instrument``: blaze, continuum slope, resolving power,
pixel integration) with the exact Doppler shift (``observe``), adds photon and read noise and computes the
photon-noise bound of the noise-free model (``noise``), and writes files in every layout lineshift reads
(``writers``).  ``from lineshift import sim`` gives all of it in one namespace.
"""

from lineshift.sim.instrument import INSTRUMENTS, Instrument, replace_instrument
from lineshift.sim.noise import photon_noise_bound
from lineshift.sim.observe import (
    Exposure,
    barycentric_truth,
    epochs,
    lamp_exposure,
    observe,
    observe_binary,
    to_spectrum,
)
from lineshift.sim.star import (
    DEMO_BINARY,
    DEMO_LAMP,
    DEMO_SITE,
    DEMO_STAR,
    Binary,
    Site,
    Star,
    StarModel,
    invented_lamp_lines,
    with_lab_lines,
)
from lineshift.sim.writers import simulate_set, write_mask, write_observation, write_truth

__all__ = [
    "DEMO_BINARY", "DEMO_LAMP", "DEMO_SITE", "DEMO_STAR", "INSTRUMENTS",
    "Binary", "Exposure", "Instrument", "Site", "Star", "StarModel",
    "barycentric_truth", "epochs", "invented_lamp_lines", "lamp_exposure", "observe", "observe_binary",
    "photon_noise_bound", "replace_instrument", "simulate_set", "to_spectrum", "with_lab_lines", "write_mask",
    "write_observation", "write_truth",
]
