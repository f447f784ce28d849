"""A catalogue of hostile inputs, each built from a good one-dimensional FITS spectrum.

``build(kind, directory, good)`` writes the input of that kind into ``directory`` and returns its
path (bytes for the names that are not UTF-8, so that callers pass them on as the operating system
would).  ``KINDS`` maps each kind to the row ``status`` and the words its message must hold: the
specific reason, never the catch-all "unexpected error".
"""

from __future__ import annotations

import gzip
import os

import numpy as np
from astropy.io import fits

#: kind -> (status, words in the message).  Gzip bombs need a lowered LINESHIFT_MAX_INPUT_BYTES
#: (BOMB_LIMIT) so that the test does not unpack a gigabyte.
KINDS = {
    "mjd_huge": ("bad time", "outside the accepted range"),          # ERFA refuses MJD 1e20
    "mjd_negative": ("bad time", "outside the accepted range"),      # ... and -3e6
    "mjd_1e9": ("bad time", "outside the accepted range"),           # ... and 1e9
    "mjd_is_jd": ("bad time", "looks like a Julian Date"),           # JD 2460000.5 written as MJD-OBS
    "date_garbage": ("missing metadata", "not an ISO-8601 date"),
    "date_year_20000": ("missing metadata", "not an ISO-8601 date"),
    "non_utf8_empty": ("empty file", "caf\\xe9"),                    # the name survives in the message
    "gzip_bomb": ("too large", "exceeds the input limit"),
    "pixel_bomb": ("too large", "more than the limit"),
    "dangling_link": ("unreadable", "cannot be read"),
    "link_loop": ("unreadable", "cannot be read"),
    "directory_named_fits": ("unreadable", "is a directory"),
    "empty": ("empty file", "empty"),
    "truncated": ("truncated", "is truncated"),
    "not_fits": ("not a spectrum", "is not a spectrum"),
    "not_gzip": ("unreadable", "damaged gzip file"),
    "crval_1e300": ("bad wavelengths", "beyond any spectrograph's range"),  # not "zero dispersion"
    "cdelt_zero": ("bad wavelengths", "zero dispersion"),
    "inf_flux": ("no valid flux", "NaN or infinite"),              # not "all NaN"
    "nan_flux": ("no valid flux", "all flux values are NaN"),
    "zero_flux": ("no valid pixels", "too few valid pixels"),
    "zero_err": ("no valid uncertainties", "no valid uncertainties"),
    "nan_err": ("no valid uncertainties", "no valid uncertainties"),
    "foreign_range": ("outside mask range", "outside the mask's range"),
    "no_target": ("missing target", "no target position"),
    "ra_absurd": ("missing metadata", "outside 0..360 degrees"),
    "site_geocentre": ("missing metadata", "not on the Earth's surface"),
    "exptime_absurd": ("bad time", "is not an exposure time"),
    "text_latin1": ("unreadable", "nor UTF-8 text (byte 0xe9"),
    "text_utf16": ("not a spectrum", "is UTF-16 text"),
    "shape_mismatch": ("unreadable", "WAVE has shape (3, 500), FLUX has (4, 500)"),
    "wave_shuffled": ("bad wavelengths", "non-monotonic wavelengths"),
    "one_pixel": ("no valid pixels", "1 pixel(s) along the dispersion axis"),
    "table_strings": ("unreadable", "could not convert string to float"),
}

BOMB_LIMIT = 4 * 2**20


def _one_d(good: str, path, *, flux=None, err=None, drop=(), **cards) -> None:
    with fits.open(good) as hdul:
        primary = fits.PrimaryHDU(np.array(hdul[0].data), header=hdul[0].header.copy())
        errhdu = fits.ImageHDU(np.array(hdul["ERR"].data), header=hdul["ERR"].header.copy(), name="ERR")
    for key in drop:
        primary.header.remove(key, ignore_missing=True, remove_all=True)
    primary.header.update(cards)
    if flux is not None:
        primary.data = np.full_like(primary.data, flux)
    if err is not None:
        errhdu.data = np.full_like(errhdu.data, err)
    fits.HDUList([primary, errhdu]).writeto(path, overwrite=True)


def _metadata(good: str) -> fits.Header:
    """The good file's observation keywords (time, target, site), without its data or WCS."""
    with fits.open(good) as hdul:
        hdr = hdul[0].header
        keep = [k for k in hdr if k not in ("SIMPLE", "BITPIX", "EXTEND") and not k.startswith(("NAXIS", "C"))]
        return fits.Header([(k, hdr[k]) for k in keep if k not in ("", "COMMENT", "HISTORY")])


_DATES = ("MJD-OBS", "MJD-BEG", "MJD-END", "MJD-AVG", "DATE-OBS", "DATE-BEG", "DATE-END", "DATE-AVG")


def build(kind: str, directory: str, good: str):
    """Write the hostile input ``kind`` into ``directory``; returns its path (str, or bytes)."""
    d = os.fsencode(directory)
    path = os.path.join(directory, f"{kind}.fits")
    if kind in ("mjd_huge", "mjd_negative", "mjd_1e9", "mjd_is_jd"):
        value = {"mjd_huge": 1e20, "mjd_negative": -3e6, "mjd_1e9": 1e9, "mjd_is_jd": 2460000.5}[kind]
        _one_d(good, path, drop=_DATES, **{"MJD-OBS": value})
    elif kind == "date_garbage":
        _one_d(good, path, drop=_DATES, **{"DATE-OBS": "yesterday at noon"})
    elif kind == "date_year_20000":
        _one_d(good, path, drop=_DATES, **{"DATE-OBS": "+20000-01-01T00:00:00"})
    elif kind == "non_utf8_empty":
        raw = os.path.join(d, b"caf\xe9_empty.fits")
        open(raw, "wb").close()
        return raw
    elif kind == "gzip_bomb":
        path += ".gz"
        n = 4 * BOMB_LIMIT // 4  # float32 pixels: 4x the limit, ~16 kB on disk
        hdr = fits.Header([("SIMPLE", True), ("BITPIX", -32), ("NAXIS", 1), ("NAXIS1", n)])
        with gzip.open(path, "wb", compresslevel=9) as gz:  # a valid header, then zeros
            gz.write(hdr.tostring().encode("ascii"))
            block = b"\0" * 2880 * 64
            for _ in range(-(-4 * n // len(block))):
                gz.write(block)
    elif kind == "pixel_bomb":  # a header announcing 2e9 pixels, with no data behind it
        hdr = fits.Header([("SIMPLE", True), ("BITPIX", -32), ("NAXIS", 2), ("NAXIS1", 100_000),
                           ("NAXIS2", 20_000)])
        with open(path, "wb") as fh:
            fh.write(hdr.tostring().encode("ascii"))
    elif kind == "dangling_link":
        os.symlink(os.path.join(directory, "nowhere.fits"), path)
    elif kind == "link_loop":
        other = os.path.join(directory, f"{kind}_b.fits")
        os.symlink(other, path)
        os.symlink(path, other)
        return path
    elif kind == "directory_named_fits":
        os.mkdir(path)
    elif kind == "empty":
        open(path, "wb").close()
    elif kind == "truncated":
        _one_d(good, path)
        with open(path, "rb") as fh:
            data = fh.read()
        with open(path, "wb") as fh:
            fh.write(data[: len(data) - 4000])  # inside the ERR extension's data
    elif kind == "not_fits":
        with open(path, "w") as fh:
            fh.write("this is a shopping list, not a spectrum\n")
    elif kind == "not_gzip":
        path += ".gz"
        with open(path, "wb") as fh:
            fh.write(b"\x1f\x8b" + bytes(range(256)) * 4)
    elif kind == "crval_1e300":
        _one_d(good, path, CRVAL1=1e300)
    elif kind == "cdelt_zero":
        _one_d(good, path, CDELT1=0.0)
    elif kind == "inf_flux":
        _one_d(good, path, flux=np.inf)
    elif kind == "nan_flux":
        _one_d(good, path, flux=np.nan)
    elif kind == "zero_flux":
        _one_d(good, path, flux=0.0)
    elif kind == "zero_err":
        _one_d(good, path, err=0.0)
    elif kind == "nan_err":
        _one_d(good, path, err=np.nan)
    elif kind == "foreign_range":  # a spectrum of 20011 A onwards: no mask line falls inside
        _one_d(good, path, CRVAL1=20011.0)
    elif kind == "no_target":
        _one_d(good, path, drop=("RA", "DEC", "RADESYS"))
    elif kind == "ra_absurd":
        _one_d(good, path, RA=1e300, DEC=95.0)
    elif kind == "site_geocentre":
        _one_d(good, path, drop=("OBSERVAT",), **{"OBSGEO-X": 0.0, "OBSGEO-Y": 0.0, "OBSGEO-Z": 0.0})
    elif kind == "exptime_absurd":
        _one_d(good, path, EXPTIME=1e30)
    elif kind in ("text_latin1", "text_utf16"):
        path = os.path.join(directory, f"{kind}.csv")
        text = "# OBJECT = Vessa-9 caf\u00e9\nwavelength,flux,err\n" + "".join(
            f"{5000 + 0.05 * k:.2f},{100 + np.sin(k):.3f},1.0\n" for k in range(400))
        with open(path, "wb") as fh:
            fh.write(text.encode("latin-1" if kind == "text_latin1" else "utf-16"))
    elif kind == "shape_mismatch":  # a multi-order file whose WAVE has one order fewer than FLUX
        rng = np.random.default_rng(1)
        fits.HDUList([fits.PrimaryHDU(header=_metadata(good)), fits.ImageHDU(rng.normal(100, 1, (4, 500)), name="FLUX"),
                      fits.ImageHDU(5000 + 0.05 * np.arange(1500.0).reshape(3, 500), name="WAVE"),
                      fits.ImageHDU(np.ones((4, 500)), name="ERR")]).writeto(path)
    elif kind == "wave_shuffled":  # a table whose wavelengths are in random order
        rng = np.random.default_rng(2)
        cols = [fits.Column("WAVE", "D", array=rng.permutation(5000 + 0.05 * np.arange(2000.0))),
                fits.Column("FLUX", "E", array=rng.normal(100, 1, 2000)),
                fits.Column("ERR", "E", array=np.ones(2000))]
        fits.HDUList([fits.PrimaryHDU(header=_metadata(good)), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    elif kind == "one_pixel":
        with fits.open(good) as hdul:
            fits.PrimaryHDU(np.array(hdul[0].data[:1]), header=hdul[0].header.copy()).writeto(path)
    elif kind == "table_strings":
        cols = [fits.Column("WAVE", "10A", array=np.array(["abc"] * 100)),
                fits.Column("FLUX", "10A", array=np.array(["x"] * 100)),
                fits.Column("ERR", "E", array=np.ones(100))]
        fits.HDUList([fits.PrimaryHDU(header=_metadata(good)), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    else:
        raise KeyError(kind)
    return path
