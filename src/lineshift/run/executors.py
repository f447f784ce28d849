"""Where per-spectrum tasks run: this process, local processes, or an existing Dask cluster.

Executors know nothing of what a task does: ``run_tasks(fn, tasks, ctx)`` calls the module-level,
picklable function ``fn(task, ctx)`` for each task. Every executor yields ``(task, row)`` as tasks
finish and keeps at most ``max_in_flight`` tasks submitted ahead, so memory stays bounded whatever
the batch size. The batch context (mask and settings) is sent to each worker once. Results are the
same floating-point numbers whichever executor runs them: the task function is pure and
deterministic.

BLAS threads: the per-spectrum linear algebra is small, so a BLAS pool of several threads per
process only competes with the other workers (over-subscription).  Each local worker limits its
BLAS and OpenMP pools to one thread (threadpoolctl, in the worker process only), and the serial
executor does the same for the length of the run and restores the previous limits afterwards:
importing lineshift changes nothing in the host process.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterator

from lineshift.errors import ConfigError

__all__ = ["default_workers", "run_tasks"]

_WORKER_CTX = None
_WORKER_FN = None
_LIMITS = None

#: How long to try reaching a Dask scheduler before giving up.
CONNECT_TIMEOUT = "15s"


#: How often (s) a worker checks that the process that started it is still alive.
PARENT_POLL = 0.5


def _watch_parent(parent: int) -> None:
    """Exit this worker as soon as its parent is gone (killed with SIGKILL, say): no orphans."""
    import threading
    import time

    def watch():
        while True:
            time.sleep(PARENT_POLL)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=watch, name="lineshift-parent-watch", daemon=True).start()


#: Spectra per worker below which starting processes costs more than it saves (spawning a worker and
#: importing astropy takes ~1-2 s, a spectrum ~30-50 ms): the automatic worker count keeps to it.
MIN_TASKS_PER_WORKER = 16


def default_workers(n_tasks: int | None = None) -> int:
    """The automatic number of local workers: every core (``os.cpu_count()``), but no more than
    one per :data:`MIN_TASKS_PER_WORKER` tasks when the batch size is known (at least 1)."""
    cores = os.cpu_count() or 1
    if n_tasks is None:
        return cores
    return max(1, min(cores, n_tasks // MIN_TASKS_PER_WORKER))


def _init_worker(fn, ctx, parent: int | None = None) -> None:
    global _WORKER_CTX, _WORKER_FN, _LIMITS
    _WORKER_CTX = ctx
    _WORKER_FN = fn
    warnings.simplefilter("ignore")
    from threadpoolctl import threadpool_limits

    _LIMITS = threadpool_limits(limits=1)   # this worker process only; kept for its lifetime
    if parent is not None:
        _watch_parent(parent)


def _run_in_worker(task):
    return _WORKER_FN(task, _WORKER_CTX)


def _serial(fn, tasks, ctx) -> Iterator:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):   # restored when the run ends or stops
        for t in tasks:
            yield t, fn(t, ctx)


def _processes(fn, tasks, ctx, workers: int, limit: int) -> Iterator:
    import concurrent.futures as cf
    import multiprocessing as mp

    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"),
                                initializer=_init_worker, initargs=(fn, ctx, os.getpid())) as pool:
        try:
            pending: dict = {}
            it = iter(tasks)
            for t in it:
                pending[pool.submit(_run_in_worker, t)] = t
                if len(pending) >= limit:
                    break
            while pending:
                done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
                for fut in done:
                    t = pending.pop(fut)
                    yield t, fut.result()
                    nxt = next(it, None)
                    if nxt is not None:
                        pending[pool.submit(_run_in_worker, nxt)] = nxt
        except BaseException:  # interrupted (SIGINT/SIGTERM) or the caller stopped: no worker outlives us
            procs = list((getattr(pool, "_processes", None) or {}).values())
            pool.shutdown(wait=False, cancel_futures=True)
            for proc in procs:
                proc.terminate()
            raise


def _dask(fn, tasks, ctx, address: str, limit: int) -> Iterator:
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise ConfigError("--scheduler needs Dask: pip install -e \".[dask]\"") from None

    try:
        client = Client(address, timeout=CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"cannot reach the Dask scheduler at {address} ({exc})") from None
    try:
        ctx_future = client.scatter(ctx, broadcast=True, hash=False)
        it = iter(tasks)
        owner = {}
        first = []
        for t in it:
            f = client.submit(fn, t, ctx_future, pure=False)
            owner[f.key] = t
            first.append(f)
            if len(owner) >= limit:
                break
        if not first:
            return
        lost = getattr(fn, "on_lost", None)
        ac = as_completed(first, loop=client.loop)
        for f in ac:
            t = owner.pop(f.key)
            try:
                row = f.result()
            except Exception as exc:  # the cluster lost the task (worker died: KilledWorker, connection closed)
                if lost is None:
                    raise
                row = lost(t, ctx, exc)
            f.release()
            yield t, row
            nxt = next(it, None)
            if nxt is not None:
                g = client.submit(fn, nxt, ctx_future, pure=False)
                owner[g.key] = nxt
                ac.add(g)
    finally:
        client.close()


def run_tasks(fn, tasks, ctx, *, workers: int | None = 1, scheduler: str | None = None,
              max_in_flight: int | None = None) -> Iterator:
    """Run ``fn(task, ctx)`` for every task and yield (task, row) in completion order.

    Parameters
    ----------
    fn : callable
        A module-level (picklable) function of ``(task, ctx)``.
    workers : int or None
        Local processes (1: this process; None: :func:`default_workers`).  Ignored with ``scheduler``.
    scheduler : str, optional
        Address of a running Dask distributed scheduler, e.g. ``tcp://127.0.0.1:8786``.  A task
        whose result the cluster cannot deliver (its worker died, the connection closed) gets
        ``fn.on_lost(task, ctx, exc)`` when ``fn`` has that attribute; otherwise the error is raised.
    max_in_flight : int, optional
        Tasks submitted ahead of those finished (default 4 per worker, 64 on Dask).
    """
    if scheduler:
        return _dask(fn, tasks, ctx, scheduler, max_in_flight or 64)
    if workers is None:
        workers = default_workers(len(tasks) if hasattr(tasks, "__len__") else None)
    if workers <= 1:
        return _serial(fn, tasks, ctx)
    return _processes(fn, tasks, ctx, workers, max_in_flight or 4 * workers)
