"""series: indicator periodograms beside the velocity's, and the linear decorrelation fitted with the orbit."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import curve_fit

from lineshift.cli import main
from lineshift.series import analysis as ser
from lineshift.series import vetting
from lineshift.series.orbit import Orbit, radial_velocity
from plotcheck import check_plot


def _zk09_power(t, y, err, freq):
    """Generalised Lomb-Scargle power written out from Zechmeister & Kuerster (2009, A&A 496, 577),
    eqs. (4)-(5) and (8)-(17): normalised weights w = (1/sigma^2) / W, floating mean,
    p = (SS YC^2 + CC YS^2 - 2 CS YC YS) / (YY D), D = CC SS - CS^2."""
    w = 1 / err**2
    w = w / w.sum()
    out = np.empty(freq.size)
    Y = np.sum(w * y)
    YY = np.sum(w * y * y) - Y * Y
    for k, f in enumerate(freq):
        c, s = np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t)
        C, S = np.sum(w * c), np.sum(w * s)
        YC = np.sum(w * y * c) - Y * C
        YS = np.sum(w * y * s) - Y * S
        CC = np.sum(w * c * c) - C * C
        SS = np.sum(w * s * s) - S * S
        CS = np.sum(w * c * s) - C * S
        D = CC * SS - CS * CS
        out[k] = (SS * YC**2 + CC * YS**2 - 2 * CS * YC * YS) / (YY * D)
    return out


def _series(seed=3, n=60, k=15.0, p_rv=7.3, p_ind=13.1, coupling=0.0):
    rng = np.random.default_rng(seed)
    t = 61000.0 + np.sort(rng.uniform(0, 120, n))
    fwhm = 7000.0 + 25.0 * np.sin(2 * np.pi * t / p_ind) + rng.normal(0, 4.0, n)
    orbit = Orbit(p_rv, k, 0.1, 1.0, 61003.0)
    rv = 14000.0 + radial_velocity(t, orbit) + coupling * (fwhm - 7000.0) + rng.normal(0, 1.5, n)
    s_index = 0.2 + 0.003 * (rv - 14000.0) + rng.normal(0, 0.004, n)   # follows the velocity
    return pd.DataFrame({"file": [f"f{i}" for i in range(n)], "bjd_tdb": t, "rv": rv, "rv_err": 1.5, "status": "ok",
                         "fwhm": fwhm, "fwhm_err": 4.0, "s_index": s_index})


def test_periodograms_follow_the_zechmeister_kuerster_formula():
    df = _series()
    s = ser.Series(df["bjd_tdb"].to_numpy(), df["rv"].to_numpy(), df["rv_err"].to_numpy(float),
                   np.array(["a"] * len(df), dtype=object), df["file"].to_numpy(object),
                   indicators={"fwhm": df["fwhm"].to_numpy(), "fwhm_err": df["fwhm_err"].to_numpy(float),
                               "s_index": df["s_index"].to_numpy()})
    pg = ser.periodogram(s)
    pick = np.linspace(0, pg.frequency.size - 1, 400).astype(int)
    f = pg.frequency[pick]
    np.testing.assert_allclose(pg.power[pick], _zk09_power(s.t, s.rv, s.err, f), rtol=1e-7, atol=1e-10)
    ind = vetting.indicator_periodograms(s)
    assert set(ind) == {"fwhm", "s_index"}
    np.testing.assert_allclose(ind["fwhm"].frequency, pg.frequency)   # one grid for all panels
    np.testing.assert_allclose(ind["fwhm"].power[pick], _zk09_power(s.t, s.indicators["fwhm"], 4.0 * np.ones(s.t.size),
                                                                     f), rtol=1e-7, atol=1e-10)
    # no error column: equal weights
    np.testing.assert_allclose(ind["s_index"].power[pick], _zk09_power(s.t, s.indicators["s_index"],
                                                                        np.ones(s.t.size), f), rtol=1e-7, atol=1e-10)


def test_series_reports_indicator_periodograms_and_plots_them(tmp_path, drawn):
    _series().to_csv(tmp_path / "rv.csv", index=False)
    js = tmp_path / "s.json"
    assert main(["series", str(tmp_path / "rv.csv"), "-o", str(tmp_path / "o.csv"), "--json", str(js),
                 "--plots", str(tmp_path / "p"), "-q"]) == 0
    summary = json.loads(js.read_text())
    assert summary["peaks"][0]["period"] == pytest.approx(7.3, rel=0.02)
    got = summary["indicator_periodograms"]
    assert got["fwhm"]["peaks"][0]["period"] == pytest.approx(13.1, rel=0.03)   # its own signal ...
    assert not got["fwhm"]["shares_rv_peak"]                                      # ... not the velocity's
    assert got["s_index"]["shares_rv_peak"]           # an index that follows the velocity shares its peak
    assert got["s_index"]["power_at_rv_peak"] > 0.5 > got["fwhm"]["power_at_rv_peak"]
    # three panels (rv, fwhm, s_index), three peaks marked in each
    check_plot(drawn, tmp_path / "p" / "periodograms.png", points=9, axes_with_data=3)


def test_decorrelation_recovers_an_injected_dependence_jointly_with_the_orbit(tmp_path):
    coupling = 0.35   # m/s of velocity per m/s of FWHM, injected
    _series(seed=8, coupling=coupling).to_csv(tmp_path / "rv.csv", index=False)
    js = tmp_path / "s.json"
    base = ["series", str(tmp_path / "rv.csv"), "-o", str(tmp_path / "o.csv"), "--json", str(js), "-q"]
    assert main([*base, "--fit-orbit", "--decorrelate", "fwhm"]) == 0
    summary = json.loads(js.read_text())
    d = summary["decorrelation"]["fwhm"]
    assert abs(d["coefficient"] - coupling) < 3 * d["coefficient_err"] and d["coefficient_err"] < 0.05
    assert summary["semi_amplitude"] == pytest.approx(15.0, abs=4 * summary["errors"]["semi_amplitude"])
    assert summary["units"]["decorrelation"]["coefficient"] == "m / s per unit of the indicator"
    # unknown names are a usage error naming what is there
    assert main([*base, "--decorrelate", "halpha_index"]) == 2


def test_decorrelation_errors_are_calibrated_against_scipy():
    # offsets-only model (no orbit): the coefficient and its error equal scipy.optimize.curve_fit's weighted
    # least squares (absolute_sigma), and over many draws the coefficient scatters by its error
    pulls = []
    for seed in range(60):
        rng = np.random.default_rng(100 + seed)
        n = 40
        x = rng.normal(0, 20.0, n)
        ds = np.where(np.arange(n) < 25, "a", "b").astype(object)
        err = rng.uniform(1.0, 3.0, n)
        y = np.where(ds == "a", 10.0, -4.0) + 0.2 * x + err * rng.normal(size=n)
        s = ser.Series(np.arange(n, dtype=float), y, err, ds, np.array([""] * n, dtype=object),
                       indicators={"fwhm": x})
        X, _ = vetting.decorrelation_regressors(s, ["fwhm"])
        offsets, coefs, _ = vetting.fit_offsets_and_indicators(s, X, ["fwhm"])
        if seed == 0:
            def model(_, a, b, c, ds=ds, X=X):
                return np.where(ds == "a", a, b) + c * X[:, 0]
            p, cov = curve_fit(model, np.zeros(n), y, p0=[0, 0, 0], sigma=err, absolute_sigma=True)
            chi2 = np.sum(((y - model(None, *p)) / err) ** 2) / (n - 3)
            assert coefs["fwhm"][0] == pytest.approx(p[2], rel=1e-6)
            assert coefs["fwhm"][1] == pytest.approx(np.sqrt(cov[2, 2] * max(chi2, 1.0)), rel=1e-6)
            assert offsets["a"] == pytest.approx(p[0], abs=1e-6)
        pulls.append((coefs["fwhm"][0] - 0.2) / coefs["fwhm"][1])
    # 60 draws: the standard deviation of the pulls is uncertain by ~1/sqrt(2 x 59) (common practice)
    assert np.std(pulls) == pytest.approx(1.0, abs=3 / np.sqrt(118))
