"""Benchmark: milliseconds per spectrum per stage, and peak memory, for the mask engine.

The case of the issue: a 36-order x 4096-pixel echelle spectrum (R = 110 000, SNR 150) of the
invented star, with masks of about 800 and about 4000 lines.  Every stage is timed on its own
(median of ``--repeats`` runs, one core, interpreter start excluded), then the whole batch path
(`measure_files` over ``--batch`` copies: header survey, vectorised barycentric step, telluric
rejection, measurement) per spectrum.

    python benchmarks/bench_pipeline.py [--repeats 15] [--batch 40]
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"  # one core: set before numpy is imported

import argparse
import resource
import shutil
import statistics
import sys
import tempfile
import time
import tracemalloc
from dataclasses import replace

import numpy as np

from lineshift import sim
from lineshift.calib.barycentric import barycentric_batch
from lineshift.io.loaders import load_spectrum, read_observation
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import prepare_spectrum
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, measure_files


def _median_ms(fn, repeats: int) -> float:
    fn()  # warm-up
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return 1e3 * statistics.median(times)


def _case(density: float, tmp: str, repeats: int, batch: int) -> dict:
    star = replace(sim.DEMO_STAR, line_density=density)
    ins = sim.INSTRUMENTS["echelle"]
    exp = sim.observe(star, ins, sim.DEMO_SITE, 61010.8, np.random.default_rng(5))
    path = sim.write_observation(exp, os.path.join(tmp, f"bench_{density}.fits"))
    lam, depth = star.line_list()
    lo, hi = ins.wavelengths().min(), ins.wavelengths().max()
    keep = (depth >= 0.05) & (lam > lo) & (lam < hi)
    mask = LineMask(lam[keep], depth[keep], (), "bench")
    settings = SearchSettings()
    spectrum = load_spectrum(path)
    orders = prepare_spectrum(spectrum)
    berv = exp.truth["berv"]
    obs = [replace(read_observation(path), mjd_mid=61000.0 + 0.37 * k) for k in range(100)]
    res = {
        "mask lines": len(mask),
        "load (read + validate)": _median_ms(lambda: load_spectrum(path), repeats),
        "prepare (continuum, weights)": _median_ms(lambda: prepare_spectrum(spectrum), repeats),
        "correlate + fit + errors": _median_ms(lambda: measure_mask(orders, mask, settings, berv=berv), repeats),
        "barycentric (per spectrum, batch of 100)":
            _median_ms(lambda: barycentric_batch(obs), max(3, repeats // 5)) / 100,
    }
    res["sum of stages"] = sum(v for k, v in res.items() if k != "mask lines")
    # template engine: a template from 8 noise realisations, then one leave-one-out fit
    from lineshift.measure.coadd import TemplateAccumulator, log_grid
    from lineshift.measure.template_engine import TemplateSettings, TemplateState, measure_template

    rng = np.random.default_rng(11)
    factor = (1 + berv / 299792458.0) / (1 + exp.truth["rv_true"] / 299792458.0)
    w = ins.wavelengths()
    acc = TemplateAccumulator(log_grid(w.min() * 0.999, w.max() * 1.001, ins.pixel_velocity / 2), per_order=True)
    copies = []
    for _ in range(8):
        flux = exp.flux + rng.normal(size=exp.flux.shape) * np.sqrt(np.maximum(exp.flux, 1.0))
        copies.append(prepare_spectrum(sim.to_spectrum(replace(exp, flux=flux))))
        acc.add(copies[-1], factor)
    state = TemplateState.from_accumulator(acc)
    res["template engine: fit against the template without itself"] = _median_ms(
        lambda: measure_template(copies[0], state, TemplateSettings(), delta0=-np.log(factor), factor=factor),
        max(3, repeats // 2))
    res["template engine / mask engine (fit stages)"] = (res["template engine: fit against the template without "
                                                         "itself"] / res["correlate + fit + errors"])
    files = []
    for k in range(batch):
        dst = os.path.join(tmp, f"copy_{density}_{k:04d}.fits")
        shutil.copy(path, dst)
        files.append(dst)
    ms = MeasureSettings(systemic_velocity=star.gamma)
    t = time.perf_counter()
    rows = measure_files(files, mask, ms)
    res["whole batch path, per spectrum"] = 1e3 * (time.perf_counter() - t) / batch
    assert all(r["status"] == "ok" for r in rows)
    tracemalloc.start()
    measure_mask(prepare_spectrum(load_spectrum(path)), mask, settings, berv=berv)
    res["peak traced memory of one spectrum (MB)"] = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    return res


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=15)
    ap.add_argument("--batch", type=int, default=40)
    args = ap.parse_args(argv)
    tmp = tempfile.mkdtemp(prefix="lineshift-bench-")
    try:
        cases = {d: _case(d, tmp, args.repeats, args.batch) for d in (0.48, 2.4)}
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    keys = list(next(iter(cases.values())))
    heads = [f"~{round(c['mask lines'], -2):.0f} lines" for c in cases.values()]
    print(f"36 orders x 4096 pixels, R=110000, one core; numpy {np.__version__}, Python {sys.version.split()[0]}\n")
    print("| stage | " + " | ".join(heads) + " |")
    print("|---|" + "---:|" * len(cases))
    for k in keys:
        fmt = "{:.0f}" if k == "mask lines" else "{:.2f}" if "/" in k else "{:.1f}"
        print(f"| {k} | " + " | ".join(fmt.format(c[k]) for c in cases.values()) + " |")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\npeak resident memory of the benchmark process: {rss:.0f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
