"""A task for the Dask tests that kills its worker process on one file (named in the environment).

Importable by the cluster's worker processes (they inherit this session's ``sys.path``).
"""

import os

from lineshift.run import pipeline

#: Environment variable naming the base name of the file whose task kills its worker.
KILL_ON = "LINESHIFT_TEST_KILL_ON"
_MEASURE = pipeline.measure_task  # the real one, before a test puts measure_or_die in its place


def measure_or_die(task, ctx):
    """``pipeline.measure_task``, except that the worker process dies (as by the OOM killer) on one file."""
    if os.path.basename(task.path) == os.environ.get(KILL_ON):
        os._exit(1)
    return _MEASURE(task, ctx)


measure_or_die.on_lost = _MEASURE.on_lost
