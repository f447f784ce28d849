"""Writing observations in every layout lineshift reads (FITS images, tables, text), masks, truth tables
and whole simulated sets.
"""

from __future__ import annotations

import csv
import gzip
import os

import numpy as np

from lineshift.sim.instrument import Instrument
from lineshift.sim.observe import Exposure, barycentric_truth, epochs, observe, observe_binary
from lineshift.sim.star import DEMO_SITE, DEMO_STAR, Binary, Site, Star

__all__ = ["simulate_set", "write_mask", "write_observation", "write_truth"]


def _meta_cards(obs: Exposure, style: int) -> list[tuple[str, object, str]]:
    """Header keywords; ``style`` varies how time, target and site are written across files."""
    from astropy.time import Time

    ins, star, site = obs.instrument, obs.star, obs.site
    start = Time(obs.mjd_start_utc, format="mjd", scale="utc")
    end = Time(obs.mjd_start_utc + ins.exptime / 86400.0, format="mjd", scale="utc")
    cards: list[tuple[str, object, str]] = [("OBJECT", star.name, "invented demo star"),
                                            ("TIMESYS", "UTC", "time scale")]
    if style % 3 == 0:
        cards += [("DATE-OBS", start.isot, "exposure start"), ("EXPTIME", ins.exptime, "[s]")]
    elif style % 3 == 1:
        cards += [("DATE-BEG", start.isot, "exposure start"), ("DATE-END", end.isot, "exposure end"),
                  ("XPOSURE", ins.exptime, "[s]")]
    else:
        cards += [("MJD-OBS", float(start.mjd), "exposure start [d]"), ("EXPTIME", ins.exptime, "[s]")]
    if style % 2 == 0:
        cards += [("RA", star.ra_deg, "[deg] ICRS"), ("DEC", star.dec_deg, "[deg] ICRS")]
    else:
        from astropy.coordinates import Angle

        cards += [("RA", Angle(star.ra_deg / 15.0, "hourangle").to_string(sep=":", precision=4), "ICRS hms"),
                  ("DEC", Angle(star.dec_deg, "deg").to_string(sep=":", precision=3, alwayssign=True), "ICRS dms")]
    cards.append(("RADESYS", "ICRS", ""))
    if style % 2 == 0:
        x, y, z = site.xyz
        cards += [("OBSGEO-X", x, "[m]"), ("OBSGEO-Y", y, "[m]"), ("OBSGEO-Z", z, "[m]")]
    else:
        cards += [("OBSGEO-L", site.lon, "[deg] east"), ("OBSGEO-B", site.lat, "[deg]"),
                  ("OBSGEO-H", site.height, "[m]")]
    cards += [("OBSERVAT", site.name, "invented site"), ("INSTRUME", ins.name, "simulated"),
              ("ORIGIN", "lineshift simulate", "synthetic data")]
    return cards


def write_observation(obs: Exposure, path: str, *, style: int = 0) -> str:
    """Write a simulated exposure in its instrument's layout; returns the path written."""
    from astropy.io import fits

    ins = obs.instrument
    cards = _meta_cards(obs, style)
    if ins.layout == "text":
        return _write_text(obs, path, cards)
    primary = fits.PrimaryHDU()
    for key, value, comment in cards:
        primary.header[key] = (value, comment)
    if ins.layout == "multi-order":
        hdus = [primary,
                fits.ImageHDU(obs.flux.astype(np.float32), name="FLUX"),
                fits.ImageHDU(obs.wave.astype(np.float64), name="WAVE"),
                fits.ImageHDU(obs.err.astype(np.float32), name="ERR")]
        hdus[2].header["BUNIT"] = "Angstrom"
        if obs.blaze is not None:
            hdus.append(fits.ImageHDU(obs.blaze.astype(np.float32), name="BLAZE"))
    elif ins.layout == "wcs-1d":
        w = obs.wave[0]
        primary.data = obs.flux[0].astype(np.float32)
        base = "AWAV" if ins.medium == "air" else "WAVE"
        if ins.dispersion == "log":
            primary.header["CTYPE1"] = f"{base}-LOG"
            primary.header["CDELT1"] = float(w[0] * np.log(w[1] / w[0]))
        else:
            primary.header["CTYPE1"] = base
            primary.header["CDELT1"] = float(w[1] - w[0])
        primary.header["CRVAL1"] = float(w[0])
        primary.header["CRPIX1"] = 1.0
        primary.header["CUNIT1"] = "Angstrom"
        hdus = [primary, fits.ImageHDU(obs.err[0].astype(np.float32), name="ERR")]
    elif ins.layout == "table":
        cols = [fits.Column("WAVE", "D", unit="Angstrom", array=obs.wave[0]),
                fits.Column("FLUX", "E", array=obs.flux[0]),
                fits.Column("ERR", "E", array=obs.err[0])]
        hdus = [primary, fits.BinTableHDU.from_columns(cols, name="SPECTRUM")]
    else:
        raise ValueError(f"unknown layout {ins.layout!r}")
    tmp = f"{path}.tmp"
    if path.endswith(".gz"):
        with gzip.open(tmp, "wb", compresslevel=6) as fh:
            fits.HDUList(hdus).writeto(fh)
    else:
        fits.HDUList(hdus).writeto(tmp, overwrite=True)
    os.replace(tmp, path)
    return path


def _write_text(obs: Exposure, path: str, cards) -> str:
    tmp = f"{path}.tmp"
    opener = gzip.open if path.endswith(".gz") else open
    with opener(tmp, "wt", newline="") as fh:
        for key, value, _comment in cards:
            fh.write(f"# {key} = {value}\n")
        fh.write(f"# medium: {obs.instrument.medium}\n")
        writer = csv.writer(fh)
        writer.writerow(["wavelength", "flux", "error"])
        for w, f, e in zip(obs.wave[0], obs.flux[0], obs.err[0], strict=True):
            writer.writerow([f"{w:.7f}", f"{f:.3f}", f"{e:.3f}"])
    os.replace(tmp, path)
    return path


def write_mask(star: Star, path: str, *, min_depth: float = 0.05) -> str:
    """Write the star's own line list as a mask (weights = line depth)."""
    lam, depth = star.line_list()
    keep = depth >= min_depth
    tmp = f"{path}.tmp"
    with open(tmp, "w", newline="") as fh:
        fh.write(f"# Line mask of the invented demo star {star.name}, written by `lineshift simulate`.\n")
        fh.write(f"# Provenance: the simulator's own seeded line list (seed {star.line_seed}), lines deeper\n")
        fh.write(f"# than {min_depth}; weight = central depth before broadening. Vacuum rest wavelengths,\n")
        fh.write("# Angstrom. Synthetic: no real star or laboratory data went into it.\n")
        fh.write("# medium: vacuum\n")
        fh.write("wavelength,weight\n")
        for w, d in zip(lam[keep], depth[keep], strict=True):
            fh.write(f"{w:.6f},{d:.4f}\n")
    os.replace(tmp, path)
    return path


def simulate_set(outdir: str, plan: list[tuple[Instrument, int]], *, star: Star = DEMO_STAR,
                 site: Site = DEMO_SITE, seed: int = 1, compress: bool = True, progress=None,
                 binary: Binary | None = None) -> list[dict]:
    """Write a set of observations; returns the truth rows (one per file).

    The truth table goes to ``OUTDIR/truth/truth.csv`` (a subdirectory, so that measuring the
    directory does not try to read it as a spectrum).
    """
    os.makedirs(outdir, exist_ok=True)
    rng = np.random.default_rng(seed)
    rows = []
    total = sum(n for _, n in plan)
    starts = epochs(total, rng)
    mids = starts + np.concatenate([np.full(n, ins.exptime) for ins, n in plan]) / 2 / 86400.0
    berv, bjd = barycentric_truth(binary.primary if binary else star, site, mids)
    k = 0
    ext = {"multi-order": ".fits", "wcs-1d": ".fits", "table": ".fits", "text": ".csv"}
    for ins, n in plan:
        for j in range(n):
            if binary is not None:
                obs = observe_binary(binary, ins, site, float(starts[k]), rng, berv_bjd=(berv[k], bjd[k]))
            else:
                obs = observe(star, ins, site, float(starts[k]), rng, berv_bjd=(berv[k], bjd[k]))
            stem = (binary.primary.name if binary else star.name).lower().replace(" ", "_")
            name = f"{stem}_{ins.name}_{j:03d}{ext[ins.layout]}" + (".gz" if compress else "")
            path = os.path.join(outdir, name)
            write_observation(obs, path, style=k)
            rows.append({"file": name, "layout": ins.layout, "instrument": ins.name, **obs.truth})
            k += 1
            if progress is not None:
                progress(1)
    os.makedirs(os.path.join(outdir, "truth"), exist_ok=True)
    write_truth(rows, os.path.join(outdir, "truth", "truth.csv"), binary.primary if binary else star)
    return rows


def write_truth(rows: list[dict], path: str, star: Star) -> None:
    tmp = f"{path}.tmp"
    with open(tmp, "w", newline="") as fh:
        fh.write(f"# Truth of the simulated observations of the invented star {star.name}.\n")
        if star.orbit is not None:
            o = star.orbit
            fh.write(f"# orbit: P={o.period} d, K={o.semi_amplitude} m/s, e={o.eccentricity}, "
                     f"omega={o.omega} rad, T_peri={o.time_periastron} BJD_TDB; gamma={star.gamma} m/s\n")
        fh.write("# rv_true: barycentric cz_B (m/s); berv, bjd_tdb: astropy; rv_bound: photon-noise bound\n")
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    os.replace(tmp, path)
