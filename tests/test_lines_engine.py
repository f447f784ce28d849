"""Line-by-line engine (measure/lines_engine.py): the mixture combination, and injection-recovery on
files of the independent forward model (tests/independent/forward.py), scored as in
tests/test_independent_precision.py against the efficient estimator on the same noise draws.

Precision is the ratio ``sqrt(1 + var(rv - rv_eff) / bound^2)`` (bound: Bouchy, Pepe & Queloz 2001 photon
limit of the noise-free model; rv_eff: the least-squares fit of the generator's own model to the same
clean draw).  Both engines are run on the same spectra, each co-adding its template with its own
velocities, as the pipeline does.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from independent import forward as fwd
from lineshift.measure.coadd import TemplateAccumulator, log_grid
from lineshift.measure.lines_engine import combine_lines, measure_lines
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import prepare_spectrum
from lineshift.measure.template_engine import TemplateSettings, TemplateState, measure_template
from lineshift.model import C_MS, LineMask, Observation, Order, Spectrum

N_SPECTRA = 30


# ------------------------------------------------------------------------------------ combination

def _mixture_nll(params, v, err):
    """Negative log-likelihood of (1 - f) N(v0, err^2) + f N(v0, err^2 + S^2), written out directly."""
    v0, logit_f, log_s = params
    f = 1 / (1 + math.exp(-logit_f))
    var = err**2
    core = (1 - f) * stats.norm.pdf(v, v0, np.sqrt(var))
    broad = f * stats.norm.pdf(v, v0, np.sqrt(var + math.exp(2 * log_s)))
    return -np.sum(np.log(core + broad))


def test_combination_without_outliers_is_the_weighted_mean():
    # common practice: for Gaussian errors the maximum-likelihood mean is the inverse-variance mean,
    # its error 1/sqrt(sum 1/err^2)
    rng = np.random.default_rng(3)
    err = rng.uniform(10.0, 80.0, 200)
    v = 25.0 + err * rng.normal(size=err.size)
    v0, e0, f, _, p = combine_lines(v, err)
    w = 1 / err**2
    assert v0 == pytest.approx(np.sum(w * v) / np.sum(w), abs=0.02 * e0)
    assert e0 == pytest.approx(1 / np.sqrt(np.sum(w)), rel=0.02)
    assert f < 0.02 and p.max() < 0.5


def test_combination_finds_the_mixture_maximum_and_ignores_outliers():
    rng = np.random.default_rng(4)
    err = rng.uniform(10.0, 80.0, 150)
    v = err * rng.normal(size=err.size)
    bad = np.arange(0, 150, 25)                    # six lines moved by something else
    v[bad] += rng.choice([-1, 1], bad.size) * rng.uniform(600.0, 3000.0, bad.size)
    v0, e0, f, S, p = combine_lines(v, err)
    good = np.setdiff1d(np.arange(v.size), bad)
    w = 1 / err[good] ** 2
    assert abs(v0 - np.sum(w * v[good]) / np.sum(w)) < 0.2 * e0    # as if the outliers were not there
    assert np.all(p[bad] > 0.99) and np.all(p[good] < 0.5)
    # the EM result is the maximum of the likelihood found by a general optimiser (scipy.optimize)
    best = optimize.minimize(_mixture_nll, [np.median(v), -2.0, math.log(1000.0)], args=(v, err),
                             method="Nelder-Mead", options={"xatol": 1e-6, "fatol": 1e-9, "maxiter": 20000})
    assert best.x[0] == pytest.approx(v0, abs=0.05 * e0)
    assert 1 / (1 + math.exp(-best.x[1])) == pytest.approx(f, rel=0.05)
    # error: the curvature of the log-likelihood in v0 (f, S held), by central differences (common practice)
    lf, ls = math.log(f / (1 - f)), math.log(S)
    h = 0.01 * e0
    curv = (_mixture_nll([v0 + h, lf, ls], v, err) - 2 * _mixture_nll([v0, lf, ls], v, err)
            + _mixture_nll([v0 - h, lf, ls], v, err)) / h**2
    assert e0 == pytest.approx(1 / math.sqrt(curv), rel=1e-3)


# ------------------------------------------------------------------------------------ injection

LINES = fwd.make_lines(11, 4300.0, 7200.0)
SETUP = fwd.echelle_setup(3, n_orders=14, n_pix=2048, blaze=False)


def _mask():
    d = fwd.line_depths(LINES)
    keep = d > 0.1
    return LineMask(LINES.wave[keep], d[keep], (), "forward-model line list")


class _Corruption:
    """A few lines spoiled in every spectrum: two telluric lines fixed in the observatory frame beside
    deep stellar lines (the star moves by +-3 km/s under them), a foreign line moving by +-8 km/s
    against a third (a blend with a background star), and in every fifth spectrum a two-pixel cosmic
    ray on the flank of a deep line, too faint for the spike finder's contrast rule (+40 %)."""

    def __init__(self, mask: LineMask, rng: np.random.Generator):
        self.cent = SETUP.centres()
        deep = [w for w, d in zip(mask.wavelength, mask.weight, strict=True)
                if d > 0.4 and any(c[100] < w < c[-100] for c in self.cent)]
        self.telluric = [deep[1] * (1 + 1500 / C_MS), deep[len(deep) // 2] * (1 - 1200 / C_MS)]
        self.blend = deep[-2]
        self.blend_v = rng.uniform(-8000, 8000, N_SPECTRA)
        self.deep = deep
        self.spoiled = [deep[1], deep[len(deep) // 2], deep[-2]]   # the stellar lines under them
        self.cosmic_line = rng.integers(0, len(deep), N_SPECTRA)

    def model(self, counts, v, i):
        out = []
        for c, a in zip(self.cent, counts, strict=True):
            f = np.ones_like(c)
            for w in self.telluric:
                f *= 1 - 0.4 * np.exp(-0.5 * ((c / w - 1) * C_MS / 2500) ** 2)
            wb = self.blend * (1 + (v + self.blend_v[i]) / C_MS)
            f *= 1 - 0.3 * np.exp(-0.5 * ((c / wb - 1) * C_MS / 3000) ** 2)
            out.append(a * f)
        return out

    def cosmic(self, flux, v, i):
        if i % 5:
            return flux
        w = self.deep[self.cosmic_line[i]] * (1 + (v + 2500) / C_MS)
        for c, f in zip(self.cent, flux, strict=True):
            j = np.searchsorted(c, w)
            if 5 < j < c.size - 5:
                f[j:j + 2] *= 1.4
        return flux


def _engines(preps, mask, iterations=3):
    """Template and line-by-line velocities, each engine co-adding with its own velocities (pipeline order)."""
    lo = min(o.wave[0] for p in preps for o in p) * 0.999
    hi = max(o.wave[-1] for p in preps for o in p) * 1.001
    c0 = SETUP.centres()[0]
    step = float(np.median(C_MS * np.diff(c0) / c0[1:])) / 2

    def coadd(v):
        factors = 1 / (1 + v / C_MS)
        acc = TemplateAccumulator(log_grid(lo * factors.min(), hi * factors.max(), step))
        for p, f in zip(preps, factors, strict=True):
            acc.add(p, f)
        return TemplateState.from_accumulator(acc), factors

    first = np.array([measure_mask(p, mask, SearchSettings(), berv=0.0).rv for p in preps])
    vt = vl = first
    for _ in range(iterations):
        state, factors = coadd(vt)
        tres = [measure_template(p, state, TemplateSettings(), delta0=-np.log(f), factor=f)
                for p, f in zip(preps, factors, strict=True)]
        vt = np.array([r.rv for r in tres])
        state, factors = coadd(vl)
        lres = [measure_lines(p, state, mask, delta0=-np.log(f), factor=f) for p, f in zip(preps, factors, strict=True)]
        vl = np.array([r.rv for r in lres])
    return tres, lres


@pytest.fixture(scope="module")
def injected():
    mask = _mask()
    rng = np.random.default_rng(1)
    vs = rng.uniform(-3000.0, 3000.0, N_SPECTRA)        # topocentric velocities: sub-pixel phases vary
    corruption = _Corruption(mask, np.random.default_rng(99))
    rn2 = SETUP.read_noise**2
    obs = Observation(path="<forward model>", layout="multi-order")
    draws, eff = [], []
    for v in vs:
        ref = fwd.reference(SETUP, LINES, v)
        z = [rng.normal(size=a.shape) for a in ref.model]   # Gaussian photon + read noise, the same for both sets
        draws.append((ref, z))
        eff.append(v + fwd.efficient_estimate(ref, [a + np.sqrt(a + rn2) * q for a, q in zip(ref.model, z,
                                                                                              strict=True)])[0])
    bound = float(np.mean([fwd.photon_bound(r) for r, _ in draws]))
    out = {"vs": vs, "eff": np.array(eff), "bound": bound, "mask": mask, "spoiled": corruption.spoiled}
    for name, spoil in (("clean", None), ("corrupted", corruption)):
        preps = []
        for i, ((ref, z), v) in enumerate(zip(draws, vs, strict=True)):
            counts = spoil.model(ref.model, v, i) if spoil else ref.model
            flux = [a + np.sqrt(a + rn2) * q for a, q in zip(counts, z, strict=True)]
            if spoil:
                flux = spoil.cosmic(flux, v, i)
            orders = tuple(Order(w, f, a + rn2, None, k)
                           for k, (w, f, a) in enumerate(zip(SETUP.centres(), flux, counts, strict=True)))
            preps.append(prepare_spectrum(Spectrum(obs, orders)))
        with np.errstate(divide="ignore", invalid="ignore"):
            out[name] = _engines(preps, mask)
    return out


def _ratio(res, results):
    rv = np.array([r.rv for r in results])
    return float(np.sqrt(1 + np.var(rv - res["eff"], ddof=1) / res["bound"] ** 2))


def _ratio_sigma(r, n=N_SPECTRA):
    return (r**2 - 1) / (2 * r) * np.sqrt(2 / (n - 1))   # error of a variance from n draws


def test_clean_precision_matches_the_template_engine(injected):
    tres, lres = injected["clean"]
    rt, rl = _ratio(injected, tres), _ratio(injected, lres)
    print(f"clean: template {rt:.3f} lines {rl:.3f} (x efficient estimator)")
    # issue target: within 5 % of the template engine's precision
    assert rl <= 1.05 * rt + 2 * _ratio_sigma(rl)
    assert np.mean([r.outlier_fraction for r in lres]) < 0.01


def test_corrupted_lines_cost_the_line_engine_little_and_the_template_engine_much(injected):
    clean_t, clean_l = (_ratio(injected, r) for r in injected["clean"])
    bad_t, bad_l = (_ratio(injected, r) for r in injected["corrupted"])
    print(f"corrupted: template {bad_t:.3f} (clean {clean_t:.3f}), lines {bad_l:.3f} (clean {clean_l:.3f})")
    # issue target: the line-by-line velocity stays within 10 % of its clean-data precision ...
    assert bad_l <= 1.10 * clean_l
    # ... while the template engine's degrades by more than that
    assert bad_t > 1.10 * clean_t + 2 * _ratio_sigma(bad_t)
    # the spoiled lines are the ones the mixture sets aside
    lres = injected["corrupted"][1]
    for w in injected["spoiled"]:
        p = [ln["outlier_probability"] for r in lres for ln in r.lines if ln["wavelength"] == w]
        print(f"line {w:.2f}: median outlier probability {np.median(p):.2f}")
        assert len(p) == N_SPECTRA and np.median(p) > 0.5


def test_per_line_error_pulls(injected):
    # each line over the draws: (rv - truth - the line's mean offset) / rv_err, pooled over lines
    # (issue target 0.95-1.05); the line's mean offset carries the template's noise, common to all draws
    lres = injected["clean"][1]
    by_line: dict[float, list] = {}
    for r in lres:
        for ln in r.lines:
            by_line.setdefault(ln["wavelength"], []).append((ln["rv"], ln["rv_err"]))
    pulls = []
    for values in by_line.values():
        a = np.array(values)
        if len(a) == N_SPECTRA and np.all(np.isfinite(a)):
            d = a[:, 0] - injected["vs"]
            pulls.append((d - d.mean()) / a[:, 1] * np.sqrt(N_SPECTRA / (N_SPECTRA - 1)))
    pulls = np.concatenate(pulls)
    print(f"per-line pulls: std {np.std(pulls):.3f} over {pulls.size} line measurements")
    assert pulls.size > 2000
    assert 0.95 <= np.std(pulls) <= 1.05


def test_line_rows_carry_depth_and_species(injected):
    lres = injected["clean"][1]
    mask = injected["mask"]
    first = lres[0].lines
    assert len(first) > 80 and all(ln["species"] == "" for ln in first)
    depth = np.array([ln["depth"] for ln in first])
    truth = np.interp([ln["wavelength"] for ln in first], mask.wavelength, mask.weight)
    # the template's depth at the line is the generator's unbroadened depth 1 - exp(-tau), smoothed by the
    # instrument (R = 80000 against ~2 km/s intrinsic width) and deepened by neighbours: mostly smaller, and
    # ordered like it
    assert np.all((depth > 0) & (depth < 1)) and np.median(depth / truth) < 1
    assert stats.spearmanr(depth, truth).statistic > 0.9
