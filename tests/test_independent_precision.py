"""Precision and error calibration on files from the independent forward model (tests/independent).

Scored against the efficient estimator on the same noise draws: a least-squares fit of the generator's
own noise-free model.  Its variance equals the photon bound of Bouchy, Pepe & Queloz (2001, A&A 374,
733), and an efficient estimator's error is uncorrelated with (estimator - efficient estimator)
(Cramer-Rao; Hausman 1978), so the ratio scatter/attainable is estimated with little noise as
sqrt(1 + var(rv - rv_eff) / bound^2).  Tolerances come from the number of draws N: a standard
deviation estimated from N draws is uncertain by 1/sqrt(2 (N - 1)) (common practice).
Targets not yet met are strict xfails: they turn into failures the day they pass.
"""

from __future__ import annotations

import ast
from pathlib import Path

import numpy as np
import pytest

from independent import forward as fwd
from independent import nuisances as nzm
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, measure_files

RV = 12_000.0
LINES = fwd.make_lines(11, 4300.0, 7200.0)


def _mask():
    d = fwd.line_depths(LINES)
    keep = d > 0.1
    return LineMask(LINES.wave[keep], d[keep], (), "forward-model line list")


def _run(tmp, setup, layout, n, seed, methods=("mask", "template")):
    berv = fwd.berv_astropy()   # astropy radial_velocity_correction for the header's time, site, target
    ref = fwd.reference(setup, LINES, fwd.topocentric(RV, berv))
    rng = np.random.default_rng(seed)
    paths, eff = [], []
    for i in range(n):
        d = fwd.draw_noise(ref.model, rng, setup.read_noise)
        p = str(tmp / f"s{i}.fits")
        (fwd.write_echelle if layout == "echelle" else fwd.write_wcs_1d)(p, setup, d)
        paths.append(p)
        eff.append(fwd.efficient_estimate(ref, d.flux)[0])
    # efficient estimate of the topocentric shift -> barycentric, exact composition
    eff_b = np.array([fwd.C * ((1 + (fwd.topocentric(RV, berv) + e) / fwd.C) * (1 + berv / fwd.C) - 1)
                      for e in eff])
    out = {"bound": fwd.photon_bound(ref), "eff": eff_b, "n": n}
    for m in methods:
        rows = measure_files(paths, _mask(), MeasureSettings(method=m))
        assert all(r["status"] == "ok" for r in rows)
        out[m] = (np.array([r["rv"] for r in rows]), np.array([r["rv_err"] for r in rows]))
        out[m + " orders"] = [r.get("_orders", []) for r in rows]
    return out


def _ratio(res, m):
    rv, _ = res[m]
    d = rv - res["eff"]
    return float(np.sqrt(1 + np.var(d, ddof=1) / res["bound"] ** 2))


def _ratio_ok(res, m, target):
    """ratio <= target within two standard errors of the ratio estimate from N draws."""
    r = _ratio(res, m)
    sigma = (r**2 - 1) / (2 * r) * np.sqrt(2 / (res["n"] - 1))   # error of a variance from N draws
    return r - 2 * sigma <= target


def _pull(res, m):
    rv, err = res[m]
    return float(np.std((rv - rv.mean()) / err, ddof=1))


def _pull_paired(res, m):
    """Pull std with the efficient estimator as control variate: the true scatter of rv is
    sqrt(bound^2 + var(rv - rv_eff)) (the two terms are uncorrelated, see the module docstring), so
    only the small var(rv - rv_eff) is estimated from the draws; divided by the rms quoted error."""
    rv, err = res[m]
    d = rv - res["eff"]
    return float(np.sqrt(res["bound"] ** 2 + np.var(d, ddof=1)) / np.sqrt(np.mean(err**2)))


def _tol(n):
    return 2.5 / np.sqrt(2 * (n - 1))


@pytest.fixture(scope="module")
def single(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("single"), fwd.single_setup(4, resolution=65_000.0), "wcs", 24, 1)


@pytest.fixture(scope="module")
def echelle(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("echelle"), fwd.echelle_setup(3, n_orders=36, blaze=True), "echelle", 40, 2)


@pytest.fixture(scope="module")
def rotator(tmp_path_factory):
    return _run(tmp_path_factory.mktemp("rot"), fwd.echelle_setup(5, n_orders=12, vsini=20_000.0), "echelle",
                40, 3)


@pytest.mark.parametrize("generator", [fwd, nzm], ids=["forward", "nuisances"])
def test_independent_generators_import_nothing_from_lineshift(generator):
    # independence is the point of the generators (common practice: a check must not share the code it checks)
    tree = ast.parse(Path(generator.__file__).read_text())
    names = [a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names]
    names += [n.module or "" for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)]
    assert not [n for n in names if n.split(".")[0] == "lineshift"]


def test_rotation_kernel_gray():
    # Gray, Observation and Analysis of Stellar Photospheres, eq. 18.14: the analytic kernel integrates
    # to one and vanishes beyond +-vsini; a rotated weak line keeps its equivalent width
    vs, eps = 20_000.0, 0.6
    dv = np.linspace(-1.5 * vs, 1.5 * vs, 30001)
    x = dv / vs
    one = np.clip(1 - x**2, 0, None)
    g = (2 * (1 - eps) * np.sqrt(one) + 0.5 * np.pi * eps * one) / (np.pi * vs * (1 - eps / 3))
    assert np.trapezoid(g, dv) == pytest.approx(1.0, abs=1e-4)
    k = fwd._rotation_kernel(dv, vs, eps)
    assert np.all(k[np.abs(dv) >= vs] == 0) and k.sum() == pytest.approx(1.0)
    weak = fwd.Lines(np.array([5500.0]), np.array([0.01]), np.array([2000.0]), np.array([300.0]))
    edges = 5480.0 * np.exp(np.arange(4001) / 256_000)
    ews = []
    for v in (0.0, vs):
        s = fwd.Setup([edges], np.array([80_000.0]), [np.ones(4000)], np.zeros(1), vsini=v)
        f = fwd._order_model(edges, 80_000.0, weak, 0.0, s)
        ews.append(np.sum((1 - f) * np.diff(edges)))
    assert ews[1] == pytest.approx(ews[0], rel=2e-3)


def test_efficient_estimator_reaches_photon_bound():
    # Bouchy, Pepe & Queloz 2001: sigma_RV = c / sqrt(sum W) is attained by the exact-model fit
    s = fwd.single_setup(4)
    ref = fwd.reference(s, LINES, -6000.0)
    rng = np.random.default_rng(5)
    e = np.array([fwd.efficient_estimate(ref, fwd.draw_noise(ref.model, rng, s.read_noise).flux)[0]
                  for _ in range(120)])
    assert np.std(e, ddof=1) / fwd.photon_bound(ref) == pytest.approx(1.0, abs=_tol(120))
    assert abs(e.mean()) < 3 * fwd.photon_bound(ref) / np.sqrt(120)


@pytest.mark.parametrize("method", ["mask", "template"])
def test_single_air_precision(single, method):
    # issue targets: scatter / efficient <= 1.25 (mask), pull std 0.95-1.05 within the draws' tolerance
    assert _ratio(single, method) <= 1.25
    assert abs(_pull(single, method) - 1.0) <= _tol(single["n"])
    assert abs(single[method][0].mean() - RV) < 10.0


def test_echelle_zero_point_mask(echelle):
    assert abs(echelle["mask"][0].mean() - RV) < 10.0


def test_echelle_mask_precision(echelle):
    # issue target 1.03 of the efficient estimator (measured 1.032 with 40 draws)
    assert _ratio_ok(echelle, "mask", 1.03)


def test_echelle_mask_pulls(echelle):
    assert abs(_pull(echelle, "mask") - 1.0) <= _tol(echelle["n"])


def test_echelle_template_precision(echelle):
    # least-squares template matching with a per-order cubic multiplicative polynomial
    assert _ratio_ok(echelle, "template", 1.03)
    assert abs(_pull(echelle, "template") - 1.0) <= _tol(echelle["n"])


def test_echelle_template_zero_point(echelle):
    # a template per order: continuum errors of overlapping neighbour orders no longer mix (was +19 m/s)
    assert abs(echelle["template"][0].mean() - RV) < 10.0


def test_echelle_template_orders_fit_to_the_noise(echelle):
    # issue target: reduced chi-square 0.9-1.2 in every order (the median over the spectra: each value
    # rests on ~2000 pixels, so its own noise is sqrt(2 / 2000) = 0.03; common practice)
    chi2 = {}
    for orders in echelle["template orders"]:
        for o in orders:
            chi2.setdefault(o["order"], []).append(o["chi2_red"])
    assert len(chi2) == 36
    med = np.array([np.median(v) for v in chi2.values()])
    assert np.all((med > 0.9) & (med < 1.2)), med


@pytest.mark.parametrize(("case", "method"), [("single", "mask"), ("single", "template"), ("echelle", "mask"),
                                          ("echelle", "template"), ("rotator", "mask"), ("rotator", "template")])
def test_pulls_with_the_efficient_estimator_as_control_variate(case, method, request):
    # issue target 0.95-1.05.  The control variate leaves only var(rv - rv_eff) to the draws: its
    # relative error 1/sqrt(2 (N - 1)) moves the pull by (ratio^2 - 1) / 2 * sqrt(2 / (N - 1));
    # allowed: the target band plus 2.5 of those (common practice)
    res = request.getfixturevalue(case)
    r = _ratio(res, method)
    sigma = (r**2 - 1) / 2 * np.sqrt(2 / (res["n"] - 1))
    assert abs(_pull_paired(res, method) - 1.0) <= 0.05 + 2.5 * sigma


def test_rotator_mask_scatter(rotator):
    assert _ratio_ok(rotator, "mask", 1.10)
    assert abs(_pull(rotator, "mask") - 1.0) <= _tol(rotator["n"])


@pytest.mark.xfail(strict=True, reason="fast-rotator mask zero point +45 m/s: blends make the rotation-broadened CCF "
                   "asymmetric (mask weights are unbroadened depths, not the lines' broadened strengths; lines "
                   "shallower than 0.1 are not in the mask): +140 m/s on a noise-free file without blaze, whatever "
                   "the fit window (docs/precision.md)")
def test_rotator_mask_zero_point(rotator):
    assert abs(rotator["mask"][0].mean() - RV) < 10.0


def test_report_values(single, echelle, rotator, capsys):
    # not a check: prints the figures (run with -s) for the record
    with capsys.disabled():
        for name, r in (("single", single), ("echelle", echelle), ("rotator", rotator)):
            for m in ("mask", "template"):
                if m in r:
                    print(name, m, r["n"], f"ratio {_ratio(r, m):.3f} pull {_pull(r, m):.3f} "
                          f"paired pull {_pull_paired(r, m):.3f} "
                          f"zp {r[m][0].mean() - RV:+.2f} bound {r['bound']:.2f}")


def test_rotator_template(rotator):
    # every order normalised by one common continuum (spectra no longer differ by their own continuum
    # noise) and a template smoothed by 0.15 of the line sigma (no noise-induced local minima)
    assert _ratio_ok(rotator, "template", 1.10)


@pytest.mark.xfail(strict=True, reason="the template engine's frame is that of the mask pass's mean velocity, so it "
                   "inherits the mask engine's fast-rotator zero point (blends; docs/precision.md)")
def test_rotator_template_zero_point(rotator):
    assert abs(rotator["template"][0].mean() - RV) < 10.0
