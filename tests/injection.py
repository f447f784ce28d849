"""Injection-recovery helper shared by the tests and the benchmark (not a test module itself).

Simulates many noise realisations of one invented star through one instrument at a spread of true
velocities (so sub-pixel phases vary), measures each in memory and returns measured-minus-true
velocities, the propagated errors and the photon-noise bound computed from the noise-free models.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift import sim
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import prepare_spectrum
from lineshift.model import LineMask


@dataclass
class Recovery:
    delta: np.ndarray   # measured - true topocentric velocity, m/s
    err: np.ndarray     # propagated 1-sigma errors, m/s
    bound: np.ndarray   # photon-noise bound per spectrum, m/s

    @property
    def pulls(self) -> np.ndarray:
        return (self.delta - self.delta.mean()) / self.err

    @property
    def rms_over_bound(self) -> float:
        return float(np.std(self.delta) / np.mean(self.bound))


def star_mask(star: sim.Star, min_depth: float = 0.05) -> LineMask:
    lam, depth = star.line_list()
    keep = depth >= min_depth
    return LineMask(lam[keep], depth[keep], (), "simulator line list")


def recover(star: sim.Star, instrument: sim.Instrument, *, n_velocities: int = 20, n_noise: int = 15,
            seed: int = 7, settings: SearchSettings | None = None) -> Recovery:
    rng = np.random.default_rng(seed)
    mask = star_mask(star)
    settings = settings or SearchSettings()
    deltas, errs, bounds = [], [], []
    for _ in range(n_velocities):
        rv = star.gamma + rng.uniform(-5000.0, 5000.0)
        berv = rng.uniform(-25000.0, 25000.0)
        clean = sim.observe(star, instrument, sim.DEMO_SITE, 61000.8, rng, rv_override=rv,
                            berv_bjd=(berv, 2461001.3), noise=False)
        A = clean.flux
        rn2 = instrument.read_noise**2
        for _ in range(n_noise):
            flux = A + rng.normal(size=A.shape) * np.sqrt(A + rn2)
            err = np.sqrt(np.maximum(flux, 0.0) + rn2)
            exp = sim.Exposure(instrument, star, sim.DEMO_SITE, 61000.8, clean.wave, flux, err,
                               clean.blaze, clean.truth)
            res = measure_mask(prepare_spectrum(sim.to_spectrum(exp)), mask, settings, berv=berv)
            deltas.append(res.rv - clean.truth["rv_topo_true"])
            errs.append(res.rv_err)
            bounds.append(clean.truth["rv_bound"])
    return Recovery(np.array(deltas), np.array(errs), np.array(bounds))


def recover_template(star: sim.Star, instrument: sim.Instrument, *, n_velocities: int = 20, n_noise: int = 15,
                     seed: int = 7, iterations: int = 2) -> tuple[Recovery, Recovery]:
    """Template-engine injection-recovery (and the mask engine on the same spectra, for comparison).

    All spectra are kept in memory: first-pass mask velocities, a co-added template, then each
    spectrum fitted against the template without itself, iterated.
    """
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.template_engine import TemplateSettings, TemplateState, measure_template, template_smoothing
    from lineshift.model import C_MS

    rng = np.random.default_rng(seed)
    mask = star_mask(star)
    settings = SearchSettings()
    prepared, truth, bervs, bounds = [], [], [], []
    for _ in range(n_velocities):
        rv = star.gamma + rng.uniform(-5000.0, 5000.0)
        berv = rng.uniform(-25000.0, 25000.0)
        clean = sim.observe(star, instrument, sim.DEMO_SITE, 61000.8, rng, rv_override=rv,
                            berv_bjd=(berv, 2461001.3), noise=False)
        rn2 = instrument.read_noise**2
        for _ in range(n_noise):
            flux = clean.flux + rng.normal(size=clean.flux.shape) * np.sqrt(clean.flux + rn2)
            exp = sim.Exposure(instrument, star, sim.DEMO_SITE, 61000.8, clean.wave, flux,
                               np.sqrt(np.maximum(flux, 0.0) + rn2), clean.blaze, clean.truth)
            prepared.append(prepare_spectrum(sim.to_spectrum(exp)))
            truth.append(clean.truth["rv_topo_true"])
            bervs.append(berv)
            bounds.append(clean.truth["rv_bound"])
    truth, bervs, bounds = map(np.array, (truth, bervs, bounds))
    mres = [measure_mask(p, mask, settings, berv=b) for p, b in zip(prepared, bervs, strict=True)]
    v = np.array([r.rv for r in mres])
    mask_rec = Recovery(v - truth, np.array([r.rv_err for r in mres]), bounds)
    lo = min(o.wave[0] for p in prepared for o in p) * 0.999
    hi = max(o.wave[-1] for p in prepared for o in p) * 1.001
    step = instrument.pixel_velocity / 2
    for _ in range(iterations):
        factors = 1 / (1 + v / C_MS)   # topocentric velocities: lambda_template = lambda_obs / (1 + v/c)
        acc = TemplateAccumulator(log_grid(lo * factors.min(), hi * factors.max(), step), per_order=True)
        for p, f in zip(prepared, factors, strict=True):
            acc.add(p, f)
        state = TemplateState.from_accumulator(acc, template_smoothing(float(np.median([r.fwhm for r in mres]))))
        tres = [measure_template(p, state, TemplateSettings(), delta0=-np.log(f), factor=f)
                for p, f in zip(prepared, factors, strict=True)]
        v = np.array([r.rv for r in tres])
    return Recovery(v - truth, np.array([r.rv_err for r in tres]), bounds), mask_rec
