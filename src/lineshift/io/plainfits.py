"""Plain FITS files read without astropy.io.fits: a fast path of the loaders, never the only one.

A file is *plain* when every HDU is the primary array or an ``IMAGE`` extension (FITS standard 4.0,
sect. 7.1) in the standard's fixed form: 80-character cards of printable ASCII, keywords of
upper-case letters, digits, ``-`` and ``_`` (sect. 4.1.2.1), values that are a quoted string, ``T``
or ``F``, an integer or a real with an ``E`` exponent (sect. 4.2), the mandatory keywords in their
order (sect. 4.4.1), no scaling (``BSCALE``, ``BZERO``, ``BLANK``), no random groups, a blank-padded
header, and HDUs that fill the file exactly.  :func:`scan` returns the HDUs of such a file and
``None`` for anything else - tables, compressed or scaled images, ``CONTINUE`` or ``HIERARCH`` cards,
lower-case keywords, an undefined value, a repeated keyword, a string with a quote or ``": "`` inside
(astropy reads the latter as a record-valued card), a ``D`` exponent, a complex value, trailing bytes,
a truncated data unit - and the caller opens the file with astropy.io.fits, which knows every
convention and repairs or reports what it finds.

On a plain file both read the same keyword values (astropy's types: ``str`` with trailing blanks
removed, ``bool``, ``int``, ``float``) and the same arrays; ``tests/test_plainfits.py`` compares them
card by card and loaded spectrum by loaded spectrum on every layout the loaders read.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable

import numpy as np

__all__ = ["BLOCK", "PlainHDU", "scan", "scan_bytes"]

#: FITS logical record length (bytes); a card is 80 bytes.
BLOCK = 2880
CARD = 80

_DTYPES = {8: "u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}
_KEYWORD = re.compile(r"[A-Z0-9_-]{1,8}")
_NUMBER = re.compile(r" *([+-]?(?:\.\d+|\d+(?:\.\d*)?)(?:E[+-]?\d+)?) *(?:/.*)?")
_LOGICAL = re.compile(r" *([TF]) *(?:/.*)?")
_PRINTABLE = re.compile(rb"[ -~]*")
_COMMENTARY = ("COMMENT", "HISTORY")
_END = f"{'END':<{CARD}}"
_BLANKS = " " * BLOCK
#: Keywords whose presence makes a file not plain (scaled data, random groups, tiled compression).
_NOT_PLAIN = ("BSCALE", "BZERO", "BLANK", "GROUPS", "ZIMAGE", "ZBITPIX", "CONTINUE", "HIERARCH")


class _NotPlainError(Exception):
    """Raised inside the scan; the file is left to astropy."""


class PlainHDU:
    """One HDU of a plain file: its keywords (a dict), name, kind, and the data seen in place."""

    __slots__ = ("_buffer", "dtype", "header", "kind", "name", "offset", "shape", "size")

    def __init__(self, header: dict, kind: str, offset: int, shape: tuple, dtype: str, buffer):
        self.header = header
        self.kind = kind                                    # "PRIMARY" or "IMAGE"
        self.name = str(header.get("EXTNAME", "PRIMARY" if kind == "PRIMARY" else ""))
        self.offset, self.shape, self.dtype = offset, shape, dtype
        self.size = math.prod(shape) if shape else 0
        self._buffer = buffer

    @property
    def data(self) -> np.ndarray | None:
        """The data unit as astropy gives it (big-endian dtype, shape NAXISn..NAXIS1), or None."""
        if not self.size:
            return None
        if self._buffer is None:
            raise ValueError("headers only were scanned: no data")
        arr = np.frombuffer(self._buffer, dtype=self.dtype, count=self.size, offset=self.offset)
        if arr.dtype.isnative:   # one byte per pixel, or a big-endian host: no conversion will copy it
            arr = arr.copy()
        return arr.reshape(self.shape)


def _value(field: str):
    """The value of a card's value field (columns 11-80), astropy's way, or raise _NotPlainError."""
    s = field.lstrip(" ")
    if not s.startswith("'"):
        m = _NUMBER.fullmatch(s) or _LOGICAL.fullmatch(s)
        if m is None:
            raise _NotPlainError      # undefined, complex, D exponent, free text
        text = m.group(1)
        if text in ("T", "F"):
            return text == "T"
        try:
            return int(text)
        except ValueError:
            return float(text)
    end = s.find("'", 1)
    if end < 0 or s[end + 1:end + 2] not in ("", " ", "/"):
        raise _NotPlainError          # unterminated, or a quote inside the string ('' escapes)
    rest = s[end + 1:].lstrip(" ")
    if rest and not rest.startswith("/"):
        raise _NotPlainError
    text = s[1:end]
    if ": " in text:
        raise _NotPlainError          # astropy takes "'key: number'" for a record-valued card
    return text.rstrip(" ")


def _header(read: Callable[[int, int], bytes], start: int, size: int) -> tuple[dict, list, int]:
    """Keywords (dict), keyword order and the end offset of the header starting at ``start``."""
    header: dict = {}
    order: list[str] = []
    pos = start
    while True:
        if pos + BLOCK > size:
            raise _NotPlainError
        block = read(pos, BLOCK)
        if len(block) != BLOCK or not _PRINTABLE.fullmatch(block):
            raise _NotPlainError
        pos += BLOCK
        text = block.decode("ascii")
        for i in range(0, BLOCK, CARD):
            card = text[i:i + CARD]
            key = card[:8].rstrip(" ")
            if key == "END":
                if card != _END or text[i + CARD:] != _BLANKS[i + CARD:]:
                    raise _NotPlainError
                return header, order, pos
            if not key or key in _COMMENTARY:
                continue
            if not _KEYWORD.fullmatch(key) or card[8:10] != "= " or key in _NOT_PLAIN or key in header:
                raise _NotPlainError
            header[key] = _value(card[10:])
            order.append(key)


def _structure(header: dict, order: list, primary: bool) -> tuple[tuple, str, int]:
    """Shape (NAXISn..NAXIS1), dtype and data bytes of one HDU, checking its mandatory keywords."""
    first = ("SIMPLE", "BITPIX", "NAXIS") if primary else ("XTENSION", "BITPIX", "NAXIS")
    if tuple(order[:3]) != first:
        raise _NotPlainError
    if primary and header["SIMPLE"] is not True:
        raise _NotPlainError
    if not primary and header["XTENSION"] != "IMAGE":
        raise _NotPlainError
    bitpix, naxis = header["BITPIX"], header["NAXIS"]
    if type(bitpix) is not int or bitpix not in _DTYPES or type(naxis) is not int or not 0 <= naxis <= 999:
        raise _NotPlainError
    axes = [f"NAXIS{k}" for k in range(1, naxis + 1)]
    if order[3:3 + naxis] != axes:
        raise _NotPlainError
    shape = tuple(header[k] for k in axes)
    if any(type(n) is not int or n < 0 for n in shape):
        raise _NotPlainError
    if not primary and (order[3 + naxis:5 + naxis] != ["PCOUNT", "GCOUNT"]
                        or header["PCOUNT"] != 0 or header["GCOUNT"] != 1):
        raise _NotPlainError
    nbytes = abs(bitpix) // 8 * math.prod(shape) if naxis else 0
    return shape[::-1], _DTYPES[bitpix], nbytes


def scan(read: Callable[[int, int], bytes], size: int, *, data: bytes | None = None) -> list[PlainHDU] | None:
    """The HDUs of a plain FITS file of ``size`` bytes, or None when the file is not plain.

    ``read(offset, n)`` returns ``n`` bytes of the file from ``offset`` (only header blocks are
    read); ``data`` is the whole file's content when the arrays are wanted (``PlainHDU.data``).
    """
    if size <= 0 or size % BLOCK:
        return None
    hdus: list[PlainHDU] = []
    pos = 0
    try:
        while pos < size:
            header, order, data_start = _header(read, pos, size)
            shape, dtype, nbytes = _structure(header, order, primary=not hdus)
            pos = data_start + -(-nbytes // BLOCK) * BLOCK
            if pos > size:
                raise _NotPlainError      # truncated: astropy says so in its own words
            hdus.append(PlainHDU(header, "PRIMARY" if not hdus else "IMAGE", data_start, shape, dtype, data))
    except _NotPlainError:
        return None
    return hdus


def scan_bytes(raw: bytes) -> list[PlainHDU] | None:
    """:func:`scan` of a file's whole content."""
    return scan(lambda offset, n: raw[offset:offset + n], len(raw), data=raw)

