"""Injection-recovery report: scatter / photon-noise bound and pull std for the issue's scenarios.

Runs the same scenarios as ``tests/test_injection.py`` with more realisations and prints a
Markdown table (the figures quoted in the README).

    python benchmarks/injection_report.py [--velocities 20] [--noise 30] [--template]
"""

from __future__ import annotations

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "tests"))

from injection import recover, recover_template
from test_injection import SCENARIOS


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--velocities", type=int, default=20)
    ap.add_argument("--noise", type=int, default=30)
    ap.add_argument("--template", action="store_true", help="also the template engine")
    args = ap.parse_args(argv)
    n = args.velocities * args.noise
    print(f"{n} spectra per scenario ({args.velocities} velocities x {args.noise} noise realisations)\n")
    print("| scenario | photon-noise bound (m/s) | rms / bound | target | mean error / bound | pull std |")
    print("|---|---:|---:|---:|---:|---:|")
    for name, (star, ins, factor) in SCENARIOS.items():
        rec = recover(star, ins, n_velocities=args.velocities, n_noise=args.noise, seed=99)
        print(f"| {name} | {np.mean(rec.bound):.2f} | {rec.rms_over_bound:.3f} | < {factor} | "
              f"{np.mean(rec.err / rec.bound):.3f} | {np.std(rec.pulls):.3f} |")
    if args.template:
        print("\ntemplate engine (leave-one-out template from the same spectra):\n")
        print("| scenario | rms / bound | target | mean error / bound | pull std |")
        print("|---|---:|---:|---:|---:|")
        for name, (star, ins, _) in SCENARIOS.items():
            rec, _ = recover_template(star, ins, n_velocities=args.velocities, n_noise=args.noise, seed=99)
            print(f"| {name} | {rec.rms_over_bound:.3f} | < 1.10 | {np.mean(rec.err / rec.bound):.3f} | "
                  f"{np.std(rec.pulls):.3f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
