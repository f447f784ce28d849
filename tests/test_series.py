"""Velocity series: two-body relations, periodogram against astropy, quick orbit, cleaning, export."""

import json
import os

import numpy as np
import pandas as pd
import pytest
from astropy import constants as const
from astropy.timeseries import LombScargle

from lineshift.cli import main
from lineshift.series import analysis as ser
from lineshift.series.orbit import (
    Orbit,
    jupiter_masses,
    mass_function,
    minimum_mass,
    radial_velocity,
    semi_amplitude,
    semi_major_axis,
)
from plotcheck import check_plot

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MJ = (const.M_jup / const.M_sun).value
ME = (const.M_earth / const.M_sun).value


def test_semi_amplitude_check_values():
    # standard values: Jupiter around the Sun ~12.5 m/s (P = 11.86 yr, e = 0.048), Earth ~0.09 m/s
    assert semi_amplitude(4332.59, MJ, 1.0, 0.0489) == pytest.approx(12.46, abs=0.05)
    assert semi_amplitude(365.256, ME, 1.0, 0.0167) == pytest.approx(0.0894, abs=0.0005)
    # computed from the formula (science notes): 1 Jupiter mass, 2.8 d, 1 solar mass -> 144 m/s
    assert semi_amplitude(2.8, MJ, 1.0) == pytest.approx(144.0, abs=0.5)
    # rule of thumb (common practice, order of magnitude): a Jupiter makes a Sun-like star move ~10 m/s
    assert 5 < semi_amplitude(4332.59, MJ, 1.0) < 20


def test_kepler_third_law():
    # 1 solar mass, 1 year -> 1 au (to 1e-4)
    assert semi_major_axis(365.25, 1.0) == pytest.approx(1.0, abs=1e-4)


def test_minimum_mass_solves_the_mass_function_exactly():
    K = semi_amplitude(11.73, 3 * MJ, 1.1, 0.25)
    m = minimum_mass(11.73, K, 0.25, 1.1)
    assert jupiter_masses(m) == pytest.approx(3.0, rel=1e-9)
    assert m**3 / (1.1 + m) ** 2 == pytest.approx(mass_function(11.73, K, 0.25), rel=1e-10)
    # a heavy companion (q = 0.5): the m << M approximation is off by (1 + q)^(2/3) = 1.31, exact is not
    K2 = semi_amplitude(30.0, 0.5, 1.0, 0.1)
    assert minimum_mass(30.0, K2, 0.1, 1.0) == pytest.approx(0.5, rel=1e-9)
    approx = mass_function(30.0, K2, 0.1) ** (1 / 3) * 1.0 ** (2 / 3)
    assert approx == pytest.approx(0.5 / 1.5 ** (2 / 3), rel=1e-9)


def _table(path, t, rv, err, *, status=None, extra=None):
    df = pd.DataFrame({"file": [f"s{k:03d}.fits" for k in range(t.size)], "object": "Vessa-9", "bjd_tdb": t,
                       "rv": rv, "rv_err": err, "status": status if status is not None else "ok"})
    if extra:
        for k, v in extra.items():
            df[k] = v
    df.to_csv(path, index=False)
    return str(path)


TRUE = Orbit(period=17.3, semi_amplitude=27.0, eccentricity=0.35, omega=2.1, time_periastron=2461010.4)


@pytest.fixture
def simulated_series(tmp_path):
    """~45 velocities over 160 days in two data sets with a zero-point offset (invented)."""
    rng = np.random.default_rng(45)
    t = np.sort(2461000.0 + rng.uniform(0, 160, 45))
    err = rng.uniform(1.0, 2.5, t.size)
    rv = radial_velocity(t, TRUE, 14230.0) + rng.normal(size=t.size) * err
    first = np.arange(t.size) < 25
    rv[~first] += 37.0   # second instrument's zero point
    a = _table(tmp_path / "inst_a.csv", t[first], rv[first], err[first])
    b = _table(tmp_path / "inst_b.csv", t[~first], rv[~first], err[~first])
    return a, b


def test_quick_orbit_recovers_the_simulated_companion(simulated_series, tmp_path, drawn):
    a, b = simulated_series
    summary = tmp_path / "s.json"
    out = tmp_path / "series.csv"
    assert main(["series", a, b, "-o", str(out), "--fit-orbit", "--stellar-mass", "1.0", "--json", str(summary),
                 "--plots", str(tmp_path / "plots"), "-q"]) == 0
    s = json.loads(summary.read_text())
    assert s["period"] == pytest.approx(TRUE.period, rel=0.005)         # issue: 0.5 %
    assert s["semi_amplitude"] == pytest.approx(TRUE.semi_amplitude, rel=0.06)   # 6 %
    assert abs(s["eccentricity"] - TRUE.eccentricity) < 0.06
    assert s["fap"] < 1e-3
    # m sin i consistent with the mass function of the fitted orbit to 1 %
    m = s["min_mass"] * MJ
    f = mass_function(s["period"], s["semi_amplitude"], s["eccentricity"])
    assert m**3 / (1.0 + m) ** 2 == pytest.approx(f, rel=0.01)
    assert s["semi_major_axis"] == pytest.approx(semi_major_axis(s["period"], 1.0 + m), rel=1e-6)
    # the zero-point offset between the data sets is fitted, not assumed
    g = s["gammas"]
    assert g["inst_b"] - g["inst_a"] == pytest.approx(37.0, abs=3.0)
    assert any("minimum mass" in c for c in s["caveats"])
    # periodogram: the strongest peaks marked; orbit: each kept point folded and as a residual, flagged ones once
    check_plot(drawn, tmp_path / "plots" / "periodogram.png", points=min(5, len(s["peaks"])), axes_with_data=2)
    check_plot(drawn, tmp_path / "plots" / "orbit.png", points=2 * s["n_points"] - s["n_flagged"], axes_with_data=2)


def test_periodogram_matches_astropy(simulated_series):
    a, _ = simulated_series
    s = ser.read_series([a])
    pg = ser.periodogram(s)
    # reference: astropy LombScargle on the same data (generalised LS, Zechmeister & Kuerster 2009)
    ls = LombScargle(s.t, s.rv, s.err, fit_mean=True, center_data=True)
    np.testing.assert_allclose(pg.power, ls.power(pg.frequency), rtol=1e-12)
    best = pg.peaks[0]
    assert best["fap"] == pytest.approx(ls.false_alarm_probability(best["power"], method="baluev",
                                                                    minimum_frequency=pg.frequency[0],
                                                                    maximum_frequency=pg.frequency[-1]), rel=1e-9)
    assert best["period"] == pytest.approx(TRUE.period, rel=0.02)


def test_cleaning_binning_jitter_and_export(tmp_path, capfd):
    rng = np.random.default_rng(3)
    t = 2461000.0 + 1.7 * np.arange(60) + rng.uniform(0, 0.5, 60)   # nights apart
    t[10:13] = t[10] + np.array([0.0, 0.01, 0.02])        # except three exposures within an hour
    err = np.full(t.size, 2.0)
    rv = 100.0 + rng.normal(size=t.size) * np.hypot(err, 3.0)   # 3 m/s of excess scatter, no signal
    rv[40] += 80.0                                          # an outlier
    status = np.where(np.arange(t.size) == 5, "no correlation peak", "ok")
    rv[5] = np.nan
    path = _table(tmp_path / "t.csv", t, rv, err, status=status)
    out = tmp_path / "clean.csv"
    js = tmp_path / "s.json"
    assert main(["series", path, "-o", str(out), "--json", str(js)]) == 0
    err_text = capfd.readouterr().err
    assert "1 row(s) without a velocity dropped" in err_text
    assert "minimum mass" in err_text and "alias" in err_text
    text = out.read_text()
    assert "# TIME: bjd_tdb: mid-exposure BJD in TDB" in text and "cz_B" in text
    clean = pd.read_csv(out, comment="#")
    assert len(clean) == t.size - 1                         # flagged, never deleted
    flagged = clean[clean.flag]
    assert list(flagged.file) == ["s040.fits"] and "sigma" in flagged.flag_reason.iloc[0]
    s = json.loads(js.read_text())
    assert s["jitter"] == pytest.approx(3.0, abs=1.2)
    assert s["fap"] > 1e-3                                   # no signal
    binned = tmp_path / "binned.csv"
    assert main(["series", path, "-o", str(binned), "--bin", "1", "-q"]) == 0
    b = pd.read_csv(binned, comment="#")
    row = b[b.n_binned == 3].iloc[0]
    # the CSV keeps velocities to 0.001 m/s
    assert row.rv_err == pytest.approx(2.0 / np.sqrt(3), abs=5e-4)
    assert row.rv == pytest.approx(np.mean(rv[10:13]), abs=5e-4)
    assert len(b) == t.size - 1 - 2 - 1                     # dropped row, 3 -> 1, the flagged outlier


def test_binning_carries_every_indicator_with_propagated_errors(tmp_path):
    # inverse-variance mean and its error 1/sqrt(sum 1/e^2) (common practice, e.g. Bevington & Robinson,
    # Data Reduction and Error Analysis, eq. 4.17-4.19), computed here by hand for one bin of three
    rng = np.random.default_rng(8)
    t = 2461000.0 + 2.0 * np.arange(12)
    t[3:6] = t[3] + np.array([0.0, 0.01, 0.02])
    err = np.full(t.size, 2.0)
    rv = 50.0 + rng.normal(size=t.size) * err
    fwhm, fwhm_err = 7000 + rng.normal(size=t.size), np.array([1.0, 2.0, 4.0] * 4)
    bis, bis_err = rng.normal(size=t.size) * 5, np.array([3.0, 6.0, 2.0] * 4)
    slope = rng.normal(size=t.size)
    extra = {"fwhm": fwhm, "fwhm_err": fwhm_err, "contrast": 0.4 + 0.01 * rng.normal(size=t.size),
             "contrast_err": np.full(t.size, 0.002), "bisector_span": bis, "bisector_span_err": bis_err,
             "rv_chromatic_slope": slope, "rv_chromatic_slope_err": np.full(t.size, 0.5),
             "rv2": np.full(t.size, np.nan), "rv2_err": np.full(t.size, np.nan)}
    path = _table(tmp_path / "t.csv", t, rv, err, extra=extra)
    out = tmp_path / "b.csv"
    assert main(["series", path, "-o", str(out), "--bin", "1", "-q"]) == 0
    b = pd.read_csv(out, comment="#")
    for c in extra:
        assert c in b.columns, c
    row = b[b.n_binned == 3].iloc[0]
    sel = slice(3, 6)
    for name in ("fwhm", "bisector_span"):
        w = 1 / extra[f"{name}_err"][sel] ** 2
        # the CSV keeps velocities to 0.001 m/s
        assert row[name] == pytest.approx(np.sum(w * extra[name][sel]) / np.sum(w), abs=5e-4)
        assert row[f"{name}_err"] == pytest.approx(1 / np.sqrt(np.sum(w)), abs=5e-4)
    assert row.rv_chromatic_slope_err == pytest.approx(0.5 / np.sqrt(3), abs=5e-4)
    assert np.isnan(row.rv2) and np.isnan(row.rv2_err)          # absent stays absent, never a number
    single = b[b.n_binned == 1].iloc[0]
    k = int(np.flatnonzero(np.isclose(t, single.bjd_tdb))[0])
    assert single.bisector_span == pytest.approx(bis[k], abs=5e-4)
    assert single.bisector_span_err == pytest.approx(bis_err[k], abs=5e-4)


def test_series_usage_errors(tmp_path, capfd):
    bad = tmp_path / "bad.csv"
    bad.write_text("a,b\n1,2\n")
    assert main(["series", str(bad), "-o", str(tmp_path / "o.csv")]) == 2
    assert "not a measure table" in capfd.readouterr().err
    assert main(["series", str(tmp_path / "missing.csv"), "-o", str(tmp_path / "o.csv")]) == 2
    assert not (tmp_path / "o.csv").exists()


@pytest.mark.slow
def test_sample_spectra_recover_the_invented_companion(tmp_path):
    rv = tmp_path / "rv.csv"
    assert main(["measure", os.path.join(ROOT, "sample_spectra"), "--mask",
                 os.path.join(ROOT, "line_lists", "vessa9_mask.csv"), "-o", str(rv), "-q"]) == 0
    js = tmp_path / "s.json"
    assert main(["series", str(rv), "--dataset-column", "layout", "--fit-orbit", "--stellar-mass", "1.0",
                 "-o", str(tmp_path / "series.csv"), "--json", str(js), "-q"]) == 0
    s = json.loads(js.read_text())
    from lineshift.sim import DEMO_STAR

    o = DEMO_STAR.orbit
    assert s["period"] == pytest.approx(o.period, rel=0.01)
    assert abs(s["semi_amplitude"] - o.semi_amplitude) < 3 * s["errors"]["semi_amplitude"]
    assert abs(s["eccentricity"] - o.eccentricity) < 3 * s["errors"]["eccentricity"] + 0.02
    assert s["fap"] < 1e-6


def test_jitter_small_sample_correction_moves_the_root():
    # outside reference (common practice): with equal errors sigma, the maximum-likelihood excess
    # variance is mean(r^2) - sigma^2 and its unbiased version with p fitted parameters is
    # sum(r^2)/(n - p) - sigma^2
    from lineshift.series.analysis import jitter

    rng = np.random.default_rng(4)
    n, sigma = 12, 2.0
    resid = rng.normal(0.0, 5.0, n)
    err = np.full(n, sigma)
    ml = np.sqrt(np.mean(resid**2) - sigma**2)
    for p in (0, 1, 3):
        unbiased = np.sqrt(np.sum(resid**2) / (n - p) - sigma**2)
        assert jitter(resid, err, n_params=p) == pytest.approx(unbiased, rel=1e-9)
    assert jitter(resid, err, 0) == pytest.approx(ml, rel=1e-9)
    assert jitter(resid, err, 3) > jitter(resid, err, 0) * 1.1
