"""One self-contained HTML page per run: header, velocity and indicator plots, periodogram, rows, CCF gallery.

May import io, measure, series, calib and plots (floors below it) and matplotlib; never run, api or cli.
"""

from lineshift.report.gallery import CCFKeeper
from lineshift.report.page import build_report, read_tables, write_report

__all__ = ["CCFKeeper", "build_report", "read_tables", "write_report"]
