"""Plain data passed between the stages.

Internal units are fixed: wavelengths in Angstrom (vacuum), velocities in m/s, times as MJD in the
scale named beside them.  Every stage takes and returns these records; nothing else travels between
modules.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

__all__ = ["C_MS", "OLD_COLUMN_NAMES", "CCFResult", "LineMask", "Observation", "Order", "OrderRows", "Spectrum",
           "order_rows"]

#: Speed of light in vacuum, m/s (exact, SI definition).
C_MS = 299_792_458.0


@dataclass(frozen=True)
class Observation:
    """What a file says about when, where and what was observed.

    Attributes
    ----------
    path : str
        The input path as given.
    layout : str
        One of ``wcs-1d``, ``table``, ``multi-order``, ``text``, ``multispec``.
    object : str
        Target name (OBJECT keyword or config); may be empty.
    mjd_mid : float or None
        Mid-exposure instant, MJD in ``time_scale``.
    time_scale : str
        astropy time scale of ``mjd_mid`` (from TIMESYS, default ``utc``).
    time_source : str
        Which keywords gave the time (e.g. ``DATE-OBS+EXPTIME/2``), or why there is none.
    exptime : float or None
        Exposure time, s.
    ra_deg, dec_deg : float or None
        Target position, degrees, in ``frame`` (and ``equinox`` for FK4/FK5).
    frame : str
        ``icrs``, ``fk5`` or ``fk4`` (from RADESYS, default ``icrs``).
    equinox : str or None
        Equinox for FK4/FK5, e.g. ``J2000``.
    site_xyz : tuple of 3 floats or None
        Observatory position, geocentric ITRS metres.
    medium : str
        ``vacuum`` or ``air``: the medium the file's wavelengths were given in (the arrays
        themselves are always vacuum after loading).
    spec_frame : str
        ``topocentric`` or ``barycentric``: the frame of the file's wavelengths (from SPECSYS,
        default topocentric); a barycentric file gets no second barycentric correction.
    notes : tuple of str
        Warnings raised while reading (e.g. Poisson variance assumed).
    """

    path: str
    layout: str
    object: str = ""
    mjd_mid: float | None = None
    time_scale: str = "utc"
    time_source: str = ""
    exptime: float | None = None
    ra_deg: float | None = None
    dec_deg: float | None = None
    frame: str = "icrs"
    equinox: str | None = None
    site_xyz: tuple[float, float, float] | None = None
    medium: str = "vacuum"
    spec_frame: str = "topocentric"
    notes: tuple[str, ...] = ()

    @property
    def missing(self) -> tuple[str, ...]:
        """Metadata the barycentric step needs but the record lacks (``time``, ``target``, ``site``)."""
        out = []
        if self.mjd_mid is None:
            out.append("time")
        if self.ra_deg is None or self.dec_deg is None:
            out.append("target")
        if self.site_xyz is None:
            out.append("site")
        return tuple(out)


@dataclass(frozen=True)
class Order:
    """One spectral order (or a whole 1-D spectrum): strictly increasing vacuum wavelengths.

    Attributes
    ----------
    wave : ndarray, Angstrom (vacuum), pixel centres
    flux : ndarray, any linear flux unit (counts preferred: photon weighting uses it)
    var : ndarray, variance of ``flux`` (same unit squared); non-finite or <= 0 marks a bad pixel
    blaze : ndarray or None, the instrument's blaze function, if the file gave one
    index : int, the order's index in the file
    """

    wave: np.ndarray
    flux: np.ndarray
    var: np.ndarray
    blaze: np.ndarray | None = None
    index: int = 0


@dataclass(frozen=True)
class Spectrum:
    """A loaded spectrum: its orders and the observation record."""

    obs: Observation
    orders: tuple[Order, ...]

    @property
    def n_orders(self) -> int:
        return len(self.orders)

    @cached_property
    def wavelength_range(self) -> tuple[float, float]:
        """(min, max) vacuum wavelength over all orders, Angstrom (NaNs ignored, as np.nanmin /
        np.nanmax: fmin/fmax reduce to the same values without their set-up; once per spectrum)."""
        lo = min(float(np.fmin.reduce(o.wave)) for o in self.orders)
        hi = max(float(np.fmax.reduce(o.wave)) for o in self.orders)
        return lo, hi


@dataclass(frozen=True)
class LineMask:
    """A weighted line mask: rest vacuum wavelengths (Angstrom) and weights.

    Attributes
    ----------
    wavelength : ndarray, rest vacuum wavelengths, Angstrom, sorted
    weight : ndarray, relative weights (> 0)
    species : tuple of str, optional labels (may be empty strings)
    source : str, where the mask came from (path or description)
    provenance : tuple of str, the file's comment lines
    """

    wavelength: np.ndarray
    weight: np.ndarray
    species: tuple[str, ...] = ()
    source: str = ""
    provenance: tuple[str, ...] = ()

    def __len__(self) -> int:
        return int(self.wavelength.size)

    def select(self, keep: np.ndarray) -> LineMask:
        """A new mask with only the lines where ``keep`` is true."""
        keep = np.asarray(keep, dtype=bool)
        species = tuple(s for s, k in zip(self.species, keep, strict=True) if k) if self.species else ()
        return LineMask(self.wavelength[keep], self.weight[keep], species, self.source, self.provenance)


@dataclass(frozen=True)
class CCFResult:
    """The correlation profile of one spectrum and the fit of its peak (observatory frame).

    All velocities in m/s.  ``rv_err`` is the 1-sigma error from linear propagation of the pixel
    variances through the CCF and the profile fit (covariance of neighbouring CCF points included).
    ``bis_span`` is the bisector span (Queloz et al. 2001, see :mod:`.profile`);
    ``chromatic_slope`` the slope of per-order velocities against ln(lambda) (m/s per unit ln lambda);
    ``orders`` one dict per order (``order``, ``wavelength``, ``rv``, ``rv_err``), topocentric.
    """

    rv: float
    rv_err: float
    fwhm: float
    fwhm_err: float
    contrast: float
    contrast_err: float
    snr: float
    n_lines: int
    n_orders: int
    velocity: np.ndarray = field(repr=False)
    ccf: np.ndarray = field(repr=False)
    model: np.ndarray = field(repr=False)
    bis_span: float = float("nan")
    bis_span_err: float = float("nan")
    chromatic_slope: float = float("nan")
    chromatic_slope_err: float = float("nan")
    bisector: tuple[np.ndarray, np.ndarray] | None = field(default=None, repr=False)
    orders: tuple[dict, ...] = field(default=(), repr=False)


#: Table column names renamed since the last release (old -> current); readers of ``measure`` tables
#: accept the old names for one release.
OLD_COLUMN_NAMES = {"bis_span": "bisector_span", "bis_span_err": "bisector_span_err"}


class OrderRows(Sequence):
    """One spectrum's per-order rows (``row["_orders"]``), held as one column per key instead of a
    dict per order: ~1.5 kB instead of ~11 kB for 36 orders, which a batch holds for every spectrum
    until its table is written.  Reads as the list of dicts it was made from (indexing and iteration
    give new dicts with Python numbers); it does not change: make a new one (:func:`order_rows`)."""

    __slots__ = ("_cols", "_keys", "_n")

    def __init__(self, keys: tuple, cols: tuple, n: int):
        self._keys, self._cols, self._n = keys, cols, n

    def __len__(self) -> int:
        return self._n

    def __getitem__(self, i):
        if isinstance(i, slice):
            return [self[k] for k in range(*i.indices(self._n))]
        if not -self._n <= i < self._n:
            raise IndexError("order row index out of range")
        return {k: c[i].item() if isinstance(c, np.ndarray) else c[i]
                for k, c in zip(self._keys, self._cols, strict=True)}

    def __eq__(self, other) -> bool:
        return isinstance(other, Sequence) and not isinstance(other, str) and list(self) == list(other)

    __hash__ = None

    def __repr__(self) -> str:
        return f"OrderRows({list(self)!r})"

    def __reduce__(self):
        return (OrderRows, (self._keys, self._cols, self._n))


def order_rows(dicts: list[dict]) -> OrderRows | list[dict]:
    """The per-order dicts as :class:`OrderRows` (columns of int or float arrays where every value is
    one, else tuples), or the list itself when the dicts do not share their keys."""
    if not dicts:
        return []
    keys = tuple(dicts[0])
    if any(tuple(d) != keys for d in dicts):
        return list(dicts)
    cols = []
    for k in keys:
        vals = [d[k] for d in dicts]
        if all(type(v) is int for v in vals):
            cols.append(np.array(vals, dtype=np.int64))
        elif all(type(v) is float for v in vals):
            cols.append(np.array(vals, dtype=np.float64))
        else:
            cols.append(tuple(vals))
    return OrderRows(keys, tuple(cols), len(dicts))
