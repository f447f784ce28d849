"""What every command shares: the argument parser class, option parsing helpers, measurement settings
from options and config, and the progress display."""

from __future__ import annotations

import argparse
import os
import sys
import time

from lineshift.errors import ConfigError, LineshiftError

__all__ = ["Parser", "Progress", "floats", "settings_from"]


class Parser(argparse.ArgumentParser):
    def error(self, message):  # one line and exit code 2, as argparse does, but without the usage dump
        command = " ".join(self.prog.split()[1:])  # "" for the top level, "measure" for a command
        self.exit(2, f"lineshift: {message} (see '{' '.join(['lineshift', command]).strip()} --help')\n")


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
    if args.workers < 1:
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
        keep_ccf=bool(args.plots),
        components=getattr(args, "components", 1) or 1,
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
