"""``lineshift report``: one self-contained HTML page from measure tables (and optional per-order and
calibration-check tables)."""

from __future__ import annotations

import os
import sys

from lineshift.cli.common import add_shared
from lineshift.errors import ConfigError


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("report", help="one self-contained HTML page about a run",
                       description="Write a self-contained HTML report (no network, images embedded) of "
                                   "measure tables. Tables hold no CCFs: for the CCF gallery use "
                                   "'lineshift measure ... --report REPORT.html'.")
    p.add_argument("tables", nargs="+", metavar="TABLE", help="tables written by 'lineshift measure'")
    p.add_argument("-o", "--output", required=True, metavar="REPORT.html", help="the HTML file to write")
    p.add_argument("--orders", metavar="TABLE", help="per-order table written by 'measure --orders-table'")
    p.add_argument("--orders-spectrum", metavar="FILE", help="spectrum whose per-order velocities are shown "
                                                             "(default: the first with a velocity)")
    p.add_argument("--wavecheck", metavar="ORDERS", help="per-order table written by 'wavecheck --summary'")
    p.add_argument("--mask", metavar="CSV", help="recompute the CCFs of the table's files with this line mask "
                                                 "(default settings) for the gallery")
    p.add_argument("--fit-orbit", action="store_true",
                   help="fit a Keplerian from the strongest peaks and give the rms about it")
    add_shared(p, "-q", "--debug")


def _html_path(path: str, inputs: set[str]) -> None:
    if not path.lower().endswith((".html", ".htm")):
        raise ConfigError(f"report {path!r}: expected a .html file name")
    if os.path.abspath(path) in inputs:
        raise ConfigError(f"report {path!r} is one of the inputs: refusing to overwrite it")


def run(args) -> int:
    from lineshift.report import read_tables, write_report
    from lineshift.series.analysis import _read_table

    ins = {os.path.abspath(p) for p in [*args.tables, args.orders, args.wavecheck, args.mask] if p}
    _html_path(args.output, ins)
    frame, meta = read_tables(args.tables)
    orders = _read_table(args.orders) if args.orders else None
    wave = _read_table(args.wavecheck) if args.wavecheck else None
    if orders is not None:   # the written names -> those of the measure rows
        from lineshift.io.table import orders_from_written

        orders = orders_from_written(orders)
    if orders is not None and not {"file", "order", "rv", "rv_err"} <= set(orders.columns):
        raise ConfigError("is not a per-order table (needs file, order, rv_topo, rv_topo_err)", path=args.orders)
    if wave is not None and not {"file", "order", "offset", "offset_err", "flagged"} <= set(wave.columns):
        raise ConfigError("is not a wavecheck per-order table (needs file, order, offset, offset_err, flagged)",
                          path=args.wavecheck)
    keeper, note = (_recompute(frame, args) if args.mask else (None, "no CCF gallery from tables without --mask"))
    write_report(args.output, frame, meta, ccfs=keeper, orders=orders, orders_spectrum=args.orders_spectrum,
                 wavecheck=wave, fit_orbit=args.fit_orbit, gallery_note=note if args.mask else "")
    if not args.quiet:
        print(f"lineshift: report of {len(frame)} rows written to {args.output} "
              f"({os.path.getsize(args.output) / 1e6:.2f} MB; {note})", file=sys.stderr)
    return 0


def _recompute(frame, args):
    """CCFs of the table's measured files, recomputed with the given mask and default settings."""
    from dataclasses import replace

    from lineshift.cli.common import Progress
    from lineshift.io.linelists import read_mask
    from lineshift.report import CCFKeeper
    from lineshift.run.pipeline import MeasureSettings, measure_files

    mask = read_mask(args.mask)
    ok = frame[frame["status"].astype(str) == "ok"]
    paths = [str(f) for f in ok["file"] if os.path.isfile(str(f))]
    missing = len(ok) - len(paths)
    keeper = CCFKeeper()
    if not paths:
        return keeper, f"no CCF recomputed: none of the {len(ok)} measured files was found from here"
    notes = dict(zip(ok["file"].astype(str), ok.get("notes", [""] * len(ok)), strict=True))
    progress = Progress(len(paths), args.quiet)

    def on_row(row):
        progress.update()
        if row.get("status") == "ok":
            keeper.add({**row, "notes": notes.get(row["file"], row.get("notes"))})
        row.pop("_ccf", None)

    try:
        measure_files(paths, mask, replace(MeasureSettings(), keep_ccf=True), on_row=on_row)
    finally:
        progress.close()
    note = (f"CCFs recomputed from {len(paths)} files with mask {os.path.basename(args.mask)} and default "
            "settings (the table's own settings may differ)")
    return keeper, note + (f"; {missing} measured files not found from here" if missing else "")
