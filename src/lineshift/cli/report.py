"""``lineshift report``: one self-contained HTML page from measure tables (and optional per-order and
calibration-check tables)."""

from __future__ import annotations

import os
import sys

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
    p.add_argument("--fit-orbit", action="store_true",
                   help="fit a Keplerian from the strongest peaks and give the rms about it")
    p.add_argument("-q", "--quiet", action="store_true")
    p.add_argument("--debug", action="store_true")


def _html_path(path: str, inputs: set[str]) -> None:
    if not path.lower().endswith((".html", ".htm")):
        raise ConfigError(f"report {path!r}: expected a .html file name")
    if os.path.abspath(path) in inputs:
        raise ConfigError(f"report {path!r} is one of the inputs: refusing to overwrite it")


def run(args) -> int:
    from lineshift.report import read_tables, write_report
    from lineshift.series.analysis import _read_table

    ins = {os.path.abspath(p) for p in [*args.tables, args.orders, args.wavecheck] if p}
    _html_path(args.output, ins)
    frame, meta = read_tables(args.tables)
    orders = _read_table(args.orders) if args.orders else None
    wave = _read_table(args.wavecheck) if args.wavecheck else None
    if orders is not None and not {"file", "order", "rv", "rv_err"} <= set(orders.columns):
        raise ConfigError("is not a per-order table (needs file, order, rv, rv_err)", path=args.orders)
    if wave is not None and not {"file", "order", "offset", "offset_err", "flagged"} <= set(wave.columns):
        raise ConfigError("is not a wavecheck per-order table (needs file, order, offset, offset_err, flagged)",
                          path=args.wavecheck)
    write_report(args.output, frame, meta, orders=orders, orders_spectrum=args.orders_spectrum, wavecheck=wave,
                 fit_orbit=args.fit_orbit)
    if not args.quiet:
        print(f"lineshift: report of {len(frame)} rows written to {args.output} "
              f"({os.path.getsize(args.output) / 1e6:.2f} MB; no CCF gallery from tables)", file=sys.stderr)
    return 0
