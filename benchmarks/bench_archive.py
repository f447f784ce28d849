"""Archive benchmark: ``lineshift measure`` from files to the results store for 1 000 and 10 000
echelle spectra (36 orders x 4096 pixels, R = 110 000, a mask of ~800 lines), wall time and peak
memory, beside a plain raw-count mask CCF timed in the same run.

The files are generated once, before anything is timed, in a temporary directory that is removed
at the end: ``--base`` spectra of the invented star are simulated, and every archive file is a
byte copy of one of them with its own ``COPYNUM`` header card (so each file has its own content
hash and the store measures each one).  The free disk space is checked first (~3 MB per file); a
size that does not fit is skipped and said so.

Timed: the command a user would type, ``lineshift measure DIR --mask MASK --store STORE -o TABLE -q``
with the default worker count (every core), in a subprocess.  Peak memory is the largest resident
set summed over that process and its workers, sampled every 20 ms from /proc (as in
bench_batch.py).  The plain reference (profile_stages.plain_ccf: FITS read, box mask on raw counts
around the known velocity, Gaussian fit) is timed serially on ``--plain`` of the same files.

    python benchmarks/bench_archive.py [--sizes 1000,10000] [--base 40] [--plain 100]
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time

import numpy as np
import pandas as pd
from astropy.io import fits

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
_ENV = dict(os.environ)
from bench_batch import _run
from profile_stages import plain_ccf

os.environ.clear()
os.environ.update(_ENV)   # profile_stages pins BLAS threads for its own run: the command runs as a user's would

from lineshift import sim

BYTES_PER_FILE = 3_000_000   # 5 image extensions of 36 x 4096 float32 plus headers: 2.97 MB


def _write_mask(path: str, n_lines: int = 800) -> tuple[np.ndarray, np.ndarray]:
    lam, depth = sim.DEMO_STAR.line_list()
    w = sim.INSTRUMENTS["echelle"].wavelengths()
    inside = (lam > w.min()) & (lam < w.max())
    lam, depth = lam[inside], depth[inside]
    keep = np.sort(np.argsort(depth)[::-1][:n_lines])
    with open(path, "w") as fh:
        fh.write("# benchmark mask: the invented star's strongest lines on the echelle's range\n")
        fh.write("# medium: vacuum\nwavelength,weight\n")
        for a, b in zip(lam[keep], depth[keep], strict=True):
            fh.write(f"{a:.6f},{b:.4f}\n")
    return lam[keep], depth[keep]


def _base_files(directory: str, n: int) -> tuple[list[bytes], list[int], list[float]]:
    """``n`` simulated spectra as bytes, the offset of their COPYNUM card, and their true velocities."""
    rng = np.random.default_rng(11)
    raw, offsets, truth = [], [], []
    for k in range(n):
        exp = sim.observe(sim.DEMO_STAR, sim.INSTRUMENTS["echelle"], sim.DEMO_SITE, 61010.8 + 1.7 * k, rng)
        path = sim.write_observation(exp, os.path.join(directory, f"base{k:03d}.fits"))
        with fits.open(path, mode="update") as h:
            h[0].header["COPYNUM"] = (0, "benchmark copy number")
        with open(path, "rb") as fh:
            data = fh.read()
        os.unlink(path)
        at = data.find(b"COPYNUM =")
        assert at >= 0 and at % 80 == 0
        raw.append(data)
        offsets.append(at)
        truth.append(exp.truth["rv_topo_true"])
    return raw, offsets, truth


def _archive(directory: str, n: int, raw, offsets) -> None:
    os.makedirs(directory)
    for k in range(n):
        b = k % len(raw)
        card = f"COPYNUM = {k:20d} / benchmark copy number".ljust(80).encode("ascii")
        with open(os.path.join(directory, f"s{k:05d}.fits"), "wb") as fh:
            fh.write(raw[b][:offsets[b]])
            fh.write(card)
            fh.write(raw[b][offsets[b] + 80:])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1000,10000")
    ap.add_argument("--base", type=int, default=40, help="distinct simulated spectra the archive is copied from")
    ap.add_argument("--plain", type=int, default=100, help="files the plain reference is timed on")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",")]
    tmp = tempfile.mkdtemp(prefix="lineshift-archive-")
    lineshift = os.path.join(os.path.dirname(sys.executable), "lineshift")
    results, skipped = [], []
    try:
        mask = os.path.join(tmp, "mask.csv")
        lines, weights = _write_mask(mask)
        raw, offsets, truth = _base_files(tmp, args.base)
        for n in sizes:
            free = shutil.disk_usage(tmp).free
            if n * BYTES_PER_FILE * 1.2 > free:
                skipped.append(f"{n}: needs ~{n * BYTES_PER_FILE / 1e9:.0f} GB, {free / 1e9:.0f} GB free")
                continue
            folder = os.path.join(tmp, f"n{n}")
            _archive(folder, n, raw, offsets)
            files = sorted(os.path.join(folder, f) for f in os.listdir(folder))
            # the plain reference, on the first files of this very archive, right before the run
            t = time.perf_counter()
            for k, f in enumerate(files[:args.plain]):
                plain_ccf(f, lines, weights, truth[k % len(truth)])
            plain_ms = 1e3 * (time.perf_counter() - t) / min(args.plain, n)
            load = os.getloadavg()[0]
            store = os.path.join(tmp, f"store{n}.sqlite")
            cmd = [lineshift, "measure", folder, "--mask", mask, "--store", store, "-q",
                   "-o", os.path.join(tmp, f"rv{n}.csv")]
            wall, peak = _run(cmd)
            ok = int((pd.read_csv(os.path.join(tmp, f"rv{n}.csv"), comment="#")["status"] == "ok").sum())
            results.append((n, wall, peak, plain_ms, load, ok))
            shutil.rmtree(folder)
            os.unlink(store)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    cores = os.cpu_count()
    print(f"{time.strftime('%Y-%m-%d %H:%M')}; 36 orders x 4096 px, {len(lines)} mask lines, {cores} cores, "
          f"default workers; Python {sys.version.split()[0]}\n")
    print("| spectra | measured ok | wall time (s) | ms per spectrum (wall) | plain CCF, ms per spectrum (one core) "
          "| ratio (wall x cores / plain) | peak RSS, all processes (MB) | load before |")
    print("|---:|---:|---:|---:|---:|---:|---:|---:|")
    for n, wall, peak, plain_ms, load, ok in results:
        ms = 1e3 * wall / n
        print(f"| {n} | {ok} | {wall:.1f} | {ms:.1f} | {plain_ms:.1f} | {ms * cores / plain_ms:.2f} | "
              f"{peak:.0f} | {load:.1f} |")
    if len(results) >= 2:
        a, b = results[0], results[-1]
        print(f"\npeak RSS at {b[0]} / at {a[0]}: {b[2] / a[2]:.2f}")
    if results and max(sizes) not in [r[0] for r in results]:
        n, wall = results[-1][0], results[-1][1]
        print(f"\nprojected from {n}: {max(sizes)} spectra in ~{wall * max(sizes) / n:.0f} s (linear)")
    for s in skipped:
        print(f"\nskipped {s}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
