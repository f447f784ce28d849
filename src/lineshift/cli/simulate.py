"""``lineshift simulate``: synthetic observations of an invented star."""

from __future__ import annotations

import os
import sys

from lineshift.cli.common import add_shared
from lineshift.errors import ConfigError


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("simulate", help="synthetic observations of an invented star",
                       description="Write simulated spectra of the invented star Vessa-9 with a truth table.")
    from lineshift.sim import INSTRUMENTS

    p.add_argument("outdir", metavar="OUTDIR", help="directory to write the spectra and truth/ into")
    p.add_argument("--instrument", action="append", metavar="NAME[:N]",
                   help=f"instrument and count (repeatable; names: {', '.join(INSTRUMENTS)}); default: the demo "
                        "set demo-echelle:20, demo-1d:4, demo-table:4, demo-text:4")
    p.add_argument("--seed", type=int, default=1, help="random seed of the noise and the observing times")
    p.add_argument("--snr", type=float, metavar="X",
                   help="override the SNR per pixel at the blaze peak (default: the instrument's)")
    p.add_argument("--mask", metavar="CSV", help="also write the star's line mask here")
    p.add_argument("--lamp", metavar="LIST",
                   help="write lamp exposures (lamp_*.fits.gz) instead: emission lines from LIST (vacuum CSV), or "
                        "'invented' for a dense invented lamp whose lines go to truth/lamp_lines_NAME.csv")
    p.add_argument("--distort", action="append", metavar="ORDER:OFFSET:TILT",
                   help="lamp wavelength-solution error of an order, m/s (offset, edge-to-edge tilt); repeatable")
    p.add_argument("--lamp-drift", type=float, default=0.0, metavar="M_S_PER_HOUR",
                   help="linear drift of the lamp exposures, which are taken one hour apart, m/s per hour")
    p.add_argument("--binary", action="store_true", help="observe the invented double-lined binary Vessa-12 instead")
    p.add_argument("--asymmetry", type=float, default=0.0, metavar="A",
                   help="asymmetric intrinsic lines: sigma (1-A) blueward, (1+A) redward (|A| < 0.5)")
    p.add_argument("--lab-lines", metavar="LIST",
                   help="plant the laboratory lines of LIST (e.g. line_lists/lab_lines_optical.csv) in the star, for "
                        "testing 'lineshift mask --anchor' (default: none)")
    p.add_argument("--no-compress", action="store_true", help="write plain files instead of .gz")
    add_shared(p, "-q", "--debug")


def run(args) -> int:
    from dataclasses import replace

    from lineshift import sim

    plan = []
    for item in args.instrument or ["demo-echelle:20", "demo-1d:4", "demo-table:4", "demo-text:4"]:
        name, _, count = item.partition(":")
        if name not in sim.INSTRUMENTS:
            raise ConfigError(f"--instrument {name!r}: known instruments are {', '.join(sim.INSTRUMENTS)}")
        try:
            n = int(count or 1)
        except ValueError:
            raise ConfigError(f"--instrument {item!r}: the count must be a whole number") from None
        if n < 1:
            raise ConfigError(f"--instrument {item!r}: the count must be at least 1")
        ins = sim.INSTRUMENTS[name]
        if args.snr is not None:
            ins = replace(ins, snr=args.snr)
        plan.append((ins, n))
    if args.lamp:
        return _simulate_lamps(args, plan, sim)
    star = sim.DEMO_STAR
    if not abs(args.asymmetry) < 0.5:
        raise ConfigError("--asymmetry must lie between -0.5 and 0.5")
    if args.asymmetry:
        from dataclasses import replace as dc_replace

        star = dc_replace(star, asymmetry=args.asymmetry)
    if args.lab_lines:
        from lineshift.io.linelists import read_lab_lines

        lab, _ = read_lab_lines(args.lab_lines)
        star = sim.with_lab_lines(star, lab.wavelength)
    total = sum(n for _, n in plan)
    bar = None
    if not args.quiet and sys.stderr.isatty():
        from tqdm import tqdm

        bar = tqdm(total=total, unit="spectrum", file=sys.stderr)
    rows = sim.simulate_set(args.outdir, plan, star=star, seed=args.seed, compress=not args.no_compress,
                            progress=bar.update if bar else None,
                            binary=sim.DEMO_BINARY if args.binary else None)
    if bar:
        bar.close()
    if args.mask:
        sim.write_mask(star, args.mask)
    if not args.quiet:
        print(f"lineshift: {len(rows)} spectra of {sim.DEMO_STAR.name} written to {args.outdir}; truth in "
              f"{os.path.join(args.outdir, 'truth', 'truth.csv')}" + (f"; mask {args.mask}" if args.mask else ""),
              file=sys.stderr)
    return 0


def _simulate_lamps(args, plan, sim) -> int:
    import numpy as np
    import pandas as pd

    from lineshift.io.linelists import read_lab_lines

    distortion = {}
    for item in args.distort or []:
        try:
            order, off, tilt = item.split(":")
            distortion[int(order)] = (float(off), float(tilt))
        except ValueError:
            raise ConfigError(f"--distort {item!r}: expected ORDER:OFFSET:TILT (m/s)") from None
    os.makedirs(os.path.join(args.outdir, "truth"), exist_ok=True)
    rng = np.random.default_rng(args.seed)
    rows, k = [], 0
    for ins, n in plan:
        if args.lamp == "invented":
            w = ins.wavelengths()
            lam, counts = sim.invented_lamp_lines(float(w.min()), float(w.max()), seed=args.seed)
            pd.DataFrame({"wavelength": lam}).to_csv(os.path.join(args.outdir, "truth", f"lamp_lines_{ins.name}.csv"),
                                                     index=False)
        else:
            lab, _ = read_lab_lines(args.lamp)
            lam, counts = lab.wavelength, np.full(lab.wavelength.size, 1e5)
        for j in range(n):
            hours = float(k)
            exp = sim.lamp_exposure(ins, lam, counts, rng, mjd_start=61000.7 + hours / 24, distortion=distortion,
                                    drift=args.lamp_drift * hours)
            name = f"lamp_{ins.name}_{j:03d}.fits" + ("" if args.no_compress else ".gz")
            sim.write_observation(exp, os.path.join(args.outdir, name), style=k)
            rows.append({"file": name, "mjd_mid_utc": exp.truth["mjd_mid_utc"], "drift": exp.truth["drift"],
                         "distortion": ";".join(f"{o}:{a}:{b}" for o, (a, b) in sorted(distortion.items()))})
            k += 1
    pd.DataFrame(rows).to_csv(os.path.join(args.outdir, "truth", "truth.csv"), index=False)
    if not args.quiet:
        print(f"lineshift: {len(rows)} lamp exposures written to {args.outdir}", file=sys.stderr)
    return 0
