"""Where a fast rotator's zero point goes: blends with lines the mask does not hold.

On noise-free files of the independent forward model (tests/independent/forward.py; 12 overlapping
orders, R ~ 80 000, no blaze), the zero point (velocity - truth) of

* lineshift's mask engine, with the test suite's mask (lines deeper than 0.1, unbroadened central depths
  as weights), with every line of the star in the mask, and with every line weighted by its central
  depth broadened as the star broadens it (each line alone through the generator);
* an outside least-squares line model written here (it imports nothing from lineshift's measurement
  code): every mask line a free depth times one line profile (the generator's own kernel, Gray's
  rotational profile, eq. 18.14, convolved with a Gaussian of the intrinsic and instrumental width),
  a quadratic continuum per order, and one common shift solved by Gauss-Newton with the depths and
  continuum eliminated (variable projection, Golub & Pereyra 1973).  Blends between mask lines are
  modelled exactly by it, whatever the weights; lines missing from the mask are not.

for v sin i of 0, 5, 10 and 20 km/s.  A line model that fits every line of the star sits near the
truth; one that fits only the mask's lines does not, at the rotator's width: the missing weak lines
(unbroadened depth < 0.1) are what moves the zero point, and no choice of weights or fit window of the
lines the mask holds can remove it.

    PYTHONPATH=src:tests python benchmarks/zero_point_blends.py [-o docs/zero-point.md]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import numpy as np

from independent import forward as fwd

RV = 12_000.0
LINES = fwd.make_lines(11, 4300.0, 7200.0)
C = fwd.C


def _kernel(vsini: float, sigma: float, eps: float = 0.6) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit-peak line profile on a 50 m/s grid: Gaussian (sigma) convolved with Gray eq. 18.14."""
    dv = np.arange(-80_000.0, 80_001.0, 50.0)
    g = np.exp(-0.5 * (dv / sigma) ** 2)
    if vsini > 0:
        x = dv / vsini
        one = np.clip(1 - x**2, 0.0, None)
        g = np.convolve(g, 2 * (1 - eps) * np.sqrt(one) + 0.5 * np.pi * eps * one, mode="same")
    g /= g.max()
    return dv, g, np.gradient(g, dv)


def line_model_shift(orders, rest: np.ndarray, vsini: float, sigma: float, v0: float = RV) -> float:
    """Common shift (m/s) of a free-depth line model at the ``rest`` wavelengths (variable projection)."""
    dv, g, gp = _kernel(vsini, sigma)
    for _ in range(10):
        num = den = 0.0
        for lam, f in orders:
            mu = rest[(rest > lam[0] * (1 - 2e-4)) & (rest < lam[-1] * (1 + 2e-4))]
            vel = C * np.log(lam[:, None] / mu[None, :]) - v0
            k, kp = np.interp(vel, dv, g, left=0, right=0), np.interp(vel, dv, gp, left=0, right=0)
            a = np.hstack([np.vander(np.linspace(-1, 1, lam.size), 3), -k])
            coef = np.linalg.lstsq(a, f, rcond=None)[0]
            r = f - a @ coef
            j = kp @ coef[3:]                                  # d model / d v0
            jp = j - a @ np.linalg.lstsq(a, j, rcond=None)[0]  # with depths and continuum eliminated
            s = slice(50, -50)                                 # order ends: lines half outside
            num += jp[s] @ r[s]
            den += jp[s] @ jp[s]
        step = num / den
        v0 += step
        if abs(step) < 0.01:
            break
    return v0 - RV


def broadened_depths(setup) -> np.ndarray:
    """Central depth of each line alone, broadened as the star broadens it (rotation, instrument)."""
    out = np.zeros(LINES.wave.size)
    for i, (w, t, sg, gm) in enumerate(zip(LINES.wave, LINES.depth, LINES.sigma_v, LINES.gamma_v, strict=True)):
        one = fwd.Lines(np.array([w]), np.array([t]), np.array([sg]), np.array([gm]))
        edges = w * np.exp((np.arange(401) - 200) / (80_000.0 * 3.2))
        out[i] = 1.0 - fwd._order_model(edges, 80_000.0, one, 0.0, setup).min()
    return out


def main(argv=None) -> int:
    from lineshift.model import LineMask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("-o", "--output", default="docs/zero-point.md")
    args = ap.parse_args(argv)
    commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True).stdout.strip()
    depth = fwd.line_depths(LINES)
    sets = {"mask lines (depth > 0.1)": depth > 0.1, "every line of the star": np.ones(depth.size, bool)}
    rows = []
    t0 = time.time()
    with tempfile.TemporaryDirectory() as tmp:
        for vsini in (0.0, 5_000.0, 10_000.0, 20_000.0):
            setup = fwd.echelle_setup(5, n_orders=12, vsini=vsini, blaze=False)
            counts = fwd.model_counts(setup, LINES, RV)
            path = os.path.join(tmp, f"v{vsini:.0f}.fits")
            fwd.write_echelle(path, setup, fwd.Draw(counts, [c + setup.read_noise**2 for c in counts], "given"))
            orders = []
            for k, e in enumerate(setup.edges):
                orders.append((0.5 * (e[1:] + e[:-1]), fwd._order_model(e, setup.resolution[k], LINES, RV, setup)))
            sigma = float(np.hypot(2000.0, C / np.median(setup.resolution) / 2.3548))
            broad = broadened_depths(setup)
            for name, keep, weight in [(n, k, depth) for n, k in sets.items()] + [
                    ("every line, weights its broadened depth", np.ones(depth.size, bool), broad)]:
                mask = LineMask(LINES.wave[keep], weight[keep], (), name)
                row = measure_files([path], mask, MeasureSettings(method="mask"))[0]
                # the file is topocentric at the header's BERV: compare like with like (rv_topo)
                mask_zp = row["rv_topo"] - RV if row["status"] == "ok" else float("nan")
                # the line model fits its own depths: a mask's weights do not enter it
                model_zp = (line_model_shift(orders, LINES.wave[keep], vsini, sigma) if weight is depth
                            else float("nan"))
                rows.append((vsini / 1e3, name, int(keep.sum()), mask_zp, model_zp))
                print(rows[-1], flush=True)
    out = [
        "# Zero point and blends",
        "",
        f"Measured {dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M} UTC at commit `{commit or 'unknown'}` by "
        "`benchmarks/zero_point_blends.py` (noise-free files of the independent forward model, 12 overlapping "
        "orders from 4500 A, R ~ 80 000 varying 10 % between orders, no blaze; one line list of "
        f"{depth.size} lines, {int((depth > 0.1).sum())} deeper than 0.1).",
        "",
        "*mask engine*: `rv_topo` of lineshift's mask engine minus the truth (m/s). *line model*: an outside "
        "least-squares fit written in the script (free depth per line, the generator's own line profile, a "
        "quadratic continuum per order, one common shift) minus the truth. Noise-free, so every figure is a "
        "bias, not luck.",
        "",
        "| v sin i (km/s) | lines used | n lines | mask engine (m/s) | line model (m/s) |",
        "|---:|---|---:|---:|---:|",
    ]
    out += [f"| {v:.0f} | {n} | {k} | {a:+.1f} | " + ("-" if np.isnan(b) else f"{b:+.1f}") + " |"
            for v, n, k, a, b in rows]
    out += ["", f"Total time {time.time() - t0:.0f} s.", ""]
    Path(args.output).write_text("\n".join(out))
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
