"""A real (local, in-process) Dask cluster: failures caused by the cluster are never stored.

A worker that cannot see a file (not on a shared file system) and a task the cluster gives up on
(``KilledWorker``, what the client receives when the workers running a task keep dying) each give
that file a failure row; neither reaches the store, so a later local run measures both files.
A second test kills a real worker process mid-task (tests/dask_tasks.py): its task and those queued
with it become ``cluster error`` rows (6 of 8 on 2026-12-03), none stored, all measured later.
"""

import os
from types import SimpleNamespace

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")


@pytest.fixture
def cluster():
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None,
                      protocol="tcp://", host="127.0.0.1") as c:
        yield c


def test_cluster_failures_are_not_stored_and_measured_later(sample_set, tmp_path, monkeypatch, cluster):
    from lineshift.io.linelists import read_mask
    from lineshift.run import pipeline
    from lineshift.run.store import ResultStore

    directory, mask_path, rows = sample_set
    paths = sorted(os.path.join(directory, r["file"]) for r in rows)
    unseen, killed = paths[0], paths[1]
    real_load, real_task = pipeline.load_spectrum, pipeline.measure_task

    def load_on_worker(path, **kw):  # this worker has no copy of one file
        if os.path.samefile(path, unseen):
            raise FileNotFoundError(2, "No such file or directory", path)
        return real_load(path, **kw)

    def task_on_worker(task, ctx):
        if os.path.samefile(task.path, killed):
            gone = SimpleNamespace(address="tcp://127.0.0.1:1")  # the scheduler's record of the dead worker
            raise distributed.KilledWorker(task.path, gone, allowed_failures=3)
        return real_task(task, ctx)

    task_on_worker.on_lost = real_task.on_lost
    mask = read_mask(mask_path)
    settings = pipeline.MeasureSettings(telluric_bands=False)
    store_path = str(tmp_path / "s.sqlite")
    with monkeypatch.context() as m:
        m.setattr(pipeline, "load_spectrum", load_on_worker)
        m.setattr(pipeline, "measure_task", task_on_worker)
        with ResultStore(store_path) as store:
            on_cluster = pipeline.measure_files(paths, mask, settings, scheduler=cluster.scheduler_address,
                                                store=store)
            assert len(store) == len(paths) - 2
    by_file = {r["file"]: r for r in on_cluster}
    assert by_file[unseen]["status"] == "unreadable" and "No such file" in by_file[unseen]["notes"]
    assert by_file[killed]["status"] == "cluster error" and "KilledWorker" in by_file[killed]["notes"]
    assert all(by_file[p]["status"] == "ok" for p in paths[2:])
    report = pipeline.BatchReport()
    with ResultStore(store_path) as store:
        local = pipeline.measure_files(paths, mask, settings, store=store, report=report)
        assert len(store) == len(paths)
    assert report.skipped == len(paths) - 2  # only the cluster's failures are measured again
    again = {r["file"]: r for r in local}
    assert again[unseen]["status"] == "ok" and again[killed]["status"] == "ok"
    for p in paths[2:]:
        np.testing.assert_equal(again[p]["rv"], by_file[p]["rv"])  # replayed, identical


def test_a_worker_that_dies_costs_no_stored_row(sample_set, tmp_path, monkeypatch):
    # a real worker process killed mid-task: the scheduler gives up on its tasks (KilledWorker)
    import dask
    from distributed import LocalCluster

    from dask_tasks import KILL_ON, measure_or_die
    from lineshift.io.linelists import read_mask
    from lineshift.run import pipeline
    from lineshift.run.store import ResultStore

    directory, mask_path, rows = sample_set
    paths = sorted(os.path.join(directory, r["file"]) for r in rows)
    monkeypatch.setenv(KILL_ON, os.path.basename(paths[3]))
    monkeypatch.setattr(pipeline, "measure_task", measure_or_die)
    mask, settings = read_mask(mask_path), pipeline.MeasureSettings(telluric_bands=False)
    store_path = str(tmp_path / "s.sqlite")
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), \
            LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None,
                         protocol="tcp://", host="127.0.0.1") as c, ResultStore(store_path) as store:
        on_cluster = pipeline.measure_files(paths, mask, settings, scheduler=c.scheduler_address, store=store)
        lost = [r["file"] for r in on_cluster if r["status"] == "cluster error"]
        assert paths[3] in lost and "KilledWorker" in on_cluster[3]["notes"]
        assert all(r["status"] in ("ok", "cluster error") for r in on_cluster)
        assert len(store) == len(paths) - len(lost)
    monkeypatch.delenv(KILL_ON)
    report = pipeline.BatchReport()
    with ResultStore(store_path) as store:
        local = pipeline.measure_files(paths, mask, settings, store=store, report=report)
    assert report.skipped == len(paths) - len(lost) and all(r["status"] == "ok" for r in local)
