"""Spectral world coordinates: FITS WCS through ``astropy.wcs``, and IRAF multispec.

FITS (Greisen & Calabretta 2002, FITS WCS Paper I; Greisen et al. 2006, Paper III)
    1-D axes ``WAVE``/``AWAV`` (linear), ``-LOG`` and ``-TAB`` (a lookup table in a BINTABLE
    extension named by ``PSi_0``, column ``PSi_1``) are evaluated by WCSLIB through
    ``astropy.wcs.WCS(header, fobj=hdul)``, so the precedence of ``CDi_j`` over ``CDELTi``/``PCi_j``,
    the default ``CRPIXi = 0`` and the unit handling are the standard's, not ours.  The IRAF
    one-dimensional form ``CTYPE1 = 'LINEAR'`` (with ``DC-FLAG = 1``: log10 wavelengths, and the unit
    from ``WAT1_001 units=``) is read too.  Units are parsed by ``astropy.units`` in the FITS format
    (IRAF's plural names such as ``angstroms`` in its generic format).

IRAF multispec (Valdes 1993, "The IRAF/NOAO Spectral World Coordinate Systems", the ``specwcs``
help page)
    ``CTYPE1 = 'MULTISPE'`` (or ``WAT0_001 = 'system=multispec'``); the attribute string is the
    values of ``WAT2_001``, ``WAT2_002``, ... each taken as exactly 68 characters (a card's
    trailing blanks belong to the string; astropy strips them, we put them back) and joined.  Each
    image line ``i`` has ``spec<i> = "ap beam dtype w1 dw nw z aplow aphigh [functions]"``:

    * ``dtype = 0`` linear: ``w = (w1 + dw (p - 1)) / (1 + z)``;
    * ``dtype = 1`` log-linear: ``w = 10 ** (w1 + dw (p - 1)) / (1 + z)``;
    * ``dtype = 2`` nonlinear: ``w = sum_i wt_i (w0_i + W_i(p)) / (1 + z)`` over the functions
      ``wt_i w0_i ftype_i [parameters] [coefficients]`` that follow, with ``ftype``
      1 Chebyshev and 2 Legendre polynomials (``order pmin pmax c_1..c_order``, argument
      ``n = (2p - (pmax + pmin)) / (pmax - pmin)``), 3 cubic spline (``npieces pmin pmax``,
      ``npieces + 3`` coefficients) and 4 linear spline (``npieces + 1`` coefficients), both on
      ``s = (p - pmin) / (pmax - pmin) npieces``, 5 pixel coordinate array (``npts``, one
      wavelength per pixel, interpolated linearly), 6 sampled array (``npts`` pairs of pixel and
      wavelength, interpolated linearly).

    ``p`` is the physical pixel, ``p = (l - LTV1) / LTM1_1`` for the logical (array) pixel ``l``
    (1 for the first pixel); only the first ``nw`` pixels of a line are valid.

The air/vacuum decision stays ours (:mod:`lineshift.io.airvac`, Morton 2000): astropy is asked
only for the wavelengths in the file's own medium.
"""

from __future__ import annotations

import functools
import math
import re
import warnings
from dataclasses import dataclass

import numpy as np

from lineshift.errors import SpectrumFormatError

__all__ = ["MultispecOrder", "angstrom_factor", "is_multispec", "multispec_orders", "wat_string",
           "wcs_wavelengths"]

_BAD = "bad wavelengths"


def _error(reason: str, path: str) -> SpectrumFormatError:
    return SpectrumFormatError(reason, path=path, status=_BAD)


# --------------------------------------------------------------------------- units

def angstrom_factor(unit, path: str = "", what: str = "unit") -> float:
    """Angstrom per unit of ``unit`` (a FITS unit string, e.g. ``Angstrom``, ``nm``, ``um``, ``m``).

    Parsed by ``astropy.units`` in the FITS format first (FITS standard 4.0, sect. 4.3), then in
    astropy's generic format, then with a plural ``s`` removed (IRAF writes ``angstroms``).  Blank
    means Angstrom.  Anything that is not a length is refused.
    """
    text = "" if unit is None else str(unit).strip()
    if not text:
        return 1.0
    factor = _length_factor(text)
    if factor is None:
        raise _error(f"{what} = {unit!r} is not a wavelength unit (Angstrom, nm, um, m)", path)
    return factor


@functools.lru_cache(maxsize=256)
def _length_factor(text: str) -> float | None:
    """Angstrom per unit of a non-blank unit string, or None when it is not a length (kept per
    string: every file of a batch names the same unit, and parsing it costs more than the rest of the
    wavelength step)."""
    import astropy.units as u

    parsed = None
    for candidate, fmt in ((text, "fits"), (text, None), (text[:-1], None) if text.endswith("s") else (None, None)):
        if candidate is None:
            continue
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                parsed = u.Unit(candidate, format=fmt) if fmt else u.Unit(candidate)
        except (ValueError, TypeError):
            continue
        if parsed.physical_type == "length":
            break
        parsed = None
    return None if parsed is None else float(parsed.to(u.AA))


# --------------------------------------------------------------------------- FITS WCS

_FITS_TYPES = ("WAVE", "AWAV")


def _ctype(header, axis: int = 1) -> str:
    return str(header.get(f"CTYPE{axis}", "") or "").strip().upper()


def wcs_wavelengths(header, n: int, path: str = "", *, hdul=None,
                    notes: list | None = None) -> tuple[np.ndarray, str]:
    """Pixel-centre wavelengths (Angstrom, in the header's medium) of axis 1 of a spectral WCS.

    ``WAVE``, ``AWAV`` with the algorithm code blank, ``-LOG`` or ``-TAB`` go through
    ``astropy.wcs`` (``hdul`` is needed for ``-TAB``: the table lives in another HDU); the IRAF
    ``LINEAR`` form is linear in CRVAL1/CRPIX1/CDELT1 (or CD1_1), log10 Angstrom with
    ``DC-FLAG = 1``.  Returns the wavelengths of pixels 1..n and the medium (``air`` for
    ``AWAV*``).  Notes (e.g. WCSLIB's fixes) are appended to ``notes``.
    """
    ctype = _ctype(header)
    base, _, algo = ctype.partition("-")
    algo = algo.strip("-")
    if not ((base in _FITS_TYPES and algo in ("", "LOG", "TAB")) or (base == "LINEAR" and not algo)):
        raise _error(f"CTYPE1 = {ctype!r} is not a wavelength axis (WAVE, AWAV, with -LOG or -TAB; "
                     "IRAF LINEAR)", path)
    if header.get("CRVAL1") is None and algo != "TAB":
        raise _error("spectral WCS lacks CRVAL1", path)
    if header.get("CD1_1") is None and header.get("CDELT1") is None and algo != "TAB":
        raise _error("spectral WCS lacks CDELT1 (or CD1_1)", path)
    for key in ("CRVAL1", "CDELT1", "CD1_1", "CRPIX1", "PC1_1"):
        value = header.get(key)
        if value is not None:
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise _error("spectral WCS keywords are not numbers", path)
            if not math.isfinite(float(value)):
                raise _error("spectral WCS keywords are not finite", path)
    if algo != "TAB":
        # the scale WCSLIB will use (Paper I sect. 2.1.2: CDi_j, else CDELTi PCi_j), checked here so
        # that a zero one gets its plain reason rather than WCSLIB's singular-matrix error
        scale = header["CD1_1"] if header.get("CD1_1") is not None else header["CDELT1"] * header.get("PC1_1", 1.0)
        if scale == 0:
            raise _error("zero dispersion (CDELT1 = 0)", path)
    world, unit = _astropy_world(header, n, path, hdul, notes)
    if base == "LINEAR":
        dc_flag = int(header.get("DC-FLAG", 0) or 0)
        if dc_flag == 1:
            world = 10.0 ** world
            unit = ""
        unit = unit or _iraf_units(header, 1)
    wave = world * angstrom_factor(unit, path, "CUNIT1")
    step = np.diff(wave)
    if algo != "TAB" and np.all(step < 0):
        raise _error("reversed dispersion (CDELT1 < 0): wavelengths must increase with pixel", path)
    return wave, ("air" if base == "AWAV" else "vacuum")


def _astropy_world(header, n: int, path: str, hdul, notes) -> tuple[np.ndarray, str]:
    """World coordinates of pixels 1..n along axis 1 and their unit, from astropy.wcs (WCSLIB)."""
    from astropy.io import fits
    from astropy.wcs import WCS

    # a one-axis copy: the spectral axis alone (other axes of a degenerate image do not matter)
    head = fits.Header()
    for card in header.cards:
        key = card.keyword
        if re.fullmatch(r"(CTYPE|CUNIT|CRVAL|CDELT|CRPIX|CROTA)1|CD1_1|PC1_1|P[SV]1_\d+|WCSNAME", key or ""):
            head[key] = card.value
    head["NAXIS"] = 1
    head["NAXIS1"] = n
    if not str(head.get("CUNIT1", "") or "").strip() and _ctype(header) != "LINEAR":
        # FITS Paper III makes a blank CUNIT1 of a WAVE axis metres; files that leave it out mean
        # Angstrom in practice (a 5000 m wavelength is no spectrum): our decision, documented
        head["CUNIT1"] = "Angstrom"
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            w = WCS(head, fobj=hdul, naxis=1)
            world = np.asarray(w.wcs_pix2world(np.arange(n, dtype=float), 0)[0], dtype=float)
            unit = str(w.wcs.cunit[0])
    except Exception as exc:  # WCSLIB reports a bad header in many ways
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise _error(f"spectral WCS cannot be evaluated (astropy.wcs: {text[:120]})", path) from None
    if notes is not None:
        for c in caught:
            text = " ".join(str(c.message).split())
            if "DATE" in text or "MJD" in text:      # WCSLIB filling MJD-OBS from DATE-OBS: not ours
                continue
            note = f"WCS: {text[:160]}"
            if note not in notes:
                notes.append(note)
    return world, unit


# --------------------------------------------------------------------------- IRAF attributes

def wat_string(header, axis: int) -> str:
    """The IRAF attribute string of ``axis``: ``WAT<axis>_001``, ``_002``, ... each as 68 characters.

    A FITS card holds 68 characters of a string value; IRAF cuts its attribute string there, so a
    blank at the end of a card is part of the string (``spec1 = "1 1 0 ..."`` may break inside a
    number or between two) and must not be dropped.
    """
    keys = sorted((k for k in header if re.fullmatch(rf"WAT{axis}_\d+", str(k))), key=lambda k: int(k.split("_")[1]))
    parts = []
    for key in keys:
        value = header[key]
        parts.append(f"{'' if value is None else str(value):<68}")
    return "".join(parts)


def _attributes(text: str) -> dict[str, str]:
    """``key = value`` and ``key = "quoted value"`` pairs of an IRAF attribute string."""
    out = {}
    for m in re.finditer(r'([A-Za-z_][\w.]*)\s*=\s*(?:"([^"]*)"|(\S+))', text):
        out[m.group(1)] = m.group(2) if m.group(2) is not None else m.group(3)
    return out


def _iraf_units(header, axis: int) -> str:
    return _attributes(wat_string(header, axis)).get("units", "")


def is_multispec(header) -> bool:
    """Whether a header carries an IRAF multispec world coordinate system."""
    if _ctype(header) == "MULTISPE":
        return True
    system = _attributes(wat_string(header, 0)).get("system", "")
    return system.lower() == "multispec"


# --------------------------------------------------------------------------- multispec functions

def _chebyshev(p, order: int, pmin: float, pmax: float, c) -> np.ndarray:
    x = (2.0 * p - (pmax + pmin)) / (pmax - pmin)
    prev, cur = np.ones_like(x), x
    total = c[0] * prev + (c[1] * cur if order > 1 else 0.0)
    for i in range(2, order):
        prev, cur = cur, 2.0 * x * cur - prev
        total = total + c[i] * cur
    return total


def _legendre(p, order: int, pmin: float, pmax: float, c) -> np.ndarray:
    x = (2.0 * p - (pmax + pmin)) / (pmax - pmin)
    prev, cur = np.ones_like(x), x
    total = c[0] * prev + (c[1] * cur if order > 1 else 0.0)
    for i in range(2, order):
        # (k + 1) P_{k+1} = (2k + 1) x P_k - k P_{k-1}, with k = i - 1
        prev, cur = cur, ((2 * i - 1) * x * cur - (i - 1) * prev) / i
        total = total + c[i] * cur
    return total


def _spline_piece(p, npieces: int, pmin: float, pmax: float):
    s = (p - pmin) / (pmax - pmin) * npieces
    j = np.clip(np.floor(s), 0, npieces - 1).astype(int)
    a = (j + 1) - s
    b = s - j
    return j, a, b


def _cubic_spline(p, npieces: int, pmin: float, pmax: float, c) -> np.ndarray:
    j, a, b = _spline_piece(p, npieces, pmin, pmax)
    x = (a ** 3, 1 + 3 * a * (1 + a * b), 1 + 3 * b * (1 + a * b), b ** 3)
    c = np.asarray(c, dtype=float)
    return sum(c[j + k] * x[k] for k in range(4))


def _linear_spline(p, npieces: int, pmin: float, pmax: float, c) -> np.ndarray:
    j, a, b = _spline_piece(p, npieces, pmin, pmax)
    c = np.asarray(c, dtype=float)
    return c[j] * a + c[j + 1] * b


_FTYPES = {1: "Chebyshev", 2: "Legendre", 3: "cubic spline", 4: "linear spline", 5: "pixel coordinate array",
           6: "sampled array"}


def _nonlinear(p: np.ndarray, words: list[str], where: str, path: str) -> np.ndarray:
    """Sum of the weighted functions ``wt w0 ftype ...`` in ``words`` at physical pixels ``p``."""
    vals = [float(w) for w in words]
    total = np.zeros_like(p)
    k = 0
    if not vals:
        raise _error(f"{where}: nonlinear dispersion (dtype 2) without a function", path)
    while k < len(vals):
        if len(vals) - k < 3:
            raise _error(f"{where}: incomplete dispersion function", path)
        wt, w0, ftype = vals[k], vals[k + 1], int(vals[k + 2])
        k += 3
        need = None
        try:
            if ftype in (1, 2):
                order, pmin, pmax = int(vals[k]), vals[k + 1], vals[k + 2]
                need = 3 + order
                c = vals[k + 3:k + need]
                if order < 1 or len(c) != order or pmax == pmin:
                    raise IndexError
                fn = _chebyshev if ftype == 1 else _legendre
                value = fn(p, order, pmin, pmax, c)
            elif ftype in (3, 4):
                npieces, pmin, pmax = int(vals[k]), vals[k + 1], vals[k + 2]
                need = 3 + npieces + (3 if ftype == 3 else 1)
                c = vals[k + 3:k + need]
                if npieces < 1 or len(c) != need - 3 or pmax == pmin:
                    raise IndexError
                fn = _cubic_spline if ftype == 3 else _linear_spline
                value = fn(p, npieces, pmin, pmax, c)
            elif ftype == 5:
                npts = int(vals[k])
                need = 1 + npts
                c = np.asarray(vals[k + 1:k + need])
                if npts < 2 or c.size != npts:
                    raise IndexError
                value = np.interp(p, np.arange(1, npts + 1, dtype=float), c)
            elif ftype == 6:
                npts = int(vals[k])
                need = 1 + 2 * npts
                pairs = np.asarray(vals[k + 1:k + need])
                if npts < 2 or pairs.size != 2 * npts:
                    raise IndexError
                xs, ys = pairs[0::2], pairs[1::2]
                order = np.argsort(xs)
                value = np.interp(p, xs[order], ys[order])
            else:
                raise _error(f"{where}: dispersion function type {ftype} is not an IRAF type "
                             f"({', '.join(f'{k} {v}' for k, v in _FTYPES.items())})", path)
        except IndexError:
            raise _error(f"{where}: {_FTYPES[ftype]} dispersion function has the wrong number of "
                         "parameters", path) from None
        total = total + wt * (w0 + value)
        k += need
    return total


@dataclass(frozen=True)
class MultispecOrder:
    """One image line of a multispec image: its wavelengths (valid pixels only) and identity."""

    line: int            # image line, 1-based (``spec<line>``)
    aperture: int
    beam: int
    wave: np.ndarray     # Angstrom, in the file's medium, pixels 1..nw
    dtype: int
    z: float


def multispec_orders(header, n_pixels: int, n_lines: int, path: str = "") -> tuple[list[MultispecOrder], list[str]]:
    """Wavelengths of every image line of an IRAF multispec header, and notes.

    Lines with ``dtype = -1`` (no dispersion) are left out with a note.  The unit comes from the
    ``units`` attribute of axis 1 (``WAT1_001``; Angstrom when absent).
    """
    attrs = _attributes(wat_string(header, 2))
    unit = _attributes(wat_string(header, 1)).get("units", "") or attrs.get("units", "")
    factor = angstrom_factor(unit, path, "WAT1 units")
    try:
        ltv = float(header.get("LTV1", 0.0) or 0.0)
        ltm = float(header.get("LTM1_1", 1.0) or 1.0)
    except (TypeError, ValueError):
        raise _error("LTV1/LTM1_1 are not numbers", path) from None
    logical = np.arange(1, n_pixels + 1, dtype=float)
    physical = (logical - ltv) / ltm
    orders, notes = [], []
    for line in range(1, n_lines + 1):
        where = f"multispec spec{line}"
        spec = attrs.get(f"spec{line}")
        if spec is None:
            raise _error(f"{where} is missing from WAT2 (image has {n_lines} lines)", path)
        words = spec.split()
        if len(words) < 9:
            raise _error(f"{where} has {len(words)} fields, needs at least 9 "
                         "(ap beam dtype w1 dw nw z aplow aphigh)", path)
        try:
            ap, beam, dtype = int(float(words[0])), int(float(words[1])), int(float(words[2]))
            w1, dw, nw, z = float(words[3]), float(words[4]), int(float(words[5])), float(words[6])
            [float(w) for w in words[7:]]
        except ValueError:
            raise _error(f"{where} has fields that are not numbers", path) from None
        if dtype == 2:
            wave = _nonlinear(physical, words[9:], where, path)
        elif dtype in (0, 1):
            wave = w1 + dw * (physical - 1.0)
            if dtype == 1:
                wave = 10.0 ** wave
        elif dtype == -1:
            notes.append(f"{where} (aperture {ap}) has no dispersion (dtype -1): left out")
            continue
        else:
            raise _error(f"{where} has dispersion type {dtype} (IRAF knows -1, 0, 1, 2)", path)
        if not -1.0 < z < 100.0:
            raise _error(f"{where} has redshift z = {z}", path)
        nw = min(nw, n_pixels) if nw > 0 else n_pixels
        wave = np.asarray(wave[:nw], dtype=float) / (1.0 + z) * factor
        orders.append(MultispecOrder(line, ap, beam, wave, dtype, z))
    if not orders:
        raise _error("multispec image has no line with a dispersion", path)
    return orders, notes
