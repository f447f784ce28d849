"""``lineshift inspect``: what the loader understood from a file."""

from __future__ import annotations

from lineshift.cli.common import add_shared, check_inputs
from lineshift.errors import ConfigError, LineshiftError


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("inspect", help="what the loader understood from a file",
                       description="Print what lineshift understood from each file and what is missing.")
    p.add_argument("spectra", nargs="+", metavar="FILE", help="spectrum files, directories or globs")
    add_shared(p, "--medium", "--debug")


def _describe(path: str, medium) -> tuple[list[str], bool]:
    import numpy as np

    from lineshift.io.loaders import load_spectrum, read_observation

    lines = [f"file:     {path}"]
    try:
        spectrum = load_spectrum(path, medium=medium)
        obs, error = spectrum.obs, None
    except LineshiftError as exc:
        spectrum, error = None, exc
        try:
            obs = read_observation(path, medium=medium)
        except LineshiftError:
            obs = None
    if obs is None:
        lines.append(f"problem:  {error.reason if error else 'unreadable'}")
        return lines, False
    lines.append(f"layout:   {obs.layout}")
    if spectrum is not None:
        sizes = sorted({o.flux.size for o in spectrum.orders})
        lo, hi = spectrum.wavelength_range
        good = [np.isfinite(o.flux) & np.isfinite(o.var) & (o.var > 0) for o in spectrum.orders]
        snr = np.concatenate([o.flux[g] / np.sqrt(o.var[g]) for o, g in zip(spectrum.orders, good, strict=True)])
        lines.append(f"orders:   {spectrum.n_orders} ({'/'.join(map(str, sizes))} pixels)")
        lines.append(f"range:    {lo:.3f} - {hi:.3f} A (vacuum)")
        lines.append(f"snr:      median {np.median(snr):.1f} per pixel" if snr.size else "snr:      no valid pixel")
        if error is None:
            from lineshift.measure.prepare import prepare_spectrum

            try:  # the same preparation the engines start from: bad pixels, continuum, photon weights
                usable = len(prepare_spectrum(spectrum))
            except LineshiftError as exc:
                error, usable = exc, None
            if usable == 0:
                error = LineshiftError("no usable order (too few valid pixels: zero, negative or NaN flux)")
    lines.append(f"medium:   {obs.medium} in the file" + (" (converted to vacuum)" if obs.medium == "air" else ""))
    from lineshift.calib.barycentric import check_mjd

    bad_time = None if obs.mjd_mid is None else check_mjd(float(obs.mjd_mid))
    if bad_time is not None:  # checked before astropy sees it: ERFA refuses some such dates
        lines.append(f"time:     unusable: {bad_time}")
    elif obs.mjd_mid is not None:
        from astropy.time import Time

        iso = Time(obs.mjd_mid, format="mjd", scale=obs.time_scale).isot
        exp = f", exposure {obs.exptime:g} s" if obs.exptime is not None else ""
        lines.append(f"time:     {iso} {obs.time_scale.upper()} = MJD {obs.mjd_mid:.6f} (mid-exposure, "
                     f"from {obs.time_source}{exp})")
    else:
        lines.append(f"time:     missing: {obs.time_source}")
    name = f"{obs.object} " if obs.object else "(no OBJECT) "
    if obs.ra_deg is not None:
        lines.append(f"target:   {name}at RA {obs.ra_deg:.6f} deg, Dec {obs.dec_deg:+.6f} deg "
                     f"({obs.frame.upper()}{' ' + obs.equinox if obs.equinox else ''})")
    else:
        lines.append(f"target:   {name}missing RA/DEC")
    if obs.site_xyz is not None:
        from astropy.coordinates import EarthLocation

        geo = EarthLocation.from_geocentric(*obs.site_xyz, unit="m").to_geodetic()
        lines.append(f"site:     lon {geo.lon.deg:.5f} deg, lat {geo.lat.deg:+.5f} deg, "
                     f"height {geo.height.value:.1f} m")
    else:
        lines.append("site:     missing (OBSGEO-X/Y/Z or OBSGEO-L/B/H)")
    for note in obs.notes:
        lines.append(f"note:     {note}")
    if error is not None:
        lines.append(f"problem:  {error.reason}")
    lines.append(f"missing:  {', '.join(obs.missing) or 'nothing'}")
    return lines, error is None and bad_time is None and not obs.missing


def run(args) -> int:
    from lineshift.run.pipeline import expand_inputs

    check_inputs(args.spectra)
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError(f"no spectrum files in {', '.join(args.spectra)}")
    all_ok = True
    for k, path in enumerate(paths):
        lines, ok = _describe(path, args.medium)
        all_ok &= ok
        if k:
            print()
        print("\n".join(lines))
    return 0 if all_ok else 1
