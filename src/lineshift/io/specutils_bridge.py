"""specutils objects in and out: ``Spectrum`` (and the older ``Spectrum1D``) and ``SpectrumCollection``.

Out
    :func:`to_specutils` turns a loaded :class:`~lineshift.model.Spectrum` into a ``Spectrum`` (one
    order) or a ``SpectrumCollection`` (several; orders of unequal length are padded with masked
    NaN), with vacuum wavelengths in Angstrom, a ``VarianceUncertainty``, a mask (True = bad pixel,
    specutils' convention) and the observation record in ``.meta`` (with ``blaze``, the
    instrument's blaze function as orders x pixels, when the file gave one).

In
    :func:`write_as_fits` writes such an object as a file of our multi-order layout (FLUX, WAVE, ERR
    image extensions; metadata in the primary header), so that every path of the pipeline (workers,
    clusters, the results store) treats it like any file.  The spectral axis is converted to
    Angstrom with ``astropy.units.spectral()`` (frequency or energy axes too); it is taken to be
    in vacuum unless the caller says air (specutils carries no medium).  Metadata come from
    ``.meta``: the keys of an observation record (as :func:`to_specutils` writes them) win over a
    FITS header in ``meta['header']`` (as specutils' readers leave it).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from lineshift.errors import SpectrumFormatError
from lineshift.model import Spectrum

__all__ = ["is_specutils", "to_specutils", "write_as_fits"]


def is_specutils(obj) -> bool:
    """Whether ``obj`` is a specutils ``Spectrum``/``Spectrum1D`` or ``SpectrumCollection``."""
    try:
        from specutils import Spectrum as SuSpectrum
        from specutils import SpectrumCollection
    except ImportError:  # pragma: no cover - specutils is a dependency
        return False
    return isinstance(obj, SuSpectrum | SpectrumCollection)


def to_specutils(spectrum: Spectrum):
    """The orders of a loaded spectrum as a specutils object with the observation in ``.meta``."""
    import astropy.units as u
    from astropy.nddata import VarianceUncertainty
    from specutils import Spectrum as SuSpectrum
    from specutils import SpectrumCollection

    meta = dataclasses.asdict(spectrum.obs)
    meta["notes"] = list(meta["notes"])
    meta["wavelength_frame"] = "vacuum"
    meta["order_index"] = [o.index for o in spectrum.orders]
    orders = spectrum.orders
    n = max(o.wave.size for o in orders)
    if any(o.blaze is not None for o in orders):   # the instrument's blaze, as the file gave it
        blaze = np.full((len(orders), n), np.nan)
        for i, o in enumerate(orders):
            if o.blaze is not None:
                blaze[i, :o.blaze.size] = o.blaze
        meta["blaze"] = blaze[0] if len(orders) == 1 else blaze
    if len(orders) == 1:
        o = orders[0]
        return SuSpectrum(flux=o.flux * u.dimensionless_unscaled, spectral_axis=o.wave * u.AA,
                          uncertainty=VarianceUncertainty(o.var), mask=_bad(o.flux, o.var), meta=meta)
    wave = np.full((len(orders), n), np.nan)
    flux = np.full((len(orders), n), np.nan)
    var = np.full((len(orders), n), np.nan)
    for i, o in enumerate(orders):
        k = o.wave.size
        wave[i, :k], flux[i, :k], var[i, :k] = o.wave, o.flux, o.var
        if k < n:  # keep the padded axis increasing: extend the last step
            step = o.wave[-1] - o.wave[-2]
            wave[i, k:] = o.wave[-1] + step * np.arange(1, n - k + 1)
    return SpectrumCollection(flux=flux * u.dimensionless_unscaled, spectral_axis=wave * u.AA,
                              uncertainty=VarianceUncertainty(var), mask=_bad(flux, var), meta=meta)


def _bad(flux, var) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        return ~(np.isfinite(flux) & np.isfinite(var) & (var > 0))


#: Header keywords that describe arrays or their WCS, never carried over from ``meta['header']``.
_STRUCTURAL = ("SIMPLE", "BITPIX", "NAXIS", "EXTEND", "PCOUNT", "GCOUNT", "BSCALE", "BZERO", "BLANK", "BUNIT",
               "CTYPE", "CRVAL", "CDELT", "CRPIX", "CUNIT", "CROTA", "CD1_", "CD2_", "PC1_", "PC2_", "WAT",
               "LTV", "LTM", "WCSDIM", "BANDID", "DC-FLAG", "APNUM", "EXTNAME", "XTENSION", "CHECKSUM",
               "DATASUM", "COMMENT", "HISTORY")


def _header_from_meta(meta) -> dict:
    cards: dict = {}
    head = meta.get("header") if hasattr(meta, "get") else None
    if head is not None:
        for key in list(head.keys()):
            k = str(key).upper()
            if not k or k.startswith(_STRUCTURAL):
                continue
            value = head[key]
            if isinstance(value, bool | int | float | str | np.integer | np.floating):
                cards[k] = value
    m = meta if hasattr(meta, "get") else {}
    if m.get("mjd_mid") is not None:
        for k in ("DATE-AVG", "DATE-OBS", "DATE-BEG", "DATE-END", "MJD-OBS", "MJD-BEG", "MJD-END", "TIME-OBS"):
            cards.pop(k, None)
        cards["MJD-AVG"] = float(m["mjd_mid"])
        cards["TIMESYS"] = str(m.get("time_scale") or "utc").upper()
    if m.get("exptime") is not None:
        cards["EXPTIME"] = float(m["exptime"])
    if m.get("ra_deg") is not None and m.get("dec_deg") is not None:
        cards["RA"], cards["DEC"] = float(m["ra_deg"]), float(m["dec_deg"])
        cards["RADESYS"] = str(m.get("frame") or "icrs").upper()
        if m.get("equinox"):
            cards["EQUINOX"] = float(str(m["equinox"]).lstrip("JB"))
    if m.get("site_xyz") is not None:
        for k in ("OBSGEO-L", "OBSGEO-B", "OBSGEO-H"):
            cards.pop(k, None)
        cards.update(zip(("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z"), (float(v) for v in m["site_xyz"]), strict=True))
    if m.get("object"):
        cards["OBJECT"] = str(m["object"])
    if m.get("spec_frame") == "barycentric":
        cards["SPECSYS"] = "BARYCENT"
    elif m.get("spec_frame") == "topocentric":
        cards["SPECSYS"] = "TOPOCENT"
    return cards


def _orders_of(obj, label: str):
    """(wave [Angstrom], flux, variance or None) as 2-D arrays (orders x pixels) of a specutils object."""
    import astropy.units as u
    from astropy.nddata import VarianceUncertainty

    try:
        axis = obj.spectral_axis
        wave = u.Quantity(axis).to_value(u.AA, equivalencies=u.spectral())
    except u.UnitsError:
        raise SpectrumFormatError(f"spectral axis in {obj.spectral_axis.unit} cannot be turned into wavelengths",
                                  path=label) from None
    flux = np.asarray(u.Quantity(obj.flux).value, dtype=float)
    if flux.ndim == 1:
        flux = flux[None, :]
    if flux.ndim != 2:
        raise SpectrumFormatError(f"flux has {flux.ndim} dimensions (1: a spectrum, 2: orders x pixels)", path=label)
    wave = np.asarray(wave, dtype=float)
    if wave.ndim == 1:
        wave = np.broadcast_to(wave, flux.shape)
    if wave.shape != flux.shape:
        raise SpectrumFormatError(f"spectral axis has shape {wave.shape}, flux has {flux.shape}", path=label)
    var = None
    if obj.uncertainty is not None:
        try:
            var = np.asarray(obj.uncertainty.represent_as(VarianceUncertainty).array, dtype=float)
        except (TypeError, ValueError, AttributeError):
            raise SpectrumFormatError(f"uncertainty of type {type(obj.uncertainty).__name__} cannot be turned "
                                      "into a variance", path=label) from None
        var = np.broadcast_to(var.reshape(flux.shape) if var.size == flux.size else var, flux.shape).copy()
    mask = getattr(obj, "mask", None)
    if mask is not None:
        bad = np.broadcast_to(np.asarray(mask, dtype=bool).reshape(flux.shape), flux.shape)
        flux = np.where(bad, np.nan, flux)
        if var is not None:
            var = np.where(bad, np.nan, var)
    return np.array(wave), flux, var


def write_as_fits(obj, path: str, label: str) -> None:
    """Write a specutils object as a file of the multi-order layout (see the module docstring)."""
    from astropy.io import fits

    wave, flux, var = _orders_of(obj, label)
    primary = fits.PrimaryHDU()
    for key, value in _header_from_meta(obj.meta).items():
        try:
            primary.header[key] = value
        except (ValueError, KeyError):   # a meta value FITS cannot hold is not metadata we read
            continue
    hdus = [primary, fits.ImageHDU(flux, name="FLUX"), fits.ImageHDU(wave, name="WAVE")]
    hdus[2].header["BUNIT"] = "Angstrom"
    if var is not None:
        hdus.append(fits.ImageHDU(var, name="VAR"))
    blaze = obj.meta.get("blaze") if hasattr(obj.meta, "get") else None
    if blaze is not None and np.asarray(blaze).size == flux.size:
        hdus.append(fits.ImageHDU(np.asarray(blaze, dtype=float).reshape(flux.shape), name="BLAZE"))
    fits.HDUList(hdus).writeto(path, overwrite=True)
