"""What every command shares: the argument parser class, option parsing helpers, measurement settings
from options and config, and the progress display."""

from __future__ import annotations

import argparse
import os
import sys
import time

from lineshift.errors import ConfigError, LineshiftError

__all__ = ["Formatter", "Parser", "Progress", "add_shared", "check_inputs", "floats", "settings_from"]


class Formatter(argparse.HelpFormatter):
    """Help that shows every option's default (unless the help text already names it)."""

    def _get_help_string(self, action):
        text = action.help or ""
        if "default" in text or action.default in (None, False, argparse.SUPPRESS) or not action.option_strings:
            return text
        return f"{text} (default: %(default)s)"


class Parser(argparse.ArgumentParser):
    """Options may stand before, between or after the inputs of a command (intermixed parsing)."""

    _intermixing = False

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", Formatter)
        super().__init__(*args, **kwargs)

    def parse_known_args(self, args=None, namespace=None):
        has_sub = any(isinstance(a, argparse._SubParsersAction) for a in self._actions)
        if has_sub or self._intermixing:
            return super().parse_known_args(args, namespace)
        self._intermixing = True
        try:
            return self.parse_known_intermixed_args(args, namespace)
        finally:
            self._intermixing = False

    def error(self, message):  # one line and exit code 2, as argparse does, but without the usage dump
        command = " ".join(self.prog.split()[1:])  # "" for the top level, "measure" for a command
        self.exit(2, f"lineshift: {message} (see '{' '.join(['lineshift', command]).strip()} --help')\n")


#: Options several commands share, with one help text each (name -> add_argument keywords).
SHARED = {
    "--config": dict(metavar="TOML", help="configuration file: target astrometry, site, measurement settings; "
                                          "command-line values win"),
    "--ra": dict(metavar="RA", help="target right ascension, degrees or hh:mm:ss (ICRS), overrides the headers"),
    "--dec": dict(metavar="DEC", help="target declination, degrees or dd:mm:ss (ICRS), overrides the headers"),
    "--object": dict(metavar="NAME", help="target name, overrides the headers"),
    "--site": dict(metavar="LON,LAT,HEIGHT", help="observatory: longitude (deg east), latitude (deg), height (m); "
                                                  "overrides the headers"),
    "--medium": dict(choices=("air", "vacuum"), help="medium of the files' wavelengths, overrides the headers "
                                                     "(default: from CTYPE1 or the config, else vacuum)"),
    "--telluric": dict(metavar="CSV", help="telluric band list (default: the shipped line_lists/telluric_bands.csv)"),
    "--no-telluric": dict(action="store_true", help="keep mask lines that telluric bands can reach"),
    "--ephemeris": dict(metavar="PATH", help="local JPL .bsp ephemeris for the barycentric correction "
                                             "(default: astropy's builtin)"),
    "--flux-time-key": dict(metavar="KEYWORD",
                            help="header keyword of a flux-weighted mid-exposure time (exposure meter; MJD, JD or "
                                 "ISO date in TIMESYS), used before the other time keywords where a file has it"),
    "-q": dict(action="store_true", help="no progress or summary on stderr"),
    "--debug": dict(action="store_true", help="show tracebacks of unexpected errors"),
}


def add_shared(p, *names: str) -> None:
    """Add the shared options ``names`` (keys of :data:`SHARED`) to parser ``p``."""
    for name in names:
        flags = ("-q", "--quiet") if name == "-q" else (name,)
        p.add_argument(*flags, **SHARED[name])


def check_inputs(items, what: str = "input") -> None:
    """A usage error (exit 2) naming the first input that is neither a file, a directory nor a matching glob."""
    import glob

    for item in items:
        if os.path.exists(item):
            continue
        if any(ch in item for ch in "*?[") and glob.glob(item):
            continue
        kind = "glob matches nothing" if any(ch in item for ch in "*?[") else "no such file or directory"
        raise ConfigError(f"{what} {item!r}: {kind}")


def floats(text: str, n: int, name: str) -> tuple[float, ...]:
    parts = [p.strip() for p in text.split(",")]
    try:
        values = tuple(float(p) for p in parts)
    except ValueError:
        raise ConfigError(f"{name} {text!r}: expected {n} comma-separated numbers") from None
    if len(values) != n:
        raise ConfigError(f"{name} {text!r}: expected {n} comma-separated numbers")
    return values


def _given(value, default):
    return default if value is None else value


def settings_from(args, cfg):
    from lineshift.calib.barycentric import Target
    from lineshift.io.metadata import parse_dec, parse_ra
    from lineshift.measure.mask_engine import SearchSettings
    from lineshift.run.config import parse_site
    from lineshift.run.pipeline import MeasureSettings, Overrides

    t, site, mc = cfg["target"], cfg["site"], cfg["measure"]
    try:
        ra = parse_ra(args.ra) if args.ra is not None else t.get("ra")
        dec = parse_dec(args.dec) if args.dec is not None else t.get("dec")
    except LineshiftError as exc:
        raise ConfigError(f"--ra/--dec: {exc.reason}") from None
    site_xyz = parse_site(args.site) if args.site else site.get("xyz")
    vrange = floats(args.velocity_range, 2, "--velocity-range") if args.velocity_range else mc.get("velocity_range")
    # every number is checked once, by MeasureSettings (lineshift.run.config.check_settings)
    if args.workers is not None and args.workers < 1:
        raise ConfigError("--workers must be at least 1")
    frame = t.get("frame")
    telluric = False if args.no_telluric else (args.telluric or mc.get("telluric_bands"))
    if telluric is True:
        telluric = None
    if isinstance(telluric, str) and not os.path.isfile(telluric):
        raise ConfigError(f"telluric band list {telluric!r} does not exist")
    ephemeris = args.ephemeris or mc.get("ephemeris")
    if ephemeris and ephemeris != "builtin" and not os.path.isfile(ephemeris):
        raise ConfigError(f"ephemeris {ephemeris!r} does not exist (give a local JPL .bsp file)")
    equinox = t.get("equinox")
    return MeasureSettings(
        method=args.method or mc.get("method", "mask"),
        search=SearchSettings(velocity_range=vrange, velocity_step=_given(args.velocity_step, mc.get("velocity_step")),
                              box_width=_given(args.box_width, mc.get("box_width"))),
        continuum_degree=mc.get("continuum_degree", 4),
        medium=args.medium or mc.get("medium"),
        overrides=Overrides(object=args.object or t.get("object"), ra_deg=ra, dec_deg=dec,
                            frame=frame.lower() if frame else None,
                            equinox=None if equinox is None else str(equinox), site_xyz=site_xyz),
        target=Target(pm_ra_cosdec=t.get("pm_ra_cosdec"), pm_dec=t.get("pm_dec"), parallax=t.get("parallax"),
                      radial_velocity=t.get("radial_velocity"), epoch=t.get("epoch")),
        ephemeris=ephemeris,
        telluric_bands=telluric,
        systemic_velocity=args.systemic_velocity if args.systemic_velocity is not None else mc.get("systemic_velocity"),
        keep_ccf=bool(args.plots or getattr(args, "report", None)),
        components=getattr(args, "components", 1) or 1,
        activity=bool(getattr(args, "activity", False) or mc.get("activity", False)),
        mount_wilson_calibration=mc.get("mount_wilson_calibration"),
        b_minus_v=getattr(args, "b_minus_v", None) if getattr(args, "b_minus_v", None) is not None
        else t.get("b_minus_v"),
        flux_time_key=getattr(args, "flux_time_key", None) or mc.get("flux_time_key"),
    )


class Progress:
    """tqdm bar on a terminal; a one-line log every 30 s otherwise; nothing with -q."""

    def __init__(self, total: int, quiet: bool):
        self.total, self.done, self.quiet = total, 0, quiet
        self.bar = None
        self.last = time.monotonic()
        self.start = self.last
        if not quiet and sys.stderr.isatty() and total > 1:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit="spectrum", file=sys.stderr, dynamic_ncols=True)

    def update(self):
        self.done += 1
        if self.bar is not None:
            self.bar.update(1)
        elif not self.quiet and time.monotonic() - self.last > 30:
            self.last = time.monotonic()
            rate = self.done / (self.last - self.start)
            print(f"lineshift: {self.done}/{self.total} spectra ({rate:.1f}/s)", file=sys.stderr)

    def write(self, text: str):
        if self.bar is not None:
            self.bar.write(text, file=sys.stderr)
        else:
            print(text, file=sys.stderr)

    def close(self):
        if self.bar is not None:
            self.bar.close()
