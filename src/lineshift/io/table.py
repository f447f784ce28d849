"""Velocity tables: the contract columns first, written atomically in CSV, ECSV, FITS or Parquet.

Atomic: each table is written to a temporary file in the destination directory and renamed over the
destination, so a reader never sees half a table and a killed run never leaves one.
"""

from __future__ import annotations

import contextlib
import os
import sys
import tempfile

import numpy as np
import pandas as pd

from lineshift.errors import ConfigError

__all__ = ["COLUMNS", "EXTRA_COLUMNS", "FORMATS", "SB2_COLUMNS", "UNITS", "atomic_path", "rows_to_frame",
           "table_format", "write_frame", "write_table"]

#: Columns of the secondary with ``--components 2`` (shared/interface.md), right after the contract columns.
SB2_COLUMNS = ["rv2", "rv2_err", "fwhm2", "contrast2", "rv2_topo", "fwhm2_err", "contrast2_err", "flux_ratio"]

#: The contract columns (shared/interface.md), in order; extra columns follow.
COLUMNS = ["file", "object", "bjd_tdb", "rv", "rv_err", "berv", "rv_topo", "fwhm", "contrast", "snr",
           "n_lines", "status"]
EXTRA_COLUMNS = ["method", "fwhm_err", "contrast_err", "bis_span", "bis_span_err", "rv_chromatic_slope",
                 "rv_chromatic_slope_err", "n_orders", "mjd_mid", "time_scale", "time_source", "layout", "medium",
                 "n_rejected_pixels", "notes"]

FORMATS = {".csv": "csv", ".ecsv": "ecsv", ".fits": "fits", ".fit": "fits", ".parquet": "parquet"}
UNITS = {"bjd_tdb": "d", "rv": "m / s", "rv_err": "m / s", "berv": "m / s", "rv_topo": "m / s",
         "fwhm": "m / s", "fwhm_err": "m / s", "mjd_mid": "d", "bis_span": "m / s", "bis_span_err": "m / s",
         "rv2": "m / s", "rv2_err": "m / s", "rv2_topo": "m / s", "fwhm2": "m / s", "fwhm2_err": "m / s"}
_INT = ("n_lines", "n_orders", "n_rejected_pixels")


def table_format(path: str) -> str:
    """Output format from the file extension (``.csv`` when there is none)."""
    ext = os.path.splitext(path)[1].lower()
    if ext == "":
        return "csv"
    if ext not in FORMATS:
        raise ConfigError(f"output {path!r}: unknown table extension {ext!r} (use .csv, .ecsv, .fits, .parquet)")
    return FORMATS[ext]


def rows_to_frame(rows: list[dict]) -> pd.DataFrame:
    """Rows to a DataFrame with the contract columns first and the extras after."""
    sb2 = SB2_COLUMNS if any("rv2" in r for r in rows) else []
    cols = COLUMNS + sb2 + EXTRA_COLUMNS
    extra = [k for r in rows for k in r if k not in cols and not k.startswith("_")]
    cols += list(dict.fromkeys(extra))
    frame = pd.DataFrame([{c: r.get(c) for c in cols} for r in rows], columns=cols)
    for c in cols:
        if c in ("file", "object", "status", "method", "time_scale", "time_source", "layout", "medium", "notes"):
            frame[c] = frame[c].fillna("").astype(str)
        elif c in _INT:
            frame[c] = pd.array(frame[c], dtype="Int64")
        else:
            frame[c] = pd.to_numeric(frame[c], errors="coerce").astype(float)
    return frame


@contextlib.contextmanager
def atomic_path(path: str):
    """Yield a temporary path beside ``path``; on success rename it over ``path``."""
    directory = os.path.dirname(os.path.abspath(path))
    os.makedirs(directory, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{os.path.basename(path)}.", suffix=".tmp", dir=directory)
    os.close(fd)
    try:
        yield tmp
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


def write_table(rows: list[dict], path: str | None, meta: dict[str, str] | None = None) -> pd.DataFrame:
    """Write velocity rows (contract columns first) to ``path``, or CSV on stdout when ``path`` is None."""
    return write_frame(rows_to_frame(rows), path, meta)


def write_frame(frame: pd.DataFrame, path: str | None, meta: dict[str, str] | None = None,
                name: str = "VELOCITIES") -> pd.DataFrame:
    """Write any table atomically in the format its extension names (CSV on stdout without a path)."""
    meta = meta or {}
    if path is None:
        frame.to_csv(sys.stdout, index=False)
        return frame
    fmt = table_format(path)
    with atomic_path(path) as tmp:
        if fmt == "csv":
            frame.to_csv(tmp, index=False)
        elif fmt == "parquet":
            import pyarrow as pa
            import pyarrow.parquet as pq

            table = pa.Table.from_pandas(frame, preserve_index=False)
            md = dict(table.schema.metadata or {})
            md.update({f"lineshift.{k}".encode(): str(v).encode() for k, v in meta.items()})
            md[b"lineshift.units"] = str(UNITS).encode()
            pq.write_table(table.replace_schema_metadata(md), tmp)
        elif fmt == "ecsv":
            _astropy_table(frame, meta).write(tmp, format="ascii.ecsv", overwrite=True)
        else:
            from astropy.io import fits

            t = _astropy_table(frame, {})
            hdu = fits.table_to_hdu(t)
            hdu.name = name
            for k, v in meta.items():
                hdu.header.add_comment(f"{k}: {v}"[:72])
            fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(tmp, overwrite=True)
    return frame
