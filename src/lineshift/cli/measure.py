"""``lineshift measure``: spectra to barycentric velocities and BJD_TDB."""

from __future__ import annotations

import os
import sys
import warnings

from lineshift.cli.common import Progress, add_shared, check_inputs, settings_from
from lineshift.errors import ConfigError, LineshiftError


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("measure", help="spectra to barycentric velocities",
                       description="Measure barycentric radial velocities (m/s, IAU cz_B) and BJD_TDB.")
    p.add_argument("spectra", nargs="+", metavar="SPECTRUM", help="spectrum files, directories or globs")
    p.add_argument("--mask", metavar="CSV",
                   help="line mask CSV (rest vacuum wavelengths, weights); without one, a relative "
                                  "mask is built from the inputs")
    p.add_argument("--save-mask", metavar="CSV", help="write the mask built from the inputs here")
    p.add_argument("-o", "--output", metavar="TABLE",
                   help="output table (.csv, .ecsv, .fits, .parquet); stdout if absent")
    add_shared(p, "--config", "--ra", "--dec", "--object", "--site", "--medium", "--flux-time-key")
    p.add_argument("--velocity-range", metavar="LO,HI", help="barycentric search range, m/s (default -300000,300000)")
    p.add_argument("--velocity-step", type=float, metavar="M_S", help="fine CCF step, m/s (default one pixel)")
    p.add_argument("--box-width", type=float, metavar="M_S", help="mask box full width, m/s (default one pixel)")
    p.add_argument("--method", choices=("mask", "template", "lines"),
                   help="velocity engine: mask CCF, least-squares template matching, or line-by-line against the "
                        "template with an outlier-resistant combination (default: mask, or the config's)")
    p.add_argument("--components", type=int, choices=(1, 2), default=1,
                   help="2: fit two correlation profiles (double-lined binary); rv2... columns for the secondary")
    p.add_argument("--activity", action="store_true",
                   help="add the Ca II H&K S-index, log R'HK, H-alpha and Na I D indices to the table")
    p.add_argument("--b-minus-v", type=float, metavar="MAG", help="the star's B-V colour, for log R'HK")
    p.add_argument("--orders-table", metavar="TABLE",
                   help="per-order topocentric velocities, one row per file and order (.csv, .ecsv, .fits, .parquet)")
    p.add_argument("--lines-table", metavar="TABLE",
                   help="with --method lines: per-line velocities, one row per file and mask line "
                        "(.csv, .ecsv, .fits, .parquet)")
    p.add_argument("--systemic-velocity", type=float, metavar="M_S",
                   help="approximate barycentric velocity for telluric rejection (default: measured)")
    add_shared(p, "--telluric", "--no-telluric", "--ephemeris")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default: every core, at most one per 16 spectra)")
    p.add_argument("--store", metavar="FILE.sqlite",
                   help="results store: keep every result, skip inputs already measured with these settings")
    p.add_argument("--rebuild-template", action="store_true",
                   help="with --method template and --store: co-add a new template from all inputs and measure "
                        "all of them again (default: new spectra are measured against the stored template)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run the measurements on an existing Dask cluster (e.g. tcp://127.0.0.1:8786)")
    p.add_argument("--store-sync", choices=("full", "normal"), default="full",
                   help="full (default): every stored row survives power loss; normal: faster, may lose the last rows")
    p.add_argument("--plots", metavar="DIR", help="write a CCF plot per spectrum and rv_time.png here")
    p.add_argument("--report", metavar="REPORT.html",
                   help="write a self-contained HTML report of the run, with a gallery of CCFs")
    add_shared(p, "-q", "--debug")


def check_writable(directory: str, what: str, given: str) -> None:
    """Create ``directory`` if needed and prove a file can be made there, before any work starts."""
    import tempfile

    try:
        os.makedirs(directory, exist_ok=True)
        with tempfile.TemporaryFile(dir=directory):
            pass
    except OSError as exc:
        raise ConfigError(f"{what} {given!r}: cannot write in {directory!r} ({exc.strerror or exc})") from None


def unique_plot_names(paths: list[str]) -> dict[str, str]:
    """A plot file stem per input (keyed by the row's ``file``), unique even when base names repeat.

    ``a/x.fits.gz``, ``b/x.fits.gz`` and ``a/x.csv.gz`` share the stem ``x``: such inputs get the
    stem plus the first 8 hex digits of the SHA-1 of their absolute path.
    """
    import hashlib
    from collections import Counter

    from lineshift.plots.figures import _stem
    from lineshift.run.pipeline import printable

    stems = {p: printable(_stem(p)) for p in paths}
    count = Counter(stems.values())
    out = {}
    for p, stem in stems.items():
        if count[stem] > 1:
            digest = hashlib.sha1(os.path.abspath(p).encode("utf-8", "surrogateescape")).hexdigest()[:8]
            stem = f"{stem}_{digest}"
        out[printable(p)] = stem
    return out


def run(args) -> int:
    from dataclasses import replace

    from lineshift.io.linelists import read_mask
    from lineshift.io.table import table_format, write_table
    from lineshift.run import pipeline
    from lineshift.run.config import load_config
    from lineshift.run.pipeline import BatchReport, expand_inputs, measure_files, provenance

    pipeline.DEBUG = args.debug
    cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
    settings = settings_from(args, cfg)
    mask_path = args.mask or cfg["measure"].get("mask")
    mask = read_mask(mask_path) if mask_path else None
    check_inputs(args.spectra)
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError(f"no spectrum files in {', '.join(args.spectra)}")
    inputs = {os.path.abspath(p) for p in paths} | ({os.path.abspath(mask_path)} if mask_path else set())
    for opt, given in (("--orders-table", args.orders_table), ("--lines-table", args.lines_table)):
        if given:
            table_format(given)
            if os.path.abspath(given) in inputs:
                raise ConfigError(f"{opt} {given!r} is one of the inputs")
    if args.lines_table and settings.method != "lines":
        raise ConfigError("--lines-table needs --method lines")
    if args.output:
        table_format(args.output)
        if os.path.abspath(args.output) in inputs:
            raise ConfigError(f"output {args.output!r} is one of the inputs: refusing to overwrite it")
    if args.store and (os.path.abspath(args.store) in inputs
                       or (args.output and os.path.abspath(args.store) == os.path.abspath(args.output))):
        raise ConfigError(f"store {args.store!r} is one of the inputs or the output table")
    for what, target in (("output", args.output), ("--orders-table", args.orders_table),
                         ("--lines-table", args.lines_table), ("--store", args.store)):
        if target:
            check_writable(os.path.dirname(os.path.abspath(target)), what, target)
    if args.plots:
        check_writable(args.plots, "--plots", args.plots)
    plot_names = unique_plot_names(paths)
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
    keeper = None
    if args.report:
        from lineshift.cli.report import _html_path
        from lineshift.report import CCFKeeper

        _html_path(args.report, inputs)
        keeper = CCFKeeper()
    store = None
    if args.store:
        from lineshift.run.store import ResultStore

        store = ResultStore(args.store, durable=args.store_sync == "full")
    progress = Progress(len(paths), args.quiet)
    failures: list[str] = []

    def on_row(row):
        progress.update()
        if row["status"] != "ok":
            failures.append(row["file"])
            progress.write(f"lineshift: {row.get('_error') or row['status']}")
        else:
            if keeper is not None:
                keeper.add(row)
            if args.plots and "_ccf" in row:
                from lineshift.plots.figures import plot_ccf

                try:
                    plot_ccf(row, args.plots, name=plot_names.get(row["file"]))
                except Exception as exc:  # a plot never costs the table
                    progress.write(f"lineshift: note: no CCF plot for {row['file']} ({type(exc).__name__}: {exc})")
            row.pop("_ccf", None)

    report = BatchReport()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            rows = measure_files(paths, mask, settings, workers=args.workers, scheduler=args.scheduler,
                                 store=store, rebuild_template=args.rebuild_template, on_row=on_row, report=report)
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
        from lineshift.io.table import orders_frame, write_frame

        write_frame(orders_frame(rows), args.orders_table,
                    {"RV_TOPO": "rv_topo, rv_topo_err: per-order velocity in the observatory frame (no barycentric "
                                "correction; profile width fixed), m/s",
                     "WAVELENGTH": "wavelength: the order's median (mask engine: weighted mean line) wavelength, "
                                   "Angstrom (vacuum)",
                     "FLAGS": "flag = order flagged (poor fit, rejected, no fit); flag_reason says why"},
                    name="ORDERS")
    if args.lines_table:
        from lineshift.io.table import lines_frame, write_frame

        write_frame(lines_frame(rows), args.lines_table,
                    {**meta, "LINES": "one row per file and mask line; rv, rv_err: the line's barycentric velocity "
                                      "(rv_topo composed with berv), m/s; line_wavelength: rest, vacuum, Angstrom; "
                                      "line_depth: 1 - template flux at the line; outlier_probability: membership of "
                                      "the broad component of the line mixture (Artigau et al. 2022)"},
                    name="LINES")
    if args.plots:
        from lineshift.plots.figures import plot_rv_time

        try:
            plot_rv_time(rows, args.plots)
        except Exception as exc:  # the table is already written
            print(f"lineshift: note: rv_time.png not written ({type(exc).__name__}: {exc})", file=sys.stderr)
    if args.report:
        import pandas as pd

        from lineshift.report import write_report

        per_order = pd.DataFrame([{"file": r["file"], **o} for r in rows for o in r.get("_orders", [])])
        write_report(args.report, rows, meta, ccfs=keeper, orders=per_order if len(per_order) else None)
    if not args.quiet:
        n_ok = len(rows) - len(failures)
        skipped = f" ({report.skipped} already in the store, skipped)" if store is not None else ""
        print(f"lineshift: {n_ok} of {len(rows)} spectra have a velocity{skipped}; {report.mask_note}"
              + (f"; table written to {args.output}" if args.output else ""), file=sys.stderr)
    return 1 if failures else 0
