"""docs/reference.md against the program: every option of the parser, every column (name, order, unit)
of every table each command writes, and the JSON summary's fields and units."""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import pathlib
import re

import numpy as np
import pytest
from astropy.table import Table

from lineshift.cli import main
from lineshift.cli.app import COMMANDS, build_parser
from lineshift.io.table import SB2_COLUMNS, UNITS

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
REFERENCE = os.path.join(ROOT, "docs", "reference.md")


def _sections(text: str, level: str) -> dict[str, str]:
    parts = re.split(rf"^{level} (.+)$", text, flags=re.M)
    return {parts[k].strip(): parts[k + 1] for k in range(1, len(parts), 2)}


def _rows(body: str) -> list[list[str]]:
    rows = []
    for line in body.splitlines():
        if line.startswith("| ") and not line.startswith("|---"):
            rows.append([c.strip() for c in line.strip().strip("|").split(" | ")])
    return rows[1:] if rows else rows  # drop the header row


@pytest.fixture(scope="module")
def doc():
    with open(REFERENCE) as fh:
        text = fh.read()
    commands = {k.split()[1]: v for k, v in _sections(text, "##").items() if k.startswith("lineshift ")}
    tables = {}
    for body in commands.values():
        for name, sub in _sections(body, "###").items():
            tables[name] = [(r[0].strip("`"), r[1]) for r in _rows(sub)]
    options = {cmd: _rows(body.split("\n### ")[0]) for cmd, body in commands.items()}
    return options, tables


def _subparsers():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return sub.choices


def test_every_command_and_option_is_in_the_reference(doc):
    options, _ = doc
    assert set(options) == set(COMMANDS)
    for name, p in _subparsers().items():
        in_parser = set()
        for a in p._actions:
            if isinstance(a, argparse._HelpAction):
                continue
            in_parser |= set(a.option_strings) if a.option_strings else {a.metavar or a.dest}
        in_doc = {o.strip("`") for row in options[name] for o in row[0].split(", ")}
        assert in_doc == in_parser, (name, sorted(in_doc ^ in_parser))
        for row in options[name]:
            assert len(row) == 4 and all(row), (name, row)   # value, default and meaning given for each


def test_every_option_has_help_and_shows_its_default():
    for name, p in _subparsers().items():
        fmt = p._get_formatter()
        for a in p._actions:
            if isinstance(a, argparse._HelpAction):
                continue
            assert a.help and len(a.help) > 10, (name, a.option_strings or a.dest)
            if a.option_strings and a.default not in (None, False):
                assert "default" in fmt._get_help_string(a) % {"default": a.default}, (name, a.option_strings)
        assert "None" not in p.format_help(), name


def _check(table_path: str, documented: list[tuple[str, str]]):
    t = Table.read(table_path)
    assert list(t.colnames) == [c for c, _ in documented], table_path
    for col, unit in documented:
        written = str(t[col].unit) if t[col].unit is not None else "—"
        assert written == unit, (table_path, col, written, unit)
        assert UNITS.get(col, "—") == unit, (col, "io.table.UNITS and the reference disagree")


def test_the_tables_each_command_writes_match_the_reference(doc, sample_set, tmp_path):
    _, tables = doc
    directory, mask, _ = sample_set
    t, o = str(tmp_path / "t.ecsv"), str(tmp_path / "o.ecsv")
    assert main(["measure", directory, "--mask", mask, "-o", t, "--orders-table", o, "-q"]) == 0
    _check(t, tables["Table: measure"])
    _check(o, tables["Table: orders (`--orders-table`)"])
    assert [c for c, _ in tables["Table: measure, secondary (`--components 2`)"]] == SB2_COLUMNS
    for col, unit in tables["Table: measure, secondary (`--components 2`)"]:
        assert UNITS.get(col, "—") == unit, col
    # CSV: the same columns, units in the '# UNITS:' header line
    csv = tmp_path / "t.csv"
    assert main(["measure", directory, "--mask", mask, "-o", str(csv), "-q"]) == 0
    header = [line for line in csv.read_text().splitlines() if line.startswith("#")]
    units_line = next(line for line in header if line.startswith("# UNITS: "))
    want = [f"{c} [{u}]" for c, u in tables["Table: measure"] if u != "—"]
    assert units_line[len("# UNITS: "):].split(", ") == want
    assert any(line.startswith("# SOFTWARE: lineshift") for line in header)

    s, js = str(tmp_path / "s.ecsv"), tmp_path / "s.json"
    assert main(["series", t, "-o", s, "--json", str(js), "--fit-orbit", "--stellar-mass", "1", "-q"]) == 0
    # the secondary's columns appear in the series only when the measure tables have them (not here)
    _check(s, [(c, u) for c, u in tables["Table: series"] if c not in SB2_COLUMNS])
    summary = json.loads(js.read_text())
    fields = dict(tables["JSON summary (`--json`)"])
    assert set(summary) <= set(fields), sorted(set(summary) - set(fields))
    for key, unit in summary["units"].items():
        if isinstance(unit, str) and unit:
            assert fields[key] == unit, (key, unit, fields[key])
    for key in ("omega", "time_periastron", "min_mass", "mass_function", "period", "semi_amplitude"):
        assert summary["units"][key], key

    m = tmp_path / "m.csv"
    assert main(["mask", directory, "-o", str(m), "-q"]) == 0
    first = next(line for line in m.read_text().splitlines() if not line.startswith("#"))
    assert first.split(",") == [c for c, _ in tables["Table: mask"]]


def test_the_lines_table_matches_the_reference(doc, sample_set, tmp_path, capfd):
    _, tables = doc
    directory, mask, _ = sample_set
    t, ln = str(tmp_path / "t.ecsv"), str(tmp_path / "l.ecsv")
    assert main(["measure", directory, "--mask", mask, "--method", "lines", "-o", t, "--lines-table", ln, "-q"]) == 0
    _check(ln, tables["Table: lines (`--lines-table`)"])
    measured, lines = Table.read(t), Table.read(ln)
    assert set(measured["method"]) == {"lines"} and set(lines["file"]) == set(measured["file"])
    # one row per spectrum and measured line: the table holds every line the measure table counts
    for row in measured:
        mine = lines[lines["file"] == row["file"]]
        measured_rv = ~mine["rv"].mask if hasattr(mine["rv"], "mask") else np.isfinite(mine["rv"])
        assert int(measured_rv.sum()) == row["n_lines"]
    assert main(["measure", directory, "--mask", mask, "--lines-table", str(tmp_path / "x.csv")]) == 2
    assert "--lines-table needs --method lines" in capfd.readouterr().err


def test_the_wavecheck_tables_match_the_reference(doc, tmp_path):
    _, tables = doc
    lamps = tmp_path / "lamps"
    assert main(["simulate", str(lamps), "--lamp", "invented", "--instrument", "demo-echelle:3",
                 "--distort", "1:60:0", "-q"]) == 0
    out = {k: str(tmp_path / f"{k}.ecsv") for k in ("lines", "orders", "drift")}
    assert main(["wavecheck", str(lamps / "*.fits.gz"), "--lines", str(lamps / "truth" / "lamp_lines_demo-echelle.csv"),
                 "-o", out["lines"], "--summary", out["orders"], "--drift", out["drift"], "-q"]) == 0
    _check(out["lines"], tables["Table: wavecheck lines"])
    _check(out["orders"], tables["Table: wavecheck orders"])
    _check(out["drift"], tables["Table: wavecheck drift (`--drift`)"])


@pytest.mark.parametrize("command", [["measure", "{bad}", "--mask", "line_lists/vessa9_mask.csv"],
                                     ["mask", "{bad}", "-o", "{tmp}/m.csv"],
                                     ["wavecheck", "{bad}", "--lines", "line_lists/lamp_lines_hg_ne_ar.csv",
                                      "-o", "{tmp}/l.csv", "--summary", "{tmp}/o.csv"],
                                     ["inspect", "{bad}/*.fits"], ["series", "{bad}", "-o", "{tmp}/s.csv"]])
def test_an_input_that_matches_nothing_is_a_usage_error_naming_it(command, tmp_path, monkeypatch, capfd):
    monkeypatch.chdir(ROOT)
    bad = str(tmp_path / "sample_spectrum")
    argv = [a.format(bad=bad, tmp=tmp_path) for a in command]
    assert main(argv) == 2
    captured = capfd.readouterr()
    assert bad in captured.err and captured.out == ""
    assert not any(p.name.endswith(".csv") for p in tmp_path.iterdir())


def test_mask_anchor_before_the_inputs_does_not_swallow_them(sample_set, tmp_path, capfd):
    # the flag takes no value: the directory after it stays an input (the missing lab list is then named)
    assert main(["mask", "--anchor", "--lab-lines", str(tmp_path / "none.csv"), sample_set[0],
                 "-o", str(tmp_path / "m.csv")]) == 2
    assert "none.csv" in capfd.readouterr().err
    assert main(["mask", str(tmp_path), "-o", str(tmp_path / "m.csv")]) == 2   # a directory without spectra
    assert f"no spectrum files in {tmp_path}" in capfd.readouterr().err


def test_parquet_without_pyarrow_is_a_clear_usage_error(monkeypatch, tmp_path, capfd):
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "pyarrow" else real(name, *a))
    out = tmp_path / "t.parquet"
    assert main(["measure", os.path.join(ROOT, "sample_spectra"), "--mask",
                 os.path.join(ROOT, "line_lists", "vessa9_mask.csv"), "-o", str(out)]) == 2
    err = capfd.readouterr().err
    assert "pyarrow" in err and "t.parquet" in err and not out.exists()


def test_options_may_stand_between_the_inputs(sample_set, tmp_path):
    directory, mask, _ = sample_set
    files = sorted(str(p) for p in pathlib.Path(directory).glob("*.fits*"))[:2]
    out = tmp_path / "t.csv"
    assert main(["measure", files[0], "--mask", mask, files[1], "-o", str(out), "-q"]) == 0
    lines = [line for line in out.read_text().splitlines() if not line.startswith("#")]
    assert len(lines) == 3   # header and both inputs
