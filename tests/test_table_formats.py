"""Velocity tables read back with astropy's Table.read registry: units, provenance and digits."""

import json

import numpy as np
import pyarrow.parquet as pq
import pytest
from astropy.table import Table

from lineshift.io.table import write_table

LONG = ("(1+rv/c) = (1+rv_topo/c)(1+berv/c), Wright & Eastman 2014; a provenance value well past the "
        "72 characters of one FITS card, which must survive whole")
ROW = {"file": "a.fits", "object": "Vessa-9", "bjd_tdb": 2461000.123456789123, "rv": 1234.567891234,
       "rv_err": 1.23456789, "berv": -20000.0001234, "rv_topo": 21234.0, "fwhm": 7000.5, "contrast": 0.351234567,
       "snr": 150.123456789, "n_lines": 42, "status": "ok"}


@pytest.mark.parametrize("ext", [".ecsv", ".fits", ".parquet"])
def test_units_and_provenance_read_back(tmp_path, ext):
    # outside reference: astropy's unified I/O registry (Table.read) must return the units and metadata
    path = str(tmp_path / f"v{ext}")
    write_table([ROW], path, meta={"BERV_COMPOSITION": LONG})
    t = Table.read(path)
    assert str(t["rv"].unit) == "m / s" and str(t["bjd_tdb"].unit) == "d"
    if ext == ".fits":
        text = "".join(t.meta["HISTORY"])
        assert LONG.replace(" ", "") in text.replace(" ", "")
        assert len(LONG) > 72
    else:
        assert t.meta["BERV_COMPOSITION"] == LONG
    if ext != ".ecsv":  # binary formats keep every bit
        assert t["bjd_tdb"][0] == ROW["bjd_tdb"] and t["rv"][0] == ROW["rv"] and t["snr"][0] == ROW["snr"]
    if ext == ".parquet":
        units = json.loads(pq.read_schema(path).metadata[b"lineshift.units"])
        assert units["rv"] == "m / s"


@pytest.mark.parametrize("ext", [".csv", ".ecsv"])
def test_text_tables_carry_the_digits_of_their_precision(tmp_path, ext):
    # common practice: velocities to 0.001 m/s, BJD to 1e-8 d (~1 ms), dimensionless to 1e-6
    path = str(tmp_path / f"v{ext}")
    write_table([ROW], path)
    with open(path) as fh:
        lines = [ln for ln in fh.read().splitlines() if not ln.startswith("#")]
    sep = "," if ext == ".csv" else " "
    header, values = lines[0].split(sep), lines[1].split(sep)
    got = dict(zip(header, values, strict=True))
    assert got["rv"] == "1234.568" and got["rv_err"] == "1.235" and got["berv"] == "-20000.0"
    assert got["bjd_tdb"] == "2461000.12345679"
    assert got["snr"] == "150.123457" and got["contrast"] == "0.351235"
    assert got["n_lines"] == "42"
    assert np.isclose(float(got["bjd_tdb"]), ROW["bjd_tdb"], rtol=0, atol=1e-8)


def test_orders_table_names_round_trip():
    """The per-order table's written names (rv_topo, flag + flag_reason) map back to the measure rows' names."""
    from lineshift.io.table import orders_frame, orders_from_written

    rows = [{"file": "a.fits", "_orders": [
        {"order": 3, "wavelength": 5000.0, "rv": 12.5, "rv_err": 1.5, "n_lines": 40, "chi2_red": 1.1, "flag": ""},
        {"order": 4, "wavelength": 5100.0, "rv": 99.0, "rv_err": 9.0, "n_lines": 3, "chi2_red": 7.0,
         "flag": "poor fit"}]}]
    written = orders_frame(rows)
    assert list(written["flag"]) == [False, True] and list(written["flag_reason"]) == ["", "poor fit"]
    back = orders_from_written(written)
    assert list(back["rv"]) == [12.5, 99.0] and list(back["rv_err"]) == [1.5, 9.0]
    assert list(back["flag"]) == ["", "poor fit"]
