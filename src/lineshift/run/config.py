"""TOML configuration: validated into plain values, overridable from the command line.

Example (every key optional)::

    [target]
    object = "Vessa-9"
    ra = "08:45:37.50"        # degrees, or sexagesimal hours
    dec = -18.72361           # degrees, or sexagesimal degrees
    frame = "icrs"            # icrs, fk5, fk4
    pm_ra_cosdec = -41.2      # mas/yr   } space motion: give all four
    pm_dec = 12.7             # mas/yr   }
    parallax = 21.4           # mas      }
    epoch = 2016.0            # Julian year of the catalogue position }
    radial_velocity = 14230.0 # m/s, used with the space motion
    b_minus_v = 0.65          # B-V colour, for log R'HK

    [site]                    # lon/lat/height (deg, deg, m, WGS84) or x/y/z (geocentric m)
    lon = 35.2133
    lat = -12.4418
    height = 1850.0

    [measure]
    mask = "line_lists/vessa9_mask.csv"
    method = "mask"
    medium = "vacuum"         # override the files' medium
    velocity_range = [-300000.0, 300000.0]   # barycentric, m/s
    velocity_step = 800.0     # m/s
    box_width = 820.0         # m/s
    systemic_velocity = 14230.0              # m/s, for telluric rejection (else measured)
    telluric_bands = "line_lists/telluric_bands.csv"   # or false to disable
    continuum_degree = 4
    ephemeris = "/path/to/de421.bsp"         # or "builtin"
    activity = true           # activity indices (S-index, H-alpha, Na I D) in the table
    mount_wilson_calibration = [0.0, 1.0]    # S_MW = a + b S_instrument, this instrument's coefficients
    flux_time_key = "MJD-FLUX"   # header keyword of a flux-weighted mid-exposure time (exposure meter)

Unknown sections or keys, and values of the wrong type, are a :class:`ConfigError` (exit 2).
Nothing read from a config is evaluated or unpickled.
"""

from __future__ import annotations

import tomllib

from lineshift.errors import ConfigError, MetadataError
from lineshift.io.metadata import geodetic_to_xyz, parse_dec, parse_ra

__all__ = ["SCHEMA", "load_config", "parse_site"]

_NUM = (int, float)
SCHEMA: dict[str, dict[str, tuple]] = {
    "target": {"object": (str,), "ra": (str, *_NUM), "dec": (str, *_NUM), "frame": (str,),
               "equinox": (str, *_NUM), "pm_ra_cosdec": _NUM, "pm_dec": _NUM, "parallax": _NUM,
               "epoch": _NUM, "radial_velocity": _NUM, "b_minus_v": _NUM},
    "site": {"lon": _NUM, "lat": _NUM, "height": _NUM, "x": _NUM, "y": _NUM, "z": _NUM},
    "measure": {"mask": (str,), "method": (str,), "medium": (str,), "velocity_range": (list,),
                "velocity_step": _NUM, "box_width": _NUM, "systemic_velocity": _NUM,
                "telluric_bands": (str, bool), "continuum_degree": (int,), "ephemeris": (str,),
                "activity": (bool,), "mount_wilson_calibration": (list,), "flux_time_key": (str,)},
}


def load_config(path: str) -> dict[str, dict]:
    """Read and validate a TOML config; returns ``{section: {key: value}}`` with checked values."""
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except OSError as exc:
        raise ConfigError(f"config cannot be read ({exc.strerror or exc})", path=path) from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config is not valid TOML ({exc})", path=path) from None
    out: dict[str, dict] = {s: {} for s in SCHEMA}
    for section, values in data.items():
        if section not in SCHEMA:
            raise ConfigError(f"unknown config section [{section}] (known: {', '.join(SCHEMA)})", path=path)
        if not isinstance(values, dict):
            raise ConfigError(f"[{section}] must be a table", path=path)
        for key, value in values.items():
            types = SCHEMA[section].get(key)
            if types is None:
                raise ConfigError(f"unknown key {key!r} in [{section}] (known: {', '.join(SCHEMA[section])})",
                                  path=path)
            if (isinstance(value, bool) and bool not in types) or not isinstance(value, types):
                names = "/".join(t.__name__ for t in types)
                raise ConfigError(f"[{section}] {key} = {value!r} should be {names}", path=path)
            out[section][key] = value
    _validate(out, path)
    return out


def _validate(cfg: dict, path: str) -> None:
    t = cfg["target"]
    try:
        if "ra" in t:
            t["ra"] = parse_ra(t["ra"])
        if "dec" in t:
            t["dec"] = parse_dec(t["dec"])
    except MetadataError as exc:
        raise ConfigError(f"[target] {exc.reason}", path=path) from None
    if "frame" in t and t["frame"].lower() not in ("icrs", "fk5", "fk4"):
        raise ConfigError(f"[target] frame = {t['frame']!r} is not icrs, fk5 or fk4", path=path)
    motion = [k for k in ("pm_ra_cosdec", "pm_dec", "parallax", "epoch") if k in t]
    if motion and len(motion) != 4:
        raise ConfigError("[target] space motion needs pm_ra_cosdec, pm_dec, parallax and epoch together",
                          path=path)
    if "parallax" in t and t["parallax"] <= 0:
        raise ConfigError("[target] parallax must be positive (mas)", path=path)
    s = cfg["site"]
    if s:
        geo, xyz = {"lon", "lat", "height"}, {"x", "y", "z"}
        if set(s) == geo:
            try:
                cfg["site"] = {"xyz": geodetic_to_xyz(s["lon"], s["lat"], s["height"])}
            except MetadataError as exc:
                raise ConfigError(f"[site] {exc.reason}", path=path) from None
        elif set(s) == xyz:
            cfg["site"] = {"xyz": (float(s["x"]), float(s["y"]), float(s["z"]))}
        else:
            raise ConfigError("[site] needs either lon, lat, height or x, y, z", path=path)
    m = cfg["measure"]
    if "velocity_range" in m:
        vr = m["velocity_range"]
        if len(vr) != 2 or not all(isinstance(v, _NUM) and not isinstance(v, bool) for v in vr) or vr[0] >= vr[1]:
            raise ConfigError("[measure] velocity_range must be [low, high] in m/s with low < high", path=path)
        m["velocity_range"] = (float(vr[0]), float(vr[1]))
    if "mount_wilson_calibration" in m:
        ab = m["mount_wilson_calibration"]
        if len(ab) != 2 or not all(isinstance(v, _NUM) and not isinstance(v, bool) for v in ab) or ab[1] == 0:
            raise ConfigError("[measure] mount_wilson_calibration must be [a, b] with S_MW = a + b S and b != 0",
                              path=path)
        m["mount_wilson_calibration"] = (float(ab[0]), float(ab[1]))
    for key in ("velocity_step", "box_width"):
        if key in m and m[key] <= 0:
            raise ConfigError(f"[measure] {key} must be positive (m/s)", path=path)
    if "medium" in m and m["medium"] not in ("air", "vacuum"):
        raise ConfigError("[measure] medium must be 'air' or 'vacuum'", path=path)
    if "continuum_degree" in m and not 0 <= m["continuum_degree"] <= 12:
        raise ConfigError("[measure] continuum_degree must be 0..12", path=path)


def parse_site(text: str) -> tuple[float, float, float]:
    """``--site LON,LAT,HEIGHT`` (degrees east, degrees, metres) to geocentric metres."""
    parts = [p.strip() for p in text.split(",")]
    if len(parts) != 3:
        raise ConfigError(f"--site {text!r}: expected LON,LAT,HEIGHT (degrees, degrees, metres)")
    try:
        lon, lat, h = (float(p) for p in parts)
    except ValueError:
        raise ConfigError(f"--site {text!r}: LON,LAT,HEIGHT must be numbers") from None
    try:
        return geodetic_to_xyz(lon, lat, h)
    except MetadataError as exc:
        raise ConfigError(f"--site: {exc.reason}") from None


# -- one validation of every numeric setting (command line, TOML and Python alike) -------------------

C_LIGHT = 299_792_458.0  # m/s, exact (SI definition)
#: Memory the fine CCF grid of one spectrum may take before it is refused (bytes).
GRID_MEMORY_BUDGET = 4 * 2**30
#: Assumptions of the estimate: a line as broad as 50 km/s FWHM (a fast rotator), searched over
#: ``window_fwhm`` FWHM on either side, and 8192 pixels per order (a large CCD row), 8-byte floats.
_BROAD_FWHM, _PIXELS = 50_000.0, 8192
#: Heights accepted for a site above the WGS84 ellipsoid (m): the Dead Sea shore to an airborne
#: observatory's ceiling (common practice: aircraft observatories fly near 14 km).
SITE_HEIGHT_RANGE = (-1_000.0, 20_000.0)
#: Parallax accepted (mas): above a galaxy's 1e-4 mas, below Proxima Centauri's 768 mas with room.
PARALLAX_RANGE = (1e-4, 1_000.0)


def _finite(name: str, value) -> float:
    import math

    try:
        x = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} = {value!r} is not a number") from None
    if not math.isfinite(x):
        raise ConfigError(f"{name} = {value!r} must be a finite number")
    return x


def grid_bytes(step: float, window_fwhm: float = 3.0) -> float:
    """Estimated bytes of the fine CCF grid for a velocity step (see :data:`GRID_MEMORY_BUDGET`)."""
    points = 2 * window_fwhm * _BROAD_FWHM / step + 1
    return points * _PIXELS * 8.0


def check_settings(settings) -> None:
    """Refuse (``ConfigError``, one line) any numeric setting that is not finite or not physical.

    Called by ``MeasureSettings`` itself, so the command line, the TOML file and the Python API
    go through the same check before any file is read or any array allocated.
    """
    s = settings.search
    if s.velocity_range is not None:
        lo, hi = (_finite("velocity range", v) for v in s.velocity_range)
        if not lo < hi:
            raise ConfigError(f"velocity range {lo:g}..{hi:g}: LO must be below HI")
        if max(abs(lo), abs(hi)) >= C_LIGHT:
            raise ConfigError(f"velocity range {lo:g}..{hi:g} m/s reaches the speed of light")
    for name, value in (("velocity step", s.velocity_step), ("box width", s.box_width)):
        if value is not None and not _finite(name, value) > 0:
            raise ConfigError(f"{name} = {value!r} must be a positive number of m/s")
        if value is not None and value >= C_LIGHT:
            raise ConfigError(f"{name} = {value:g} m/s is not below the speed of light")
    if s.velocity_step is not None:
        need = grid_bytes(s.velocity_step, s.window_fwhm)
        if need > GRID_MEMORY_BUDGET:
            raise ConfigError(
                f"velocity step {s.velocity_step:g} m/s needs about {need / 2**30:,.0f} GiB for the CCF grid "
                f"(limit {GRID_MEMORY_BUDGET / 2**30:.0f} GiB); use a step of at least "
                f"{grid_bytes(1.0, s.window_fwhm) / GRID_MEMORY_BUDGET:.1f} m/s")
    if settings.systemic_velocity is not None:
        v = _finite("systemic velocity", settings.systemic_velocity)
        if abs(v) >= C_LIGHT:
            raise ConfigError(f"systemic velocity {v:g} m/s is not below the speed of light")
    if not 0 <= int(settings.continuum_degree) <= 12:
        raise ConfigError("continuum degree must be 0..12")
    key = settings.flux_time_key
    if key is not None and (not isinstance(key, str) or not key.strip() or "=" in key or "'" in key
                            or not key.isascii() or not key.isprintable()):
        raise ConfigError(f"flux-weighted time keyword {key!r} is not a FITS keyword name")
    t = settings.target
    for name in ("pm_ra_cosdec", "pm_dec", "parallax", "radial_velocity", "epoch"):
        value = getattr(t, name)
        if value is not None:
            _finite(name, value)
    if t.parallax is not None and not PARALLAX_RANGE[0] <= t.parallax <= PARALLAX_RANGE[1]:
        raise ConfigError(f"parallax {t.parallax:g} mas is outside {PARALLAX_RANGE[0]:g}..{PARALLAX_RANGE[1]:g} mas")
    if t.radial_velocity is not None and abs(t.radial_velocity) >= C_LIGHT:
        raise ConfigError(f"radial_velocity {t.radial_velocity:g} m/s is not below the speed of light")
    if t.epoch is not None and not 1000.0 <= t.epoch <= 3000.0:
        raise ConfigError(f"epoch {t.epoch:g} is not a Julian year between 1000 and 3000")
    o = settings.overrides
    for name in ("ra_deg", "dec_deg"):
        if getattr(o, name) is not None:
            _finite(name.replace("_deg", ""), getattr(o, name))
    if o.site_xyz is not None:
        check_site(o.site_xyz)


def check_site(xyz) -> None:
    """The site (geocentric metres) must lie near the Earth's surface (WGS84, astropy EarthLocation)."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    x, y, z = (_finite("site", v) for v in xyz)
    height = EarthLocation.from_geocentric(x, y, z, unit=u.m).geodetic.height.to_value(u.m)
    if not SITE_HEIGHT_RANGE[0] <= height <= SITE_HEIGHT_RANGE[1]:
        raise ConfigError(f"site ({x:.0f}, {y:.0f}, {z:.0f}) m is {height / 1e3:,.1f} km from the Earth's "
                          f"surface (WGS84); expected {SITE_HEIGHT_RANGE[0] / 1e3:g} to "
                          f"{SITE_HEIGHT_RANGE[1] / 1e3:g} km")
