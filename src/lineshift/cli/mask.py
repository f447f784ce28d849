"""``lineshift mask``: build a line mask from spectra of one star."""

from __future__ import annotations

import os
import sys

from lineshift.cli.common import add_shared, check_inputs, settings_from
from lineshift.errors import ConfigError, LineshiftError


def add_parser(sub) -> None:
    """Declare the command and its options on the subcommand set ``sub``."""
    p = sub.add_parser("mask", help="build a line mask from spectra of one star",
                       description="Co-add spectra in the star's frame, find and fit its lines, write a mask.")
    p.add_argument("spectra", nargs="+", metavar="SPECTRUM", help="spectrum files, directories or globs")
    p.add_argument("-o", "--output", metavar="MASK", required=True, help="mask CSV to write")
    p.add_argument("--start-mask", metavar="CSV",
                   help="refine this mask instead of finding lines afresh: first-pass velocities with it, its "
                        "lines re-measured on the co-add (positions, weights), lines the star lacks dropped; "
                        "the changes are printed and written in the mask's header (default: lines found in the "
                        "co-add)")
    p.add_argument("--changes", metavar="CSV",
                   help="with --start-mask: also write a per-line table of what changed (start and new "
                        "wavelength, shift, weight, kept / moved / dropped and why)")
    p.add_argument("--anchor", action="store_true",
                   help="shift the mask to laboratory wavelengths (absolute zero point) with the --lab-lines list; "
                        "without it the zero point is relative")
    p.add_argument("--lab-lines", metavar="LABLIST",
                   help="laboratory line list CSV for --anchor (default: line_lists/lab_lines_optical.csv)")
    p.add_argument("--min-depth", type=float, default=0.05,
                   help="minimum line depth below the continuum, fraction 0..1 (default 0.05)")
    p.add_argument("--blend-fraction", type=float, default=1.0, metavar="X",
                   help="reject lines with a neighbour closer than this x FWHM (default 1.0)")
    p.add_argument("--max-width-ratio", type=float, default=1.25, metavar="X",
                   help="reject lines wider than this x the median FWHM as unresolved blends (default 1.25)")
    p.add_argument("--max-centre-error", type=float, default=100.0, metavar="M_S",
                   help="reject lines whose fitted centre error exceeds this (default 100 m/s)")
    p.add_argument("--iterations", type=int, default=4, metavar="N",
                   help="co-add / measure iterations at most; stops earlier when the velocities move by less "
                        "than a tenth of their errors (default 4)")
    p.add_argument("--plot", metavar="PNG", help="plot of the template with the kept lines")
    add_shared(p, "--config", "--ra", "--dec", "--site", "--medium", "--telluric", "--no-telluric", "--ephemeris",
               "-q", "--debug")


def run(args) -> int:
    from lineshift.calib.linefind import LineSettings
    from lineshift.io.linelists import DEFAULT_LAB_LINES, read_mask
    from lineshift.run.config import load_config
    from lineshift.run.mask_builder import MaskBuildSettings, build_mask, write_changes_file, write_mask_file
    from lineshift.run.pipeline import expand_inputs

    cfg = load_config(args.config) if args.config else {"target": {}, "site": {}, "measure": {}}
    for name in ("object", "velocity_range", "velocity_step", "box_width", "method", "systemic_velocity",
                 "workers", "plots"):
        setattr(args, name, None if name != "workers" else 1)
    settings = settings_from(args, cfg)
    if not 0 < args.min_depth < 1:
        raise ConfigError("--min-depth must lie between 0 and 1")
    if args.blend_fraction < 0 or args.max_centre_error <= 0 or args.iterations < 0:
        raise ConfigError("--blend-fraction must be >= 0, --max-centre-error > 0, --iterations >= 0")
    check_inputs(args.spectra)
    paths = expand_inputs(args.spectra)
    if not paths:
        raise ConfigError(f"no spectrum files in {', '.join(args.spectra)}")
    if os.path.abspath(args.output) in {os.path.abspath(p) for p in paths}:
        raise ConfigError(f"output {args.output!r} is one of the inputs: refusing to overwrite it")
    if args.changes and not args.start_mask:
        raise ConfigError("--changes only applies with --start-mask")
    if args.changes and os.path.abspath(args.changes) == os.path.abspath(args.output):
        raise ConfigError("--changes and --output name the same file")
    if args.changes and os.path.abspath(args.changes) in {os.path.abspath(p) for p in paths}:
        raise ConfigError(f"--changes {args.changes!r} is one of the inputs: refusing to overwrite it")
    from lineshift.cli.measure import check_writable

    for what, target in (("output", args.output), ("--changes", args.changes)):
        if target:
            check_writable(os.path.dirname(os.path.abspath(target)), what, target)
    start = read_mask(args.start_mask) if args.start_mask else None
    anchor = None
    if args.lab_lines and not args.anchor:
        raise ConfigError("--lab-lines only applies with --anchor")
    if args.anchor:
        anchor = args.lab_lines or DEFAULT_LAB_LINES
        from lineshift.io.linelists import read_lab_lines

        read_lab_lines(anchor)  # a bad list is a usage error, before any work
    if args.max_width_ratio <= 1:
        raise ConfigError("--max-width-ratio must exceed 1")
    build = MaskBuildSettings(lines=LineSettings(min_depth=args.min_depth, blend_fraction=args.blend_fraction,
                                                 max_centre_error=args.max_centre_error,
                                                 max_width_ratio=args.max_width_ratio),
                              iterations=args.iterations)
    try:
        res = build_mask(paths, settings, build, start_mask=start, anchor=anchor)
    except LineshiftError as exc:
        print(f"lineshift: cannot build a mask: {exc.reason}", file=sys.stderr)
        return 1
    for _path, reason in res.failures:
        print(f"lineshift: {reason}", file=sys.stderr)
    write_mask_file(res.mask, args.output)
    if args.changes and res.refinement is not None:
        write_changes_file(res.refinement, args.changes, res.mask.provenance)
    if args.plot:
        from lineshift.plots.figures import plot_template

        plot_template(res.template, res.found, args.plot)
    if not args.quiet:
        c = res.found.counts()
        print(f"lineshift: mask of {c['kept']} lines written to {args.output} from {len(res.paths)} spectra; "
              f"rejected {c['blend']} blend, {c['edge']} edge/bad pixel, {c['telluric']} telluric, "
              f"{c['centre']} centre error, {c['shallow']} shallow, {c['fit']} fit", file=sys.stderr)
        if res.refinement is not None:
            print(f"lineshift: refined {args.start_mask}: {res.refinement.summary()}", file=sys.stderr)
        print(f"lineshift: expected photon-limited error {res.error_per_snr:.0f} m/s per unit SNR "
              f"({res.error_per_snr / 100:.2f} m/s at SNR 100)", file=sys.stderr)
        if res.anchor is None and res.refinement is not None:
            print("lineshift: zero point is the starting mask's", file=sys.stderr)
        elif res.anchor is None:
            print("lineshift: zero point is relative (the co-added template's frame)", file=sys.stderr)
        else:
            a = res.anchor
            print(f"lineshift: anchored to {a.n_matched} laboratory lines: offset {a.offset:+.1f} +- "
                  f"{a.offset_err:.1f} m/s removed", file=sys.stderr)
    return 1 if res.failures else 0
