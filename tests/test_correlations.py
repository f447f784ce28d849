"""Velocity-indicator correlations in `series`: our formulas against scipy.stats on the same arrays."""

import json

import numpy as np
import pandas as pd
import pytest
from scipy.stats import pearsonr, spearmanr

from lineshift.cli import main
from lineshift.series import analysis as ser


def test_correlation_matches_scipy():
    rng = np.random.default_rng(5)
    x = rng.normal(size=40)
    y = 0.4 * x + rng.normal(size=40)
    y[3] = y[7]  # a tie for the ranks
    c = ser.correlation(x, y)
    # reference library: scipy.stats.pearsonr / spearmanr (our code computes r and p itself)
    r, p = pearsonr(x, y)
    rs, ps = spearmanr(x, y)
    assert c["pearson_r"] == pytest.approx(r, rel=1e-12) and c["pearson_p"] == pytest.approx(p, rel=1e-9)
    assert c["spearman_r"] == pytest.approx(rs, rel=1e-12) and c["spearman_p"] == pytest.approx(ps, rel=1e-9)
    assert c["significant"] == bool(p < 0.01 or ps < 0.01)


def test_uncorrelated_p_values_are_uniform():
    """Under independence p is uniform: about 5 % below 0.05 (common practice)."""
    rng = np.random.default_rng(9)
    p = np.array([ser.correlation(rng.normal(size=12), rng.normal(size=12))["pearson_p"] for _ in range(2000)])
    assert np.mean(p < 0.05) == pytest.approx(0.05, abs=0.015)


def test_series_reports_indicator_correlations(tmp_path):
    rng = np.random.default_rng(2)
    n = 30
    t = 61000.0 + np.sort(rng.uniform(0, 100, n))
    rv = 14000.0 + 20.0 * np.sin(2 * np.pi * t / 7.3) + rng.normal(0, 2.0, n)
    s_index = 0.2 + 0.002 * (rv - 14000.0) + rng.normal(0, 0.005, n)   # follows the velocity
    fwhm = 7000.0 + rng.normal(0, 5.0, n)                               # does not
    pd.DataFrame({"file": [f"f{i}" for i in range(n)], "bjd_tdb": t, "rv": rv, "rv_err": 2.0, "status": "ok",
                  "fwhm": fwhm, "s_index": s_index}).to_csv(tmp_path / "rv.csv", index=False)
    out = tmp_path / "s.json"
    args = ["series", str(tmp_path / "rv.csv"), "-o", str(tmp_path / "o.csv"), "--json", str(out)]
    assert main([*args, "--plots", str(tmp_path / "p"), "-q"]) == 0
    got = json.loads(out.read_text())["rv_indicator_correlations"]
    assert set(got) == {"fwhm", "s_index"}
    r, _ = pearsonr(rv, s_index)   # one data set: its offset does not change r
    assert got["s_index"]["pearson_r"] == pytest.approx(r, rel=1e-9) and got["s_index"]["significant"]
    assert got["fwhm"]["pearson_p"] == pytest.approx(pearsonr(rv, fwhm)[1], rel=1e-9)
    assert (tmp_path / "p" / "rv_indicators.png").stat().st_size > 1000
