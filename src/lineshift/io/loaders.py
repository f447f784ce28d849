"""Spectrum loaders: any supported file to orders of (vacuum wavelength, flux, variance).

The layout is detected from the file's content, not its name (``shared/interface.md``):

``wcs-1d``       FITS 1-D image with a spectral WCS (FITS WCS Paper III, Greisen et al. 2006),
                 evaluated by astropy.wcs (:mod:`.wcs`): CTYPE1 ``WAVE``, ``AWAV``, with ``-LOG``
                 or ``-TAB``, and IRAF ``LINEAR``.  Uncertainty from an image extension ``ERR``/``ERROR``/``SIGMA``/
                 ``UNCERT`` (standard deviation), ``VAR``/``VARIANCE`` or ``IVAR``.
``table``        FITS binary table with wavelength / flux / uncertainty columns.  Array-valued
                 columns give one order per row.
``multi-order``  FITS image extensions ``FLUX`` and ``WAVE`` (orders x pixels), ``ERR`` (or
                 ``VAR``/``IVAR``), optional ``BLAZE``; metadata in the primary header.
``multispec``    IRAF multispec image (``WAT2_nnn`` dispersion functions, :mod:`.wcs`): one order
                 per image line; in the 3-D form the ``sigma`` band (``BANDIDn``) is the uncertainty.
``text``         CSV or whitespace table with a header row naming the columns; ``# KEY = value``
                 comment lines are read as header keywords, ``# medium: air`` marks air
                 wavelengths; an optional ``order`` column splits orders.

gzip-compressed files are recognised by their magic bytes.  astropy.wcs gives the wavelengths in
the file's medium; the air/vacuum decision is ours (``AWAV*`` is air; specutils reads ``AWAV`` like
``WAVE`` and leaves no air flag), and air wavelengths are converted to vacuum on load
(:mod:`.airvac`, Morton 2000).
"""

from __future__ import annotations

import gzip
import hashlib
import io
import math
import os
import warnings
import zlib
from collections.abc import Callable
from dataclasses import replace

import numpy as np

from lineshift.errors import LineshiftError, MetadataError, SpectrumFormatError
from lineshift.io import airvac, plainfits
from lineshift.io.metadata import read_site, read_spec_frame, read_target, read_time
from lineshift.io.wcs import angstrom_factor, is_multispec, multispec_orders, wcs_wavelengths
from lineshift.model import Observation, Order, Spectrum

__all__ = ["load_spectrum", "read_observation", "wcs_wavelengths"]

WAVE_NAMES = ("WAVE", "WAVELENGTH", "LAMBDA", "LAM")
FLUX_NAMES = ("FLUX",)
STD_NAMES = ("ERR", "ERROR", "SIGMA", "UNCERT")
VAR_NAMES = ("VAR", "VARIANCE")
IVAR_NAMES = ("IVAR",)
_POISSON_NOTE = "no uncertainty given: Poisson variance from the counts assumed"


# --------------------------------------------------------------------------- file access

#: Largest input accepted, in bytes after decompression (default 1 GiB, well below the memory of
#: a machine that runs two workers); ``LINESHIFT_MAX_INPUT_BYTES`` in the environment changes it.
MAX_INPUT_BYTES = int(float(os.environ.get("LINESHIFT_MAX_INPUT_BYTES", 2**30)))
#: Most pixels (array elements of all image extensions together) accepted from one file.
MAX_PIXELS = int(float(os.environ.get("LINESHIFT_MAX_PIXELS", 100_000_000)))


#: Longest wavelength accepted (Angstrom): 1 mm, past the far infrared (common practice: optical
#: and infrared spectrographs stop well below 1e6 A = 100 micron).
MAX_WAVELENGTH = 1e7


def _too_large(path: str, what: str) -> SpectrumFormatError:
    return SpectrumFormatError(f"{what} exceeds the input limit of {MAX_INPUT_BYTES:,} bytes "
                               "(LINESHIFT_MAX_INPUT_BYTES)", path=path, status="too large")


def _read_bytes(path: str, digest: list | None = None) -> bytes:
    """The file's bytes (unpacked when gzip); ``digest``: a list the SHA-256 (hex) of the bytes as read,
    before any unpacking, is appended to (the results store's content hash, :func:`.store.content_hash`)."""
    try:
        with open(path, "rb") as fh:
            size = os.fstat(fh.fileno()).st_size
            if size > MAX_INPUT_BYTES:
                raise _too_large(path, "the file")
            # read(n) allocates n bytes up front: ask for what the file holds (one byte more shows a
            # file that grew meanwhile; a size of 0 is a pipe or special file: read it to the limit)
            raw = fh.read(size + 1 if size else MAX_INPUT_BYTES + 1)
            if size and len(raw) > size:
                raw += fh.read(MAX_INPUT_BYTES + 1 - len(raw))
    except IsADirectoryError:
        raise SpectrumFormatError("is a directory, not a spectrum", path=path) from None
    except OSError as exc:
        raise SpectrumFormatError(f"cannot be read ({exc.strerror or exc})", path=path) from None
    if len(raw) > MAX_INPUT_BYTES:
        raise _too_large(path, "the file")
    if digest is not None:
        digest.append(hashlib.sha256(raw).hexdigest())
    if raw[:2] == b"\x1f\x8b":
        try:
            # streamed: stop as soon as the limit is passed, never unpack a bomb in full
            with gzip.GzipFile(fileobj=io.BytesIO(raw)) as gz:
                raw = gz.read(MAX_INPUT_BYTES + 1)
        except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
            raise SpectrumFormatError(f"is a damaged gzip file ({exc})", path=path) from None
        if len(raw) > MAX_INPUT_BYTES:
            raise _too_large(path, "the decompressed content")
    if not raw.strip():
        raise SpectrumFormatError("is empty", path=path, status="empty file")
    return raw


def _is_fits(raw: bytes) -> bool:
    return raw[:9] == b"SIMPLE  ="


def _check_pixels(hdus, path: str) -> None:
    """Refuse a file whose image extensions together hold more than :data:`MAX_PIXELS` elements."""
    pixels = sum(math.prod(h.header.get(f"NAXIS{i}", 0) or 0 for i in range(1, h.header.get("NAXIS", 0) + 1))
                 for h in hdus if h.header.get("NAXIS", 0))
    if pixels > MAX_PIXELS:
        raise SpectrumFormatError(f"holds {pixels:,} pixels, more than the limit of {MAX_PIXELS:,} "
                                  "(LINESHIFT_MAX_PIXELS)", path=path, status="too large")


#: Read plain multi-order FITS files with :mod:`.plainfits` (astropy.io.fits reads every other
#: file, and all files when this is False; tests/test_plainfits.py runs both on the same files).
PLAIN_FITS = True


def _plain_multi_order(hdus, path: str):
    """The HDUs of a plain file (:mod:`.plainfits`) in the multi-order layout, else None."""
    if hdus is None:
        return None
    flux_ext, wave_ext = _find_ext(hdus, ("FLUX",)), _find_ext(hdus, ("WAVE", "WAVELENGTH"))
    if flux_ext is None or wave_ext is None:
        return None
    _check_pixels(hdus, path)
    return hdus


def _plain_headers(path: str):
    """The HDUs of a plain, uncompressed multi-order FITS file, from its header blocks alone; None
    for any other file (which is then read in full, with the checks and messages of that path)."""
    try:
        with open(path, "rb") as fh:
            size = os.fstat(fh.fileno()).st_size
            if not 0 < size <= MAX_INPUT_BYTES or fh.read(9) != b"SIMPLE  =":
                return None

            def read(offset: int, n: int) -> bytes:
                fh.seek(offset)
                return fh.read(n)

            return _plain_multi_order(plainfits.scan(read, size), path)
    except OSError:
        return None


def _open_fits(raw: bytes, path: str, *, read_data: bool = True):
    from astropy.io import fits

    if len(raw) % 2880:
        raise SpectrumFormatError(
            f"is truncated ({len(raw)} bytes is not a whole number of 2880-byte FITS blocks)",
            path=path, status="truncated")
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            hdul = fits.open(io.BytesIO(raw), memmap=False, lazy_load_hdus=False)
            _check_pixels(hdul, path)
            if read_data:
                for hdu in hdul:
                    _ = hdu.data  # force reading: a damaged data unit fails here, not later
    except SpectrumFormatError:
        raise
    except Exception as exc:  # astropy raises many types for damaged files
        raise SpectrumFormatError(f"is not a readable FITS file ({_short(exc)})", path=path) from None
    notes = []
    for w in caught:
        text = _short(w.message)
        if any(word in text.lower() for word in _FATAL_WARNINGS):
            raise SpectrumFormatError(f"is not a readable FITS file ({text})", path=path, status="truncated")
        note = f"FITS: {text}"
        if note not in notes:
            notes.append(note)
    return hdul, notes


#: Warnings while opening that do mean the data are damaged (everything else becomes a note).
_FATAL_WARNINGS = ("truncated", "unexpected end of file")


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:160]


def _header_getter(*headers) -> Callable[[str], object]:
    """First value found for a keyword across headers (blank strings count as absent)."""

    def get(key: str):
        for h in headers:
            if h is not None and key in h:
                value = h[key]
                if value is None or (isinstance(value, str) and not value.strip()):
                    continue
                if type(value).__name__ == "Undefined":
                    continue
                return value
        return None

    return get


def _wave_factor(unit, path: str, what: str) -> float:
    return angstrom_factor(unit, path, what)


# --------------------------------------------------------------------------- public API

def read_observation(path: str, *, medium: str | None = None, flux_time_key: str | None = None) -> Observation:
    """Read only the observation record of a file (cheap: no arrays are validated)."""
    return _load(path, medium=medium, arrays=False, time_key=flux_time_key)[0]


def load_spectrum(path: str, *, medium: str | None = None, flux_time_key: str | None = None,
                  digest: list | None = None) -> Spectrum:
    """Load a spectrum file of any supported layout.

    Parameters
    ----------
    path : str
        The file.
    medium : {'air', 'vacuum'} or None
        Override the medium of the file's wavelengths (config / ``--medium``).
    flux_time_key : str or None
        Header keyword holding a flux-weighted mid-exposure time (an exposure meter's), used
        before the other time rules when the file has it (config / ``--flux-time-key``).
    digest : list, optional
        The SHA-256 (hex) of the file's bytes is appended to it as soon as they are read (before
        they are interpreted, so a file that then fails still has its hash): the file is read once
        for both.

    Returns
    -------
    Spectrum
        Orders with vacuum wavelengths in Angstrom, flux and variance, plus the observation record.

    Raises
    ------
    SpectrumFormatError
        Not a spectrum in a supported layout, truncated, or with unusable arrays.
    MetadataError
        A metadata keyword is present but malformed (missing metadata is not an error here).
    """
    obs, orders = _load(path, medium=medium, arrays=True, time_key=flux_time_key, digest=digest)
    return Spectrum(obs, tuple(orders))


def _load(path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None, digest: list | None = None):
    path = os.fsdecode(os.fspath(path))  # bytes names (any bytes) as str with surrogate escapes
    # the observation record of a plain FITS file needs its header blocks only
    hdul = _plain_headers(path) if PLAIN_FITS and not arrays else None
    raw = _read_bytes(path, digest) if hdul is None else b""
    if hdul is not None or _is_fits(raw):
        if hdul is None and PLAIN_FITS:
            hdul = _plain_multi_order(plainfits.scan_bytes(raw), path)
        fits_notes: list[str] = []
        if hdul is None:
            hdul, fits_notes = _open_fits(raw, path, read_data=arrays)
        try:
            obs, orders = _load_fits(hdul, path, medium=medium, arrays=arrays, time_key=time_key)
            if fits_notes:
                obs = replace(obs, notes=(*fits_notes, *obs.notes))
            return obs, orders
        except LineshiftError:
            raise
        except Exception as exc:  # any surprise inside a damaged header is still a format error
            raise SpectrumFormatError(f"could not be interpreted ({_short(exc)})", path=path) from None
    if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise SpectrumFormatError("is UTF-16 text; text tables are read as UTF-8 (or ASCII): convert it",
                                  path=path, status="not a spectrum")
    if b"\x00" in raw[:65536]:
        raise SpectrumFormatError("is neither FITS nor a text table", path=path)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise SpectrumFormatError(f"is neither FITS nor UTF-8 text (byte 0x{raw[exc.start]:02x} at offset "
                                  f"{exc.start}); text tables are read as UTF-8 (or ASCII)",
                                  path=path) from None
    try:
        return _load_text(text, path, medium=medium, arrays=arrays, time_key=time_key)
    except LineshiftError:
        raise
    except Exception as exc:  # a surprise inside a damaged text file is still a format error
        raise SpectrumFormatError(f"could not be interpreted ({_short(exc)})", path=path) from None


# --------------------------------------------------------------------------- FITS

def _has_data(hdu) -> bool:
    """Whether an HDU has a non-empty data unit, from its header alone (no data is read)."""
    naxis = int(hdu.header.get("NAXIS", 0) or 0)
    return naxis > 0 and all(int(hdu.header.get(f"NAXIS{k}", 0) or 0) > 0 for k in range(1, naxis + 1))


def _find_ext(hdul, names):
    for hdu in hdul[1:]:
        if hdu.name.upper() in names and _has_data(hdu):
            return hdu
    return None


_UNCERTAINTY_KINDS = ((STD_NAMES, "std"), (VAR_NAMES, "var"), (IVAR_NAMES, "ivar"))


def _variance(find, flux: np.ndarray, notes: list) -> np.ndarray:
    """Variance from the first uncertainty found (std, then variance, then inverse variance names);
    Poisson variance from the counts, with a note, when there is none.

    ``find(names)`` returns the array stored under one of ``names``, or None.
    """
    for names, kind in _UNCERTAINTY_KINDS:
        arr = find(names)
        if arr is not None:
            return _to_variance(arr, kind)
    notes.append(_POISSON_NOTE)
    return np.where(flux > 0, flux, np.nan)


def _uncertainty_from_ext(hdul, flux: np.ndarray, path: str, notes: list):
    def find(names):
        hdu = _find_ext(hdul, names)
        if hdu is None:
            return None
        if hdu.data.shape != flux.shape:
            raise SpectrumFormatError(
                f"extension {hdu.name} has shape {hdu.data.shape}, flux has {flux.shape}", path=path)
        return hdu.data

    return _variance(find, flux, notes)


def _to_variance(arr, kind: str) -> np.ndarray:
    """Variance (a new float64 array) from a standard deviation (``std``), a variance (``var``) or an
    inverse variance (``ivar``); NaN where the value given is not positive.

    The same as ``np.where(a > 0, a * a, nan)`` etc. on ``a = arr`` as float64, computed into one new
    array: the ufuncs convert a narrower or byte-swapped input to float64 on the fly (exactly).
    """
    arr = np.asarray(arr)
    if arr.dtype.kind not in "fiu":
        arr = np.asarray(arr, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "std":
            out = np.multiply(arr, arr, dtype=float)
        elif kind == "var":
            out = np.array(arr, dtype=float)
        else:
            out = np.divide(1.0, arr, dtype=float)
        bad = arr > 0
    np.logical_not(bad, out=bad)
    np.copyto(out, np.nan, where=bad)
    return out


def _saturated(get, flux: np.ndarray, var: np.ndarray, path: str, notes: list) -> np.ndarray:
    """Variance made NaN (a bad pixel) where the flux reaches the header's ``SATURATE`` level.

    ``SATURATE`` is the detector's saturation level in the flux's unit (common practice for CCD
    headers); preparation then masks these pixels with their neighbours (:mod:`lineshift.measure.badpixels`).
    """
    level = get("SATURATE")
    if level is None:
        return var
    try:
        level = float(level)
    except (TypeError, ValueError):
        raise MetadataError(f"SATURATE = {level!r} is not a number", path=path) from None
    if not math.isfinite(level) or level <= 0:
        raise MetadataError(f"SATURATE = {level!r} is not a positive number", path=path)
    with np.errstate(invalid="ignore"):
        hit = flux >= level
    if hit.any():
        notes.append(f"{int(hit.sum())} pixel(s) at or above SATURATE = {level:g} masked")
        var = np.where(hit, np.nan, var)
    return var


def _medium_from_ctype(ctype: str | None) -> str:
    return "air" if ctype and str(ctype).strip().upper().startswith("AWAV") else "vacuum"


def _load_fits(hdul, path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None):
    from astropy.io import fits

    primary = hdul[0].header
    flux_ext = _find_ext(hdul, ("FLUX",))
    wave_ext = _find_ext(hdul, ("WAVE", "WAVELENGTH"))
    if flux_ext is not None and wave_ext is not None and (
            isinstance(flux_ext, fits.ImageHDU) or getattr(flux_ext, "kind", None) == "IMAGE"):
        get = _header_getter(primary, flux_ext.header)
        file_medium = medium or _medium_from_ctype(get("CTYPE1"))
        notes: list[str] = []
        obs = _observation(get, path, "multi-order", file_medium, notes, time_key)
        if not arrays:
            return obs, []
        flux = np.atleast_2d(np.asarray(flux_ext.data, dtype=float))
        wave = np.atleast_2d(np.asarray(wave_ext.data, dtype=float))
        if wave.shape != flux.shape:
            raise SpectrumFormatError(f"WAVE has shape {wave.shape}, FLUX has {flux.shape}", path=path)
        factor = _wave_factor(wave_ext.header.get("BUNIT") or wave_ext.header.get("CUNIT1"), path, "WAVE unit")
        if factor != 1.0:     # x * 1.0 is x for every float: no copy in Angstrom
            wave = wave * factor
        var = np.atleast_2d(_uncertainty_from_ext(hdul, flux, path, notes))
        var = _saturated(get, flux, var, path, notes)
        blaze_ext = _find_ext(hdul, ("BLAZE",))
        blaze = None
        if blaze_ext is not None:
            blaze = np.atleast_2d(np.asarray(blaze_ext.data, dtype=float))
            if blaze.shape != flux.shape:
                raise SpectrumFormatError(f"BLAZE has shape {blaze.shape}, FLUX has {flux.shape}", path=path)
        orders = _build_orders_2d(wave, flux, var, blaze, file_medium, path, notes)
        return replace(obs, notes=tuple(notes)), orders

    for hdu in hdul:
        if isinstance(hdu, fits.BinTableHDU) and _has_data(hdu):
            cols = {c.name.upper(): c for c in hdu.columns}
            if any(n in cols for n in WAVE_NAMES) and "FLUX" in cols:
                return _load_fits_table(hdu, cols, primary, path, medium=medium, arrays=arrays, time_key=time_key)

    for hdu in hdul:
        if isinstance(hdu, fits.PrimaryHDU | fits.ImageHDU) and _has_data(hdu):
            if is_multispec(hdu.header):
                return _load_multispec(hdul, hdu, primary, path, medium=medium, arrays=arrays, time_key=time_key)
            if hdu.header.get("CTYPE1") is not None:
                return _load_wcs_1d(hdul, hdu, primary, path, medium=medium, arrays=arrays, time_key=time_key)
            break
    raise SpectrumFormatError(
        "has no spectrum: no 1-D image with CTYPE1, no table with wavelength and FLUX columns, "
        "no FLUX+WAVE image extensions", path=path, status="not a spectrum")


def _load_wcs_1d(hdul, hdu, primary, path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None):
    get = _header_getter(hdu.header, primary)
    notes: list[str] = []
    shape = [int(hdu.header.get(f"NAXIS{k}", 0)) for k in range(1, int(hdu.header["NAXIS"]) + 1)]
    if shape[0] < 2 and all(n == 1 for n in shape[1:]):
        raise SpectrumFormatError(f"image holds {shape[0]} pixel(s) along the dispersion axis; a spectrum "
                                  "needs at least 2", path=path, status="no valid pixels")
    if shape[0] < 2 or any(n != 1 for n in shape[1:]):
        raise SpectrumFormatError(f"image with CTYPE1 has shape {tuple(shape[::-1])}, expected 1-D along axis 1",
                                  path=path)
    wave, wcs_medium = wcs_wavelengths(hdu.header, shape[0], path, hdul=hdul, notes=notes)
    file_medium = medium or wcs_medium
    if medium is None and _ctype_base(hdu.header) == "LINEAR":
        notes.append(_IRAF_MEDIUM_NOTE)
    obs = _observation(get, path, "wcs-1d", file_medium, notes, time_key)
    if not arrays:
        return obs, []
    data = np.asarray(hdu.data, dtype=float).ravel()
    var = _saturated(get, data, _uncertainty_from_ext(hdul, data, path, notes), path, notes)
    orders = _build_orders([(wave, data, var, None)], file_medium, path, notes)
    return replace(obs, notes=tuple(notes)), orders


_IRAF_MEDIUM_NOTE = ("IRAF dispersion has no air/vacuum flag: vacuum assumed (IRAF's arc line lists are "
                     "mostly in air: give --medium air if so)")


def _ctype_base(header) -> str:
    return str(header.get("CTYPE1", "") or "").strip().upper().partition("-")[0]


#: BANDID text (IRAF apextract) -> our uncertainty kind; the first band is the spectrum.
_BAND_KINDS = (("sigma", "std"), ("variance", "var"))


def _load_multispec(hdul, hdu, primary, path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None):
    """IRAF multispec image: one order per image line; in the 3-D form band 1 is the spectrum and
    the band whose ``BANDIDk`` starts with ``sigma`` (or ``variance``) its uncertainty."""
    get = _header_getter(hdu.header, primary)
    notes: list[str] = []
    naxis = int(hdu.header["NAXIS"])
    shape = [int(hdu.header.get(f"NAXIS{k}", 0)) for k in range(1, naxis + 1)]
    if naxis > 3:
        raise SpectrumFormatError(f"multispec image has {naxis} axes (at most 3: pixels, lines, bands)", path=path)
    n_pix = shape[0]
    n_lines = shape[1] if naxis > 1 else 1
    n_bands = shape[2] if naxis > 2 else 1
    wat_orders, wcs_notes = multispec_orders(hdu.header, n_pix, n_lines, path)
    notes.extend(wcs_notes)
    file_medium = medium or "vacuum"
    if medium is None:
        notes.append(_IRAF_MEDIUM_NOTE)
    obs = _observation(get, path, "multispec", file_medium, notes, time_key)
    if not arrays:
        return obs, []
    cube = np.asarray(hdu.data, dtype=float).reshape(n_bands, n_lines, n_pix)
    flux = cube[0]
    err_band = None
    for band in range(2, n_bands + 1):
        text = str(hdu.header.get(f"BANDID{band}", "") or "").strip().lower()
        for word, kind in _BAND_KINDS:
            if text.startswith(word):
                err_band = (band, kind)
                break
        if err_band is not None:
            break
    if err_band is not None:
        var = _to_variance(cube[err_band[0] - 1], err_band[1])
        notes.append(f"uncertainty from band {err_band[0]} ({hdu.header.get(f'BANDID{err_band[0]}')!s}".strip()
                     + ")")
    else:
        var = _uncertainty_from_ext(hdul, flux, path, notes)
    parts = []
    for o in wat_orders:
        i, nw = o.line - 1, o.wave.size
        parts.append((o.wave, flux[i, :nw], var[i, :nw], None))
    orders = _build_orders(parts, file_medium, path, notes)
    orders = [replace(order, index=o.line - 1) for order, o in zip(orders, wat_orders, strict=True)]
    return replace(obs, notes=tuple(notes)), orders


def _load_fits_table(hdu, cols, primary, path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None):
    get = _header_getter(primary, hdu.header)
    notes: list[str] = []
    file_medium = medium or _medium_from_ctype(get("CTYPE1"))
    obs = _observation(get, path, "table", file_medium, notes, time_key)
    if not arrays:
        return obs, []
    data = hdu.data
    wname = next(n for n in WAVE_NAMES if n in cols)
    factor = _wave_factor(cols[wname].unit, path, f"unit of column {cols[wname].name}")
    wave = np.asarray(data[cols[wname].name], dtype=float) * factor
    flux = np.asarray(data[cols["FLUX"].name], dtype=float)
    def find(names):
        name = next((n for n in names if n in cols), None)
        return None if name is None else data[cols[name].name]

    var = _variance(find, flux, notes)
    if wave.shape != flux.shape or var.shape != flux.shape:
        raise SpectrumFormatError("wavelength, flux and uncertainty columns differ in shape", path=path)
    var = _saturated(get, flux, var, path, notes)
    if wave.ndim == 1:
        parts = [(wave, flux, var, None)]
    else:  # one order per row
        parts = [(wave[i], flux[i], var[i], None) for i in range(wave.shape[0])]
    orders = _build_orders(parts, file_medium, path, notes)
    return replace(obs, notes=tuple(notes)), orders


# --------------------------------------------------------------------------- text

def _load_text(text: str, path: str, *, medium: str | None, arrays: bool,
               time_key: str | None = None):
    header: dict[str, str] = {}
    rows: list[str] = []
    text_medium = None
    for line in text.splitlines():
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            body = stripped.lstrip("#").strip()
            for sep in ("=", ":"):
                if sep in body:
                    key, _, value = body.partition(sep)
                    key = key.strip().upper()
                    value = value.split(" / ")[0].strip().strip("'\"").strip()
                    if key == "MEDIUM":
                        text_medium = value.lower()
                    elif key and " " not in key:
                        header.setdefault(key, value)
                    break
            continue
        rows.append(stripped)
    if len(rows) < 2:
        raise SpectrumFormatError("is not a spectrum: no header row and data rows found", path=path,
                                  status="not a spectrum")
    delim = "," if "," in rows[0] else None
    names = [n.strip().strip('"').upper() for n in (rows[0].split(delim) if delim else rows[0].split())]
    wname = next((n for n in WAVE_NAMES if n in names), None)
    if wname is None or "FLUX" not in names:
        raise SpectrumFormatError(
            "text table needs a header row naming a wavelength column (wavelength, wave, lambda, lam) "
            "and a flux column", path=path, status="not a spectrum")
    if text_medium not in (None, "air", "vacuum"):
        raise SpectrumFormatError(f"medium {text_medium!r} is neither air nor vacuum", path=path)
    file_medium = medium or text_medium or "vacuum"
    notes: list[str] = []
    get = _header_getter(header)
    obs = _observation(get, path, "text", file_medium, notes, time_key)
    if not arrays:
        return obs, []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = np.genfromtxt(io.StringIO("\n".join(rows[1:])), delimiter=delim, dtype=float,
                                  invalid_raise=True)
    except ValueError as exc:
        raise SpectrumFormatError(f"text table has malformed rows ({_short(exc)})", path=path) from None
    table = np.atleast_2d(table)
    if table.shape[1] != len(names):
        raise SpectrumFormatError(f"header names {len(names)} columns, rows have {table.shape[1]}", path=path)
    col = {n: table[:, i] for i, n in enumerate(names)}
    factor = _wave_factor(header.get("WAVEUNIT") or header.get("CUNIT1"), path, "WAVEUNIT")
    wave, flux = col[wname] * factor, col["FLUX"]
    var = _variance(lambda names: next((col[n] for n in names if n in col), None), flux, notes)
    if "ORDER" in col:
        ords = col["ORDER"]
        parts = [(wave[ords == k], flux[ords == k], var[ords == k], None) for k in np.unique(ords)]
    else:
        parts = [(wave, flux, var, None)]
    orders = _build_orders(parts, file_medium, path, notes)
    return replace(obs, notes=tuple(notes)), orders


# --------------------------------------------------------------------------- shared

def _observation(get, path: str, layout: str, medium: str, notes: list,
                 time_key: str | None = None) -> Observation:
    if medium not in ("air", "vacuum"):
        raise MetadataError(f"medium {medium!r} is neither air nor vacuum", path=path)
    mjd, scale, source, exptime = read_time(get, path, flux_time_key=time_key)
    ra, dec, frame, equinox = read_target(get, path)
    site = read_site(get, path)
    spec_frame, frame_note = read_spec_frame(get, path)
    if frame_note is not None:
        notes.append(frame_note)
    obj = get("OBJECT")
    return Observation(
        path=path, layout=layout, object=str(obj).strip() if obj is not None else "",
        mjd_mid=mjd, time_scale=scale, time_source=source, exptime=exptime, ra_deg=ra, dec_deg=dec,
        frame=frame, equinox=equinox, site_xyz=site, medium=medium, spec_frame=spec_frame,
        notes=tuple(notes))


def _build_orders_2d(wave: np.ndarray, flux: np.ndarray, var: np.ndarray, blaze: np.ndarray | None,
                     medium: str, path: str, notes: list) -> list[Order]:
    """:func:`_build_orders` of the rows of (orders x pixels) arrays, validated all at once.

    When every order passes every check with its wavelengths increasing (the usual file), the orders
    are made here from one pass over the whole arrays; otherwise :func:`_build_orders` takes them one
    by one and says what is wrong (tests/test_plainfits.py compares the two).
    """
    if wave.ndim == 2 and wave.shape[1] >= 8 and np.isfinite(wave).all():
        with np.errstate(invalid="ignore"):
            step_ok = (wave[:, 1:] > wave[:, :-1]).all()
        if step_ok and (wave[:, 0] > 0).all() and (wave[:, -1] <= MAX_WAVELENGTH).all():
            orders = [Order(wave=airvac.air_to_vacuum(wave[i]) if medium == "air" else wave[i], flux=flux[i],
                            var=var[i], blaze=None if blaze is None else blaze[i], index=i)
                      for i in range(wave.shape[0])]
            _check_orders(orders, path)
            return orders
    parts = [(wave[i], flux[i], var[i], None if blaze is None else blaze[i]) for i in range(flux.shape[0])]
    return _build_orders(parts, medium, path, notes)


def _check_orders(orders: list[Order], path: str) -> None:
    """Refuse a spectrum without orders, without finite flux or without usable uncertainties."""
    if not orders:
        raise SpectrumFormatError("contains no orders", path=path)
    if all(not np.any(np.isfinite(o.flux)) for o in orders):
        kind = "NaN" if all(np.all(np.isnan(o.flux)) for o in orders) else "NaN or infinite"
        raise SpectrumFormatError(f"all flux values are {kind}", path=path, status="no valid flux")
    if all(not np.any(np.isfinite(o.var) & (o.var > 0)) for o in orders):
        raise SpectrumFormatError("no valid uncertainties (zero, negative or NaN everywhere)", path=path,
                                  status="no valid uncertainties")


def _build_orders(parts, medium: str, path: str, notes: list) -> list[Order]:
    """Validate each order's arrays, convert air to vacuum, return :class:`Order` records."""
    orders = []
    for index, (wave, flux, var, blaze) in enumerate(parts):
        wave = np.asarray(wave, dtype=float)
        flux = np.asarray(flux, dtype=float)
        var = np.asarray(var, dtype=float)
        if wave.size < 8:
            raise SpectrumFormatError(f"order {index} has only {wave.size} pixels", path=path)
        if not np.all(np.isfinite(wave)):
            raise SpectrumFormatError(f"order {index} has non-finite wavelengths", path=path,
                                      status="bad wavelengths")
        step = np.diff(wave)
        if np.all(step < 0):
            wave, flux, var = wave[::-1], flux[::-1], var[::-1]
            blaze = None if blaze is None else np.asarray(blaze)[::-1]
            step = -step[::-1]
            if "wavelengths decrease with pixel: arrays flipped" not in notes:
                notes.append("wavelengths decrease with pixel: arrays flipped")
        if not np.all(np.isfinite(wave)) or wave[-1] > MAX_WAVELENGTH:
            raise SpectrumFormatError(
                f"order {index} has wavelengths up to {np.nanmax(np.abs(wave)):.3g} A, beyond any "
                f"spectrograph's range (limit {MAX_WAVELENGTH:.0e} A): check CRVAL/CDELT and the unit",
                path=path, status="bad wavelengths")
        if np.any(step == 0):
            raise SpectrumFormatError(f"order {index} has zero dispersion (repeated wavelengths)",
                                      path=path, status="bad wavelengths")
        if np.any(step < 0):
            raise SpectrumFormatError(f"order {index} has non-monotonic wavelengths", path=path,
                                      status="bad wavelengths")
        if wave[0] <= 0:
            raise SpectrumFormatError(f"order {index} has non-positive wavelengths", path=path,
                                      status="bad wavelengths")
        if medium == "air":
            wave = airvac.air_to_vacuum(wave)
        orders.append(Order(wave=wave, flux=flux, var=var,
                            blaze=None if blaze is None else np.asarray(blaze, dtype=float), index=index))
    _check_orders(orders, path)
    return orders
