"""``lineshift series``: combine, bin, periodogram, quick orbit, export."""

from __future__ import annotations

import os
import sys

from lineshift._version import __version__
from lineshift.cli.common import add_shared, check_inputs
from lineshift.errors import ConfigError

#: Units of the JSON summary's physical fields (``<name>_err`` has the unit of ``<name>``; written as "units").
JSON_UNITS = {"period": "d", "semi_amplitude": "m / s", "eccentricity": "", "omega": "rad",
              "time_periastron": "d (BJD_TDB)",
              "errors": "each the unit of the parameter it names", "jitter": "m / s", "rms": "m / s", "chi2_red": "",
              "fap": "", "gammas": "m / s", "gamma_errors": "m / s", "offsets": "m / s", "min_mass": "M_jup",
              "min_mass_err": "M_jup", "semi_major_axis": "AU", "semi_major_axis_err": "AU", "mass_function": "M_sun",
              "stellar_mass": "M_sun", "semi_amplitude_2": "m / s", "semi_amplitude_2_err": "m / s",
              "gamma_2": "m / s", "gamma_2_err": "m / s", "mass_ratio": "", "mass_ratio_err": "", "rms_2": "m / s",
              "peaks": {"period": "d", "frequency": "1 / d", "power": "", "fap": "", "aliases": "d"},
              "rv_bisector_correlation": {"r": "", "p_value": "", "n": "", "slope": "", "significant": ""},
              "indicator_periodograms": {"peaks": {"period": "d", "frequency": "1 / d", "power": "", "fap": ""},
                                         "power_at_rv_peak": "", "shares_rv_peak": ""},
              "decorrelation": {"coefficient": "m / s per unit of the indicator",
                                "coefficient_err": "m / s per unit of the indicator",
                                "mean": "the indicator's unit"}}


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("series", help="velocity series: combine, bin, periodogram, quick orbit, export",
                       description="Combine measure tables, flag outliers, bin, compute a periodogram, fit a "
                                   "quick Keplerian and export a clean table for orbit fitters.")
    p.add_argument("tables", nargs="+", metavar="TABLE", help="tables written by 'lineshift measure'")
    p.add_argument("-o", "--output", required=True, metavar="SERIES",
                   help="clean series (.csv, .ecsv, .fits, .parquet)")
    p.add_argument("--fit-orbit", action="store_true", help="fit a Keplerian orbit from the strongest peaks")
    p.add_argument("--stellar-mass", type=float, metavar="MSUN",
                   help="stellar mass, solar masses, for m sin i and the semi-major axis")
    p.add_argument("--stellar-mass-err", type=float, default=0.0, metavar="MSUN",
                   help="1-sigma error of --stellar-mass, solar masses, propagated into min_mass_err")
    p.add_argument("--json", metavar="SUMMARY", help="JSON summary (period, semi_amplitude, eccentricity, fap, ...)")
    p.add_argument("--dataset-column", metavar="COLUMN",
                   help="split data sets by this column (e.g. layout) instead of one per input table")
    p.add_argument("--bin", type=float, metavar="HOURS", help="bin exposures taken within this many hours")
    p.add_argument("--outlier-threshold", type=float, default=5.0, metavar="SIGMA",
                   help="flag residuals beyond this many robust sigma")
    p.add_argument("--min-period", type=float, metavar="DAYS", help="shortest period searched (default 1.2 d)")
    p.add_argument("--max-period", type=float, metavar="DAYS", help="longest period searched (default 2 x span)")
    p.add_argument("--decorrelate", metavar="NAMES",
                   help="comma-separated indicators (e.g. fwhm,bisector_span) whose linear terms are fitted jointly "
                        "with the velocity model (the orbit with --fit-orbit, else the data-set offsets)")
    p.add_argument("--plots", metavar="DIR", help="periodogram, orbit and series plots")
    add_shared(p, "-q", "--debug")


def run(args) -> int:
    import json

    import numpy as np
    import pandas as pd

    from lineshift.io.table import atomic_path, table_format, write_frame
    from lineshift.series import analysis as ser

    table_format(args.output)
    if args.stellar_mass is not None and not args.stellar_mass > 0:
        raise ConfigError("--stellar-mass must be positive (solar masses)")
    if args.bin is not None and not args.bin > 0:
        raise ConfigError("--bin must be a positive number of hours")
    ins = {os.path.abspath(p) for p in args.tables}
    for out in (args.output, args.json):
        if out and os.path.abspath(out) in ins:
            raise ConfigError(f"output {out!r} is one of the inputs: refusing to overwrite it")
    names = [n.strip() for n in args.decorrelate.split(",") if n.strip()] if args.decorrelate else []
    if args.decorrelate is not None and (not names or len(set(names)) != len(names)):
        raise ConfigError(f"--decorrelate {args.decorrelate!r}: give distinct indicator names separated by commas")
    check_inputs(args.tables, "table")
    s = ser.read_series(args.tables, dataset_column=args.dataset_column)
    say = (lambda text: None) if args.quiet else (lambda text: print(f"lineshift: {text}", file=sys.stderr))
    say(f"{s.t.size} velocities in {len(s.datasets)} data set(s); {s.n_dropped} row(s) without a velocity dropped")
    offsets = ser.dataset_offsets(s)
    const_model = np.array([offsets[d] for d in s.dataset])
    ser.flag_outliers(s, const_model, threshold=args.outlier_threshold)
    if args.bin:
        n0 = s.t.size
        s = ser.bin_series(s, args.bin / 24)
        say(f"binned within {args.bin:g} h: {n0} -> {s.t.size} points")
        offsets = ser.dataset_offsets(s)
    pg = ser.periodogram(s, min_period=args.min_period, max_period=args.max_period, offsets=offsets)
    summary: dict = {"n_points": int(s.t.size), "n_dropped": s.n_dropped, "datasets": s.datasets,
                     "peaks": pg.peaks, "fap": pg.fap_best, "caveats": list(ser.CAVEATS)}
    from lineshift.series import vetting

    ind_pg = vetting.indicator_periodograms(s, min_period=args.min_period, max_period=args.max_period)
    if ind_pg and pg.peaks:
        span = float(np.ptp(s.t[~s.flag]))
        summary["indicator_periodograms"] = {n: vetting.periodogram_summary(q, rv_frequency=pg.peaks[0]["frequency"],
                                                                          span=span) for n, q in ind_pg.items()}
    regressors = None
    if names:
        X, means = vetting.decorrelation_regressors(s, names)
        regressors = (names, X)
    fit = None
    if args.fit_orbit:
        fit = ser.fit_orbit(s, [p["period"] for p in pg.peaks[:3]], regressors=regressors)
        s.flag[:] = False
        s.flag_reason[:] = ""
        ser.flag_outliers(s, fit.model, threshold=args.outlier_threshold, s_jit=fit.jitter)
        if s.flag.any():
            fit = ser.fit_orbit(s, [fit.orbit.period], regressors=regressors)
        o = fit.orbit
        offsets = dict(fit.gammas)
        summary.update(model="keplerian", period=o.period, semi_amplitude=o.semi_amplitude, eccentricity=o.eccentricity,
                       omega=o.omega, time_periastron=o.time_periastron, errors=fit.errors, gammas=fit.gammas,
                       gamma_errors=fit.gamma_errors, jitter=fit.jitter, rms=fit.rms, chi2_red=fit.chi2_red)
        if args.stellar_mass:
            summary.update(ser.derived_masses(fit, args.stellar_mass, args.stellar_mass_err),
                           stellar_mass=args.stellar_mass)
        resid_jit = fit.jitter
        if names:
            summary["decorrelation"] = {n: {"coefficient": c, "coefficient_err": e, "mean": means[n]}
                                        for n, (c, e) in fit.coefficients.items()}
    else:
        from astropy.timeseries import LombScargle

        use = ~s.flag
        y = s.rv[use] - np.array([offsets[d] for d in s.dataset[use]])
        best = pg.peaks[0]
        ls = LombScargle(s.t[use], y, s.err[use], fit_mean=True)
        amp = float(np.hypot(*ls.model_parameters(best["frequency"])[1:3]))
        resid_jit = ser.jitter(y - np.average(y, weights=1 / s.err[use] ** 2), s.err[use], 1)
        summary.update(model="sinusoid at the strongest peak", period=best["period"], semi_amplitude=amp,
                       eccentricity=0.0, jitter=resid_jit, offsets=offsets)
        if names:
            offsets, coefs, _ = vetting.fit_offsets_and_indicators(s, X, names)
            summary["offsets"] = offsets
            summary["decorrelation"] = {n: {"coefficient": c, "coefficient_err": e, "mean": means[n]}
                                        for n, (c, e) in coefs.items()}
    summary["n_flagged"] = int(s.flag.sum())
    corr = ser.bisector_correlation(s, offsets)
    indicator_corr = ser.indicator_correlations(s, offsets)
    if indicator_corr:
        summary["rv_indicator_correlations"] = indicator_corr
    if corr is not None:
        summary["rv_bisector_correlation"] = corr
    if fit is not None:
        second = ser.secondary_orbit(s, fit)
        if second is not None:
            summary.update(second)
    aligned_offset = np.array([offsets.get(d, 0.0) for d in s.dataset])
    frame = pd.DataFrame({"bjd_tdb": s.t, "rv": s.rv, "rv_err": s.err, "dataset": s.dataset.astype(str),
                          "offset": aligned_offset, "rv_aligned": s.rv - aligned_offset, "flag": s.flag,
                          "flag_reason": s.flag_reason.astype(str), "n_binned": s.n_binned,
                          **s.indicators, "file": s.file.astype(str)})
    meta = {"TIME": "bjd_tdb: mid-exposure BJD in TDB (days)",
            "VELOCITY": "rv, rv_err, offset, rv_aligned in m/s; rv is the IAU 2000 Resolution C1 barycentric "
                        "radial-velocity measure cz_B as measured; rv_aligned = rv - offset "
                        "(fitted data-set zero point)",
            "FLAGS": "flag = robust outlier (kept, not deleted); flag_reason says why",
            "INDICATORS": "line-shape and secondary columns as in the measure table (same units); with --bin "
                          "inverse-variance means with propagated errors",
            "SOFTWARE": f"lineshift {__version__}"}
    write_frame(frame, args.output, meta, name="SERIES")
    summary["units"] = {k: v for k, v in JSON_UNITS.items() if k in summary}
    if args.json:
        with atomic_path(args.json) as tmp, open(tmp, "w") as fh:
            json.dump(summary, fh, indent=2, default=float)
    if args.plots:
        from lineshift.plots.figures import plot_orbit, plot_periodogram

        os.makedirs(args.plots, exist_ok=True)
        plot_periodogram(pg, os.path.join(args.plots, "periodogram.png"))
        if fit is not None:
            plot_orbit(s, fit, offsets, os.path.join(args.plots, "orbit.png"))
        if corr is not None:
            from lineshift.plots.figures import plot_rv_bisector

            plot_rv_bisector(s, offsets, corr, os.path.join(args.plots, "rv_bisector.png"))
        if ind_pg:
            from lineshift.plots.figures import plot_indicator_periodograms

            plot_indicator_periodograms(pg, ind_pg, os.path.join(args.plots, "periodograms.png"))
        if indicator_corr:
            from lineshift.plots.figures import plot_indicator_grid

            plot_indicator_grid(s, offsets, indicator_corr, os.path.join(args.plots, "rv_indicators.png"))
    best = pg.peaks[0]
    say(f"strongest peak {best['period']:.4f} d, FAP {best['fap']:.2g} (Baluev 2008); "
        f"next: " + ", ".join(f"{p['period']:.3f} d" for p in pg.peaks[1:4]))
    if fit is not None:
        o, e = fit.orbit, fit.errors
        say(f"Keplerian: P = {o.period:.5f} +- {e['period']:.5f} d, K = {o.semi_amplitude:.2f} +- "
            f"{e['semi_amplitude']:.2f} m/s, e = {o.eccentricity:.3f} +- {e['eccentricity']:.3f}, jitter "
            f"{fit.jitter:.2f} m/s, rms {fit.rms:.2f} m/s")
        if args.stellar_mass:
            say(f"m sin i = {summary['min_mass']:.3f} +- {summary['min_mass_err']:.3f} Jupiter masses (a MINIMUM "
                f"mass), a = {summary['semi_major_axis']:.4f} au, for M* = {args.stellar_mass:g} Msun")
    say(f"excess scatter (jitter) {resid_jit:.2f} m/s; {int(s.flag.sum())} point(s) flagged")
    if corr is not None:
        say(f"velocity vs bisector span: r = {corr['r']:+.3f} (p = {corr['p_value']:.2g}, {corr['n']} points)")
        if corr["significant"]:
            say("WARNING: velocity and bisector span correlate significantly: the velocity changes come with "
                "line-shape changes (activity or a blend), not only a companion")
    for n, d in summary.get("decorrelation", {}).items():
        say(f"decorrelation: {d['coefficient']:+.4g} +- {d['coefficient_err']:.2g} m/s per unit of {n} "
            "(fitted jointly with the " + ("orbit)" if fit is not None else "data-set offsets)"))
    for n, d in summary.get("indicator_periodograms", {}).items():
        if d["shares_rv_peak"]:
            say(f"WARNING: the {n} periodogram has one of its strongest peaks at the velocity's strongest period")
    if "mass_ratio" in summary:
        say(f"secondary: K2 = {summary['semi_amplitude_2']:.1f} +- {summary['semi_amplitude_2_err']:.1f} m/s; "
            f"mass ratio q = m2/m1 = K1/K2 = {summary['mass_ratio']:.4f} +- {summary['mass_ratio_err']:.4f}")
    for text in ser.CAVEATS:
        say(f"note: {text}")
    return 0
