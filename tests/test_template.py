"""The template-matching engine: interpolation accuracy, the photon limit, agreement with the mask
engine, per-order diagnostics, and the command line."""

import os

import numpy as np
import pandas as pd
import pytest

from injection import recover_template
from lineshift import sim
from lineshift.cli import main
from lineshift.measure.coadd import TemplateAccumulator, log_grid
from lineshift.measure.prepare import prepare_spectrum
from lineshift.measure.template_engine import TemplateSettings, TemplateState, measure_template
from lineshift.model import C_MS, Order, Spectrum
from test_injection import SCENARIOS

INS = sim.Instrument("tm-echelle", "multi-order", 110_000, 8, 2048, 5000.0, snr=150)


def _noise_free_set(n=12, seed=1):
    rng = np.random.default_rng(seed)
    exps = []
    for _ in range(n):
        rv = sim.DEMO_STAR.gamma + rng.uniform(-3000, 3000)   # sub-pixel and multi-pixel shifts
        berv = rng.uniform(-20000, 20000)
        exps.append(sim.observe(sim.DEMO_STAR, INS, sim.DEMO_SITE, 61000.8, rng, rv_override=rv,
                                berv_bjd=(berv, 0.0), noise=False))
    prepared = [prepare_spectrum(sim.to_spectrum(e)) for e in exps]
    factors = [(1 + e.truth["berv"] / C_MS) / (1 + e.truth["rv_true"] / C_MS) for e in exps]
    w = INS.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, INS.pixel_velocity / 2))
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p, f)
    return exps, prepared, factors, TemplateState.from_accumulator(acc)


def test_noise_free_shifts_are_recovered_to_five_hundredths_of_a_metre_per_second():
    exps, prepared, factors, state = _noise_free_set()
    for e, p, f in zip(exps, prepared, factors, strict=True):
        # each spectrum against the template of the others (leave-one-out), started 30 m/s off
        r = measure_template(p, state, TemplateSettings(), delta0=-np.log(f) + 1e-7, factor=f)
        assert abs(r.rv - e.truth["rv_topo_true"]) < 0.05, r.rv - e.truth["rv_topo_true"]   # issue: 0.05 m/s


def test_leave_one_out_removes_the_spectrum_itself():
    _, prepared, factors, state = _noise_free_set(n=3)
    flux_all, _, _ = state.without(prepared[0], None)
    flux_loo, _, _ = state.without(prepared[0], factors[0])
    acc = TemplateAccumulator(np.exp(state.lng0 + state.dlng * np.arange(state.sw.size)))
    for p, f in zip(prepared[1:], factors[1:], strict=True):
        acc.add(p, f)
    ref, _, ok = TemplateState.from_accumulator(acc).without(prepared[0], None)
    good = ok & np.isfinite(flux_loo)
    np.testing.assert_allclose(flux_loo[good], ref[good], rtol=0, atol=1e-10)
    assert not np.allclose(flux_all[good], ref[good], atol=1e-6)


@pytest.fixture(scope="module", params=list(SCENARIOS))
def scenario(request):
    star, ins, _ = SCENARIOS[request.param]
    return request.param, *recover_template(star, ins, n_velocities=20, n_noise=15, seed=2027)


@pytest.mark.slow
def test_template_engine_reaches_the_cramer_rao_bound(scenario):
    # the bound of Bouchy, Pepe & Queloz (2001) from each spectrum's noise-free model is the
    # Cramer-Rao bound for photon noise: an efficient estimator reaches it
    name, tmpl, _ = scenario
    assert 0.9 < tmpl.rms_over_bound < 1.10, (name, tmpl.rms_over_bound)     # issue: within 1.10x
    assert 0.9 <= np.std(tmpl.pulls) <= 1.1, (name, np.std(tmpl.pulls))


@pytest.mark.slow
def test_template_and_mask_engines_agree(scenario):
    name, tmpl, mask = scenario
    diff = (tmpl.delta - tmpl.delta.mean()) - (mask.delta - mask.delta.mean())
    combined = np.sqrt(tmpl.err**2 + mask.err**2)
    assert np.all(np.abs(diff) < 4 * combined), name
    assert np.std(diff / combined) < 1.0, name        # the engines share the photons: well inside


def test_a_bad_order_is_flagged_and_rejected():
    exps, _, factors, state = _noise_free_set(n=4)
    rng = np.random.default_rng(4)
    e = exps[0]
    flux = e.flux + rng.normal(size=e.flux.shape) * np.sqrt(e.flux)
    sp = sim.to_spectrum(sim.Exposure(e.instrument, e.star, e.site, e.mjd_start_utc, e.wave, flux,
                                      np.sqrt(np.maximum(flux, 0)), e.blaze, e.truth))
    orders = list(sp.orders)
    o = orders[3]
    orders[3] = Order(o.wave * (1 + 2000.0 / C_MS), o.flux, o.var, o.blaze, o.index)   # a wrong order
    res = measure_template(prepare_spectrum(Spectrum(sp.obs, tuple(orders))), state, TemplateSettings(),
                           delta0=-np.log(factors[0]), factor=factors[0])
    flags = {r["order"]: r["flag"] for r in res.orders}
    assert flags[3] == "rejected"
    assert sum(1 for f in flags.values() if f) == 1
    assert all(np.isfinite(r["chi2_red"]) for r in res.orders)
    assert abs(res.rv - e.truth["rv_topo_true"]) < 5 * res.rv_err


def test_command_line(tmp_path):
    out = tmp_path / "s"
    rows = sim.simulate_set(str(out), [(sim.INSTRUMENTS["demo-echelle"], 12)], seed=3, compress=False)
    mask = tmp_path / "m.csv"
    sim.write_mask(sim.DEMO_STAR, str(mask))
    table, orders = tmp_path / "t.csv", tmp_path / "o.csv"
    assert main(["measure", str(out), "--mask", str(mask), "--method", "template", "-o", str(table),
                 "--orders-table", str(orders), "-q"]) == 0
    t = pd.read_csv(table, comment="#")
    assert (t.method == "template").all() and (t.status == "ok").all()
    truth = pd.DataFrame(rows)
    d = t.rv.to_numpy() - truth.rv_true.to_numpy()
    assert np.all(np.abs(d - d.mean()) < 5 * t.rv_err)
    o = pd.read_csv(orders, keep_default_na=False, comment="#")
    assert {"rv_topo", "rv_topo_err", "chi2_red", "flag", "flag_reason"} <= set(o.columns)
    assert len(o) == 12 * sim.INSTRUMENTS["demo-echelle"].n_orders
    assert os.path.getsize(table) > 0


def test_template_needs_two_spectra_and_one_component(tmp_path, capfd):
    out = tmp_path / "one"
    sim.simulate_set(str(out), [(sim.INSTRUMENTS["demo-echelle"], 1)], seed=5, compress=False)
    mask = tmp_path / "m.csv"
    sim.write_mask(sim.DEMO_STAR, str(mask))
    table = tmp_path / "t.csv"
    assert main(["measure", str(out), "--mask", str(mask), "--method", "template", "-o", str(table), "-q"]) == 1
    assert pd.read_csv(table, comment="#").status[0] == "no template"
    assert "at least two spectra" in capfd.readouterr().err
    assert main(["measure", str(out), "--mask", str(mask), "--method", "template", "--components", "2"]) == 2


def test_store_keeps_the_template_and_measures_only_new_spectra(tmp_path, capfd):
    out = tmp_path / "s"
    rows = sim.simulate_set(str(out), [(sim.INSTRUMENTS["demo-echelle"], 7)], seed=4, compress=False)
    files = sorted(str(out / r["file"]) for r in rows)
    mask = tmp_path / "m.csv"
    sim.write_mask(sim.DEMO_STAR, str(mask))
    store = str(tmp_path / "r.sqlite")
    base = ["--mask", str(mask), "--method", "template", "--store", store]
    first, second, rebuilt = tmp_path / "a.csv", tmp_path / "b.csv", tmp_path / "c.csv"
    assert main(["measure", *files[:6], *base, "-o", str(first)]) == 0
    a = pd.read_csv(first, comment="#")
    assert a.notes.str.contains("co-added in this run (6 spectra), kept in the store", regex=False).all()
    capfd.readouterr()
    # one new spectrum: the six are taken from the store, the new one is fitted against the stored template
    assert main(["measure", *files, *base, "-o", str(second)]) == 0
    assert "(6 already in the store, skipped)" in capfd.readouterr().err
    b = pd.read_csv(second, comment="#")
    np.testing.assert_array_equal(b.rv[:6], a.rv)                  # untouched
    template_id = a.notes[0].split("template ")[1].split()[0]
    assert f"template {template_id} from the store (6 spectra)" in b.notes[6]
    # the new spectrum agrees with the truth like the others (same zero point: relative to the same template)
    truth = pd.DataFrame(rows).set_index("file").loc[[os.path.basename(f) for f in files]]
    d = b.rv.to_numpy() - truth.rv_true.to_numpy()
    assert abs(d[6] - np.mean(d[:6])) < 5 * np.hypot(b.rv_err[6], np.std(d[:6]))
    # --rebuild-template: a new co-add of all seven, every spectrum measured again
    assert main(["measure", *files, *base, "-o", str(rebuilt), "--rebuild-template"]) == 0
    assert "(0 already in the store, skipped)" in capfd.readouterr().err
    c = pd.read_csv(rebuilt, comment="#")
    assert c.notes.str.contains("co-added in this run (7 spectra)", regex=False).all()
    assert abs(c.rv[6] - b.rv[6]) < 2 * b.rv_err[6]


def test_common_continuum_keeps_counts_and_their_variance():
    # a change of normalisation: f c, var c^2 and q / c^2 (photon weight in counts) are what the data
    # were, whatever continuum divides them (algebra; common practice)
    from lineshift.measure.coadd import on_common_continuum

    _, prepared, _, _ = _noise_free_set(n=2)
    ref = {o.index: o.continuum * (1.1 + 0.2 * np.linspace(-1, 1, o.flux.size)) for o in prepared[1]}
    for o, n in zip(prepared[0], on_common_continuum(prepared[0], ref), strict=True):
        c = ref[o.index]
        np.testing.assert_allclose(n.flux * c, o.flux * o.continuum, rtol=1e-12)
        np.testing.assert_allclose(n.var * c**2, o.var * o.continuum**2, rtol=1e-12)
        np.testing.assert_allclose(n.weight / c**2, o.weight / o.continuum**2, rtol=1e-12)
    assert on_common_continuum(prepared[0], None) is prepared[0]


def test_per_order_template_state_round_trips_through_plain_arrays():
    exps, prepared, factors, _ = _noise_free_set(n=3)
    w = INS.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, INS.pixel_velocity / 2), per_order=True)
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p, f)
    cont = {o.index: o.continuum for o in prepared[0]}
    state = TemplateState.from_accumulator(acc, 500.0, cont)
    assert sorted(state.segments[:, 0]) == sorted(o.index for o in prepared[0])   # one template per order
    back = TemplateState.from_arrays(state.to_arrays())
    for a, b in ((state.sw, back.sw), (state.swf, back.swf), (state.segments, back.segments)):
        np.testing.assert_array_equal(a, b)
    assert back.smooth == 500.0 and all(np.array_equal(cont[k], back.continua[k]) for k in cont)
    r1 = measure_template(prepared[0], state, TemplateSettings(), delta0=-np.log(factors[0]), factor=factors[0])
    r2 = measure_template(prepared[0], back, TemplateSettings(), delta0=-np.log(factors[0]), factor=factors[0])
    assert r1.rv == r2.rv
    # noise-free: the smoothed template's lines are 1.1 % wider than the spectrum's, so blends move the
    # fit slightly (measured -0.21 m/s here; the unsmoothed fit above holds 0.05 m/s)
    assert abs(r1.rv - exps[0].truth["rv_topo_true"]) < 0.5


def _noisy_prepared(n=4, seed=3):
    rng = np.random.default_rng(seed)
    exps = [sim.observe(sim.DEMO_STAR, INS, sim.DEMO_SITE, 61000.8, rng, rv_override=sim.DEMO_STAR.gamma
                        + rng.uniform(-3000, 3000), berv_bjd=(rng.uniform(-20000, 20000), 0.0)) for _ in range(n)]
    prepared = [prepare_spectrum(sim.to_spectrum(e)) for e in exps]
    factors = [(1 + e.truth["berv"] / C_MS) / (1 + e.truth["rv_true"] / C_MS) for e in exps]
    return prepared, factors


def _levelled_state(prepared, factors, screen=None):
    w = INS.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.99, w.max() * 1.01, INS.pixel_velocity / 2), per_order=True,
                              levelled=True)
    for p, f in zip(prepared, factors, strict=True):
        acc.add(p if screen is None else screen.screened(p, f), f)
    return TemplateState.from_accumulator(acc)


def test_screening_rejects_a_wide_hit_and_own_removal_stays_exact():
    # a 6-pixel double hit (wider than the spike finder's 3-pixel runs) left in one spectrum must be
    # found against the co-add of all, and the fit's removal of that spectrum must still equal the
    # co-add of the others (algebra of weighted sums; common practice for leave-one-out)
    from dataclasses import replace

    prepared, factors = _noisy_prepared()
    o = prepared[0][3]
    hit = np.zeros(o.flux.size, dtype=bool)
    hit[1000:1006] = True
    prepared[0][3] = replace(o, flux=np.where(hit, o.flux * 4.0, o.flux), good=o.good | hit)
    first = _levelled_state(prepared, factors)
    screen = replace(first, ref_flux=first.flux(), ref_segments=first.segments)
    kept = [screen.screened(p, f) for p, f in zip(prepared, factors, strict=True)]
    assert not kept[0][3].good[hit].any()
    # elsewhere 8 sigma never bites on the noise (beside the hit, the co-add's spline rings below the
    # others: a few of their pixels there are lost, harmlessly)
    centre = o.wave[1002] * factors[0]
    lost = sum(int(np.sum(p.good & ~k.good & (np.abs(p.wave * f - centre) > 0.3)))
               for ps, ks, f in zip(prepared, kept, factors, strict=True) for p, k in zip(ps, ks, strict=True))
    assert lost <= 2e-4 * sum(p.flux.size for ps in prepared for p in ps)
    state = _levelled_state(prepared, factors, screen)
    state.ref_flux, state.ref_segments = screen.ref_flux, screen.ref_segments
    loo, _, ok = state.without(state.screened(prepared[0], factors[0]), factors[0])
    others = _levelled_state(prepared[1:], factors[1:], screen)
    ref = others.flux()
    for k, a, off, n in state.segments:   # same layout: compare segment by segment on the grid
        row = others.segments[others.segments[:, 0] == k][0]
        lo, hi = max(a, row[1]), min(a + n, row[1] + row[3])
        x = loo[off + lo - a:off + hi - a]
        y = ref[row[2] + lo - row[1]:row[2] + hi - row[1]]
        good = ok[off + lo - a:off + hi - a] & np.isfinite(y)
        np.testing.assert_allclose(x[good], y[good], rtol=0, atol=1e-9)


def test_levelled_coadd_ignores_the_exposure_level():
    # flux, variance and weight of a spectrum scaled by 2 (a longer exposure on a common continuum):
    # the levelled co-add is unchanged (f/L, v/L^2, w L^2 are scale-free; algebra)
    from dataclasses import replace

    prepared, factors = _noisy_prepared(n=3)
    scaled = [prepared[0], [replace(o, flux=2 * o.flux, var=4 * o.var, weight=o.weight / 4) for o in prepared[1]],
              prepared[2]]
    a, b = _levelled_state(prepared, factors), _levelled_state(scaled, factors)
    np.testing.assert_allclose(b.flux(), a.flux(), rtol=1e-12, equal_nan=True)
    assert not b.flagged.any() or b.flagged.mean() < 0.05
