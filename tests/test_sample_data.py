"""The shipped sample and demo mask are exactly what the simulator makes (reproducible data)."""

import os

import numpy as np
import pandas as pd
from astropy.io import fits

from lineshift import sim
from lineshift.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def test_shipped_sample_is_reproducible(tmp_path):
    out = tmp_path / "again"
    assert main(["simulate", str(out), "--seed", "2026", "--mask", str(tmp_path / "mask.csv"), "-q"]) == 0
    shipped = pd.read_csv(os.path.join(ROOT, "sample_spectra", "truth", "truth.csv"), comment="#")
    again = pd.read_csv(out / "truth" / "truth.csv", comment="#")
    pd.testing.assert_frame_equal(shipped, again)
    name = shipped.file[shipped.layout == "multi-order"].iloc[0]
    with fits.open(os.path.join(ROOT, "sample_spectra", name)) as a, fits.open(out / name) as b:
        assert np.array_equal(a["FLUX"].data, b["FLUX"].data)
    with open(os.path.join(ROOT, "line_lists", "vessa9_mask.csv")) as fa, open(tmp_path / "mask.csv") as fb:
        assert fa.read() == fb.read()


def test_demo_star_is_invented():
    assert sim.DEMO_STAR.name == "Vessa-9"
    assert "Brennick" in sim.DEMO_SITE.name
