"""Python API: astropy Quantities at the boundary, the pipeline inside.

Example
-------
>>> import lineshift.api as ls                                        # doctest: +SKIP
>>> table = ls.measure(["sample_spectra"], "line_lists/vessa9_mask.csv")  # doctest: +SKIP
>>> table["rv"].unit                                                  # doctest: +SKIP
Unit("m / s")
"""

from __future__ import annotations

from collections.abc import Sequence

import astropy.units as u
from astropy.table import QTable

from lineshift._offline import offline_call
from lineshift.calib.barycentric import Target
from lineshift.errors import ConfigError
from lineshift.io.linelists import read_mask
from lineshift.io.table import COLUMNS, EXTRA_COLUMNS, UNITS, rows_to_frame
from lineshift.measure.mask_engine import SearchSettings
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, Overrides, expand_inputs, measure_files

__all__ = ["measure"]


def _ms(value, name: str) -> float | None:
    if value is None:
        return None
    try:
        return float(u.Quantity(value).to_value(u.m / u.s))
    except (u.UnitsError, TypeError):
        raise ConfigError(f"{name} must be a velocity Quantity (e.g. 800 * u.m / u.s)") from None


@offline_call
def measure(spectra: Sequence[str] | str, mask: str | LineMask, *, velocity_range=None, velocity_step=None,
            box_width=None, site=None, ra=None, dec=None, medium: str | None = None,
            ephemeris: str | None = None, workers: int | None = None) -> QTable:
    """Barycentric radial velocities of spectra against a line mask.

    Parameters
    ----------
    spectra : str or sequence of str
        Files, directories or globs.
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

    Returns
    -------
    QTable
        One row per input; the contract columns (docs/reference.md) with units (``rv`` in
        m/s, ``bjd_tdb`` in days), then the extra columns.  Rows whose ``status`` is not ``ok``
        have NaN velocities.
    """
    paths = expand_inputs([spectra] if isinstance(spectra, str) else list(spectra))
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
        target=Target(), ephemeris=ephemeris)
    frame = rows_to_frame(measure_files(paths, line_mask, settings, workers=workers))
    table = QTable()
    for c in COLUMNS + EXTRA_COLUMNS:
        values = frame[c].to_numpy(dtype=float if c in UNITS else None) if c in UNITS else frame[c].to_numpy()
        table[c] = values * u.Unit(UNITS[c]) if c in UNITS else values
    return table
