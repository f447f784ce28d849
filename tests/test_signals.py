"""No process outlives a two-worker run stopped by SIGTERM or SIGKILL."""

import os
import shutil
import signal
import subprocess
import sys
import time

import psutil
import pytest

SRC = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src")


def _wait_gone(procs, timeout):
    _gone, alive = psutil.wait_procs(procs, timeout=timeout)
    return [p for p in alive if p.is_running() and p.status() != psutil.STATUS_ZOMBIE]


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_no_process_outlives_a_stopped_run(sample_set, tmp_path, sig):
    directory, mask, rows = sample_set
    work = tmp_path / "many"
    work.mkdir()
    first = next(r for r in rows if r["layout"] == "multi-order")
    for k in range(400):  # enough work that the run is still busy when the signal comes (60 were done in ~1 s)
        shutil.copy(os.path.join(directory, first["file"]), work / f"s{k:03d}.fits")
    env = {**os.environ, "PYTHONPATH": SRC}
    proc = subprocess.Popen([sys.executable, "-m", "lineshift", "measure", str(work), "--mask", mask,
                             "--workers", "2", "-q", "-o", str(tmp_path / "out.csv")],
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    main = psutil.Process(proc.pid)
    deadline = time.monotonic() + 60
    children = []
    while time.monotonic() < deadline:
        children = main.children(recursive=True)
        workers = [c for c in children if "resource_tracker" not in " ".join(c.cmdline())]
        if len(workers) >= 2:
            break
        time.sleep(0.2)
    assert len(children) >= 2, "the workers never started"
    time.sleep(1.0)  # let them take a task each
    proc.send_signal(sig)
    proc.wait(timeout=30)
    proc.stderr.close()
    left = _wait_gone(children, timeout=15)
    for p in left:  # clean up before failing
        p.kill()
    assert not left, [(p.pid, p.cmdline()) for p in left]
    if sig == signal.SIGTERM:
        assert proc.returncode == 130
