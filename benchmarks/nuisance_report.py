"""Nuisance report: each engine x each nuisance on/off, on files made by the independent generator.

Every exposure of a case is written twice from the same noise draw, clean and with one nuisance
(tests/independent/nuisances.py), over a year of BERV (astropy), and both sets are measured by
lineshift.  Reported per engine and case, clean and damaged: scatter / efficient estimator (the
least-squares fit of the generator's noise-free model on the clean draw, the attainable limit;
Bouchy, Pepe & Queloz 2001), the damaged/clean ratio of that, pull std (std of (rv - mean) / rv_err)
and the paired pull std (the efficient estimator as control variate, far less noisy), zero point
(mean rv minus the true barycentric velocity, with its standard error) and the mean number
of pixels rejected per spectrum (column n_rejected_pixels).  Writes docs/nuisances.md with date and
commit.  The mismatched mask is also refined by ``lineshift mask --start-mask`` (run.mask_builder.build_mask
on the damaged exposures) and the mask engine measured again with the refined mask: the remedy a user has.

    PYTHONPATH=src:tests python benchmarks/nuisance_report.py [--draws N] [--orders K] [-o docs/nuisances.md]
"""

from __future__ import annotations

import argparse
import datetime as dt
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import numpy as np

import nuisance_run as nr
from independent import nuisances as nzm
from lineshift._offline import offline

CASES = [
    ("cosmic rays", nzm.Nuisances(cosmics=True)),
    ("hot pixels", nzm.Nuisances(hot_pixels=True)),
    ("tellurics (band + weak lines)", nzm.Nuisances(tellurics=True)),
    ("NaN runs (ends + inside)", nzm.Nuisances(nan_runs=True)),
    ("zero / negative counts", nzm.Nuisances(nonpositive=True)),
    ("saturation, SATURATE keyword", nzm.Nuisances(saturation="flagged")),
    ("saturation, unflagged", nzm.Nuisances(saturation="unflagged")),
    ("mismatched mask", nzm.Nuisances(mask=True)),
    ("all at once", nzm.Nuisances.all()),
]


def _refined_row(name: str, batch, nz, clean) -> str:
    """The mask engine on the damaged exposures with the mismatched mask refined on them first."""
    from lineshift.model import LineMask
    from lineshift.run.mask_builder import build_mask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    w, d = nr.true_mask()
    mm = nzm.mismatch_mask(w, d, batch.seed)
    with tempfile.TemporaryDirectory() as tmp:
        paths = nr.write_batch(batch, Path(tmp), nz)
        built = build_mask(paths, MeasureSettings(), start_mask=LineMask(mm.wave, mm.weight, (), "mismatched"))
        rows = measure_files(paths, built.mask, MeasureSettings(method="mask"))
    g = nr.Result(np.array([r["rv"] for r in rows]), np.array([r["rv_err"] for r in rows]),
                  np.array([r.get("n_rejected_pixels") or 0 for r in rows]), batch.eff, batch.bound)
    c = clean
    return (f"| {name}, mask refined by `lineshift mask --start-mask` ({len(built.mask)} lines kept) | mask | "
            f"{c.ratio():.3f} | {g.ratio():.3f} | {g.ratio() / c.ratio():.3f} | {c.pull():.2f} | {g.pull():.2f} | "
            f"{c.paired_pull():.3f} | {g.paired_pull():.3f} | {c.zero_point():+.1f} ({c.zero_point_err():.1f}) | "
            f"{g.zero_point():+.1f} ({g.zero_point_err():.1f}) | {g.rejected.mean():.0f} |")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=16)
    ap.add_argument("--orders", type=int, default=12)
    ap.add_argument("-o", "--output", default="docs/nuisances.md")
    args = ap.parse_args(argv)
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True).stdout.strip()
    lines = [
        "# Nuisances: what real spectra carry",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC at commit `{commit or 'unknown'}` by "
        "`benchmarks/nuisance_report.py` "
        f"({args.draws} exposures over a year of BERV, {args.orders} overlapping blazed orders from 5950 A, "
        "R ~ 80 000, peak 2e4 counts; independent generator tests/independent/nuisances.py).",
        "",
        "Each exposure is written clean and damaged from the same noise draw. *ratio* = scatter / efficient "
        "estimator (least-squares fit of the true noise-free model to the clean draw); *x clean* = damaged "
        "ratio / clean ratio; *pull* = std of (rv - mean) / rv_err; *paired pull* = "
        "sqrt(bound^2 + var(rv - rv_eff)) / rms(rv_err), the pull with the efficient estimator as control "
        "variate (its error from N draws is (ratio^2 - 1) / 2 of the plain pull's); "
        "*zp* = mean rv - true rv (m/s, standard error in brackets); "
        "*rejected* = mean n_rejected_pixels per spectrum. Standard errors of a ratio "
        "or pull std from N draws are about 1/sqrt(2 (N - 1)) of it.",
        "",
        "| nuisance | engine | clean ratio | damaged ratio | x clean | pull clean | pull damaged | "
        "paired pull clean | paired pull damaged | zp clean | zp damaged | rejected |",
        "|---|---|---|---|---|---|---|---|---|---|---|---|",
    ]
    t0 = time.time()
    with offline():
        batch = nr.make_batch(n=args.draws, n_orders=args.orders)
        with tempfile.TemporaryDirectory() as d:
            clean = nr.measure_batch(batch, Path(d), nzm.Nuisances())
        for name, nz in CASES:
            with tempfile.TemporaryDirectory() as d:
                res = nr.measure_batch(batch, Path(d), nz)
            for m in ("mask", "template"):
                c, g = clean[m], res[m]
                lines.append(
                    f"| {name} | {m} | {c.ratio():.3f} | {g.ratio():.3f} | {g.ratio() / c.ratio():.3f} | "
                    f"{c.pull():.2f} | {g.pull():.2f} | {c.paired_pull():.3f} | {g.paired_pull():.3f} | "
                    f"{c.zero_point():+.1f} ({c.zero_point_err():.1f}) | "
                    f"{g.zero_point():+.1f} ({g.zero_point_err():.1f}) | {g.rejected.mean():.0f} |")
            print(lines[-2], lines[-1], sep="\n", flush=True)
            if nz.mask:
                lines.append(_refined_row(name, batch, nz, clean["mask"]))
                print(lines[-1], flush=True)
    lines += ["", f"Total time {time.time() - t0:.0f} s.", ""]
    Path(args.output).write_text("\n".join(lines))
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
