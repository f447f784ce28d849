"""A real (local, in-process) Dask cluster: failures caused by the cluster are never stored.

A worker that cannot see a file (not on a shared file system) and a task the cluster gives up on
(``KilledWorker``, what the client receives when the workers running a task keep dying) each give
that file a failure row; neither reaches the store, so a later local run measures both files.
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
