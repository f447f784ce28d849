"""Velocity series for orbit fitting: combine, clean, bin, periodogram, quick Keplerian orbit, export.

* **Combine**: rows with ``status == ok`` from one or more ``measure`` tables, one data set per
  input table (or per value of a column such as ``layout``), sorted by time.  Zero-point offsets
  between data sets are fitted (jointly with the orbit when one is fitted) and reported; the
  exported velocities are the measured ones, with the offsets beside them.
* **Clean**: robust outlier flagging (flagged, never deleted; reason in ``flag_reason``) against
  the model at hand (per-data-set weighted means, or the orbit); optional binning in a time window
  (weighted mean, its error, number binned); the excess scatter (jitter) by maximum likelihood.
* **Periodogram**: generalised Lomb-Scargle (Zechmeister & Kuerster 2009) through astropy's
  ``LombScargle(fit_mean=True)``, false-alarm probabilities by Baluev (2008), and the window function.
* **Quick orbit**: Keplerian (P, K, e, omega, T_peri, one gamma per data set, jitter) by weighted
  least squares from the strongest peaks, parameter errors from the curvature, minimum mass from the
  mass function solved exactly, semi-major axis from Kepler's third law (:mod:`.orbit`).

Caveats the output repeats: m sin i is a *minimum* mass (sin i unknown); a periodogram peak can be
an alias of the sampling (1 day, 1 year, the window's peaks) or stellar activity (rotation,
spots), which line-shape indicators help to tell apart.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.optimize import brentq, least_squares

from lineshift.errors import ConfigError
from lineshift.linefit import weighted_line
from lineshift.model import OLD_COLUMN_NAMES
from lineshift.series.orbit import Orbit, jupiter_masses, mass_function, minimum_mass, radial_velocity, semi_major_axis

__all__ = ["CORRELATED", "INDICATORS", "Series", "bin_series", "bisector_correlation", "correlation", "fit_orbit",
           "flag_outliers", "indicator_correlations", "jitter", "periodogram", "read_series", "secondary_orbit"]

CAVEATS = ("m sin i is a minimum mass: the orbital inclination is unknown.",
           "A periodogram peak can be an alias of the sampling (1 d, 1 yr, or a peak of the window function) "
           "or stellar activity (rotation, spots); check line-shape indicators before calling it a companion.")


#: measure-table columns carried into the series (and through binning) where present; each may have ``_err``
INDICATORS = ("fwhm", "contrast", "bisector_span", "rv_chromatic_slope", "s_index", "log_rhk", "halpha_index",
              "nad_index", "rv2", "fwhm2", "contrast2", "flux_ratio")


@dataclass
class Series:
    """A combined velocity series (days, m/s)."""

    t: np.ndarray
    rv: np.ndarray
    err: np.ndarray
    dataset: np.ndarray            # label per point
    file: np.ndarray
    n_dropped: int = 0
    flag: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))
    flag_reason: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=object))
    n_binned: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=int))
    bis: np.ndarray = field(default_factory=lambda: np.zeros(0))       # bisector span, m/s (NaN if absent)
    bis_err: np.ndarray = field(default_factory=lambda: np.zeros(0))
    rv2: np.ndarray = field(default_factory=lambda: np.zeros(0))       # secondary's velocity (NaN if absent)
    rv2_err: np.ndarray = field(default_factory=lambda: np.zeros(0))
    #: every indicator column of the input tables present (INDICATORS and their ``_err``), aligned with ``t``
    indicators: dict[str, np.ndarray] = field(default_factory=dict)

    def __post_init__(self):
        n = self.t.size
        for name in ("bis", "bis_err", "rv2", "rv2_err"):
            if getattr(self, name).size != n:
                setattr(self, name, np.full(n, np.nan))
        if self.flag.size != n:
            self.flag = np.zeros(n, dtype=bool)
        if self.flag_reason.size != n:
            self.flag_reason = np.full(n, "", dtype=object)
        if self.n_binned.size != n:
            self.n_binned = np.ones(n, dtype=int)

    @property
    def datasets(self) -> list[str]:
        return list(dict.fromkeys(self.dataset.tolist()))


def _read_table(path: str) -> pd.DataFrame:
    ext = os.path.splitext(path)[1].lower()
    try:
        if ext == ".parquet":
            import importlib.util

            if importlib.util.find_spec("pyarrow") is None:
                raise ConfigError("Parquet tables need pyarrow, which is not installed (pip install pyarrow)",
                                  path=path)
            return pd.read_parquet(path)
        if ext in (".ecsv", ".fits", ".fit"):
            from astropy.table import Table

            return Table.read(path).to_pandas()
        return pd.read_csv(path, comment="#", keep_default_na=True)
    except (OSError, ValueError, KeyError) as exc:
        raise ConfigError(f"cannot be read as a velocity table ({str(exc).splitlines()[0][:120]})", path=path) from None


def read_series(paths: list[str], *, dataset_column: str | None = None) -> Series:
    """Combine ``measure`` tables: ok rows only, one data set per table (or per ``dataset_column``)."""
    parts, dropped = [], 0
    for path in paths:
        df = _read_table(path)
        need = {"bjd_tdb", "rv", "rv_err", "status"}
        if not need <= set(df.columns):
            raise ConfigError(f"is not a measure table (needs columns {', '.join(sorted(need))})", path=path)
        status = df["status"].astype(str).str.strip()
        good = (status == "ok") & np.isfinite(pd.to_numeric(df["rv"], errors="coerce")) \
            & (pd.to_numeric(df["rv_err"], errors="coerce") > 0)
        dropped += int((~good).sum())
        df = df[good].copy()
        if dataset_column:
            if dataset_column not in df.columns:
                raise ConfigError(f"--dataset-column {dataset_column!r} is not a column of {path}")
            df["_ds"] = os.path.splitext(os.path.basename(path))[0] + ":" + df[dataset_column].astype(str) \
                if len(paths) > 1 else df[dataset_column].astype(str)
        else:
            df["_ds"] = os.path.splitext(os.path.basename(path))[0]
        parts.append(df)
    df = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()
    if df.empty:
        raise ConfigError("no row with status ok in the input tables")
    df = df.sort_values("bjd_tdb", kind="stable")

    df = df.rename(columns={old: new for old, new in OLD_COLUMN_NAMES.items() if old in df and new not in df})

    def col(name):
        return pd.to_numeric(df[name], errors="coerce").to_numpy(float) if name in df else np.full(len(df), np.nan)

    indicators = {c: col(c) for name in INDICATORS for c in (name, f"{name}_err") if c in df}
    return Series(df["bjd_tdb"].to_numpy(float), df["rv"].to_numpy(float), df["rv_err"].to_numpy(float),
                  df["_ds"].to_numpy(object), df.get("file", pd.Series([""] * len(df))).to_numpy(object), dropped,
                  bis=col("bisector_span"), bis_err=col("bisector_span_err"), rv2=col("rv2"), rv2_err=col("rv2_err"),
                  indicators=indicators)


# --------------------------------------------------------------------------- jitter, offsets, outliers

def jitter(resid: np.ndarray, err: np.ndarray, n_params: int = 0) -> float:
    """Excess scatter s (m/s) maximising the Gaussian likelihood of residuals with errors sqrt(err^2 + s^2).

    With ``n_params`` fitted parameters the residual term of the score is scaled by n/(n - p), so that
    for equal errors the root is s^2 = sum(r^2)/(n - p) - err^2: the unbiased variance with p fitted
    parameters in place of the maximum-likelihood sum(r^2)/n (common practice).
    """
    n = resid.size
    if n <= n_params + 1:
        return 0.0
    factor = n / (n - n_params)

    def dlogl(s):
        v = err**2 + s * s
        return np.sum(factor * resid**2 / v**2 - 1 / v)

    if dlogl(0.0) <= 0:
        return 0.0
    hi = max(np.std(resid) * 10 * np.sqrt(factor), 1.0)
    return float(brentq(dlogl, 0.0, hi))


def dataset_offsets(s: Series, model: np.ndarray | None = None, extra: float = 0.0) -> dict[str, float]:
    """Weighted mean of (rv - model) per data set."""
    model = np.zeros_like(s.rv) if model is None else model
    out = {}
    for d in s.datasets:
        m = (s.dataset == d) & ~s.flag
        if not m.any():
            m = s.dataset == d
        w = 1 / (s.err[m] ** 2 + extra**2)
        out[d] = float(np.sum(w * (s.rv[m] - model[m])) / np.sum(w))
    return out


def flag_outliers(s: Series, model: np.ndarray, *, threshold: float = 5.0, s_jit: float = 0.0) -> None:
    """Flag points whose residual from ``model`` exceeds ``threshold`` robust sigmas (in place)."""
    z = (s.rv - model) / np.sqrt(s.err**2 + s_jit**2)
    scale = max(1.0, 1.4826 * np.median(np.abs(z - np.median(z))))
    out = np.abs(z) > threshold * scale
    s.flag[out] = True
    s.flag_reason[out] = [f"residual {zz:+.1f} sigma" for zz in z[out]]


def _weighted_mean(x: np.ndarray, err: np.ndarray | None, w_rv: np.ndarray) -> tuple[float, float]:
    """Inverse-variance mean of the finite values and its propagated error (common practice).

    With no error column the velocities' weights are used and the error is NaN."""
    ok = np.isfinite(x) & (np.isfinite(err) & (err > 0) if err is not None else True)
    if not ok.any():
        return np.nan, np.nan
    if err is None:
        return float(np.sum(w_rv[ok] * x[ok]) / np.sum(w_rv[ok])), np.nan
    w = 1 / err[ok] ** 2
    return float(np.sum(w * x[ok]) / np.sum(w)), float(1 / np.sqrt(np.sum(w)))


def bin_series(s: Series, window_days: float) -> Series:
    """Weighted means of unflagged points within ``window_days`` of the first point of a bin, per data set.

    Time and velocity are inverse-variance means with the velocity errors; every indicator column is the
    inverse-variance mean with its own errors (propagated: ``1 / sqrt(sum w)``), or, where the table has no
    error column for it, the mean with the velocities' weights."""
    bins = []
    for d in s.datasets:
        idx = np.flatnonzero((s.dataset == d) & ~s.flag)
        i = 0
        while i < idx.size:
            j = i
            while j + 1 < idx.size and s.t[idx[j + 1]] - s.t[idx[i]] <= window_days:
                j += 1
            bins.append((d, idx[i:j + 1]))
            i = j + 1
    t, rv, err, ds, files, n = [], [], [], [], [], []
    ind: dict[str, list[float]] = {c: [] for c in s.indicators}
    for d, sel in bins:
        w = 1 / s.err[sel] ** 2
        t.append(np.sum(w * s.t[sel]) / np.sum(w))
        rv.append(np.sum(w * s.rv[sel]) / np.sum(w))
        err.append(1 / np.sqrt(np.sum(w)))
        ds.append(d)
        files.append(";".join(map(str, s.file[sel])))
        n.append(sel.size)
        for c in s.indicators:
            if c.endswith("_err") and c[:-4] in s.indicators:
                continue
            e = s.indicators.get(f"{c}_err")
            value, value_err = _weighted_mean(s.indicators[c][sel], None if e is None else e[sel], w)
            ind[c].append(value)
            if e is not None:
                ind[f"{c}_err"].append(value_err)
    order = np.argsort(t, kind="stable")
    indicators = {c: np.asarray(v, float)[order] for c, v in ind.items()}
    nan = np.full(order.size, np.nan)
    return Series(np.asarray(t)[order], np.asarray(rv)[order], np.asarray(err)[order],
                  np.asarray(ds, dtype=object)[order], np.asarray(files, dtype=object)[order], s.n_dropped,
                  n_binned=np.asarray(n, int)[order], indicators=indicators,
                  bis=indicators.get("bisector_span", nan), bis_err=indicators.get("bisector_span_err", nan),
                  rv2=indicators.get("rv2", nan), rv2_err=indicators.get("rv2_err", nan))


# --------------------------------------------------------------------------- periodogram

@dataclass
class Periodogram:
    frequency: np.ndarray      # 1/day
    power: np.ndarray
    window: np.ndarray
    peaks: list[dict]
    fap_best: float
    fap_levels: dict[float, float]


def periodogram(s: Series, *, min_period: float | None = None, max_period: float | None = None,
                n_peaks: int = 5, offsets: dict[str, float] | None = None) -> Periodogram:
    """Generalised Lomb-Scargle of the (offset-aligned) unflagged velocities, with Baluev FAPs.

    Uses ``astropy.timeseries.LombScargle(fit_mean=True, center_data=True)``, i.e. the floating-mean
    periodogram of Zechmeister & Kuerster (2009), normalisation ``standard``; the false-alarm
    probability is ``LombScargle.false_alarm_probability(method='baluev')`` (Baluev 2008).
    """
    from astropy.timeseries import LombScargle

    use = ~s.flag
    t, y, e = s.t[use], s.rv[use].copy(), s.err[use]
    if offsets:
        y -= np.array([offsets[d] for d in s.dataset[use]])
    span = np.ptp(t)
    if span <= 0 or t.size < 4:
        raise ConfigError("a periodogram needs at least four points at different times")
    fmin = 1 / (max_period or 2 * span)
    fmax = 1 / (min_period or 1.2)
    n = int(np.clip(10 * span * (fmax - fmin), 1000, 200_000))
    freq = np.linspace(fmin, fmax, n)
    ls = LombScargle(t, y, e, fit_mean=True, center_data=True)
    power = ls.power(freq)
    window = LombScargle(t, np.ones_like(t), fit_mean=False, center_data=False).power(freq)
    order = np.argsort(power)[::-1]
    peaks: list[dict] = []
    for i in order:
        f = freq[i]
        if any(abs(f - p["frequency"]) < 1.5 / span for p in peaks):
            continue
        is_local = (i == 0 or power[i] >= power[i - 1]) and (i == n - 1 or power[i] >= power[i + 1])
        if not is_local:
            continue
        peaks.append({"frequency": float(f), "period": float(1 / f), "power": float(power[i]),
                      "fap": float(ls.false_alarm_probability(power[i], minimum_frequency=fmin,
                                                              maximum_frequency=fmax, method="baluev")),
                      "aliases": {"1 d": [float(1 / abs(f + k)) for k in (-1, 1) if abs(f + k) > 0],
                                  "1 yr": [float(1 / abs(f + k / 365.25)) for k in (-1, 1)]}})
        if len(peaks) >= n_peaks:
            break
    with warnings.catch_warnings():
        # astropy inverts Baluev's FAP with a root finder that probes powers outside [0, 1] (sqrt of
        # a negative number on the way); the root it returns lies inside, checked finite below
        warnings.simplefilter("ignore", RuntimeWarning)
        levels = {p: float(ls.false_alarm_level(p, minimum_frequency=fmin, maximum_frequency=fmax,
                                                method="baluev")) for p in (0.1, 0.01, 0.001)}
    levels = {p: v for p, v in levels.items() if np.isfinite(v) and 0 <= v <= 1}
    return Periodogram(freq, power, window, peaks, peaks[0]["fap"] if peaks else 1.0, levels)


# --------------------------------------------------------------------------- Keplerian fit

@dataclass
class OrbitFit:
    orbit: Orbit
    errors: dict[str, float]
    gammas: dict[str, float]
    gamma_errors: dict[str, float]
    jitter: float
    chi2_red: float
    rms: float
    n_points: int
    model: np.ndarray
    #: with ``regressors``: per indicator (coefficient, error), m/s per unit of the indicator
    coefficients: dict[str, tuple[float, float]] = field(default_factory=dict)


def _unpack(x, datasets):
    logP, K, se_c, se_s, phase = x[:5]
    e = se_c**2 + se_s**2
    w = np.arctan2(se_s, se_c)
    return np.exp(logP), K, e, w, phase, dict(zip(datasets, x[5:], strict=True))


def _kepler_model(x, t, ds_idx, datasets, t_ref):
    P, K, e, w, phase, _ = _unpack(x, datasets)
    tp = t_ref - phase / (2 * np.pi) * P
    g = np.asarray(x[5:])[ds_idx]
    return radial_velocity(t, Orbit(P, K, min(e, 0.99), w, tp)) + g


def fit_orbit(s: Series, periods: list[float], *, max_iter_jitter: int = 4,
              regressors: tuple[list[str], np.ndarray] | None = None) -> OrbitFit:
    """Keplerian fit started from each period in ``periods``; the best (lowest chi-square) is kept.

    Parameters are (ln P, K, sqrt(e) cos w, sqrt(e) sin w, mean anomaly at t_ref, gamma per data
    set) for well-behaved least squares.  All starts (periods x eccentricities x phases) are fitted
    with the measurement errors alone and compared by chi-square; the best is then refitted with
    the jitter estimated by maximum likelihood.  Errors come from the Jacobian at the solution
    (propagated to P, e, omega, T_peri).

    ``regressors`` = (names, R): linear terms ``R @ c`` (R: one row per point of ``s``, e.g. centred
    indicators; rows with a NaN are left out) fitted jointly with the orbit; ``coefficients`` gives c.
    """
    reg_names, R_all = regressors if regressors is not None else ([], np.zeros((s.t.size, 0)))
    use = ~s.flag & np.all(np.isfinite(R_all), axis=1)
    t, y, err, ds = s.t[use], s.rv[use], s.err[use], s.dataset[use]
    R = R_all[use]
    n_reg = R.shape[1]
    datasets = list(dict.fromkeys(ds.tolist()))
    ds_idx = np.array([datasets.index(d) for d in ds])
    t_ref = float(np.round(np.median(t), 1))
    n_ds = len(datasets)

    def model(x, tt, idx, RR):
        return _kepler_model(x[: 5 + n_ds], tt, idx, datasets, t_ref) + RR @ x[5 + n_ds:]

    def solve(x0, sig, P0):
        lo = np.array([np.log(P0 * 0.8), 0.0, -0.95, -0.95, -np.inf] + [-np.inf] * (n_ds + n_reg))
        hi = np.array([np.log(P0 * 1.25), np.inf, 0.95, 0.95, np.inf] + [np.inf] * (n_ds + n_reg))
        return least_squares(lambda x: (model(x, t, ds_idx, R) - y) / sig,
                             np.clip(x0, lo + 1e-9, hi - 1e-9), bounds=(lo, hi), x_scale="jac")

    # every start is fitted with the measurement errors alone, so their chi-squares compare fairly
    # (a start that inflated its own jitter would otherwise look best)
    best = None
    for P0 in periods:
        for e0, w0 in ((0.05, 0.0), (0.3, 1.0), (0.3, -2.0), (0.5, 3.0)):
            for ph0 in (0.0, 2.0, 4.0):
                gam0 = [float(np.median(y[ds == d])) for d in datasets]
                K0 = max(0.5 * np.ptp(y), 1.0)
                x0 = np.array([np.log(P0), K0, np.sqrt(e0) * np.cos(w0), np.sqrt(e0) * np.sin(w0), ph0, *gam0,
                               *np.zeros(n_reg)])
                res = solve(x0, err, P0)
                chi2 = float(np.sum(res.fun**2))
                if best is None or chi2 < best[0]:
                    best = (chi2, res, P0)
    _, res, P0 = best
    # then the jitter by maximum likelihood, refitting with it
    s_jit = 0.0
    for _ in range(max_iter_jitter):
        resid = model(res.x, t, ds_idx, R) - y
        new_jit = jitter(resid, err, n_params=res.x.size)
        if abs(new_jit - s_jit) < 1e-3 * (1 + s_jit):
            break
        s_jit = new_jit
        res = solve(res.x, np.sqrt(err**2 + s_jit**2), P0)
    chi2 = float(np.sum(res.fun**2))
    x = res.x
    J = res.jac
    with np.errstate(all="ignore"):
        cov = np.linalg.pinv(J.T @ J)
    dof = max(t.size - x.size, 1)
    P, K, e, w, phase, gam = _unpack(x[: 5 + n_ds], datasets)
    tp = t_ref - phase / (2 * np.pi) * P

    def derived(xx):
        P_, K_, e_, w_, ph_, _ = _unpack(xx[: 5 + n_ds], datasets)
        return np.array([P_, K_, e_, w_, t_ref - ph_ / (2 * np.pi) * P_])

    D = np.empty((5, x.size))
    base = derived(x)
    for k in range(x.size):
        h = 1e-6 * max(abs(x[k]), 1e-3)
        xp = x.copy()
        xp[k] += h
        D[:, k] = (derived(xp) - base) / h
    C = D @ cov @ D.T
    names = ["period", "semi_amplitude", "eccentricity", "omega", "time_periastron"]
    errors = {n: float(np.sqrt(max(C[i, i], 0.0))) for i, n in enumerate(names)}
    g_err = {d: float(np.sqrt(max(cov[5 + i, 5 + i], 0.0))) for i, d in enumerate(datasets)}
    model_all = model(x, s.t, np.array([datasets.index(d) if d in datasets else 0 for d in s.dataset]),
                      np.nan_to_num(R_all))
    resid = y - model_all[use]
    coefs = {n: (float(x[5 + n_ds + j]), float(np.sqrt(max(cov[5 + n_ds + j, 5 + n_ds + j], 0.0))))
             for j, n in enumerate(reg_names)}
    return OrbitFit(Orbit(P, K, e, float(np.mod(w, 2 * np.pi)), tp), errors, gam, g_err, s_jit, chi2 / dof,
                    float(np.std(resid)), int(t.size), model_all, coefs)


def derived_masses(fit: OrbitFit, m_star: float, m_star_err: float = 0.0) -> dict[str, float]:
    """m sin i (Jupiter masses) and a (au), with errors propagated numerically."""
    o, err = fit.orbit, fit.errors

    def calc(P, K, e, M):
        m = minimum_mass(P, K, e, M)
        return np.array([jupiter_masses(m), semi_major_axis(P, M + m), mass_function(P, K, e)])

    base = calc(o.period, o.semi_amplitude, o.eccentricity, m_star)
    var = np.zeros(3)
    for name, val, sd in (("P", o.period, err["period"]), ("K", o.semi_amplitude, err["semi_amplitude"]),
                          ("e", o.eccentricity, err["eccentricity"]), ("M", m_star, m_star_err)):
        if not sd:
            continue
        args = dict(P=o.period, K=o.semi_amplitude, e=o.eccentricity, M=m_star)
        args[name] = val + 1e-3 * sd
        var += ((calc(args["P"], args["K"], min(args["e"], 0.99), args["M"]) - base) / 1e-3) ** 2
    return {"min_mass": float(base[0]), "min_mass_err": float(np.sqrt(var[0])), "semi_major_axis": float(base[1]),
            "semi_major_axis_err": float(np.sqrt(var[1])), "mass_function": float(base[2])}


# --------------------------------------------------------------------------- line shape and binaries

def bisector_correlation(s: Series, offsets: dict[str, float]) -> dict | None:
    """Pearson correlation of (offset-aligned) velocity with bisector span; None without spans.

    A significant correlation (p < 0.01) says the velocity changes come with line-shape changes:
    activity or a blend rather than (only) a companion (Queloz et al. 2001).
    """
    from scipy.stats import pearsonr

    use = ~s.flag & np.isfinite(s.bis)
    if use.sum() < 5:
        return None
    aligned = s.rv[use] - np.array([offsets.get(d, 0.0) for d in s.dataset[use]])
    r, p = pearsonr(aligned, s.bis[use])
    slope = float(np.polyfit(aligned, s.bis[use], 1)[0])
    return {"r": float(r), "p_value": float(p), "n": int(use.sum()), "slope": slope, "significant": bool(p < 0.01)}


#: Indicator columns of a measure table that ``series`` correlates with the velocity (when present).
#: ``bisector_span`` is accepted as another name of the bisector-span column.
#: the indicators the velocity is correlated with (line shape and activity; not the secondary)
CORRELATED = ("fwhm", "contrast", "bisector_span", "rv_chromatic_slope", "s_index", "log_rhk", "halpha_index",
              "nad_index")


def _pearson(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Pearson r and its two-sided p-value from Student's t with n - 2 degrees of freedom.

    t = r sqrt((n - 2) / (1 - r^2)) is exactly t-distributed for independent Gaussian x, y (Fisher 1915;
    any statistics text).
    """
    from scipy.stats import t as student_t

    n = x.size
    dx, dy = x - x.mean(), y - y.mean()
    den = np.sqrt(np.dot(dx, dx) * np.dot(dy, dy))
    if den == 0:
        return float("nan"), float("nan")
    r = float(np.clip(np.dot(dx, dy) / den, -1.0, 1.0))
    if abs(r) == 1.0:
        return r, 0.0
    tval = r * np.sqrt((n - 2) / (1 - r * r))
    return r, float(2 * student_t.sf(abs(tval), n - 2))


def correlation(x: np.ndarray, y: np.ndarray) -> dict:
    """Pearson and Spearman coefficients with p-values (Spearman: Pearson of the ranks, ties averaged,
    p from the same t approximation)."""
    from scipy.stats import rankdata

    r, p = _pearson(x, y)
    rs, ps = _pearson(rankdata(x), rankdata(y))
    return {"pearson_r": r, "pearson_p": p, "spearman_r": rs, "spearman_p": ps, "n": int(x.size),
            "significant": bool(p < 0.01 or ps < 0.01)}


def indicator_correlations(s: Series, offsets: dict[str, float]) -> dict[str, dict]:
    """Correlation of the (offset-aligned) velocity with every indicator present (>= 5 usable points)."""
    aligned = s.rv - np.array([offsets.get(d, 0.0) for d in s.dataset])
    out = {}
    for name in CORRELATED:
        if name not in s.indicators:
            continue
        v = s.indicators[name]
        use = ~s.flag & np.isfinite(v) & np.isfinite(aligned)
        if use.sum() >= 5:
            out[name] = correlation(aligned[use], v[use])
    return out


def secondary_orbit(s: Series, fit: OrbitFit) -> dict | None:
    """The secondary's semi-amplitude and gamma on the primary's orbit, and q = m2/m1 = K1/K2.

    With P, e and T_peri shared and omega_2 = omega_1 + pi, the secondary's curve
    ``v2 = gamma_2 - K2 [cos(nu + w) + e cos w]`` is linear in (gamma_2, K2): weighted linear least
    squares.  The mass ratio follows from the two-body relation m1 K1 = m2 K2.
    """
    use = ~s.flag & np.isfinite(s.rv2) & (s.rv2_err > 0)
    if use.sum() < 4:
        return None
    o = fit.orbit
    from lineshift.series.orbit import true_anomaly

    nu = true_anomaly(s.t[use], o)
    shape = -(np.cos(nu + o.omega) + o.eccentricity * np.cos(o.omega))
    coef, cov = weighted_line(shape, s.rv2[use], s.rv2_err[use])
    resid = s.rv2[use] - (coef[0] + coef[1] * shape)
    chi2 = float(np.sum((resid / s.rv2_err[use]) ** 2) / max(use.sum() - 2, 1))
    cov = cov * max(1.0, chi2)
    k2, k2_err = float(coef[1]), float(np.sqrt(cov[1, 1]))
    k1, k1_err = o.semi_amplitude, fit.errors["semi_amplitude"]
    q = k1 / k2
    return {"semi_amplitude_2": k2, "semi_amplitude_2_err": k2_err, "gamma_2": float(coef[0]),
            "gamma_2_err": float(np.sqrt(cov[0, 0])), "mass_ratio": q,
            "mass_ratio_err": float(q * np.hypot(k1_err / k1, k2_err / k2)), "rms_2": float(np.std(resid)),
            "n_2": int(use.sum())}
