"""Velocity tables: the contract columns first, written atomically in CSV, ECSV, FITS or Parquet.

Text tables (CSV, ECSV) carry the digits their precision supports: velocities 0.001 m/s, times
1e-8 d, everything else 1e-6; FITS and Parquet keep full double precision.  Provenance (``meta``)
reaches FITS as HISTORY lines (nothing cut), ECSV and Parquet through astropy's table metadata, and
Parquet units also as JSON (``lineshift.units``), so ``astropy.table.Table.read`` gives them back.

Atomic: each table is written to a temporary file in the destination directory and renamed over the
destination, so a reader never sees half a table and a killed run never leaves one.
"""

from __future__ import annotations

import contextlib
import json
import os
import sys
import tempfile

import numpy as np
import pandas as pd

from lineshift.errors import ConfigError
from lineshift.model import OLD_COLUMN_NAMES

__all__ = ["ACTIVITY_COLUMNS", "COLUMNS", "EXTRA_COLUMNS", "FORMATS", "LINES_COLUMNS", "OLD_NAMES", "SB2_COLUMNS",
           "UNITS", "atomic_path", "csv_header", "lines_frame", "printable", "require_parquet", "rows_to_frame",
           "table_format", "write_frame", "write_table"]

#: Columns of the secondary with ``--components 2`` (shared/interface.md), right after the contract columns.
SB2_COLUMNS = ["rv2", "rv2_err", "fwhm2", "contrast2", "rv2_topo", "fwhm2_err", "contrast2_err", "flux_ratio"]

#: Activity-index columns with ``--activity`` (lineshift.measure.activity), after the extra columns.
ACTIVITY_COLUMNS = ["s_index", "s_index_err", "log_rhk", "log_rhk_err", "halpha_index", "halpha_index_err",
                    "nad_index", "nad_index_err"]

#: The contract columns (shared/interface.md), in order; extra columns follow.
COLUMNS = ["file", "object", "bjd_tdb", "rv", "rv_err", "berv", "rv_topo", "fwhm", "contrast", "snr",
           "n_lines", "status"]
EXTRA_COLUMNS = ["method", "fwhm_err", "contrast_err", "bisector_span", "bisector_span_err", "rv_chromatic_slope",
                 "rv_chromatic_slope_err", "n_orders", "mjd_mid", "time_scale", "time_source", "layout", "medium",
                 "n_rejected_pixels", "notes"]

#: Columns of the ``--orders-table`` (docs/reference.md).
ORDERS_COLUMNS = ["file", "order", "wavelength", "rv_topo", "rv_topo_err", "n_lines", "chi2_red", "flag",
                  "flag_reason"]


def orders_frame(rows):
    """The per-order table of measured ``rows``: each row's ``_orders`` under the written names.

    In the measure rows an order carries ``rv``/``rv_err`` (observatory frame) and ``flag`` (the reason text,
    empty when good); the written table says ``rv_topo``/``rv_topo_err`` and splits the flag into a boolean
    ``flag`` and ``flag_reason``.  :func:`orders_from_written` is the exact inverse.
    """
    import pandas as pd

    per_order = [{"file": r["file"], "order": o.get("order"), "wavelength": o.get("wavelength"),
                  "rv_topo": o.get("rv"), "rv_topo_err": o.get("rv_err"), "n_lines": o.get("n_lines"),
                  "chi2_red": o.get("chi2_red"), "flag": bool(o.get("flag")), "flag_reason": o.get("flag") or ""}
                 for r in rows for o in r.get("_orders", [])]
    return pd.DataFrame(per_order, columns=ORDERS_COLUMNS)


def orders_from_written(frame):
    """A written per-order table back under the names of the measure rows (inverse of :func:`orders_frame`)."""
    if "rv_topo" not in frame.columns:
        return frame
    return frame.drop(columns=["rv", "rv_err", "flag"], errors="ignore").rename(
        columns={"rv_topo": "rv", "rv_topo_err": "rv_err", "flag_reason": "flag"})


#: Columns of the ``--lines-table`` (line-by-line engine, docs/reference.md).
LINES_COLUMNS = ["file", "bjd_tdb", "line_wavelength", "species", "line_depth", "rv", "rv_err", "rv_topo",
                 "rv_topo_err", "outlier_probability", "n_pixels", "chi2_red"]


def lines_frame(rows):
    """The per-line table of measured ``rows`` (``--method lines``): one row per spectrum and mask line."""
    import pandas as pd

    per_line = [{"file": r["file"], "bjd_tdb": r.get("bjd_tdb"), "line_wavelength": ln.get("wavelength"),
                 "species": ln.get("species") or "", "line_depth": ln.get("depth"), "rv": ln.get("rv"),
                 "rv_err": ln.get("rv_err"), "rv_topo": ln.get("rv_topo"), "rv_topo_err": ln.get("rv_topo_err"),
                 "outlier_probability": ln.get("outlier_probability"), "n_pixels": ln.get("n_pixels"),
                 "chi2_red": ln.get("chi2_red")}
                for r in rows for ln in (r.get("_lines") or [])]
    frame = pd.DataFrame(per_line, columns=LINES_COLUMNS)
    for c in LINES_COLUMNS:
        if c in ("file", "species"):
            frame[c] = frame[c].fillna("").astype(str)
        elif c == "n_pixels":
            frame[c] = pd.array(frame[c], dtype="Int64")
        else:
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype(float)
    return frame


FORMATS = {".csv": "csv", ".ecsv": "ecsv", ".fits": "fits", ".fit": "fits", ".parquet": "parquet"}
#: Old column names still accepted on reading (old name -> current name); dropped one release later.
OLD_NAMES = OLD_COLUMN_NAMES

#: Unit of every physical column of every table lineshift writes (one meaning per name, so one unit per name;
#: docs/reference.md lists them).  Columns not named here are dimensionless, counts or text.
UNITS = {"bjd_tdb": "d", "rv": "m / s", "rv_err": "m / s", "berv": "m / s", "rv_topo": "m / s",
         "fwhm": "m / s", "fwhm_err": "m / s", "mjd_mid": "d", "bisector_span": "m / s",
         "bisector_span_err": "m / s", "rv_chromatic_slope": "m / s", "rv_chromatic_slope_err": "m / s",
         "rv2": "m / s", "rv2_err": "m / s", "rv2_topo": "m / s", "fwhm2": "m / s", "fwhm2_err": "m / s",
         "rv_topo_err": "m / s", "wavelength": "Angstrom", "line_wavelength": "Angstrom",
         "wavelength_lab": "Angstrom", "wavelength_measured": "Angstrom", "residual": "m / s",
         "residual_err": "m / s", "pixel": "pix", "offset": "m / s", "offset_err": "m / s", "slope": "m / s",
         "slope_err": "m / s", "rms": "m / s", "offset_from_global": "m / s", "rv_aligned": "m / s"}
_INT = ("n_lines", "n_orders", "n_rejected_pixels", "n_pixels")
#: Text-table digits (decimals): 0.001 m/s for velocities, 1e-8 d for times, 1e-6 otherwise.
_TEXT_DECIMALS = {"m / s": 3, "d": 8}
_VELOCITY_LIKE = ("rv_chromatic_slope", "rv_chromatic_slope_err")


def _decimals(name: str) -> int:
    return 3 if name in _VELOCITY_LIKE else _TEXT_DECIMALS.get(UNITS.get(name, ""), 6)


def _text_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy with float columns rounded to the decimals of :func:`_decimals`."""
    out = frame.copy()
    for c in out.columns:
        if pd.api.types.is_float_dtype(out[c]):
            out[c] = out[c].round(_decimals(c))
    return out


def csv_header(frame: pd.DataFrame, meta: dict) -> str:
    """``# KEY: value`` provenance lines and a ``# UNITS:`` line for a CSV table (read back with comment='#')."""
    lines = [f"# {k}: {' '.join(str(v).split())}\n" for k, v in meta.items()]
    units = [f"{c} [{UNITS[c]}]" for c in frame.columns if c in UNITS]
    if units:
        lines.append(f"# UNITS: {', '.join(units)}\n")
    return "".join(lines)


def table_format(path: str) -> str:
    """Output format from the file extension (``.csv`` when there is none)."""
    ext = os.path.splitext(path)[1].lower()
    if ext == "":
        return "csv"
    if ext not in FORMATS:
        raise ConfigError(f"output {path!r}: unknown table extension {ext!r} (use .csv, .ecsv, .fits, .parquet)")
    if FORMATS[ext] == "parquet":
        require_parquet(path)
    return FORMATS[ext]


def require_parquet(path: str) -> None:
    """Parquet needs the optional pyarrow: a usage error naming the file when it is not installed."""
    import importlib.util

    if importlib.util.find_spec("pyarrow") is None:
        raise ConfigError(f"{path!r}: Parquet tables need pyarrow, which is not installed "
                          "(pip install pyarrow, or pip install -e \".[parquet]\"); use .csv, .ecsv or .fits")


def rows_to_frame(rows: list[dict]) -> pd.DataFrame:
    """Rows to a DataFrame with the contract columns first and the extras after."""
    sb2 = SB2_COLUMNS if any("rv2" in r for r in rows) else []
    act = ACTIVITY_COLUMNS if any("s_index" in r for r in rows) else []
    cols = COLUMNS + sb2 + EXTRA_COLUMNS + act
    extra = [k for r in rows for k in r if k not in cols and not k.startswith("_")]
    cols += list(dict.fromkeys(extra))
    rows = [{OLD_NAMES.get(k, k): v for k, v in r.items()} for r in rows]  # rows kept in an older store
    frame = pd.DataFrame([{c: r.get(c) for c in cols} for r in rows], columns=cols)
    for c in cols:
        if c in ("file", "object", "status", "method", "time_scale", "time_source", "layout", "medium", "notes"):
            frame[c] = frame[c].fillna("").astype(str)
        elif c in _INT:
            frame[c] = pd.array(frame[c], dtype="Int64")
        else:
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype(float)
    return frame


#: A temporary file of ours older than this (s) is left by a killed write and is removed.
STALE_TMP_AGE = 3600.0


def _clean_stale(directory: str, name: str) -> None:
    import glob
    import time

    for old in glob.glob(os.path.join(glob.escape(directory), f".{glob.escape(name)}.*.tmp")):
        try:
            if time.time() - os.path.getmtime(old) > STALE_TMP_AGE:
                os.unlink(old)
        except OSError:
            pass  # another writer's file, or already gone


def _umask() -> int:
    """The process umask, read without changing it where /proc allows (Linux)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except OSError:
        pass
    old = os.umask(0o022)
    os.umask(old)
    return old


@contextlib.contextmanager
def atomic_path(path: str):
    """Yield a temporary path beside ``path``; on success rename it over ``path``."""
    directory = os.path.dirname(os.path.abspath(path))
    os.makedirs(directory, exist_ok=True)
    _clean_stale(directory, os.path.basename(path))
    fd, tmp = tempfile.mkstemp(prefix=f".{os.path.basename(path)}.", suffix=".tmp", dir=directory)
    os.close(fd)
    try:
        yield tmp
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600; a table is as readable as any new file
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _astropy_table(frame: pd.DataFrame, meta: dict):
    from astropy.table import Table

    t = Table()
    for c in frame.columns:
        col = frame[c]
        if pd.api.types.is_bool_dtype(col):
            t[c] = col.to_numpy(dtype=bool)
        elif c in _INT:
            t[c] = np.ma.masked_array(col.fillna(-1).to_numpy(dtype=np.int64), mask=col.isna().to_numpy())
        elif pd.api.types.is_numeric_dtype(col):
            t[c] = col.to_numpy(dtype=float)
        else:
            t[c] = col.to_numpy(dtype=str)
        if c in UNITS:
            t[c].unit = UNITS[c]
    t.meta.update(meta)
    return t


def printable(text: str) -> str:
    """``text`` with any undecodable file-name bytes (surrogate escapes) written as ``\\xNN``.

    File names are bytes on POSIX; Python decodes the ones that are not UTF-8 with surrogate
    escapes, which no table format or SQLite can encode.  This is the documented form of such a
    name in every output.
    """
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return text.encode("utf-8", "surrogateescape").decode("utf-8", "backslashreplace")
    return text


def _printable_frame(frame: pd.DataFrame, convert=printable) -> pd.DataFrame:
    """A copy of ``frame`` whose text cells went through ``convert`` (the frame itself when none changes)."""
    out = None
    for c in frame.columns:
        if frame[c].dtype == object or pd.api.types.is_string_dtype(frame[c]):
            new = [convert(v) if isinstance(v, str) else v for v in frame[c]]
            if any(a is not b for a, b in zip(new, frame[c], strict=True)):
                out = frame.copy() if out is None else out
                out[c] = pd.Series(new, index=frame.index, dtype=frame[c].dtype)
    return frame if out is None else out


def _ascii(text: str) -> str:
    """``text`` with every non-ASCII byte of its UTF-8 form (or undecodable name byte) as ``\\xNN``.

    FITS strings are ASCII (FITS standard 4.0, sect. 7.3.3.1): a file name such as ``café.fits``
    appears there as ``caf\\xc3\\xa9.fits``, the bytes the file system holds.
    """
    return text.encode("utf-8", "surrogateescape").decode("ascii", "backslashreplace")


def write_table(rows: list[dict], path: str | None, meta: dict[str, str] | None = None) -> pd.DataFrame:
    """Write velocity rows (contract columns first) to ``path``, or CSV on stdout when ``path`` is None."""
    return write_frame(rows_to_frame(rows), path, meta)


def write_frame(frame: pd.DataFrame, path: str | None, meta: dict[str, str] | None = None,
                name: str = "VELOCITIES") -> pd.DataFrame:
    """Write any table atomically in the format its extension names (CSV on stdout without a path)."""
    meta = {k: printable(v) if isinstance(v, str) else v for k, v in (meta or {}).items()}
    frame = _printable_frame(frame)
    if path is None:
        _text_frame(frame).to_csv(sys.stdout, index=False)
        return frame
    fmt = table_format(path)
    with atomic_path(path) as tmp:
        if fmt == "csv":
            with open(tmp, "w", newline="") as fh:
                fh.write(csv_header(frame, meta))
                _text_frame(frame).to_csv(fh, index=False)
        elif fmt == "parquet":
            import pyarrow.parquet as pq

            _astropy_table(frame, {str(k): str(v) for k, v in meta.items()}).write(
                tmp, format="parquet", overwrite=True)
            table = pq.read_table(tmp)
            md = dict(table.schema.metadata or {})
            md.update({f"lineshift.{k}".encode(): str(v).encode() for k, v in meta.items()})
            md[b"lineshift.units"] = json.dumps({c: u for c, u in UNITS.items() if c in frame.columns}).encode()
            pq.write_table(table.replace_schema_metadata(md), tmp)
        elif fmt == "ecsv":
            t = _astropy_table(_text_frame(frame), meta)
            t.write(tmp, format="ascii.ecsv", overwrite=True)
        else:
            import textwrap

            from astropy.io import fits

            t = _astropy_table(_printable_frame(frame, _ascii), {})
            hdu = fits.table_to_hdu(t)
            hdu.name = name
            for k, v in meta.items():
                for line in textwrap.wrap(_ascii(f"{k}: {v}"), 72, break_long_words=True, drop_whitespace=False):
                    hdu.header.add_history(line)
            fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp, overwrite=True)
    return frame
