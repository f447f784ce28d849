"""Batch benchmark: throughput and peak memory for 100 and 1,000 simulated spectra on 2 cores.

Modes: ``--workers 2`` (local processes) and a local Dask cluster (a ``dask scheduler`` and a
``dask worker --nworkers 2 --nthreads 1`` on 127.0.0.1).  Spectra: the demo echelle (6 orders x 1536
pixels); 50 are simulated and copied with a distinct header card, so every file has its own content.
Peak memory is the largest resident set summed over the driver and all its child processes (and,
for Dask, over the scheduler and worker processes), sampled every 20 ms from /proc.

    python benchmarks/bench_batch.py [--sizes 100,1000]
"""

from __future__ import annotations

import argparse
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time

from astropy.io import fits

from lineshift import sim


def _tree(pid: int) -> list[int]:
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        try:
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    todo.extend(int(c) for c in fh.read().split())
        except OSError:
            pass
    return out


def _rss_mb(pids) -> float:
    total = 0
    for p in pids:
        try:
            with open(f"/proc/{p}/status") as fh:
                for line in fh:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1])
        except OSError:
            pass
    return total / 1024


class _Peak(threading.Thread):
    def __init__(self, roots):
        super().__init__(daemon=True)
        self.roots, self.peak, self.stop = roots, 0.0, threading.Event()

    def run(self):
        while not self.stop.is_set():
            pids = [q for r in self.roots for q in _tree(r)]
            self.peak = max(self.peak, _rss_mb(pids))
            time.sleep(0.02)


def _make_inputs(directory: str, n: int) -> None:
    base = os.path.join(directory, "base")
    if not os.path.isdir(base):
        sim.simulate_set(base, [(sim.INSTRUMENTS["demo-echelle"], 50)], seed=3, compress=False)
    names = sorted(f for f in os.listdir(base) if f.endswith(".fits"))
    out = os.path.join(directory, f"n{n}")
    os.makedirs(out)
    for k in range(n):
        with fits.open(os.path.join(base, names[k % len(names)])) as h:
            h[0].header["COPYNUM"] = k
            h.writeto(os.path.join(out, f"s{k:05d}.fits"))


def _run(cmd, extra_roots=()) -> tuple[float, float]:
    t = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    peak = _Peak([proc.pid, *extra_roots])
    peak.start()
    _, err = proc.communicate()
    peak.stop.set()
    peak.join()
    if proc.returncode != 0:
        raise RuntimeError(err.decode()[-2000:])
    return time.perf_counter() - t, peak.peak


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="100,1000")
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.sizes.split(",")]
    tmp = tempfile.mkdtemp(prefix="lineshift-batch-")
    bindir = os.path.dirname(sys.executable)
    lineshift = [os.path.join(bindir, "lineshift")]
    mask = os.path.join(tmp, "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    rows = []
    sched = worker = None
    try:
        for n in sizes:
            _make_inputs(tmp, n)
        for n in sizes:
            cmd = [*lineshift, "measure", os.path.join(tmp, f"n{n}"), "--mask", mask, "-q",
                   "-o", os.path.join(tmp, f"local{n}.csv"), "--workers", "2"]
            wall, peak = _run(cmd)
            rows.append(("local processes (--workers 2)", n, wall, peak))
        port = _free_port()
        address = f"tcp://127.0.0.1:{port}"
        dask = os.path.join(bindir, "dask")
        sched = subprocess.Popen([dask, "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        worker = subprocess.Popen([dask, "worker", address, "--nworkers", "2", "--nthreads", "1", "--no-dashboard",
                                   "--host", "127.0.0.1"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(8)
        for n in sizes:
            cmd = [*lineshift, "measure", os.path.join(tmp, f"n{n}"), "--mask", mask, "-q",
                   "-o", os.path.join(tmp, f"dask{n}.csv"), "--scheduler", address]
            wall, peak = _run(cmd, extra_roots=(sched.pid, worker.pid))
            rows.append(("local Dask cluster (2 workers x 1 thread)", n, wall, peak))
    finally:
        for p in (worker, sched):
            if p is not None:
                p.terminate()
                p.wait(timeout=30)
        shutil.rmtree(tmp, ignore_errors=True)
    print(f"demo echelle spectra (6 orders x 1536 px), 2 cores, Python {sys.version.split()[0]}\n")
    print("| mode | spectra | wall time (s) | spectra / s | peak memory, all processes (MB) |")
    print("|---|---:|---:|---:|---:|")
    for mode, n, wall, peak in rows:
        print(f"| {mode} | {n} | {wall:.1f} | {n / wall:.1f} | {peak:.0f} |")
    by = {(m, n): p for m, n, _, p in rows}
    for mode in dict.fromkeys(m for m, *_ in rows):
        if (mode, min(sizes)) in by and (mode, max(sizes)) in by:
            ratio = by[(mode, max(sizes))] / by[(mode, min(sizes))]
            print(f"\n{mode}: peak memory for {max(sizes)} spectra / for {min(sizes)} = {ratio:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
