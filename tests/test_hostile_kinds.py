"""Each kind of hostile input gets its own specific reason, and no Python warning text reaches the user.

The catalogue of kinds is tests/hostile_inputs.py; the catch-all "unexpected error" is for true bugs.
"""

import os
import re
import subprocess
import sys

import pandas as pd
import pytest

from hostile_inputs import BOMB_LIMIT, KINDS, build
from lineshift.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SRC = os.path.join(ROOT, "src")
SAMPLES = os.path.join(ROOT, "sample_spectra")
SAMPLE_MASK = os.path.join(ROOT, "line_lists", "vessa9_mask.csv")

#: What a raw Python warning looks like on stderr: "file.py:123: SomeWarning: ...", NumPy's
#: floating-point wording, a traceback.
RAW = re.compile(r"\.py:\d+|\w+Warning\b|encountered in|Traceback")


def _good_1d(sample_set):
    directory, mask, rows = sample_set
    return os.path.join(directory, next(r["file"] for r in rows if r["layout"] == "wcs-1d")), mask


@pytest.mark.parametrize("kind", sorted(KINDS))
def test_each_hostile_input_has_a_specific_reason(kind, sample_set, tmp_path, capfd, monkeypatch):
    from lineshift.io import loaders

    monkeypatch.setattr(loaders, "MAX_INPUT_BYTES", BOMB_LIMIT)
    monkeypatch.setenv("LINESHIFT_MAX_INPUT_BYTES", str(BOMB_LIMIT))   # the same limit in spawned workers
    good, mask = _good_1d(sample_set)
    d = tmp_path / "in"
    d.mkdir()
    build(kind, str(d), good)
    out = tmp_path / "t.csv"
    assert main(["measure", str(d), "--mask", mask, "-o", str(out), "-q"]) == 1
    err = capfd.readouterr().err
    table = pd.read_csv(out, comment="#", keep_default_na=False)
    status, words = KINDS[kind]
    assert len(table) >= 1
    for row in table.to_dict("records"):
        assert row["status"] == status, (kind, row["notes"])
        assert words in row["notes"], (kind, row["notes"])
        assert row["notes"].startswith(row["file"] + ": ")  # the file is named
    assert "unexpected error" not in err and not RAW.search(err), err
    lines = err.strip().splitlines()
    assert len(lines) == len(table) and all(line.startswith("lineshift: ") for line in lines), err
    # inspect names the same kind of fault, never the catch-all
    main(["inspect", str(d)])
    shown = capfd.readouterr()
    assert "unexpected error" not in shown.out + shown.err and not RAW.search(shown.out + shown.err)


def test_misleading_messages_are_gone(sample_set, tmp_path):
    from lineshift.errors import LineshiftError
    from lineshift.io.loaders import load_spectrum

    good, _ = _good_1d(sample_set)
    for kind, right, wrong in (("crval_1e300", "beyond any spectrograph's range", "zero dispersion"),
                               ("inf_flux", "NaN or infinite", None),
                               ("exptime_absurd", "EXPTIME = 1e+30 s", "observation time")):
        with pytest.raises(LineshiftError) as info:
            load_spectrum(build(kind, str(tmp_path), good))
        assert right in str(info.value)
        if wrong:
            assert wrong not in str(info.value)
        assert not str(info.value).endswith("are NaN")  # inf flux once read "all NaN"


def _run(argv, env):
    proc = subprocess.run([sys.executable, "-m", "lineshift", *argv], env=env, capture_output=True,
                          text=True, errors="backslashreplace", timeout=300)
    return proc.returncode, proc.stdout + proc.stderr


def test_no_python_warning_text_reaches_the_user(sample_set, tmp_path):
    good, mask = _good_1d(sample_set)
    directory = sample_set[0]
    four = sorted(os.path.join(directory, r["file"]) for r in sample_set[2] if r["layout"] in ("multi-order", "wcs-1d"))
    hostile = tmp_path / "hostile"
    hostile.mkdir()
    for kind in KINDS:
        build(kind, str(hostile), good)
    env = {**os.environ, "PYTHONPATH": SRC, "LINESHIFT_MAX_INPUT_BYTES": str(BOMB_LIMIT),
           "PYTHONWARNINGS": "default"}  # every warning shown: none may leak raw
    t = str(tmp_path)
    runs = [
        ["inspect", SAMPLES, str(hostile)],
        ["mask", directory, str(hostile), "-o", f"{t}/m.csv", "--plot", f"{t}/m.png"],
        ["measure", SAMPLES, "--mask", SAMPLE_MASK, "-o", f"{t}/shipped.csv"],
        ["measure", directory, str(hostile), "--mask", mask, "-o", f"{t}/mixed.csv", "--workers", "2",
         "--plots", f"{t}/p2"],
        ["series", f"{t}/shipped.csv", "-o", f"{t}/s.csv", "--fit-orbit", "--plots", f"{t}/p3"],
        ["series", f"{t}/mixed.csv", "-o", f"{t}/s2.csv", "--json", f"{t}/s2.json"],
        ["measure", *four, "--mask", mask, "-o", f"{t}/four.csv"],
        ["series", f"{t}/four.csv", "-o", f"{t}/s4.csv"],  # four points: astropy's FAP inversion once leaked
        ["report", f"{t}/shipped.csv", "-o", f"{t}/r.html"],
    ]
    assert main(["simulate", f"{t}/lamp", "--lamp", "invented", "--instrument", "demo-echelle:2", "-q"]) == 0
    lines = os.path.join(t, "lamp", "truth", "lamp_lines_demo-echelle.csv")
    runs.append(["wavecheck", f"{t}/lamp", str(hostile), "--lines", lines, "-o", f"{t}/w.csv", "--summary",
                 f"{t}/ws.csv", "--drift", f"{t}/wd.csv", "--plots", f"{t}/p4"])
    for argv in runs:
        code, text = _run(argv, env)
        assert code in (0, 1), (argv[0], code, text[-2000:])
        assert not RAW.search(text), (argv[0], [x for x in text.splitlines() if RAW.search(x)][:5])
        assert "unexpected error" not in text, (argv[0], text[-2000:])


@pytest.mark.parametrize("given_mask", [True, False])
def test_every_hostile_kind_in_one_batch_leaves_the_good_rows_identical(sample_set, tmp_path, capfd, monkeypatch,
                                                                         given_mask):
    # without --mask the mask is built from the inputs: the hostile ones must not change it
    import shutil

    from lineshift.io import loaders

    monkeypatch.setattr(loaders, "MAX_INPUT_BYTES", BOMB_LIMIT)
    monkeypatch.setenv("LINESHIFT_MAX_INPUT_BYTES", str(BOMB_LIMIT))   # the same limit in spawned workers
    directory, mask, rows = sample_set
    good1d, _ = _good_1d(sample_set)
    clean, mixed = tmp_path / "clean", tmp_path / "mixed"
    clean.mkdir()
    mixed.mkdir()
    for r in rows:
        shutil.copy(os.path.join(directory, r["file"]), clean)
        shutil.copy(os.path.join(directory, r["file"]), mixed)
    expected = {}
    for kind in KINDS:
        path = os.fsdecode(build(kind, str(mixed), good1d))
        expected[os.path.basename(path)] = KINDS[kind]
    expected["link_loop_b.fits"] = KINDS["link_loop"]
    use = ["--mask", mask] if given_mask else []
    assert main(["measure", str(clean), *use, "-o", str(tmp_path / "clean.csv"), "-q"]) == 0
    assert main(["measure", str(mixed), *use, "-o", str(tmp_path / "mixed.csv"), "-q"]) == 1
    err = capfd.readouterr().err
    assert "unexpected error" not in err and not RAW.search(err)
    a = pd.read_csv(tmp_path / "clean.csv", comment="#", keep_default_na=False, dtype=str)
    b = pd.read_csv(tmp_path / "mixed.csv", comment="#", keep_default_na=False, dtype=str)
    assert len(b) == len(a) + len(expected)

    def provenance(name):  # the same mask and the same telluric rejection, bad files at the front or not
        with open(tmp_path / name) as fh:
            return [line for line in fh if line.startswith(("# MASK", "# TELLURIC"))]

    assert provenance("mixed.csv") == provenance("clean.csv") and len(provenance("clean.csv")) == 2
    by_name = {os.path.basename(f): r for f, r in zip(b.file, b.to_dict("records"), strict=True)}
    for name, (status, words) in expected.items():
        name = name.replace("\udce9", "\\xe9")
        assert by_name[name]["status"] == status and words in by_name[name]["notes"], name
    for row in a.to_dict("records"):
        other = by_name[os.path.basename(row["file"])]
        for col in a.columns:
            if col != "file":
                assert other[col] == row[col], col  # identical text: every digit the table holds


@pytest.mark.parametrize("kind", ["zero_flux", "zero_err"])
def test_inspect_fails_a_file_no_engine_can_use(kind, sample_set, tmp_path, capfd):
    # inspect gives the verdict measure would: a file readable but without one usable pixel is a
    # problem (exit 1, the measure table's reason words), not "missing: nothing"
    good, _ = _good_1d(sample_set)
    path = build(kind, str(tmp_path), good)
    assert main(["inspect", str(path)]) == 1
    out = capfd.readouterr().out
    problem = [line for line in out.splitlines() if line.startswith("problem:")]
    assert len(problem) == 1 and KINDS[kind][1] in problem[0], out
