"""File names of any bytes: carried through every table format, the store and the plot names.

The documented form of a name that is not UTF-8 is the name with each undecodable byte written
as ``\\xNN`` (README, "Reliability"); here it is inverted independently to find the file again.
"""

import os
import re
import shutil

import numpy as np
import pandas as pd
import pytest
from astropy.table import Table

from lineshift.cli import main

NAMES = [b"caf\xe9.fits", b"\xff\xfe raw.fits", "日本.fits".encode()]  # latin-1, invalid UTF-8, valid UTF-8


def _unprintable(name: str) -> bytes:
    """Back from the documented form to the operating system's bytes (written here, not imported)."""
    return re.sub(rb"\\x([0-9a-f]{2})", lambda m: bytes([int(m[1], 16)]), name.encode("utf-8"))


def _read(path: str) -> pd.DataFrame:
    if path.endswith(".csv"):
        return pd.read_csv(path, comment="#", keep_default_na=False)
    if path.endswith(".parquet"):
        return pd.read_parquet(path)
    frame = Table.read(path).to_pandas()
    for c in ("file", "status"):
        if c not in frame.columns:
            continue
        frame[c] = [v.decode("ascii") if isinstance(v, bytes) else str(v) for v in frame[c]]
    return frame


@pytest.fixture
def byte_named(sample_set, tmp_path):
    directory, mask, rows = sample_set
    multi = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    d = os.fsencode(tmp_path / "in")
    os.makedirs(os.path.join(d, b"a\xe9"))
    os.makedirs(os.path.join(d, b"b"))
    for name, src in zip(NAMES, [multi[0], multi[1], multi[0]], strict=True):
        shutil.copy(src, os.path.join(d, name))
    # same base name in two directories (one of them not UTF-8): the plots must not collide
    shutil.copy(multi[1], os.path.join(d, b"a\xe9", b"x.fits"))
    shutil.copy(multi[0], os.path.join(d, b"b", b"x.fits"))
    with open(os.path.join(d, b"broken \xe9.fits"), "wb") as fh:
        fh.write(b"SIMPLE  = garbage")
    return os.fsdecode(d), mask


@pytest.mark.parametrize("ext", [".csv", ".ecsv", ".fits", ".parquet"])
def test_byte_names_round_trip_every_format(byte_named, tmp_path, ext):
    d, mask = byte_named
    inputs = [d, os.path.join(d, "a\udce9"), os.path.join(d, "b")]
    out = str(tmp_path / f"t{ext}")
    assert main(["measure", *inputs, "--mask", mask, "-o", out, "-q"]) == 1
    table = _read(out)
    files = list(table.file)
    assert len(files) == len(set(files)) == 6
    for f in files:
        assert os.path.exists(_unprintable(f)), f  # the documented form leads back to the file
    ok = dict(zip(files, table.status, strict=True))
    assert ok[os.path.join(d, "broken \\xe9.fits")] == "truncated"
    assert sum(s == "ok" for s in ok.values()) == 5


def test_byte_names_in_the_store_and_the_plots(byte_named, tmp_path):
    d, mask = byte_named
    inputs = [d, os.path.join(d, "a\udce9"), os.path.join(d, "b")]
    store, plots = str(tmp_path / "s.sqlite"), tmp_path / "plots"
    first, again = str(tmp_path / "first.csv"), str(tmp_path / "again.csv")
    assert main(["measure", *inputs, "--mask", mask, "-o", first, "--store", store, "--plots", str(plots),
                 "-q"]) == 1
    assert main(["measure", *inputs, "--mask", mask, "-o", again, "--store", store, "-q"]) == 1
    a, b = _read(first), _read(again)
    assert list(a.file) == list(b.file)
    ok = a.status == "ok"
    np.testing.assert_array_equal(a.rv[ok].astype(float), b.rv[ok].astype(float))  # replayed from the store
    ccf = sorted(p for p in os.listdir(plots) if p.endswith("_ccf.png"))
    assert len(ccf) == int(ok.sum()) == 5  # one per measured input: the two x.fits do not collide
    assert "caf\\xe9_ccf.png" in ccf and "日本_ccf.png" in ccf
    assert sum(p.startswith("x_") for p in ccf) == 2


@pytest.mark.parametrize("ext", [".csv", ".fits"])
def test_byte_names_in_wavecheck_tables_and_plots(tmp_path, ext):
    lamp = tmp_path / "lamp"
    assert main(["simulate", str(lamp), "--lamp", "invented", "--instrument", "demo-echelle:1", "-q"]) == 0
    src = os.path.join(os.fsencode(lamp), b"lamp_demo-echelle_000.fits.gz")
    os.rename(src, os.path.join(os.fsencode(lamp), b"caf\xe9.fits.gz"))
    out, summ, drift = (str(tmp_path / f"{n}{ext}") for n in ("l", "o", "d"))
    assert main(["wavecheck", str(lamp), "--lines", str(lamp / "truth" / "lamp_lines_demo-echelle.csv"), "-o", out,
                 "--summary", summ, "--drift", drift, "--plots", str(tmp_path / "p"), "-q"]) == 0
    for path in (out, summ, drift):
        files = set(_read(path).file)
        assert len(files) == 1 and os.path.exists(_unprintable(files.pop()))
    assert sorted(os.listdir(tmp_path / "p")) == ["caf\\xe9_orders.png", "caf\\xe9_residuals.png"]
