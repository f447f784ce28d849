"""Importing lineshift changes no global state of its host (astropy configuration, matplotlib backend)."""

import json
import subprocess
import sys

PROBE = r"""
import json, sys
import matplotlib
from astropy.utils import data, iers
def state():
    return {"allow_internet": data.conf.allow_internet, "auto_download": iers.conf.auto_download,
            "auto_max_age": iers.conf.auto_max_age, "degraded": iers.conf.iers_degraded_accuracy,
            "backend": str(matplotlib.rcParams._get("backend")), "pyplot": "matplotlib.pyplot" in sys.modules}
before = state()
import lineshift, lineshift.api, lineshift.plots.figures, lineshift.cli.app, lineshift.sim  # noqa
after = state()
print(json.dumps([before, after]))
"""


def test_import_leaves_astropy_and_matplotlib_alone(tmp_path):
    # outside reference: astropy's documented defaults (allow_internet True, auto_download True) and
    # matplotlib's rcParams: a library import must leave both as the host had them
    out = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, check=True,
                         env={"PYTHONPATH": "src", "MPLCONFIGDIR": str(tmp_path), "PATH": ""})
    before, after = json.loads(out.stdout.strip().splitlines()[-1])
    assert before == after
    assert after["allow_internet"] is True and after["pyplot"] is False


def test_offline_context_restores_settings():
    from astropy.utils import data, iers

    from lineshift._offline import offline

    with data.conf.set_temp("allow_internet", True), iers.conf.set_temp("auto_download", True):
        with offline():
            assert data.conf.allow_internet is False and iers.conf.auto_download is False
        assert data.conf.allow_internet is True and iers.conf.auto_download is True


SIM_PROBE = r"""
import sys
import lineshift.cli.app  # noqa: the command line's parser
parsed = "scipy" in sys.modules
import lineshift.sim.writers  # noqa: imports the observe submodule before anything asks the package
from lineshift import sim
print(parsed, callable(sim.observe), sim.observe.__module__, sorted(set(sim.__all__) - set(dir(sim))))
"""


def test_simulator_is_imported_on_first_use():
    # the parser does not import SciPy through the simulator; the package's names are what they were
    # when everything was imported eagerly, ``observe`` the function although a submodule has its name
    out = subprocess.run([sys.executable, "-c", SIM_PROBE], capture_output=True, text=True, check=True,
                         env={"PYTHONPATH": "src", "PATH": ""})
    assert out.stdout.strip() == "False True lineshift.sim.observe []", out.stdout
