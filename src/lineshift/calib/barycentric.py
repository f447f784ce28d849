"""Barycentric step: BERV and BJD_TDB for a batch, vectorised per (target, site, time scale).

* BERV: astropy ``SkyCoord.radial_velocity_correction(kind="barycentric")`` at the mid-exposure
  instant (UTC/TT of photon arrival, never the BJD) for the site.  astropy returns ``c z_B`` in the
  sense "add this to the observed velocity"; it is composed with the measured shift
  multiplicatively (Wright & Eastman 2014, PASP 126, 838): ``1 + rv/c = (1 + rv_topo/c)(1 + berv/c)``.
* BJD_TDB: ``t.tdb + t.light_travel_time(target, kind="barycentric", location=site)`` (Eastman,
  Siverd & Gaudi 2010, PASP 122, 935).
* A file whose wavelengths are already barycentric (``Observation.spec_frame == "barycentric"``,
  from ``SPECSYS = 'BARYCENT'``) gets no second correction: its result has ``berv = 0`` (the
  velocity composed with the measured shift) and ``berv_obs`` the BERV astropy gives for the
  instant (quoted in a note too), from which the pipeline derives the observatory-frame velocity
  and places the telluric bands; the BJD_TDB is computed as for any file.
* Proper motion, parallax and the catalogue epoch come from the config.  Given all of them (and a
  radial velocity) astropy's correction includes the secular change of the space motion itself;
  nothing is corrected twice.
* The solar-system ephemeris is astropy's builtin (ERFA) unless a local JPL ``.bsp`` is given
  (``--ephemeris PATH``); they differ by a few mm/s.  Nothing is downloaded
  (:mod:`lineshift._offline`): dates past the bundled IERS predictions warn and still give a value.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass

import numpy as np

from lineshift._offline import offline_call
from lineshift.errors import ConfigError, DegradedAccuracyWarning, IERSPredictionWarning, MetadataError
from lineshift.model import C_MS, Observation

__all__ = ["BarycentricResult", "Target", "barycentric_batch", "compose_velocity"]


@dataclass(frozen=True)
class Target:
    """Astrometry of a target beyond what the header gives (all optional).

    pm_ra_cosdec, pm_dec : mas/yr; parallax : mas; radial_velocity : m/s; epoch : Julian year of the
    catalogue position (e.g. 2016.0).
    """

    pm_ra_cosdec: float | None = None
    pm_dec: float | None = None
    parallax: float | None = None
    radial_velocity: float | None = None
    epoch: float | None = None

    @property
    def has_space_motion(self) -> bool:
        return self.pm_ra_cosdec is not None or self.pm_dec is not None or self.parallax is not None


@dataclass(frozen=True)
class BarycentricResult:
    """BERV (m/s) and BJD_TDB (days) of one observation, with any accuracy notes.

    ``berv`` is the velocity to compose with the shift measured on the file's wavelengths (0 for a
    file that is already barycentric); ``berv_obs`` is the BERV of the observation itself (the same
    for a topocentric file): the ``berv`` column, telluric positions and ``rv_topo`` use it.
    """

    berv: float
    bjd_tdb: float
    notes: tuple[str, ...] = ()
    berv_obs: float | None = None

    @property
    def observed_berv(self) -> float:
        return self.berv if self.berv_obs is None else self.berv_obs


def compose_velocity(rv_topo, berv):
    """Barycentric velocity from topocentric velocity and BERV (m/s), Wright & Eastman 2014 eq. 10.

    ``rv = rv_topo + berv + rv_topo * berv / c``.
    """
    rv_topo = np.asarray(rv_topo, dtype=float)
    return rv_topo + berv + rv_topo * berv / C_MS


def _coord(obs: Observation, target: Target):
    import astropy.units as u
    from astropy.coordinates import Distance, SkyCoord
    from astropy.time import Time

    kwargs = {"frame": obs.frame}
    if obs.equinox is not None:
        kwargs["equinox"] = obs.equinox
    if target.has_space_motion:
        if None in (target.pm_ra_cosdec, target.pm_dec, target.parallax, target.epoch):
            raise ConfigError("space motion needs pm_ra_cosdec, pm_dec, parallax and epoch together")
        if target.parallax <= 0:
            raise ConfigError(f"parallax {target.parallax} mas must be positive")
        return SkyCoord(
            ra=obs.ra_deg * u.deg, dec=obs.dec_deg * u.deg,
            pm_ra_cosdec=target.pm_ra_cosdec * u.mas / u.yr, pm_dec=target.pm_dec * u.mas / u.yr,
            distance=Distance(parallax=target.parallax * u.mas),
            radial_velocity=(target.radial_velocity or 0.0) * u.m / u.s,
            obstime=Time(target.epoch, format="jyear", scale="tdb"), **kwargs)
    return SkyCoord(ra=obs.ra_deg * u.deg, dec=obs.dec_deg * u.deg, **kwargs)


#: MJD range accepted for an observation time: 1858-11-17 to 2132-08-31.  Outside it a date is a
#: header error, not an observation (astropy/ERFA refuse some, e.g. MJD 1e9, and the rest would
#: give a BERV for no real epoch).  Common practice: MJD = JD - 2400000.5 (IAU 1997 Res. B1).
MJD_RANGE = (0.0, 100_000.0)
_JD_RANGE = (2_400_000.5 + MJD_RANGE[0], 2_400_000.5 + MJD_RANGE[1])


def check_mjd(mjd: float) -> str | None:
    """Why ``mjd`` cannot be an observation's MJD (None when it can)."""
    if not np.isfinite(mjd):
        return f"observation time MJD {mjd} is not a finite number"
    if _JD_RANGE[0] <= mjd <= _JD_RANGE[1]:
        return (f"observation time {mjd} looks like a Julian Date, not an MJD "
                f"(MJD = JD - 2400000.5 = {mjd - 2_400_000.5:.5f}); fix the header or give the MJD")
    if not MJD_RANGE[0] <= mjd <= MJD_RANGE[1]:
        return (f"observation time MJD {mjd:g} is outside the accepted range "
                f"{MJD_RANGE[0]:g}-{MJD_RANGE[1]:g} (years 1858-2132)")
    return None


def _check(obs: Observation) -> None:
    missing = obs.missing
    if "time" in missing:
        raise MetadataError(f"no usable observation time ({obs.time_source})", path=obs.path,
                            status="missing time")
    reason = check_mjd(float(obs.mjd_mid))
    if reason is not None:
        raise MetadataError(reason, path=obs.path, status="bad time")
    if "target" in missing:
        raise MetadataError("no target position (RA/DEC keywords, --ra/--dec or the config)",
                            path=obs.path, status="missing target")
    if "site" in missing:
        raise MetadataError("no observatory position (OBSGEO-X/Y/Z or -L/B/H, --site or the config)",
                            path=obs.path, status="missing site")


@offline_call
def barycentric_batch(observations: list[Observation], *, target: Target | None = None,
                      ephemeris: str | None = None) -> list[BarycentricResult | MetadataError]:
    """BERV and BJD_TDB for many observations, one astropy call per group.

    Observations are grouped by (target position, frame, site, time scale); each group is one
    vectorised call of ``radial_velocity_correction`` and one of ``light_travel_time``.

    Returns
    -------
    list
        Per observation, a :class:`BarycentricResult` or the :class:`MetadataError` explaining why
        none could be computed.

    Warns
    -----
    DegradedAccuracyWarning
        When astropy had to extrapolate the IERS tables (once per call).
    """
    import astropy.units as u
    from astropy.coordinates import EarthLocation, solar_system_ephemeris
    from astropy.time import Time

    target = target or Target()
    results: list = [None] * len(observations)
    groups: dict[tuple, list[int]] = {}
    for i, obs in enumerate(observations):
        try:
            _check(obs)
        except MetadataError as exc:
            results[i] = exc
            continue
        key = (obs.ra_deg, obs.dec_deg, obs.frame, obs.equinox, obs.site_xyz, obs.time_scale)
        groups.setdefault(key, []).append(i)
    if not groups:
        return results
    if ephemeris is not None and ephemeris != "builtin":
        if not os.path.isfile(ephemeris):
            raise ConfigError(f"ephemeris file {ephemeris!r} does not exist (give a local JPL .bsp path)")
        ephemeris = os.path.abspath(ephemeris)  # a bare name would be taken as a download request
    degraded = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with solar_system_ephemeris.set(ephemeris or "builtin"):
            for key, group in groups.items():
                first = observations[group[0]]
                coord = _coord(first, target)
                loc = EarthLocation.from_geocentric(*first.site_xyz, unit=u.m)

                def compute(idx, coord=coord, loc=loc, scale=key[-1]):
                    t = Time(np.array([observations[i].mjd_mid for i in idx]), format="mjd", scale=scale)
                    berv = coord.radial_velocity_correction(kind="barycentric", obstime=t, location=loc)
                    ltt = t.light_travel_time(coord, kind="barycentric", location=loc)
                    return (np.atleast_1d((t.tdb + ltt).jd), np.atleast_1d(berv.to_value(u.m / u.s)),
                            _iers_status(t))

                try:
                    parts = [(group, compute(group))]
                except (ValueError, ArithmeticError, MemoryError):
                    # one bad value (ERFA refuses it) must not sink the group: one call each
                    parts = []
                    for i in group:
                        try:
                            parts.append(([i], compute([i])))
                        except (ValueError, ArithmeticError, MemoryError) as exc:
                            results[i] = MetadataError(
                                f"barycentric correction failed for MJD {observations[i].mjd_mid:g} "
                                f"({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''})",
                                path=observations[i].path, status="bad time")
                for idx, (bjd, berv, status) in parts:
                    _store(idx, bjd, berv, status, results, degraded, observations)
    for w in caught:
        text = str(w.message)
        if "IERS" in text or "polar motion" in text.lower() or "dubious year" in text.lower():
            continue  # reported once below, and per row in the notes
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    if degraded.count("beyond"):
        warnings.warn(f"{degraded.count('beyond')} observation(s): {DEGRADED_NOTE}",
                      DegradedAccuracyWarning, stacklevel=2)
    if degraded.count("predicted"):
        warnings.warn(f"{degraded.count('predicted')} observation(s): {PREDICTED_NOTE}",
                      IERSPredictionWarning, stacklevel=2)
    return results


DEGRADED_NOTE = ("date beyond the bundled IERS tables: Earth orientation extrapolated "
                 "(<= 3 cm/s on BERV)")


PREDICTED_NOTE = ("date after the bundled IERS measurements: Earth orientation from IERS "
                  "predictions (effect < 1 mm/s)")


def _store(idx, bjd, berv, status, results, degraded, observations) -> None:
    for j, i in enumerate(idx):
        notes = ()
        if status[j] == "beyond":
            notes = (DEGRADED_NOTE,)
        elif status[j] == "predicted":
            notes = (PREDICTED_NOTE,)
        degraded.append(status[j])
        applied = float(berv[j])
        if observations[i].spec_frame == "barycentric":
            notes = (*notes, f"wavelengths already barycentric: no BERV applied (BERV at mid-exposure "
                             f"{applied:+.3f} m/s)")
            applied = 0.0
        results[i] = BarycentricResult(applied, float(bjd[j]), notes, float(berv[j]))


def _iers_status(t) -> list[str]:
    """Per time: ``measured``, ``predicted`` (IERS-A predictions) or ``beyond`` (extrapolated)."""
    from astropy.utils import iers

    table = iers.earth_orientation_table.get()
    _, _, status = table.pm_xy(t, return_status=True)
    status = np.atleast_1d(status)
    return ["beyond" if s == iers.TIME_BEYOND_IERS_RANGE
            else "predicted" if s == iers.FROM_IERS_A_PREDICTION else "measured" for s in status]
