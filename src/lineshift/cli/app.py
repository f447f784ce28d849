"""Command line: a thin layer over the Python API.

``main(argv)`` returns the exit code: 0 everything done, 1 some inputs unusable (each named on
stderr and in the table's ``status``), 2 usage or configuration error (nothing written).  Data go to
stdout, diagnostics to stderr; no traceback unless ``--debug``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

from lineshift._version import __version__
from lineshift.errors import ConfigError, LineshiftError, MaskError

__all__ = ["main"]


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line and exit code 2, as argparse does, but without the usage dump
        self.exit(2, f"lineshift: {message} (see 'lineshift {self.prog.split()[-1]} --help')\n")


def _floats(text: str, n: int, name: str) -> tuple[float, ...]:
    parts = [p.strip() for p in text.split(",")]
    try:
        values = tuple(float(p) for p in parts)
    except ValueError:
        raise ConfigError(f"{name} {text!r}: expected {n} comma-separated numbers") from None
    if len(values) != n:
        raise ConfigError(f"{name} {text!r}: expected {n} comma-separated numbers")
    return values


def _build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="lineshift", description="Barycentric radial velocities from reduced spectra.")
    parser.add_argument("--version", action="version", version=f"lineshift {__version__}")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)

    m = sub.add_parser("measure", help="spectra to barycentric velocities",
                       description="Measure barycentric radial velocities (m/s, IAU cz_B) and BJD_TDB.")
    m.add_argument("spectra", nargs="+", metavar="SPECTRUM", help="files, directories or globs")
    m.add_argument("--mask", help="line mask CSV (rest vacuum wavelengths, weights); without one, a relative "
                                  "mask is built from the inputs")
    m.add_argument("--save-mask", metavar="CSV", help="write the mask built from the inputs here")
    m.add_argument("-o", "--output", metavar="TABLE",
                   help="output table (.csv, .ecsv, .fits, .parquet); stdout if absent")
    m.add_argument("--config", metavar="TOML", help="configuration file")
    m.add_argument("--ra", help="target RA (degrees or hh:mm:ss), overrides headers")
    m.add_argument("--dec", help="target Dec (degrees or dd:mm:ss), overrides headers")
    m.add_argument("--object", help="target name, overrides headers")
    m.add_argument("--site", metavar="LON,LAT,HEIGHT", help="observatory (deg east, deg, m), overrides headers")
    m.add_argument("--medium", choices=("air", "vacuum"), help="medium of the files' wavelengths")
    m.add_argument("--velocity-range", metavar="LO,HI", help="barycentric search range, m/s (default -300000,300000)")
    m.add_argument("--velocity-step", type=float, metavar="M_S", help="fine CCF step, m/s (default one pixel)")
    m.add_argument("--box-width", type=float, metavar="M_S", help="mask box full width, m/s (default one pixel)")
    m.add_argument("--method", choices=("mask", "template"),
                   help="velocity engine: mask CCF (default) or least-squares template matching")
    m.add_argument("--components", type=int, choices=(1, 2), default=1,
                   help="2: fit two correlation profiles (double-lined binary); rv2... columns for the secondary")
    m.add_argument("--orders-table", metavar="TABLE", help="per-order velocities (one row per file and order)")
    m.add_argument("--systemic-velocity", type=float, metavar="M_S",
                   help="approximate barycentric velocity for telluric rejection (default: measured)")
    m.add_argument("--telluric", metavar="CSV", help="telluric band list (default: the shipped one)")
    m.add_argument("--no-telluric", action="store_true", help="keep mask lines in telluric bands")
    m.add_argument("--ephemeris", metavar="PATH", help="local JPL .bsp ephemeris (default: astropy builtin)")
    m.add_argument("--workers", type=int, default=1, metavar="N", help="local worker processes (default 1)")
    m.add_argument("--store", metavar="FILE.sqlite",
                   help="results store: keep every result, skip inputs already measured with these settings")
    m.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the measurements on an existing Dask cluster (e.g. tcp://127.0.0.1:8786)")
    m.add_argument("--plots", metavar="DIR", help="write a CCF plot per spectrum and rv_time.png here")
    m.add_argument("-q", "--quiet", action="store_true", help="no progress or summary on stderr")
    m.add_argument("--debug", action="store_true", help="show tracebacks of unexpected errors")

    k = sub.add_parser("mask", help="build a line mask from spectra of one star",
                       description="Co-add spectra in the star's frame, find and fit its lines, write a mask.")
    k.add_argument("spectra", nargs="+", metavar="SPECTRUM", help="files, directories or globs")
    k.add_argument("-o", "--output", metavar="MASK", required=True, help="mask CSV to write")
    k.add_argument("--start-mask", metavar="CSV", help="measure first-pass velocities with this mask")
    k.add_argument("--anchor", metavar="LABLIST", nargs="?", const="shipped",
                   help="shift to laboratory wavelengths (default list: line_lists/lab_lines_optical.csv)")
    k.add_argument("--min-depth", type=float, default=0.05, help="minimum line depth (default 0.05)")
    k.add_argument("--blend-fraction", type=float, default=1.0,
                   help="reject lines with a neighbour closer than this x FWHM (default 1.0)")
    k.add_argument("--max-width-ratio", type=float, default=1.25,
                   help="reject lines wider than this x the median FWHM as unresolved blends (default 1.25)")
    k.add_argument("--max-centre-error", type=float, default=100.0, metavar="M_S",
                   help="reject lines whose fitted centre error exceeds this (default 100 m/s)")
    k.add_argument("--iterations", type=int, default=4, help="co-add / measure iterations at most (default 4)")
    k.add_argument("--plot", metavar="PNG", help="plot of the template with the kept lines")
    for opt in ("--config", "--ra", "--dec", "--site", "--telluric", "--ephemeris"):
        k.add_argument(opt)
    k.add_argument("--medium", choices=("air", "vacuum"))
    k.add_argument("--no-telluric", action="store_true")
    k.add_argument("-q", "--quiet", action="store_true")
    k.add_argument("--debug", action="store_true")

    c = sub.add_parser("wavecheck", help="wavelength calibration against laboratory lines",
                       description="Residuals of laboratory lines in lamp or science spectra, per line and per order.")
    c.add_argument("spectra", nargs="+", metavar="SPECTRUM")
    c.add_argument("--lines", required=True, metavar="LIST", help="laboratory line list CSV (vacuum unless marked air)")
    c.add_argument("--kind", choices=("emission", "absorption"), default="emission")
    c.add_argument("-o", "--output", required=True, metavar="LINES", help="per-line table")
    c.add_argument("--summary", required=True, metavar="ORDERS", help="per-order table")
    c.add_argument("--drift", metavar="TABLE", help="per-exposure offsets in time order, with a linear drift fit")
    c.add_argument("--plots", metavar="DIR", help="residuals, order offsets and drift plots")
    c.add_argument("--window-pixels", type=int, default=7, help="fit half-window in pixels (default 7)")
    c.add_argument("--min-snr", type=float, default=10.0, help="minimum line amplitude / its error (default 10)")
    c.add_argument("--clip", type=float, default=4.0, help="outlier clipping threshold, sigma (default 4)")
    c.add_argument("--saturation", type=float, help="flux level at which a pixel counts as saturated")
    c.add_argument("--threshold-ms", type=float, default=20.0, help="flag orders off by more than this (m/s)")
    c.add_argument("--threshold-sigma", type=float, default=3.0, help="... and by more than this many sigma")
    c.add_argument("--barycentric", action="store_true", help="move measured wavelengths to the barycentric frame")
    for opt in ("--config", "--ra", "--dec", "--site", "--ephemeris"):
        c.add_argument(opt)
    c.add_argument("--medium", choices=("air", "vacuum"))
    c.add_argument("-q", "--quiet", action="store_true")
    c.add_argument("--debug", action="store_true")

    r = sub.add_parser("series", help="velocity series: combine, bin, periodogram, quick orbit, export",
                       description="Combine measure tables, flag outliers, bin, compute a periodogram, fit a "
                                   "quick Keplerian and export a clean table for orbit fitters.")
    r.add_argument("tables", nargs="+", metavar="TABLE", help="tables written by 'lineshift measure'")
    r.add_argument("-o", "--output", required=True, metavar="SERIES",
                   help="clean series (.csv, .ecsv, .fits, .parquet)")
    r.add_argument("--fit-orbit", action="store_true", help="fit a Keplerian orbit from the strongest peaks")
    r.add_argument("--stellar-mass", type=float, metavar="MSUN", help="stellar mass for m sin i and a")
    r.add_argument("--stellar-mass-err", type=float, default=0.0, metavar="MSUN")
    r.add_argument("--json", metavar="SUMMARY", help="JSON summary (period, semi_amplitude, eccentricity, fap, ...)")
    r.add_argument("--dataset-column", metavar="COLUMN",
                   help="split data sets by this column (e.g. layout) instead of one per input table")
    r.add_argument("--bin", type=float, metavar="HOURS", help="bin exposures taken within this many hours")
    r.add_argument("--outlier-threshold", type=float, default=5.0, help="flag residuals beyond this many robust sigma")
    r.add_argument("--min-period", type=float, metavar="DAYS", help="shortest period searched (default 1.2 d)")
    r.add_argument("--max-period", type=float, metavar="DAYS", help="longest period searched (default 2 x span)")
    r.add_argument("--plots", metavar="DIR", help="periodogram, orbit and series plots")
    r.add_argument("-q", "--quiet", action="store_true")
    r.add_argument("--debug", action="store_true")

    i = sub.add_parser("inspect", help="what the loader understood from a file",
                       description="Print what lineshift understood from each file and what is missing.")
    i.add_argument("spectra", nargs="+", metavar="FILE")
    i.add_argument("--medium", choices=("air", "vacuum"), help="medium of the file's wavelengths")
    i.add_argument("--debug", action="store_true")

    s = sub.add_parser("simulate", help="synthetic observations of an invented star",
                       description="Write simulated spectra of the invented star Vessa-9 with a truth table.")
    s.add_argument("outdir", metavar="OUTDIR")
    s.add_argument("--instrument", action="append", metavar="NAME[:N]",
                   help="instrument and count (repeatable; names: %(choices)s); default: the demo set")
    s.add_argument("--seed", type=int, default=1)
    s.add_argument("--snr", type=float, help="override SNR per pixel at the blaze peak")
    s.add_argument("--mask", metavar="CSV", help="also write the star's line mask here")
    s.add_argument("--lamp", metavar="LIST", help="write lamp exposures instead: emission lines from LIST (vacuum "
                                                "CSV), or 'invented' for a dense invented lamp")
    s.add_argument("--distort", action="append", metavar="ORDER:OFFSET:TILT",
                   help="lamp wavelength-solution error of an order, m/s (offset, edge-to-edge tilt); repeatable")
    s.add_argument("--lamp-drift", type=float, default=0.0, metavar="M_S_PER_HOUR",
                   help="linear drift of the lamp exposures, which are taken one hour apart")
    s.add_argument("--binary", action="store_true", help="observe the invented double-lined binary Vessa-12 instead")
    s.add_argument("--asymmetry", type=float, default=0.0, metavar="A",
                   help="asymmetric intrinsic lines: sigma (1-A) blueward, (1+A) redward (|A| < 0.5)")
    s.add_argument("--lab-lines", metavar="LIST", nargs="?", const="shipped",
                   help="plant these laboratory lines in the star (default: line_lists/lab_lines_optical.csv)")
    s.add_argument("--no-compress", action="store_true", help="write plain files instead of .gz")
    s.add_argument("-q", "--quiet", action="store_true")
    s.add_argument("--debug", action="store_true")
    return parser


# --------------------------------------------------------------------------- measure

def _settings_from(args, cfg):
    from lineshift.calib.barycentric import Target
    from lineshift.io.metadata import parse_dec, parse_ra
    from lineshift.measure.mask_engine import SearchSettings
    from lineshift.run.config import parse_site
    from lineshift.run.pipeline import MeasureSettings, Overrides

    t, site, mc = cfg["target"], cfg["site"], cfg["measure"]
    try:
        ra = parse_ra(args.ra) if args.ra is not None else t.get("ra")
        dec = parse_dec(args.dec) if args.dec is not None else t.get("dec")
    except LineshiftError as exc:
        raise ConfigError(f"--ra/--dec: {exc.reason}") from None
    site_xyz = parse_site(args.site) if args.site else site.get("xyz")
    vrange = _floats(args.velocity_range, 2, "--velocity-range") if args.velocity_range else mc.get("velocity_range")
    if vrange is not None and vrange[0] >= vrange[1]:
        raise ConfigError("--velocity-range: LO must be below HI")
    for name, value in (("--velocity-step", args.velocity_step), ("--box-width", args.box_width)):
        if value is not None and not value > 0:
            raise ConfigError(f"{name} must be a positive number of m/s")
    if args.workers < 1:
        raise ConfigError("--workers must be at least 1")
    frame = t.get("frame")
    telluric = False if args.no_telluric else (args.telluric or mc.get("telluric_bands"))
    if telluric is True:
        telluric = None
    if isinstance(telluric, str) and not os.path.isfile(telluric):
        raise ConfigError(f"telluric band list {telluric!r} does not exist")
    ephemeris = args.ephemeris or mc.get("ephemeris")
    if ephemeris and ephemeris != "builtin" and not os.path.isfile(ephemeris):
        raise ConfigError(f"ephemeris {ephemeris!r} does not exist (give a local JPL .bsp file)")
    equinox = t.get("equinox")
    return MeasureSettings(
        method=args.method or mc.get("method", "mask"),
        search=SearchSettings(velocity_range=vrange, velocity_step=args.velocity_step or mc.get("velocity_step"),
                              box_width=args.box_width or mc.get("box_width")),
        continuum_degree=mc.get("continuum_degree", 4),
        medium=args.medium or mc.get("medium"),
        overrides=Overrides(object=args.object or t.get("object"), ra_deg=ra, dec_deg=dec,
                            frame=frame.lower() if frame else None,
                            equinox=None if equinox is None else str(equinox), site_xyz=site_xyz),
        target=Target(pm_ra_cosdec=t.get("pm_ra_cosdec"), pm_dec=t.get("pm_dec"), parallax=t.get("parallax"),
                      radial_velocity=t.get("radial_velocity"), epoch=t.get("epoch")),
        ephemeris=ephemeris,
        telluric_bands=telluric,
        systemic_velocity=args.systemic_velocity if args.systemic_velocity is not None else mc.get("systemic_velocity"),
        keep_ccf=bool(args.plots),
        components=getattr(args, "components", 1) or 1,
    )


class _Progress:
    """tqdm bar on a terminal; a one-line log every 30 s otherwise; nothing with -q."""

    def __init__(self, total: int, quiet: bool):
        self.total, self.done, self.quiet = total, 0, quiet
        self.bar = None
        self.last = time.monotonic()
        self.start = self.last
        if not quiet and sys.stderr.isatty() and total > 1:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="spectrum", file=sys.stderr, dynamic_ncols=True)

    def update(self):
        self.done += 1
        if self.bar is not None:
            self.bar.update(1)
        elif not self.quiet and time.monotonic() - self.last > 30:
            self.last = time.monotonic()
            rate = self.done / (self.last - self.start)
            print(f"lineshift: {self.done}/{self.total} spectra ({rate:.1f}/s)", file=sys.stderr)

    def write(self, text: str):
        if self.bar is not None:
            self.bar.write(text, file=sys.stderr)
        else:
            print(text, file=sys.stderr)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def _cmd_measure(args) -> int:
    from dataclasses import replace

    from lineshift.io.linelists import read_mask
    from lineshift.io.table import table_format, write_table
    from lineshift.run import pipeline
    from lineshift.run.config import load_config
    from lineshift.run.pipeline import BatchReport, expand_inputs, measure_files, provenance

    pipeline.DEBUG = args.debug
    cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
    settings = _settings_from(args, cfg)
    mask_path = args.mask or cfg["measure"].get("mask")
    mask = read_mask(mask_path) if mask_path else None
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError("no input spectra found")
    inputs = {os.path.abspath(p) for p in paths} | ({os.path.abspath(mask_path)} if mask_path else set())
    if args.orders_table:
        table_format(args.orders_table)
        if os.path.abspath(args.orders_table) in inputs:
            raise ConfigError(f"--orders-table {args.orders_table!r} is one of the inputs")
    if args.output:
        table_format(args.output)
        if os.path.abspath(args.output) in inputs:
            raise ConfigError(f"output {args.output!r} is one of the inputs: refusing to overwrite it")
    if args.store and (os.path.abspath(args.store) in inputs
                       or (args.output and os.path.abspath(args.store) == os.path.abspath(args.output))):
        raise ConfigError(f"store {args.store!r} is one of the inputs or the output table")
    if args.scheduler and not args.scheduler.startswith(("tcp://", "tls://", "inproc://", "ucx://")):
        raise ConfigError(f"--scheduler {args.scheduler!r}: expected an address like tcp://HOST:PORT")
    if args.save_mask and os.path.abspath(args.save_mask) in inputs:
        raise ConfigError(f"--save-mask {args.save_mask!r} is one of the inputs: refusing to overwrite it")
    if mask is None:
        from lineshift.run.mask_builder import build_mask, write_mask_file

        try:
            built = build_mask(paths, settings)
        except LineshiftError as exc:
            print(f"lineshift: no --mask given and none could be built from the inputs: {exc.reason}",
                  file=sys.stderr)
            return 1
        mask = replace(built.mask, source="built from the inputs (relative zero point)")
        if not args.quiet:
            print(f"lineshift: no --mask given: built a relative mask of {len(mask)} lines from "
                  f"{len(built.paths)} of the inputs; velocities are differential (arbitrary zero point)",
                  file=sys.stderr)
        if args.save_mask:
            write_mask_file(mask, args.save_mask)
    elif args.save_mask:
        raise ConfigError("--save-mask only applies when no --mask is given")
    store = None
    if args.store:
        from lineshift.run.store import ResultStore

        store = ResultStore(args.store)
    progress = _Progress(len(paths), args.quiet)
    failures: list[str] = []

    def on_row(row):
        progress.update()
        if row["status"] != "ok":
            failures.append(row["file"])
            progress.write(f"lineshift: {row.get('_error') or row['status']}")
        elif args.plots and "_ccf" in row:
            from lineshift.plots.figures import plot_ccf

            os.makedirs(args.plots, exist_ok=True)
            plot_ccf(row, args.plots)
            row.pop("_ccf", None)

    report = BatchReport()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            rows = measure_files(paths, mask, settings, workers=args.workers, scheduler=args.scheduler,
                                 store=store, on_row=on_row, report=report)
        finally:
            progress.close()
            if store is not None:
                store.close()
    for w in {str(w.message): w for w in caught}.values():
        print(f"lineshift: warning: {str(w.message).splitlines()[0]}", file=sys.stderr)
    meta = provenance(mask, settings, report)
    if settings.components == 2:
        meta["COMPONENTS"] = ("2: rv/fwhm/contrast describe the primary (the deeper profile, kept the same star "
                              f"across the batch; {report.swaps} exchanged), rv2... the secondary")
    write_table(rows, args.output, meta)
    if args.orders_table:
        import pandas as pd

        from lineshift.io.table import write_frame

        per_order = [{"file": r["file"], **o} for r in rows for o in r.get("_orders", [])]
        write_frame(pd.DataFrame(per_order, columns=["file", "order", "wavelength", "rv", "rv_err", "n_lines",
                                                    "chi2_red", "flag"]),
                    args.orders_table, {"RV": "per-order topocentric velocity (profile width fixed), m/s"},
                    name="ORDERS")
    if args.plots:
        from lineshift.plots.figures import plot_rv_time

        os.makedirs(args.plots, exist_ok=True)
        plot_rv_time(rows, args.plots)
    if not args.quiet:
        n_ok = len(rows) - len(failures)
        skipped = f" ({report.skipped} already in the store, skipped)" if store is not None else ""
        print(f"lineshift: {n_ok} of {len(rows)} spectra have a velocity{skipped}; {report.mask_note}"
              + (f"; table written to {args.output}" if args.output else ""), file=sys.stderr)
    return 1 if failures else 0


# --------------------------------------------------------------------------- inspect

def _describe(path: str, medium) -> tuple[list[str], bool]:
    import numpy as np

    from lineshift.io.loaders import load_spectrum, read_observation

    lines = [f"file:     {path}"]
    try:
        spectrum = load_spectrum(path, medium=medium)
        obs, error = spectrum.obs, None
    except LineshiftError as exc:
        spectrum, error = None, exc
        try:
            obs = read_observation(path, medium=medium)
        except LineshiftError:
            obs = None
    if obs is None:
        lines.append(f"problem:  {error.reason if error else 'unreadable'}")
        return lines, False
    lines.append(f"layout:   {obs.layout}")
    if spectrum is not None:
        sizes = sorted({o.flux.size for o in spectrum.orders})
        lo, hi = spectrum.wavelength_range
        good = [np.isfinite(o.flux) & np.isfinite(o.var) & (o.var > 0) for o in spectrum.orders]
        snr = np.concatenate([o.flux[g] / np.sqrt(o.var[g]) for o, g in zip(spectrum.orders, good, strict=True)])
        lines.append(f"orders:   {spectrum.n_orders} ({'/'.join(map(str, sizes))} pixels)")
        lines.append(f"range:    {lo:.3f} - {hi:.3f} A (vacuum)")
        lines.append(f"snr:      median {np.median(snr):.1f} per pixel")
    lines.append(f"medium:   {obs.medium} in the file" + (" (converted to vacuum)" if obs.medium == "air" else ""))
    if obs.mjd_mid is not None:
        from astropy.time import Time

        iso = Time(obs.mjd_mid, format="mjd", scale=obs.time_scale).isot
        exp = f", exposure {obs.exptime:g} s" if obs.exptime is not None else ""
        lines.append(f"time:     {iso} {obs.time_scale.upper()} = MJD {obs.mjd_mid:.6f} (mid-exposure, "
                     f"from {obs.time_source}{exp})")
    else:
        lines.append(f"time:     missing: {obs.time_source}")
    name = f"{obs.object} " if obs.object else "(no OBJECT) "
    if obs.ra_deg is not None:
        lines.append(f"target:   {name}at RA {obs.ra_deg:.6f} deg, Dec {obs.dec_deg:+.6f} deg "
                     f"({obs.frame.upper()}{' ' + obs.equinox if obs.equinox else ''})")
    else:
        lines.append(f"target:   {name}missing RA/DEC")
    if obs.site_xyz is not None:
        from astropy.coordinates import EarthLocation

        geo = EarthLocation.from_geocentric(*obs.site_xyz, unit="m").to_geodetic()
        lines.append(f"site:     lon {geo.lon.deg:.5f} deg, lat {geo.lat.deg:+.5f} deg, "
                     f"height {geo.height.value:.1f} m")
    else:
        lines.append("site:     missing (OBSGEO-X/Y/Z or OBSGEO-L/B/H)")
    for note in obs.notes:
        lines.append(f"note:     {note}")
    if error is not None:
        lines.append(f"problem:  {error.reason}")
    lines.append(f"missing:  {', '.join(obs.missing) or 'nothing'}")
    return lines, error is None and not obs.missing


def _cmd_inspect(args) -> int:
    from lineshift.run.pipeline import expand_inputs

    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError("no input files found")
    all_ok = True
    for k, path in enumerate(paths):
        lines, ok = _describe(path, args.medium)
        all_ok &= ok
        if k:
            print()
        print("\n".join(lines))
    return 0 if all_ok else 1


# --------------------------------------------------------------------------- simulate

def _cmd_simulate(args) -> int:
    from dataclasses import replace

    from lineshift.sim import simulate as sim

    plan = []
    for item in args.instrument or ["demo-echelle:20", "demo-1d:4", "demo-table:4", "demo-text:4"]:
        name, _, count = item.partition(":")
        if name not in sim.INSTRUMENTS:
            raise ConfigError(f"--instrument {name!r}: known instruments are {', '.join(sim.INSTRUMENTS)}")
        try:
            n = int(count or 1)
        except ValueError:
            raise ConfigError(f"--instrument {item!r}: the count must be a whole number") from None
        if n < 1:
            raise ConfigError(f"--instrument {item!r}: the count must be at least 1")
        ins = sim.INSTRUMENTS[name]
        if args.snr is not None:
            ins = replace(ins, snr=args.snr)
        plan.append((ins, n))
    if args.lamp:
        return _simulate_lamps(args, plan, sim)
    star = sim.DEMO_STAR
    if not abs(args.asymmetry) < 0.5:
        raise ConfigError("--asymmetry must lie between -0.5 and 0.5")
    if args.asymmetry:
        from dataclasses import replace as dc_replace

        star = dc_replace(star, asymmetry=args.asymmetry)
    if args.lab_lines:
        from lineshift.io.linelists import DEFAULT_LAB_LINES, read_lab_lines

        lab, _ = read_lab_lines(DEFAULT_LAB_LINES if args.lab_lines == "shipped" else args.lab_lines)
        star = sim.with_lab_lines(star, lab.wavelength)
    total = sum(n for _, n in plan)
    bar = None
    if not args.quiet and sys.stderr.isatty():
        from tqdm import tqdm

        bar = tqdm(total=total, unit="spectrum", file=sys.stderr)
    rows = sim.simulate_set(args.outdir, plan, star=star, seed=args.seed, compress=not args.no_compress,
                            progress=bar.update if bar else None,
                            binary=sim.DEMO_BINARY if args.binary else None)
    if bar:
        bar.close()
    if args.mask:
        sim.write_mask(star, args.mask)
    if not args.quiet:
        print(f"lineshift: {len(rows)} spectra of {sim.DEMO_STAR.name} written to {args.outdir}; truth in "
              f"{os.path.join(args.outdir, 'truth', 'truth.csv')}" + (f"; mask {args.mask}" if args.mask else ""),
              file=sys.stderr)
    return 0


def _cmd_mask(args) -> int:
    from lineshift.calib.linefind import LineSettings
    from lineshift.io.linelists import DEFAULT_LAB_LINES, read_mask
    from lineshift.run.config import load_config
    from lineshift.run.mask_builder import MaskBuildSettings, build_mask, write_mask_file
    from lineshift.run.pipeline import expand_inputs

    cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
    for name in ("object", "velocity_range", "velocity_step", "box_width", "method", "systemic_velocity",
                 "workers", "plots"):
        setattr(args, name, None if name != "workers" else 1)
    settings = _settings_from(args, cfg)
    if not 0 < args.min_depth < 1:
        raise ConfigError("--min-depth must lie between 0 and 1")
    if args.blend_fraction < 0 or args.max_centre_error <= 0 or args.iterations < 0:
        raise ConfigError("--blend-fraction must be >= 0, --max-centre-error > 0, --iterations >= 0")
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError("no input spectra found")
    if os.path.abspath(args.output) in {os.path.abspath(p) for p in paths}:
        raise ConfigError(f"output {args.output!r} is one of the inputs: refusing to overwrite it")
    start = read_mask(args.start_mask) if args.start_mask else None
    anchor = None
    if args.anchor:
        anchor = DEFAULT_LAB_LINES if args.anchor == "shipped" else args.anchor
        from lineshift.io.linelists import read_lab_lines

        read_lab_lines(anchor)  # a bad list is a usage error, before any work
    if args.max_width_ratio <= 1:
        raise ConfigError("--max-width-ratio must exceed 1")
    build = MaskBuildSettings(lines=LineSettings(min_depth=args.min_depth, blend_fraction=args.blend_fraction,
                                                 max_centre_error=args.max_centre_error,
                                                 max_width_ratio=args.max_width_ratio),
                              iterations=args.iterations)
    try:
        res = build_mask(paths, settings, build, start_mask=start, anchor=anchor)
    except LineshiftError as exc:
        print(f"lineshift: cannot build a mask: {exc.reason}", file=sys.stderr)
        return 1
    for _path, reason in res.failures:
        print(f"lineshift: {reason}", file=sys.stderr)
    write_mask_file(res.mask, args.output)
    if args.plot:
        from lineshift.plots.figures import plot_template

        plot_template(res.template, res.found, args.plot)
    if not args.quiet:
        c = res.found.counts()
        print(f"lineshift: mask of {c['kept']} lines written to {args.output} from {len(res.paths)} spectra; "
              f"rejected {c['blend']} blend, {c['edge']} edge/bad pixel, {c['telluric']} telluric, "
              f"{c['centre']} centre error, {c['shallow']} shallow, {c['fit']} fit", file=sys.stderr)
        print(f"lineshift: expected photon-limited error {res.error_per_snr:.0f} m/s per unit SNR "
              f"({res.error_per_snr / 100:.2f} m/s at SNR 100)", file=sys.stderr)
        if res.anchor is None:
            print("lineshift: zero point is relative (the co-added template's frame)", file=sys.stderr)
        else:
            a = res.anchor
            print(f"lineshift: anchored to {a.n_matched} laboratory lines: offset {a.offset:+.1f} +- "
                  f"{a.offset_err:.1f} m/s removed", file=sys.stderr)
    return 1 if res.failures else 0


def _cmd_wavecheck(args) -> int:
    import numpy as np
    import pandas as pd

    from lineshift.calib.wavecheck import WavecheckSettings, check_spectrum, file_summary, fit_drift
    from lineshift.io.linelists import read_lab_lines
    from lineshift.io.loaders import load_spectrum
    from lineshift.io.table import table_format, write_frame
    from lineshift.run.config import load_config
    from lineshift.run.pipeline import expand_inputs

    if args.window_pixels < 3 or args.min_snr < 0 or args.clip <= 0:
        raise ConfigError("--window-pixels must be >= 3, --min-snr >= 0, --clip > 0")
    for out in (args.output, args.summary, args.drift):
        if out:
            table_format(out)
    lab, _ = read_lab_lines(args.lines)
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError("no input spectra found")
    inputs = {os.path.abspath(p) for p in paths} | {os.path.abspath(args.lines)}
    for out in (args.output, args.summary, args.drift):
        if out and os.path.abspath(out) in inputs:
            raise ConfigError(f"output {out!r} is one of the inputs: refusing to overwrite it")
    settings = WavecheckSettings(kind=args.kind, window_pixels=args.window_pixels, min_snr=args.min_snr,
                                 clip=args.clip, saturation=args.saturation, threshold_ms=args.threshold_ms,
                                 threshold_sigma=args.threshold_sigma)
    bervs: dict[str, float] = {}
    if args.barycentric:
        from lineshift.calib.barycentric import BarycentricResult, barycentric_batch
        from lineshift.run.pipeline import Observation, survey

        cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
        for name in ("object", "velocity_range", "velocity_step", "box_width", "method", "systemic_velocity",
                     "plots", "telluric"):
            setattr(args, name, None)
        args.no_telluric, args.workers = True, 1
        ms = _settings_from(args, cfg)
        obs = survey(paths, ms)
        good = [(p, o) for p, o in zip(paths, obs, strict=True) if isinstance(o, Observation)]
        for (p, _), b in zip(good, barycentric_batch([o for _, o in good], ephemeris=ms.ephemeris), strict=True):
            if isinstance(b, BarycentricResult):
                bervs[p] = b.berv
    all_lines, all_orders, drift_rows, failures = [], [], [], 0
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
        all_lines += lines
        all_orders += orders
        summ = file_summary(orders)
        drift_rows.append({"file": path, "mjd_mid": sp.obs.mjd_mid if sp.obs.mjd_mid is not None else np.nan,
                           "time_scale": sp.obs.time_scale, "offset": summ["offset"],
                           "offset_err": summ["offset_err"], "rms": summ["rms"], "n_orders": summ["n_orders"]})
        if not args.quiet:
            flagged = [r for r in orders if r["flagged"]]
            text = ", ".join(f"{r['order']} ({r['offset']:+.1f} +- {r['offset_err']:.1f})" for r in flagged) or "none"
            n_ok = sum(r["status"] == "ok" for r in lines)
            print(f"lineshift: {os.path.basename(path)}: {n_ok} of {len(lines)} lines used; global offset "
                  f"{summ['offset']:+.2f} +- {summ['offset_err']:.2f} m/s, order-to-order rms {summ['rms']:.2f} m/s; "
                  f"flagged orders: {text}", file=sys.stderr)
        if args.plots:
            from lineshift.plots.figures import _stem, plot_order_offsets, plot_residuals

            os.makedirs(args.plots, exist_ok=True)
            plot_residuals(lines, os.path.join(args.plots, f"{_stem(path)}_residuals.png"), os.path.basename(path))
            plot_order_offsets(orders, os.path.join(args.plots, f"{_stem(path)}_orders.png"), os.path.basename(path))
    meta = {"SOFTWARE": f"lineshift {__version__}", "RESIDUAL": "c (lambda_measured - lambda_lab) / lambda_lab, m/s",
            "FRAME": ("barycentric" if args.barycentric
                      else "the file's wavelength solution (no barycentric correction)"),
            "LINES": args.lines, "KIND": args.kind}
    line_cols = ["file", "order", "wavelength_lab", "wavelength_measured", "residual", "residual_err", "status",
                 "species", "pixel", "fwhm", "snr"]
    order_cols = ["file", "order", "n_lines", "offset", "offset_err", "slope", "rms", "slope_err", "chi2_red",
                  "flagged"]
    write_frame(pd.DataFrame(all_lines, columns=line_cols), args.output, meta, name="LINES")
    write_frame(pd.DataFrame(all_orders, columns=order_cols), args.summary, meta, name="ORDERS")
    if args.drift:
        drift = pd.DataFrame(drift_rows, columns=["file", "mjd_mid", "time_scale", "offset", "offset_err", "rms",
                                                  "n_orders"]).sort_values("mjd_mid", kind="stable")
        rate = None
        use = drift[np.isfinite(drift.mjd_mid) & np.isfinite(drift.offset_err)]
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


def _simulate_lamps(args, plan, sim) -> int:
    import numpy as np
    import pandas as pd

    from lineshift.io.linelists import read_lab_lines

    distortion = {}
    for item in args.distort or []:
        try:
            order, off, tilt = item.split(":")
            distortion[int(order)] = (float(off), float(tilt))
        except ValueError:
            raise ConfigError(f"--distort {item!r}: expected ORDER:OFFSET:TILT (m/s)") from None
    os.makedirs(os.path.join(args.outdir, "truth"), exist_ok=True)
    rng = np.random.default_rng(args.seed)
    rows, k = [], 0
    for ins, n in plan:
        if args.lamp == "invented":
            w = ins.wavelengths()
            lam, counts = sim.invented_lamp_lines(float(w.min()), float(w.max()), seed=args.seed)
            pd.DataFrame({"wavelength": lam}).to_csv(os.path.join(args.outdir, "truth", f"lamp_lines_{ins.name}.csv"),
                                                     index=False)
        else:
            lab, _ = read_lab_lines(args.lamp)
            lam, counts = lab.wavelength, np.full(lab.wavelength.size, 1e5)
        for j in range(n):
            hours = float(k)
            exp = sim.lamp_exposure(ins, lam, counts, rng, mjd_start=61000.7 + hours / 24, distortion=distortion,
                                    drift=args.lamp_drift * hours)
            name = f"lamp_{ins.name}_{j:03d}.fits" + ("" if args.no_compress else ".gz")
            sim.write_observation(exp, os.path.join(args.outdir, name), style=k)
            rows.append({"file": name, "mjd_mid_utc": exp.truth["mjd_mid_utc"], "drift": exp.truth["drift"],
                         "distortion": ";".join(f"{o}:{a}:{b}" for o, (a, b) in sorted(distortion.items()))})
            k += 1
    pd.DataFrame(rows).to_csv(os.path.join(args.outdir, "truth", "truth.csv"), index=False)
    if not args.quiet:
        print(f"lineshift: {len(rows)} lamp exposures written to {args.outdir}", file=sys.stderr)
    return 0


def _cmd_series(args) -> int:
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
    fit = None
    if args.fit_orbit:
        fit = ser.fit_orbit(s, [p["period"] for p in pg.peaks[:3]])
        s.flag[:] = False
        s.flag_reason[:] = ""
        ser.flag_outliers(s, fit.model, threshold=args.outlier_threshold, s_jit=fit.jitter)
        if s.flag.any():
            fit = ser.fit_orbit(s, [fit.orbit.period])
        o = fit.orbit
        offsets = dict(fit.gammas)
        summary.update(model="keplerian", period=o.period, semi_amplitude=o.semi_amplitude, eccentricity=o.eccentricity,
                       omega=o.omega, time_periastron=o.time_periastron, errors=fit.errors, gammas=fit.gammas,
                       gamma_errors=fit.gamma_errors, jitter=fit.jitter, rms=fit.rms, chi2_red=fit.chi2_red)
        if args.stellar_mass:
            summary.update(ser.derived_masses(fit, args.stellar_mass, args.stellar_mass_err),
                           stellar_mass=args.stellar_mass)
        resid_jit = fit.jitter
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
    summary["n_flagged"] = int(s.flag.sum())
    corr = ser.bisector_correlation(s, offsets)
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
                          "file": s.file.astype(str)})
    meta = {"TIME": "bjd_tdb: mid-exposure BJD in TDB (days)",
            "VELOCITY": "rv, rv_err, offset, rv_aligned in m/s; rv is the IAU 2000 Resolution C1 barycentric "
                        "radial-velocity measure cz_B as measured; rv_aligned = rv - offset "
                        "(fitted data-set zero point)",
            "FLAGS": "flag = robust outlier (kept, not deleted); flag_reason says why",
            "SOFTWARE": f"lineshift {__version__}"}
    if table_format(args.output) == "csv":
        with atomic_path(args.output) as tmp, open(tmp, "w", newline="") as fh:
            for k, v in meta.items():
                fh.write(f"# {k}: {v}\n")
            frame.to_csv(fh, index=False)
    else:
        write_frame(frame, args.output, meta, name="SERIES")
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
    if "mass_ratio" in summary:
        say(f"secondary: K2 = {summary['semi_amplitude_2']:.1f} +- {summary['semi_amplitude_2_err']:.1f} m/s; "
            f"mass ratio q = m2/m1 = K1/K2 = {summary['mass_ratio']:.4f} +- {summary['mass_ratio_err']:.4f}")
    for text in ser.CAVEATS:
        say(f"note: {text}")
    return 0


_COMMANDS = {"series": _cmd_series, "measure": _cmd_measure, "mask": _cmd_mask, "wavecheck": _cmd_wavecheck,
             "inspect": _cmd_inspect,
             "simulate": _cmd_simulate}


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    parser = _build_parser()
    raw = list(sys.argv[1:] if argv is None else argv)
    # "--velocity-range -250000,-150000": a value starting with '-' is still the option's value
    argv, k = [], 0
    while k < len(raw):
        if raw[k] == "--velocity-range" and k + 1 < len(raw) and raw[k + 1].startswith("-"):
            argv.append(f"--velocity-range={raw[k + 1]}")
            k += 2
        else:
            argv.append(raw[k])
            k += 1
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    try:
        return _COMMANDS[args.command](args)
    except (ConfigError, MaskError) as exc:
        print(f"lineshift: {exc}", file=sys.stderr)
        return 2
    except LineshiftError as exc:
        print(f"lineshift: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("lineshift: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the interpreter's flush at exit
        except OSError:
            pass
        return 0
    except Exception as exc:
        if getattr(args, "debug", False):
            raise
        print(f"lineshift: unexpected error ({type(exc).__name__}: {exc}); rerun with --debug", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
