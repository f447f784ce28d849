"""Vetting a velocity signal against the line-shape and activity indicators measured with it.

* **Indicator periodograms**: the generalised Lomb-Scargle periodogram (Zechmeister & Kuerster 2009,
  floating mean, through :func:`.analysis.periodogram`) of every indicator present, on the same frequency
  grid as the velocities', each indicator's per-data-set weighted mean removed (instruments have their own
  zero points for FWHM, contrast, S-index, ...).  Weights are the indicator's own errors where the table
  gives them, otherwise equal.  Reported per indicator: its strongest peaks with Baluev (2008) false-alarm
  probabilities, and its power and FAP at the velocity's strongest frequency (an indicator with power
  there says the velocity signal may be stellar: Queloz et al. 2001; Boisse et al. 2011).
* **Linear decorrelation**: ``rv = model + sum_j c_j (x_j - <x_j>)`` with the indicators x_j chosen by
  the user, fitted *jointly* with the velocity model (the Keplerian of :func:`.analysis.fit_orbit`, or the
  data-set offsets alone), so an orbit cannot be absorbed into a coefficient nor a coefficient into the
  orbit (the usual practice of fitting activity terms together with the planets, e.g. Melo et al. 2007).
  Coefficients (m/s per unit of the indicator) and their errors from the weighted least-squares
  covariance, jitter included.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from lineshift.errors import ConfigError
from lineshift.series.analysis import CORRELATED, Periodogram, Series, periodogram

__all__ = ["decorrelation_regressors", "fit_offsets_and_indicators", "indicator_periodograms",
           "periodogram_summary"]


def _centred_per_dataset(s: Series, x: np.ndarray, err: np.ndarray | None) -> np.ndarray:
    out = x.copy()
    for d in s.datasets:
        m = (s.dataset == d) & np.isfinite(x)
        if not m.any():
            continue
        w = 1 / err[m] ** 2 if err is not None and np.all(np.isfinite(err[m]) & (err[m] > 0)) else np.ones(m.sum())
        out[m] = x[m] - np.sum(w * x[m]) / np.sum(w)
    return out


def indicator_periodograms(s: Series, *, min_period: float | None = None, max_period: float | None = None,
                           n_peaks: int = 3) -> dict[str, Periodogram]:
    """GLS periodogram of every indicator in :data:`.analysis.CORRELATED` present with >= 6 usable points."""
    out = {}
    for name in CORRELATED:
        if name not in s.indicators:
            continue
        x = s.indicators[name]
        e = s.indicators.get(f"{name}_err")
        use = ~s.flag & np.isfinite(x)
        if e is not None:
            good_err = np.isfinite(e) & (e > 0)
            e = e if np.all(good_err[use]) else None
        if use.sum() < 6 or np.ptp(s.t[use]) <= 0 or np.ptp(x[use]) == 0:
            continue
        y = _centred_per_dataset(s, np.where(use, x, np.nan), e)
        sub = replace(s, t=s.t[use], rv=y[use], err=(e[use] if e is not None else np.ones(use.sum())),
                      dataset=s.dataset[use], file=s.file[use], flag=np.zeros(use.sum(), bool),
                      flag_reason=np.full(use.sum(), "", dtype=object), n_binned=s.n_binned[use],
                      bis=np.zeros(0), bis_err=np.zeros(0), rv2=np.zeros(0), rv2_err=np.zeros(0), indicators={})
        # the velocities' grid: the same span rules, so the panels line up
        pmax = max_period or 2 * np.ptp(s.t[~s.flag])
        out[name] = periodogram(sub, min_period=min_period, max_period=pmax, n_peaks=n_peaks)
    return out


def periodogram_summary(pg: Periodogram, *, rv_frequency: float, span: float) -> dict:
    """JSON-ready summary: the strongest peaks, the power at the velocity's best frequency, and whether one
    of the strongest peaks lies within a peak width (1 / span) of it."""
    i = int(np.argmin(np.abs(pg.frequency - rv_frequency)))
    return {"peaks": [{k: p[k] for k in ("period", "frequency", "power", "fap")} for p in pg.peaks],
            "power_at_rv_peak": float(pg.power[i]),
            "shares_rv_peak": bool(any(abs(p["frequency"] - rv_frequency) < 1 / span for p in pg.peaks))}


def decorrelation_regressors(s: Series, names: list[str]) -> tuple[np.ndarray, dict[str, float]]:
    """The design columns ``x_j - <x_j>`` (n x k; NaN where the table has no value) and the means removed.

    Raises
    ------
    ConfigError
        An indicator that is not in the input tables.
    """
    missing = [n for n in names if n not in s.indicators]
    if missing:
        present = ", ".join(n for n in CORRELATED if n in s.indicators) or "none"
        raise ConfigError(f"--decorrelate: {', '.join(missing)} not in the input tables (present: {present})")
    cols, means = [], {}
    use = ~s.flag
    for n in names:
        x = s.indicators[n]
        ok = use & np.isfinite(x)
        if ok.sum() < 3 or np.ptp(x[ok]) == 0:
            raise ConfigError(f"--decorrelate: {n} has fewer than three distinct values")
        means[n] = float(np.mean(x[ok]))
        cols.append(x - means[n])
    return np.column_stack(cols), means


def fit_offsets_and_indicators(s: Series, X: np.ndarray, names: list[str]) -> tuple[dict, dict, np.ndarray]:
    """Without an orbit: data-set offsets and the indicator coefficients by weighted linear least squares.

    Returns (offsets, coefficients {name: (value, error)}, model per point).  Errors from the covariance
    ``(A^T W A)^-1`` scaled by the reduced chi-square when it exceeds one (common practice).
    """
    use = ~s.flag & np.all(np.isfinite(X), axis=1)
    datasets = s.datasets
    D = np.column_stack([(s.dataset == d).astype(float) for d in datasets])
    A = np.hstack([D, np.nan_to_num(X)])
    w = 1 / s.err**2
    Aw = A[use] * w[use, None]
    cov = np.linalg.pinv(Aw.T @ A[use])
    coef = cov @ (Aw.T @ s.rv[use])
    resid = s.rv[use] - A[use] @ coef
    dof = max(int(use.sum()) - A.shape[1], 1)
    chi2 = float(np.sum(w[use] * resid**2) / dof)
    cov = cov * max(chi2, 1.0)
    k = len(datasets)
    offsets = {d: float(coef[i]) for i, d in enumerate(datasets)}
    coefs = {n: (float(coef[k + j]), float(np.sqrt(cov[k + j, k + j]))) for j, n in enumerate(names)}
    return offsets, coefs, A @ coef
