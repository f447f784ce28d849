"""Reading line masks, laboratory line lists and telluric band lists (CSV, ``#`` comments).

Mask: columns ``wavelength`` (rest, vacuum unless a ``# medium: air`` comment says air) and
``weight``; optional ``species``.  Telluric bands: ``wavelength_start``, ``wavelength_end`` (vacuum,
observatory frame, Angstrom), optional ``species``.  Every problem is a :class:`MaskError` (a usage
error, exit code 2) naming the file.
"""

from __future__ import annotations

import csv
import io
import os

import numpy as np

from lineshift.errors import MaskError
from lineshift.io import airvac
from lineshift.model import LineMask

__all__ = ["DEFAULT_LAB_LINES", "DEFAULT_TELLURIC", "read_lab_lines", "read_mask", "read_telluric_bands"]

_HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))  # the package directory
#: Telluric band list shipped with the package (a copy of ``line_lists/telluric_bands.csv``).
DEFAULT_TELLURIC = os.path.join(_HERE, "data", "telluric_bands.csv")
#: Laboratory list of strong optical lines (a copy of ``line_lists/lab_lines_optical.csv``).
DEFAULT_LAB_LINES = os.path.join(_HERE, "data", "lab_lines_optical.csv")


def _read_csv(path: str) -> tuple[list[str], list[dict[str, str]], str]:
    try:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
    except (OSError, UnicodeDecodeError) as exc:
        raise MaskError(f"cannot be read ({getattr(exc, 'strerror', None) or exc})", path=path) from None
    comments, body = [], []
    medium = "vacuum"
    for line in text.splitlines():
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            c = s.lstrip("#").strip()
            comments.append(c)
            if c.lower().replace(" ", "").startswith("medium:"):
                medium = c.split(":", 1)[1].strip().lower()
            continue
        body.append(s)
    if medium not in ("air", "vacuum"):
        raise MaskError(f"medium {medium!r} is neither air nor vacuum", path=path)
    if not body:
        raise MaskError("has no header row and no lines", path=path)
    reader = csv.DictReader(io.StringIO("\n".join(body)))
    reader.fieldnames = [f.strip().lower() for f in (reader.fieldnames or [])]
    rows = list(reader)
    return comments, rows, medium


def _floats(rows, key: str, path: str) -> np.ndarray:
    out = np.empty(len(rows))
    for i, row in enumerate(rows):
        try:
            out[i] = float(row[key])
        except (TypeError, ValueError, KeyError):
            raise MaskError(f"row {i + 1}: {key} = {row.get(key)!r} is not a number", path=path) from None
    if not np.all(np.isfinite(out)):
        raise MaskError(f"column {key} has non-finite values", path=path)
    return out


def read_mask(path: str) -> LineMask:
    """Read a line mask; air wavelengths are converted to vacuum (Morton 2000).

    Raises
    ------
    MaskError
        Unreadable file, missing columns, non-numeric or non-positive values, no lines.
    """
    path = os.fspath(path)
    comments, rows, medium = _read_csv(path)
    if not rows or "wavelength" not in rows[0] or "weight" not in rows[0]:
        raise MaskError("needs a header row with columns wavelength and weight", path=path)
    lam = _floats(rows, "wavelength", path)
    weight = _floats(rows, "weight", path)
    if np.any(lam <= 0):
        raise MaskError("has non-positive wavelengths", path=path)
    if np.any(weight < 0):
        raise MaskError("has negative weights", path=path)
    keep = weight > 0
    if not keep.any():
        raise MaskError("has no line with a positive weight", path=path)
    if medium == "air":
        try:
            lam = airvac.air_to_vacuum(lam)
        except ValueError as exc:
            raise MaskError(str(exc), path=path) from None
    species = [row.get("species", "") or "" for row in rows]
    order = np.argsort(lam[keep], kind="stable")
    sp = [s for s, k in zip(species, keep, strict=True) if k]
    return LineMask(lam[keep][order], weight[keep][order], tuple(sp[i] for i in order), path, tuple(comments))


def read_telluric_bands(path: str | None = None) -> np.ndarray:
    """Telluric bands as an (n, 2) array of vacuum wavelength intervals (Angstrom)."""
    path = os.fspath(path or DEFAULT_TELLURIC)
    _, rows, medium = _read_csv(path)
    if not rows:
        return np.zeros((0, 2))
    if "wavelength_start" not in rows[0] or "wavelength_end" not in rows[0]:
        raise MaskError("needs columns wavelength_start and wavelength_end", path=path)
    lo = _floats(rows, "wavelength_start", path)
    hi = _floats(rows, "wavelength_end", path)
    if np.any(hi <= lo):
        raise MaskError("has a band whose end is not after its start", path=path)
    if medium == "air":
        lo, hi = airvac.air_to_vacuum(lo), airvac.air_to_vacuum(hi)
    return np.column_stack((lo, hi))


def read_lab_lines(path: str) -> tuple[LineMask, np.ndarray]:
    """Laboratory line list: (lines as a unit-weight mask in vacuum, uncertainties in Angstrom).

    Columns: ``wavelength`` (vacuum unless ``# medium: air``), optional ``species`` and
    ``uncertainty`` (Angstrom; 0 when absent).
    """
    path = os.fspath(path)
    comments, rows, medium = _read_csv(path)
    if not rows or "wavelength" not in rows[0]:
        raise MaskError("needs a header row with a wavelength column", path=path)
    lam = _floats(rows, "wavelength", path)
    unc = _floats(rows, "uncertainty", path) if "uncertainty" in rows[0] else np.zeros(lam.size)
    if medium == "air":
        lam = airvac.air_to_vacuum(lam)
    order = np.argsort(lam)
    species = tuple((rows[i].get("species") or "") for i in order)
    return LineMask(lam[order], np.ones(lam.size), species, path, tuple(comments)), unc[order]
