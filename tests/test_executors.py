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


def test_survey_on_workers_equals_the_serial_survey(tmp_path):
    import numpy as np

    from lineshift import sim
    from lineshift.run.pipeline import MeasureSettings, survey

    rng = np.random.default_rng(1)
    paths = []
    for k in range(3):
        exp = sim.observe(sim.DEMO_STAR, sim.INSTRUMENTS["echelle"], sim.DEMO_SITE, 61010.8 + k, rng)
        paths.append(sim.write_observation(exp, str(tmp_path / f"e{k}.fits")))
    (tmp_path / "broken.fits").write_bytes(b"SIMPLE  =    T" + b" " * 100)
    paths.insert(1, str(tmp_path / "broken.fits"))
    serial = survey(paths, MeasureSettings(), workers=1)
    parallel = survey(paths, MeasureSettings(), workers=2)
    assert [type(o) for o in serial] == [type(o) for o in parallel]
    assert [str(o) for o in serial] == [str(o) for o in parallel]
    assert getattr(parallel[1], "status", None) == serial[1].status == "truncated"
    assert [o.mjd_mid for k, o in enumerate(serial) if k != 1] == [o.mjd_mid for k, o in enumerate(parallel) if k != 1]
    # with the store's content hashes: the same records, and each file's SHA-256 (hashlib, outside reference)
    import hashlib

    with_hash = survey(paths, MeasureSettings(), workers=2, hashes=True)
    assert [str(o) for o, _h in with_hash] == [str(o) for o in serial]
    for k, (_o, h) in enumerate(with_hash):
        with open(paths[k], "rb") as fh:
            assert h == ("" if k == 1 else hashlib.sha256(fh.read()).hexdigest())


def test_survey_hands_the_rest_to_the_workers_only_when_slow(tmp_path, monkeypatch):
    import numpy as np

    from lineshift import sim
    from lineshift.run import pipeline

    rng = np.random.default_rng(2)
    paths = []
    for k in range(3):
        exp = sim.observe(sim.DEMO_STAR, sim.INSTRUMENTS["echelle"], sim.DEMO_SITE, 61020.8 + k, rng)
        paths.append(sim.write_observation(exp, str(tmp_path / f"e{k}.fits")))
    (tmp_path / "broken.fits").write_bytes(b"SIMPLE  =    T" + b" " * 100)
    paths.insert(2, str(tmp_path / "broken.fits"))
    handed = []
    real = pipeline.run_tasks

    def spy(fn, tasks, ctx, **kw):
        handed.append([t[0] for t in tasks])
        return real(fn, tasks, ctx, **kw)

    monkeypatch.setattr(pipeline, "run_tasks", spy)
    serial = pipeline.survey(paths, pipeline.MeasureSettings(), workers=1)
    quick = pipeline.survey(paths, pipeline.MeasureSettings(), workers=2)
    assert handed == []      # four headers take far less than starting the workers
    monkeypatch.setattr(pipeline, "SURVEY_PROBE", 1)
    monkeypatch.setattr(pipeline, "SURVEY_POOL_SECONDS", 0.0)
    mixed = pipeline.survey(paths, pipeline.MeasureSettings(), workers=2, hashes=True)
    assert handed == [[1, 2, 3]]   # the first in this process, the rest on the workers
    assert [str(o) for o in quick] == [str(o) for o, _h in mixed] == [str(o) for o in serial]
    assert [type(o) for o in quick] == [type(o) for o, _h in mixed] == [type(o) for o in serial]
    assert mixed[2][0].status == "truncated" and mixed[2][1] == ""
    times = [o.mjd_mid for k, (o, _h) in enumerate(mixed) if k != 2]
    assert [o.mjd_mid for k, o in enumerate(serial) if k != 2] == times
