"""Python API: astropy Quantities at the boundary, the pipeline inside.

Example
-------
>>> import lineshift.api as ls                                        # doctest: +SKIP
>>> table = ls.measure(["sample_spectra"], "line_lists/vessa9_mask.csv")  # doctest: +SKIP
>>> table["rv"].unit                                                  # doctest: +SKIP
Unit("m / s")
>>> orders = ls.load("sample_spectra/vessa9_echelle_000.fits")       # doctest: +SKIP
>>> ls.measure([orders], "line_lists/vessa9_mask.csv")               # doctest: +SKIP

specutils objects (``Spectrum``, ``Spectrum1D``, ``SpectrumCollection``, ``SpectrumList``) are
accepted wherever a file is, alone or in a list with paths.
"""

from __future__ import annotations

import os
import tempfile

import astropy.units as u
from astropy.table import QTable

from lineshift._offline import offline_call
from lineshift.calib.barycentric import Target
from lineshift.errors import ConfigError
from lineshift.io.linelists import read_mask
from lineshift.io.loaders import load_spectrum
from lineshift.io.specutils_bridge import is_specutils, to_specutils, write_as_fits
from lineshift.io.table import COLUMNS, EXTRA_COLUMNS, UNITS, rows_to_frame
from lineshift.measure.mask_engine import SearchSettings
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, Overrides, expand_inputs, measure_files

__all__ = ["load", "measure"]


def _ms(value, name: str) -> float | None:
    if value is None:
        return None
    try:
        return float(u.Quantity(value).to_value(u.m / u.s))
    except (u.UnitsError, TypeError):
        raise ConfigError(f"{name} must be a velocity Quantity (e.g. 800 * u.m / u.s)") from None


@offline_call
def load(path: str, *, medium: str | None = None, flux_time_key: str | None = None):
    """A spectrum file of any layout lineshift reads, as a specutils object.

    Returns a ``specutils.Spectrum`` for a file with one order and a ``SpectrumCollection`` for
    several (orders of unequal length padded with masked NaN), with vacuum wavelengths in
    Angstrom, a ``VarianceUncertainty``, a mask (True = bad pixel) and ``.meta`` holding the
    observation record: ``mjd_mid`` (in ``time_scale``), ``time_source``, ``ra_deg``, ``dec_deg``,
    ``site_xyz`` (geocentric m), ``medium`` (of the file; the axis is vacuum), ``spec_frame``,
    ``layout``, ``notes`` and the rest of :class:`lineshift.model.Observation`.  Handing the object
    back to :func:`measure` measures it with that metadata.
    """
    return to_specutils(load_spectrum(os.fspath(path), medium=medium, flux_time_key=flux_time_key))


def _label(obj, i: int) -> str:
    meta = getattr(obj, "meta", None) or {}
    name = meta.get("path") if hasattr(meta, "get") else None
    return f"{name} (specutils object {i})" if name else f"specutils object {i}"


@offline_call
def measure(spectra, mask: str | LineMask, *, velocity_range=None, velocity_step=None,
            box_width=None, site=None, ra=None, dec=None, medium: str | None = None,
            ephemeris: str | None = None, workers: int | None = None, flux_time_key: str | None = None) -> QTable:
    """Barycentric radial velocities of spectra against a line mask.

    Parameters
    ----------
    spectra : str, specutils object, or sequence of them
        Files, directories or globs, and specutils ``Spectrum``/``Spectrum1D`` (one order, or
        orders x pixels) or ``SpectrumCollection`` objects (one observation each) with their
        uncertainty (any astropy ``NDUncertainty`` that converts to a variance) and mask.  An
        object's spectral axis is read as vacuum (``medium="air"`` says otherwise) and its
        metadata from ``.meta`` (what :func:`load` puts there, or a FITS header in
        ``meta["header"]``); its ``file`` column reads ``specutils object N``.
    mask : str or LineMask
        A mask CSV path or a mask.
    velocity_range : (Quantity, Quantity), optional
        Barycentric search range (velocity units); default -300 to +300 km/s.
    velocity_step, box_width : Quantity, optional
        Fine-grid step and box width (velocity units); default one pixel.
    site : astropy.coordinates.EarthLocation, optional
        Observatory, overriding the headers.
    ra, dec : Quantity (angle), optional
        Target position (ICRS), overriding the headers.
    medium : {'air', 'vacuum'}, optional
        Medium of the files' wavelengths, overriding the headers.
    ephemeris : str, optional
        Path of a local JPL ``.bsp`` file.
    workers : int, optional
        Local processes (default: every core, at most one per 16 spectra).
    flux_time_key : str, optional
        Header keyword of a flux-weighted mid-exposure time (exposure meter), used where present.

    Returns
    -------
    QTable
        One row per input; the contract columns (docs/reference.md) with units (``rv`` in
        m/s, ``bjd_tdb`` in days), then the extra columns.  Rows whose ``status`` is not ``ok``
        have NaN velocities.
    """
    items = [spectra] if isinstance(spectra, str | os.PathLike) or is_specutils(spectra) else list(spectra)
    with tempfile.TemporaryDirectory(prefix="lineshift-specutils-") as tmp:
        paths, labels = [], {}
        for item in items:
            if is_specutils(item):
                path = os.path.join(tmp, f"object_{len(labels):05d}.fits")
                labels[path] = _label(item, len(labels))
                write_as_fits(item, path, labels[path])
                paths.append(path)
            else:
                paths.extend(expand_inputs([os.fspath(item)]))
        return _measure(paths, labels, mask, velocity_range=velocity_range, velocity_step=velocity_step,
                        box_width=box_width, site=site, ra=ra, dec=dec, medium=medium, ephemeris=ephemeris,
                        workers=workers, flux_time_key=flux_time_key)


def _measure(paths, labels, mask, *, velocity_range, velocity_step, box_width, site, ra, dec, medium, ephemeris,
             workers, flux_time_key) -> QTable:
    line_mask = read_mask(mask) if isinstance(mask, str) else mask
    vr = None
    if velocity_range is not None:
        lo, hi = (_ms(v, "velocity_range") for v in velocity_range)
        vr = (lo, hi)
    xyz = None
    if site is not None:
        xyz = tuple(float(c.to_value(u.m)) for c in (site.x, site.y, site.z))
    settings = MeasureSettings(
        search=SearchSettings(velocity_range=vr, velocity_step=_ms(velocity_step, "velocity_step"),
                              box_width=_ms(box_width, "box_width")),
        medium=medium,
        overrides=Overrides(ra_deg=None if ra is None else float(u.Quantity(ra).to_value(u.deg)),
                            dec_deg=None if dec is None else float(u.Quantity(dec).to_value(u.deg)),
                            site_xyz=xyz),
        target=Target(), ephemeris=ephemeris, flux_time_key=flux_time_key)
    rows = measure_files(paths, line_mask, settings, workers=workers)
    for row in rows:
        if row.get("file") in labels:
            label, tmp = labels[row["file"]], row["file"]
            row["file"] = label
            for key in ("notes", "_error"):
                if isinstance(row.get(key), str):
                    row[key] = row[key].replace(tmp, label)
    frame = rows_to_frame(rows)
    table = QTable()
    for c in COLUMNS + EXTRA_COLUMNS:
        values = frame[c].to_numpy(dtype=float if c in UNITS else None) if c in UNITS else frame[c].to_numpy()
        table[c] = values * u.Unit(UNITS[c]) if c in UNITS else values
    return table
