"""Local executors: the automatic worker count, and one BLAS thread per worker without touching the host."""

import os

from threadpoolctl import threadpool_info

from lineshift.run.executors import MIN_TASKS_PER_WORKER, default_workers, run_tasks


def _blas_threads(task, ctx):
    """Task: the largest BLAS/OpenMP pool size seen in the process that runs it."""
    import numpy  # noqa: F401  (the pools exist once numpy is loaded)

    return max((p["num_threads"] for p in threadpool_info()), default=1)


def test_default_workers_every_core_but_not_for_a_handful():
    cores = os.cpu_count() or 1
    assert default_workers() == cores
    assert default_workers(1) == 1
    assert default_workers(MIN_TASKS_PER_WORKER * cores * 10) == cores
    assert default_workers(2 * MIN_TASKS_PER_WORKER) == min(cores, 2)


def test_workers_and_serial_run_with_one_blas_thread_and_the_host_is_restored():
    before = [p["num_threads"] for p in threadpool_info()]
    serial = [row for _t, row in run_tasks(_blas_threads, range(3), None, workers=1)]
    assert serial == [1, 1, 1]
    assert [p["num_threads"] for p in threadpool_info()] == before   # limits restored after the run
    parallel = [row for _t, row in run_tasks(_blas_threads, range(4), None, workers=2)]
    assert parallel == [1, 1, 1, 1]
    assert [p["num_threads"] for p in threadpool_info()] == before
