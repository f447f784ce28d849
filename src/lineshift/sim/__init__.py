"""Simulate: synthetic observations of invented stars, with the truth alongside.

May import ``lineshift.io``, ``lineshift.measure``, ``lineshift.series`` and the base modules.

Everything here is invented: the star *Vessa-9*, its companion, the binary *Vessa-12* and the *Mount
Brennick Observatory*.  The simulator builds a rest-frame stellar spectrum from a seeded random line list
(``star``), observes it through an instrument (``instrument``: blaze, continuum slope, resolving power,
pixel integration) with the exact Doppler shift (``observe``), adds photon and read noise and computes the
photon-noise bound of the noise-free model (``noise``), and writes files in every layout lineshift reads
(``writers``).  ``from lineshift import sim`` gives all of it in one namespace; each part is imported on first use
(PEP 562), so the command line's parser does not pay for the simulator's SciPy imports.
"""

import importlib
import sys
import types

#: public name -> the submodule that defines it
_HOME = {
    "INSTRUMENTS": "instrument", "Instrument": "instrument", "replace_instrument": "instrument",
    "photon_noise_bound": "noise",
    "Exposure": "observe", "barycentric_truth": "observe", "epochs": "observe", "lamp_exposure": "observe",
    "observe": "observe", "observe_binary": "observe", "to_spectrum": "observe",
    "DEMO_BINARY": "star", "DEMO_LAMP": "star", "DEMO_SITE": "star", "DEMO_STAR": "star", "Binary": "star",
    "Site": "star", "Star": "star", "StarModel": "star", "invented_lamp_lines": "star", "with_lab_lines": "star",
    "simulate_set": "writers", "write_mask": "writers", "write_observation": "writers", "write_truth": "writers",
}


def __getattr__(name: str):
    if name in _HOME:
        value = getattr(importlib.import_module(f"lineshift.sim.{_HOME[name]}"), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'lineshift.sim' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOME))


class _Package(types.ModuleType):
    """``observe`` names both a submodule and its main function.  Importing the submodule binds the
    package attribute to the module (the import system does so after loading it); the function keeps
    the name here, as it did when everything was imported eagerly."""

    @property
    def observe(self):
        from lineshift.sim.observe import observe

        return observe

    @observe.setter
    def observe(self, value) -> None:   # the submodule binding: ignored, the function keeps the name
        pass


sys.modules[__name__].__class__ = _Package


__all__ = [
    "DEMO_BINARY", "DEMO_LAMP", "DEMO_SITE", "DEMO_STAR", "INSTRUMENTS",
    "Binary", "Exposure", "Instrument", "Site", "Star", "StarModel",
    "barycentric_truth", "epochs", "invented_lamp_lines", "lamp_exposure", "observe", "observe_binary",
    "photon_noise_bound", "replace_instrument", "simulate_set", "to_spectrum", "with_lab_lines", "write_mask",
    "write_observation", "write_truth",
]
