"""Cost of the detector-frame response estimate in the template engine's passes.

Times ``measure_files(..., method="template")`` on an independent year-of-BERV echelle batch
(tests/nuisance_run.py, clean) as shipped and, as the plain reference in the same run, with the
response estimate switched off (``measure.response.detector_response`` answering nothing: the
passes before the estimate existed); also the time spent in the estimate itself, and both runs'
scatter / efficient estimator.

    PYTHONPATH=src:tests python benchmarks/bench_template_response.py [--draws N] [--orders K] [--repeats R]
"""

from __future__ import annotations

import argparse
import glob
import tempfile
import time
from pathlib import Path

import numpy as np

import lineshift.measure.response as response
import nuisance_run as nr
from independent import nuisances as nzm
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, measure_files


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=16)
    ap.add_argument("--orders", type=int, default=12)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args(argv)
    batch = nr.make_batch(n=args.draws, n_orders=args.orders)
    tmp = Path(tempfile.mkdtemp())
    nr.measure_batch(batch, tmp, nzm.Nuisances(), methods=())
    paths = sorted(glob.glob(str(tmp / "*.fits")))
    w, d = nr.true_mask()
    mask = LineMask(w, d, (), "forward-model line list")
    shipped = response.detector_response
    spent: list[float] = []

    def timed(*a, **k):
        t = time.perf_counter()
        out = shipped(*a, **k)
        spent.append(time.perf_counter() - t)
        return out

    results = {}
    for name, fn in (("without the response estimate (reference)", lambda *a, **k: {}), ("as shipped", timed)):
        response.detector_response = fn
        times = []
        for _ in range(args.repeats):
            spent.clear()
            t = time.perf_counter()
            rows = measure_files(paths, mask, MeasureSettings(method="template"))
            times.append(time.perf_counter() - t)
        rv = np.array([r["rv"] for r in rows])
        ratio = nr.Result(rv, np.array([r["rv_err"] for r in rows]), np.zeros(rv.size), batch.eff, batch.bound).ratio()
        results[name] = (float(np.median(times)), sum(spent), ratio)
    response.detector_response = shipped
    print(f"{args.draws} spectra x {args.orders} orders, median of {args.repeats} runs")
    for name, (t, s, r) in results.items():
        print(f"  {name:44s} {t:7.2f} s  (response estimate {s:5.2f} s)  scatter / efficient {r:.3f}")
    ref = results["without the response estimate (reference)"][0]
    print(f"  as shipped / reference: {results['as shipped'][0] / ref:.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
