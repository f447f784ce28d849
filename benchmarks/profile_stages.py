"""Where the time goes: a per-stage profile of ``lineshift measure`` (mask engine, defaults) beside a plain
raw-count mask CCF timed in the same run on the same files.

The files: 36-order x 4096-pixel echelle spectra (R = 110 000) of the invented star with a mask of about
800 lines, written once outside the timed part.  Three timings, each the median over ``--rounds``:

* the plain reference: read FLUX/WAVE with astropy.io.fits, a box mask (one pixel wide) on the raw
  counts over a fixed grid of +-15 km/s in 250 m/s steps around the known velocity (cumulative-sum
  integration), summed over orders, a Gaussian fit (scipy.optimize.curve_fit).  Nothing else: no
  search, no continuum, no barycentric step, no diagnostics.  It is the floor a fuller program is
  compared with;
* ``measure_files`` over the same files (serial, one core): everything lineshift computes by default;
* a cProfile run of the same call, its time attributed to stages by the module and function that
  spent it (load, metadata and BJD/BERV, prepare/continuum, coarse search, fine CCF, peak fit, error
  propagation, diagnostics, per-order velocities, store write, other).

With ``--template`` the template engine's whole run (first pass, co-adds, fits; defaults otherwise)
is timed in the same rounds and its ratio to the mask engine printed.

    python benchmarks/profile_stages.py [--files 24] [--rounds 3] [--store] [--template]

The output is a Markdown table (write it to docs/ with the date and commit when the figures move).
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core: set before numpy is imported
# the steady state of a large batch: compiled kernels from the first spectrum (a process turns to them
# after its first WARMUP_SPECTRA spectra otherwise, so a short run would time a mix); LINESHIFT_JIT=0
# times the NumPy forms.  The one-time load of the kernels is timed apart and printed, not hidden.
os.environ.setdefault("LINESHIFT_JIT", "1")

import argparse
import cProfile
import pstats
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import replace

import numpy as np
from astropy.io import fits
from scipy.optimize import curve_fit

from lineshift import sim
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, measure_files

C = 299792458.0


def plain_ccf(path: str, lines: np.ndarray, weights: np.ndarray, v0: float) -> float:
    """The plain reference: raw-count box-mask CCF around ``v0`` (m/s), summed over orders, Gaussian fit."""
    with fits.open(path, memmap=False) as hdul:
        flux = np.asarray(hdul["FLUX"].data, dtype=float)
        wave = np.asarray(hdul["WAVE"].data, dtype=float)
    grid = v0 + np.arange(-15_000.0, 15_001.0, 250.0)
    ccf = np.zeros(grid.size)
    for w, f in zip(wave, flux, strict=True):
        edges = np.concatenate([[1.5 * w[0] - 0.5 * w[1]], 0.5 * (w[1:] + w[:-1]), [1.5 * w[-1] - 0.5 * w[-2]]])
        cum = np.concatenate([[0.0], np.cumsum(f)])
        pix = np.median(np.diff(w) / w[1:])
        sel = (lines > w[0] * 1.001) & (lines < w[-1] * 0.999)
        if not sel.any():
            continue
        centre = lines[sel][None, :] * (1 + grid[:, None] / C)
        lo, hi = centre * (1 - pix / 2), centre * (1 + pix / 2)
        x = np.arange(edges.size, dtype=float)
        a, b = np.interp(lo, edges, x), np.interp(hi, edges, x)
        ccf += (np.interp(b, x, cum) - np.interp(a, x, cum)) @ weights[sel]

    def gauss(v, c0, amp, mu, sig):
        return c0 - amp * np.exp(-0.5 * ((v - mu) / sig) ** 2)

    p0 = (ccf.max(), ccf.max() - ccf.min(), grid[np.argmin(ccf)], 3000.0)
    popt, _ = curve_fit(gauss, grid, ccf, p0=p0)
    return float(popt[2])


#: (stage, predicate on "module:function") — first match wins; cumulative time of the outermost match
STAGES = [
    ("store write", lambda m, f: m.endswith("run/store.py") and f in ("put", "content_hash", "get")),
    ("load (read + validate)", lambda m, f: m.endswith("io/loaders.py") and f == "load_spectrum"),
    ("metadata and BJD/BERV", lambda m, f: (m.endswith("run/pipeline.py") and f == "survey")
     or (m.endswith("calib/barycentric.py") and f == "barycentric_batch")),
    ("prepare / continuum", lambda m, f: m.endswith("measure/prepare.py") and f == "prepare_spectrum"),
    ("per-order velocities", lambda m, f: m.endswith("measure/profile.py") and "order" in f),
    ("diagnostics (bisector, chromatic slope)", lambda m, f: m.endswith("measure/profile.py")),
    ("error propagation", lambda m, f: m.endswith("measure/ccf.py") and ("variance" in f or "adjoint" in f)),
    ("peak fit", lambda m, f: m.endswith("measure/peak.py")),
    ("coarse search", lambda m, f: m.endswith("measure/mask_engine.py") and "coarse" in f),
    ("fine CCF", lambda m, f: m.endswith("measure/ccf.py")),
]


def stage_table(prof: cProfile.Profile, total: float) -> dict[str, float]:
    """Inclusive seconds per stage: the cumulative time of the stage's outermost matching functions.

    Stages can nest (the fine CCF's time includes the error propagation it calls; the coarse search
    includes the CCF and peak fits it runs): each row is what that stage costs with everything it calls."""
    st = pstats.Stats(prof)
    entries = {}
    for key, (_cc, _nc, _tt, ct, callers) in st.stats.items():
        mod, _line, fn = key
        for name, match in STAGES:
            if match(mod.replace(os.sep, "/"), fn):
                entries[key] = (name, ct, callers)
                break
    out = dict.fromkeys([s for s, _ in STAGES], 0.0)
    for name, ct, callers in entries.values():
        inner = sum(c[3] for k, c in callers.items() if k in entries and entries[k][0] == name)
        out[name] += max(ct - inner, 0.0)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--files", type=int, default=24)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--store", action="store_true", help="also write every row to a results store")
    ap.add_argument("--template", action="store_true", help="also time the template engine's whole run")
    args = ap.parse_args(argv)
    tmp = tempfile.mkdtemp(prefix="lineshift-profile-")
    try:
        star = sim.DEMO_STAR
        ins = sim.INSTRUMENTS["echelle"]
        rng = np.random.default_rng(3)
        files, truth = [], []
        for k in range(args.files):
            exp = sim.observe(star, ins, sim.DEMO_SITE, 61010.8 + 3.1 * k, rng)
            files.append(sim.write_observation(exp, os.path.join(tmp, f"e{k:03d}.fits")))
            truth.append(exp.truth["rv_topo_true"])
        lam, depth = star.line_list()
        w = ins.wavelengths()
        keep = (depth >= 0.05) & (lam > w.min()) & (lam < w.max())
        mask = LineMask(lam[keep], depth[keep], (), "benchmark")
        settings = MeasureSettings(systemic_velocity=star.gamma)
        store_path = os.path.join(tmp, "r.sqlite") if args.store else None

        def ours():
            store = None
            if store_path:
                from lineshift.run.store import ResultStore

                if os.path.exists(store_path):
                    os.unlink(store_path)
                store = ResultStore(store_path)
            rows = measure_files(files, mask, settings, store=store, workers=1)
            if store is not None:
                store.close()
            assert all(r["status"] == "ok" for r in rows), [r["notes"] for r in rows if r["status"] != "ok"]

        def template():
            rows = measure_files(files, mask, replace(settings, method="template"), workers=1)
            assert all(r["status"] == "ok" for r in rows), [r["notes"] for r in rows if r["status"] != "ok"]

        def plain():
            for f, v in zip(files, truth, strict=True):
                plain_ccf(f, mask.wavelength, mask.weight, v)

        t = time.perf_counter()          # the process's one-time costs (numba and its cached kernels)
        measure_files(files[:1], mask, settings, workers=1)
        t_first = time.perf_counter() - t
        t_ours, t_plain, t_template = [], [], []
        for _ in range(args.rounds):   # interleaved, so machine load hits both alike
            t = time.perf_counter()
            plain()
            t_plain.append(time.perf_counter() - t)
            t = time.perf_counter()
            ours()
            t_ours.append(time.perf_counter() - t)
            if args.template:
                t = time.perf_counter()
                template()
                t_template.append(time.perf_counter() - t)
        prof = cProfile.Profile()
        t = time.perf_counter()
        prof.runcall(ours)
        t_prof = time.perf_counter() - t
        stages = stage_table(prof, t_prof)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    n = args.files
    ms_ours, ms_plain = 1e3 * statistics.median(t_ours) / n, 1e3 * statistics.median(t_plain) / n
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True, text=True,
                                cwd=os.path.dirname(os.path.abspath(__file__)), check=False).stdout.strip()
    except OSError:
        commit = "?"
    print(f"{time.strftime('%Y-%m-%d')}, commit {commit}; {n} files of 36 orders x 4096 pixels, {len(mask)} mask "
          f"lines, one core; numpy {np.__version__}, Python {sys.version.split()[0]}\n")
    from lineshift.measure import kernels

    jit = os.environ.get("LINESHIFT_JIT")
    mode = {"1": "compiled kernels from the first spectrum (LINESHIFT_JIT=1: the steady state of a batch "
                 f"past its first {kernels.WARMUP_SPECTRA} spectra)",
            "0": "NumPy forms only (LINESHIFT_JIT=0)"}.get(jit, f"LINESHIFT_JIT={jit!r}")
    print(f"Kernels: {mode}; the first call in this process (one file, before the timed rounds, loading "
          f"the kernels) took {1e3 * t_first:.0f} ms.\n")
    print("| | ms per spectrum |\n|---|---:|")
    print(f"| plain raw-count mask CCF (reference) | {ms_plain:.1f} |")
    print(f"| lineshift measure (mask engine, defaults) | {ms_ours:.1f} |")
    print(f"| ratio lineshift / plain | {ms_ours / ms_plain:.2f} |")
    if t_template:
        ms_t = 1e3 * statistics.median(t_template) / n
        print(f"| lineshift measure --method template (whole run) | {ms_t:.1f} |")
        print(f"| ratio template / mask engine | {ms_t / ms_ours:.2f} |")
    columns = [t_plain, t_ours, *([t_template] if t_template else [])]
    per_round = "; ".join(" / ".join(f"{x:.2f}" for x in r) for r in zip(*columns, strict=True))
    print(f"\nrounds (s, plain / mask{' / template' if t_template else ''}): {per_round}\n")
    print(f"Profile of one run under cProfile ({1e3 * t_prof / n:.1f} ms per spectrum with the profiler's "
          "overhead; shares are what matters):\n")
    print("| stage (inclusive: nested stages count in their parents) | ms per spectrum | share |\n|---|---:|---:|")
    for name, sec in sorted(stages.items(), key=lambda kv: -kv[1]):
        print(f"| {name} | {1e3 * sec / n:.1f} | {100 * sec / t_prof:.0f} % |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
