"""``lineshift wavecheck``: wavelength calibration against laboratory lines."""

from __future__ import annotations

import os
import sys

from lineshift._version import __version__
from lineshift.cli.common import add_shared, check_inputs, settings_from
from lineshift.errors import ConfigError, LineshiftError

#: Columns of the three tables (docs/reference.md; the first ones are fixed by the interface contract).
LINE_COLUMNS = ["file", "order", "wavelength_lab", "wavelength_measured", "residual", "residual_err", "status",
                "species", "pixel", "fwhm", "snr"]
ORDER_COLUMNS = ["file", "order", "n_lines", "offset", "offset_err", "slope", "rms", "slope_err", "chi2_red",
                 "offset_from_global", "flagged"]
DRIFT_COLUMNS = ["file", "bjd_tdb", "mjd_mid", "time_scale", "offset", "offset_err", "rms", "n_orders", "flagged"]


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("wavecheck", help="wavelength calibration against laboratory lines",
                       description="Residuals of laboratory lines in lamp or science spectra, per line and per order.")
    p.add_argument("spectra", nargs="+", metavar="SPECTRUM",
                   help="lamp or science spectra: files, directories or globs")
    p.add_argument("--lines", required=True, metavar="LIST", help="laboratory line list CSV (vacuum unless marked air)")
    p.add_argument("--kind", choices=("emission", "absorption"), default="emission",
                   help="emission: lamp lines; absorption: lines fixed in the observatory frame (telluric) in "
                        "science spectra")
    p.add_argument("-o", "--output", required=True, metavar="LINES", help="per-line table")
    p.add_argument("--summary", required=True, metavar="ORDERS", help="per-order table")
    p.add_argument("--drift", metavar="TABLE", help="per-exposure offsets in time order, with a linear drift fit")
    p.add_argument("--plots", metavar="DIR", help="residuals, order offsets and drift plots")
    p.add_argument("--window-pixels", type=int, default=7, metavar="N", help="fit half-window, pixels (default 7)")
    p.add_argument("--min-snr", type=float, default=10.0, metavar="X",
                   help="minimum line amplitude / its error (default 10)")
    p.add_argument("--clip", type=float, default=4.0, metavar="SIGMA",
                   help="outlier clipping threshold, sigma (default 4)")
    p.add_argument("--saturation", type=float, metavar="FLUX",
                   help="flux level at which a pixel counts as saturated, in the file's flux units (default: none)")
    p.add_argument("--threshold-ms", type=float, default=20.0, metavar="M_S",
                   help="flag orders off by more than this, m/s, from zero and from the exposure's global offset")
    p.add_argument("--threshold-sigma", type=float, default=3.0, metavar="SIGMA",
                   help="... and by more than this many times the offset's error")
    p.add_argument("--barycentric", action="store_true", help="move measured wavelengths to the barycentric frame")
    add_shared(p, "--config", "--ra", "--dec", "--site", "--ephemeris", "--medium", "-q", "--debug")


def run(args) -> int:
    import numpy as np
    import pandas as pd

    from lineshift.calib.wavecheck import WavecheckSettings, check_spectrum, file_summary, fit_drift
    from lineshift.io.linelists import read_lab_lines
    from lineshift.io.loaders import load_spectrum
    from lineshift.io.table import printable, table_format, write_frame
    from lineshift.run.config import load_config
    from lineshift.run.pipeline import expand_inputs

    if args.window_pixels < 3 or args.min_snr < 0 or args.clip <= 0:
        raise ConfigError("--window-pixels must be >= 3, --min-snr >= 0, --clip > 0")
    for out in (args.output, args.summary, args.drift):
        if out:
            table_format(out)
    lab, _ = read_lab_lines(args.lines)
    check_inputs(args.spectra)
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError(f"no spectrum files in {', '.join(args.spectra)}")
    inputs = {os.path.abspath(p) for p in paths} | {os.path.abspath(args.lines)}
    for out in (args.output, args.summary, args.drift):
        if out and os.path.abspath(out) in inputs:
            raise ConfigError(f"output {out!r} is one of the inputs: refusing to overwrite it")
    settings = WavecheckSettings(kind=args.kind, window_pixels=args.window_pixels, min_snr=args.min_snr,
                                 clip=args.clip, saturation=args.saturation, threshold_ms=args.threshold_ms,
                                 threshold_sigma=args.threshold_sigma)
    bervs: dict[str, float] = {}
    bjds: dict[str, float] = {}
    if args.barycentric:
        from lineshift.calib.barycentric import BarycentricResult, barycentric_batch
        from lineshift.run.pipeline import Observation, survey

        cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
        for name in ("object", "velocity_range", "velocity_step", "box_width", "method", "systemic_velocity",
                     "plots", "telluric"):
            setattr(args, name, None)
        args.no_telluric, args.workers = True, 1
        ms = settings_from(args, cfg)
        obs = survey(paths, ms)
        good = [(p, o) for p, o in zip(paths, obs, strict=True) if isinstance(o, Observation)]
        for (p, _), b in zip(good, barycentric_batch([o for _, o in good], ephemeris=ms.ephemeris), strict=True):
            if isinstance(b, BarycentricResult):
                bervs[p] = b.berv
                bjds[p] = b.bjd_tdb
    all_lines, all_orders, drift_rows, failures = [], [], [], 0
    if args.plots:
        from lineshift.cli.measure import unique_plot_names

        plot_stems = unique_plot_names(paths)  # unique per input, undecodable bytes as \xNN
    for path in paths:
        try:
            sp = load_spectrum(path, medium=args.medium)
            if args.barycentric and path not in bervs:
                raise ConfigError(f"{path}: --barycentric needs its time, target and site")
            lines, orders = check_spectrum(sp, lab.wavelength, settings, lab_species=lab.species,
                                           berv=bervs.get(path) if args.barycentric else None)
        except (LineshiftError, ConfigError) as exc:
            failures += 1
            print(f"lineshift: {exc}", file=sys.stderr)
            continue
        if not lines:
            failures += 1
            print(f"lineshift: {path}: no line of {args.lines} falls on the spectrum", file=sys.stderr)
            continue
        lines, orders = _printable_rows(lines), _printable_rows(orders)  # names of any bytes, as \xNN
        all_lines += lines
        all_orders += orders
        summ = file_summary(orders, settings)
        drift_rows.append({"file": printable(path), "bjd_tdb": bjds.get(path, np.nan),
                           "mjd_mid": sp.obs.mjd_mid if sp.obs.mjd_mid is not None else np.nan,
                           "time_scale": sp.obs.time_scale, "offset": summ["offset"],
                           "offset_err": summ["offset_err"], "rms": summ["rms"], "n_orders": summ["n_orders"],
                           "flagged": summ["global_flagged"]})
        if not args.quiet:
            flagged = [r for r in orders if r["flagged"]]
            text = ", ".join(f"{r['order']} ({r['offset']:+.1f} +- {r['offset_err']:.1f})" for r in flagged) or "none"
            n_ok = sum(r["status"] == "ok" for r in lines)
            print(f"lineshift: {os.path.basename(path)}: {n_ok} of {len(lines)} lines used; global offset "
                  f"{summ['offset']:+.2f} +- {summ['offset_err']:.2f} m/s"
                  f"{' (off zero: flagged)' if summ['global_flagged'] else ''}, order-to-order rms "
                  f"{summ['rms']:.2f} m/s; "
                  f"orders off zero and off the global offset: {text}", file=sys.stderr)
        if args.plots:
            from lineshift.plots.figures import plot_order_offsets, plot_residuals

            os.makedirs(args.plots, exist_ok=True)
            stem = plot_stems[printable(path)]
            title = printable(os.path.basename(path))
            plot_residuals(lines, os.path.join(args.plots, f"{stem}_residuals.png"), title)
            plot_order_offsets(orders, os.path.join(args.plots, f"{stem}_orders.png"), title)
    meta = {"SOFTWARE": f"lineshift {__version__}", "RESIDUAL": "c (lambda_measured - lambda_lab) / lambda_lab, m/s",
            "FRAME": ("barycentric" if args.barycentric
                      else "the file's wavelength solution (no barycentric correction)"),
            "LINES": args.lines, "KIND": args.kind,
            "COLUMNS": "snr = fitted line amplitude / its error; offset = weighted mean residual of an order (ORDERS) "
                       "or of the exposure (DRIFT), m/s; offset_from_global = order offset - exposure offset; "
                       "flagged = off zero and off the global offset (ORDERS), global offset off zero (DRIFT); "
                       "mjd_mid = mid-exposure MJD in time_scale; bjd_tdb (DRIFT, with --barycentric) = "
                       "mid-exposure BJD_TDB, d"}
    line_cols = LINE_COLUMNS
    order_cols = ORDER_COLUMNS
    write_frame(pd.DataFrame(all_lines, columns=line_cols), args.output, meta, name="LINES")
    write_frame(pd.DataFrame(all_orders, columns=order_cols), args.summary, meta, name="ORDERS")
    if args.drift:
        drift = pd.DataFrame(drift_rows, columns=DRIFT_COLUMNS).sort_values("mjd_mid", kind="stable")
        rate = None
        use = drift[np.isfinite(drift.mjd_mid.astype(float)) & np.isfinite(drift.offset_err.astype(float))]
        if len(use) >= 3 and np.ptp(use.mjd_mid) > 0:
            rate = fit_drift(use.mjd_mid.to_numpy(), use.offset.to_numpy(), use.offset_err.to_numpy())
            meta["DRIFT"] = f"{rate[0]:+.3f} +- {rate[1]:.3f} m/s per hour"
            if not args.quiet:
                print(f"lineshift: drift over {len(use)} exposures: {rate[0]:+.3f} +- {rate[1]:.3f} m/s per hour",
                      file=sys.stderr)
        write_frame(drift, args.drift, meta, name="DRIFT")
        if args.plots and len(use) >= 2:
            from lineshift.plots.figures import plot_drift

            plot_drift(use.to_dict("records"), rate, os.path.join(args.plots, "drift.png"))
    return 1 if failures else 0


def _printable_rows(rows: list[dict]) -> list[dict]:
    from lineshift.io.table import printable

    return [{k: printable(v) if isinstance(v, str) else v for k, v in r.items()} for r in rows]
