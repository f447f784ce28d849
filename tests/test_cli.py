"""End to end through ``main(argv)``: tables, exit codes, bad input, plots, inspect, simulate."""

import os
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from astropy.table import Table

from lineshift.cli import main
from lineshift.io.table import COLUMNS
from plotcheck import check_plot


def _truth(directory):
    return pd.read_csv(os.path.join(directory, "truth", "truth.csv"), comment="#")


def test_measure_writes_the_contract_table(sample_set, tmp_path, capsys):
    directory, mask, _ = sample_set
    out = tmp_path / "rv.csv"
    code = main(["measure", directory, "--mask", mask, "-o", str(out), "-q"])
    assert code == 0
    table = pd.read_csv(out, comment="#")
    assert list(table.columns[: len(COLUMNS)]) == COLUMNS
    truth = _truth(directory)
    assert len(table) == len(truth)
    assert (table.status == "ok").all()
    table["name"] = table.file.map(os.path.basename)
    m = table.merge(truth, left_on="name", right_on="file", suffixes=("", "_true"))
    # BERV and BJD_TDB equal the simulator's direct astropy values (issue: < 1 mm/s, < 0.01 s)
    assert np.max(np.abs(m.berv - m.berv_true)) < 1e-3
    assert np.max(np.abs(m.bjd_tdb - m.bjd_tdb_true)) * 86400 < 0.01
    # velocities: differential, so compare after removing each layout's mean offset
    for _, g in m.groupby("layout_true"):
        d = g.rv - g.rv_true
        assert np.all(np.abs(d - d.mean()) < 5 * g.rv_err + 1.0)
    assert np.all(np.abs(m.rv - m.rv_true) < 100.0)  # mask zero point within 0.1 km/s
    assert (m.n_lines > 10).all() and (m.contrast > 0.05).all() and (m.fwhm > 3000).all()
    # rv = rv_topo (+) berv, multiplicatively (to the CSV rounding of 0.001 m/s per column)
    c = 299792458.0
    assert np.allclose(m.rv, m.rv_topo + m.berv + m.rv_topo * m.berv / c, rtol=0, atol=1.5e-3)


@pytest.mark.parametrize("ext", [".ecsv", ".fits", ".parquet"])
def test_other_table_formats(sample_set, tmp_path, ext):
    directory, mask, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows[:2]]
    out = tmp_path / f"rv{ext}"
    assert main(["measure", *files, "--mask", mask, "-o", str(out), "-q"]) == 0
    table = pd.read_parquet(out) if ext == ".parquet" else Table.read(out).to_pandas()
    assert list(table.columns[: len(COLUMNS)]) == COLUMNS
    assert len(table) == 2
    if ext == ".ecsv":
        t = Table.read(out)
        assert str(t["rv"].unit) == "m / s"
        assert "IAU 2000" in t.meta["RV_CONVENTION"]


def test_stdout_when_no_output(sample_set, capsys):
    directory, mask, rows = sample_set
    assert main(["measure", os.path.join(directory, rows[0]["file"]), "--mask", mask, "-q"]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[0].split(",")[: len(COLUMNS)] == COLUMNS
    assert len(out.splitlines()) == 2


def test_plots(sample_set, tmp_path, drawn):
    directory, mask, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows[:3]]
    plots = tmp_path / "plots"
    assert main(["measure", *files, "--mask", mask, "-o", str(tmp_path / "t.csv"), "--plots", str(plots), "-q"]) == 0
    names = sorted(os.listdir(plots))
    assert "rv_time.png" in names
    assert sum(n.endswith("_ccf.png") for n in names) == 3
    check_plot(drawn, plots / "rv_time.png", points=3)          # one point per spectrum
    for name in names:
        if name.endswith("_ccf.png"):
            fig = check_plot(drawn, plots / name, min_points=20, axes_with_data=2)   # CCF, residual (+ bisector)
            ccf_ax = fig.axes[0]
            assert {t.get_text() for t in ccf_ax.get_legend().get_texts()} >= {"CCF", "fit"}


def _make_bad_files(directory, good_file, wcs_file):
    """One file per kind of bad input; returns {kind: path}."""
    bad = {}
    with open(good_file, "rb") as fh:
        raw = fh.read()

    def put(name, data):
        p = os.path.join(directory, name)
        with open(p, "wb") as fh:
            fh.write(data)
        bad[name] = p

    import gzip

    plain = gzip.decompress(raw) if raw[:2] == b"\x1f\x8b" else raw
    put("truncated.fits", plain[: len(plain) // 2])
    put("empty.fits", b"")
    put("notfits.fits", b"\x00\x01garbage" * 500)
    with fits.open(good_file) as hdul:
        def variant(name, edit):
            h = fits.HDUList([hdu.copy() for hdu in hdul])
            edit(h)
            p = os.path.join(directory, name)
            h.writeto(p, overwrite=True)
            bad[name] = p

        variant("allnan.fits", lambda h: h["FLUX"].data.__setitem__(slice(None), np.nan))
        variant("notime.fits", lambda h: [h[0].header.remove(k, ignore_missing=True)
                                          for k in ("DATE-OBS", "DATE-BEG", "DATE-END", "MJD-OBS")])
        variant("notarget.fits", lambda h: [h[0].header.remove(k) for k in ("RA", "DEC")])
        variant("nosite.fits", lambda h: [h[0].header.remove(k, ignore_missing=True) for k in
                                          ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "OBSGEO-L", "OBSGEO-B", "OBSGEO-H")])
        variant("badwave.fits", lambda h: h["WAVE"].data.__setitem__((0, 100), h["WAVE"].data[0, 50]))
        variant("flatwave.fits", lambda h: h["WAVE"].data.__setitem__((0, slice(100, 110)), h["WAVE"].data[0, 100]))
        variant("baderr.fits", lambda h: h["ERR"].data.__setitem__(slice(None), 0.0))
        variant("outside.fits", lambda h: h["WAVE"].data.__setitem__(slice(None), h["WAVE"].data * 1.6))
        variant("noise.fits", lambda h: h["FLUX"].data.__setitem__(
            slice(None), np.random.default_rng(1).normal(1000, 30, h["FLUX"].data.shape)))
        variant("negerr.fits", lambda h: h["ERR"].data.__setitem__(
            slice(None), np.where(np.arange(h["ERR"].data.size).reshape(h["ERR"].data.shape) % 2, -1.0, np.nan)))
    with fits.open(wcs_file) as hdul:
        h = fits.HDUList([hdu.copy() for hdu in hdul])
        h[0].header["CDELT1"] = -abs(h[0].header["CDELT1"])
        p = os.path.join(directory, "reversed.fits")
        h.writeto(p)
        bad["reversed.fits"] = p
    return bad


def test_bad_inputs_never_stop_the_batch(sample_set, tmp_path, capfd):
    directory, mask, rows = sample_set
    work = tmp_path / "mixed"
    work.mkdir()
    good = [r for r in rows if r["layout"] == "multi-order"]
    for r in rows:
        shutil.copy(os.path.join(directory, r["file"]), work)
    wcs = next(r for r in rows if r["layout"] == "wcs-1d")
    bad = _make_bad_files(str(work), os.path.join(directory, good[0]["file"]), os.path.join(directory, wcs["file"]))
    out = tmp_path / "mixed.csv"
    code = main(["measure", str(work), "--mask", mask, "-o", str(out), "-q"])
    captured = capfd.readouterr()
    assert code == 1
    assert "Traceback" not in captured.err
    table = pd.read_csv(out, keep_default_na=False, comment="#")
    assert len(table) == len(rows) + len(bad)
    by_name = {os.path.basename(f): row for f, row in zip(table.file, table.itertuples(), strict=True)}
    for r in rows:
        assert by_name[r["file"]].status == "ok"
    expected = {"truncated.fits": "truncated", "empty.fits": "empty file", "notfits.fits": "unreadable",
                "allnan.fits": "no valid flux", "notime.fits": "missing time", "notarget.fits": "missing target",
                "nosite.fits": "missing site", "badwave.fits": "bad wavelengths",
                "flatwave.fits": "bad wavelengths", "baderr.fits": "no valid uncertainties",
                "outside.fits": "outside mask range", "noise.fits": "no correlation peak",
                "negerr.fits": "no valid uncertainties", "reversed.fits": "bad wavelengths"}
    assert set(expected) == set(bad)
    err_lines = [ln for ln in captured.err.splitlines() if ln.strip()]
    for name, status in expected.items():
        assert by_name[name].status == status, name
        assert by_name[name].rv == ""
        # exactly one line on stderr names the file
        assert sum(name in ln for ln in err_lines) == 1, name


@pytest.mark.parametrize(("argv", "message"), [
    (["measure", "{dir}", "--mask", "{mask}", "--workers", "0"], "--workers must be at least 1"),
    (["measure", "{dir}", "--mask", "{mask}", "--save-mask", "{tmp}/m.csv"], "only applies when no --mask"),
    (["measure", "{dir}", "--mask", "{tmp}/missing.csv"], "cannot be read"),
    (["measure", "{tmp}/empty_dir", "--mask", "{mask}"], "no spectrum files in"),
    (["measure", "{dir}", "--mask", "{mask}", "--velocity-range", "5,1"], "LO must be below HI"),
    (["measure", "{dir}", "--mask", "{mask}", "--config", "{tmp}/bad.toml"], "unknown key"),
    (["measure", "{dir}", "--mask", "{mask}", "--config", "{tmp}/broken.toml"], "not valid TOML"),
    (["measure", "{dir}", "--mask", "{tmp}/bad.toml"], "needs a header row with columns wavelength and weight"),
    (["measure", "{dir}", "--mask", "{mask}", "-o", "{tmp}/out.xlsx"], "unknown table extension"),
    (["measure", "{dir}", "--mask", "{mask}", "--method", "psychic"], "invalid choice"),
])
def test_usage_errors_exit_2_and_write_nothing(sample_set, tmp_path, capfd, argv, message):
    directory, mask, _ = sample_set
    (tmp_path / "empty_dir").mkdir()
    (tmp_path / "bad.toml").write_text("[measure]\nvelocity_rnage = [1, 2]\n")
    (tmp_path / "broken.toml").write_text("[measure\nmask = 'x'\n")
    argv = [a.format(dir=directory, mask=mask, tmp=tmp_path) for a in argv]
    before = set(os.listdir(tmp_path))
    assert main(argv) == 2
    err = capfd.readouterr().err
    assert message in err
    assert "Traceback" not in err
    assert set(os.listdir(tmp_path)) == before


def test_refuses_to_overwrite_an_input(sample_set, tmp_path, capfd):
    directory, mask, rows = sample_set
    victim = tmp_path / "x.csv"
    shutil.copy(os.path.join(directory, next(r["file"] for r in rows if r["layout"] == "text")), victim)
    before = victim.read_bytes()
    assert main(["measure", str(victim), "--mask", mask, "-o", str(victim)]) == 2
    assert victim.read_bytes() == before


def test_overrides_from_command_line_and_config(sample_set, tmp_path):
    directory, mask, rows = sample_set
    f = os.path.join(directory, rows[0]["file"])
    nosite = tmp_path / "nosite.fits"
    with fits.open(f) as h:
        for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "OBSGEO-L", "OBSGEO-B", "OBSGEO-H"):
            h[0].header.remove(k, ignore_missing=True)
        h.writeto(nosite)
    out = tmp_path / "o.csv"
    assert main(["measure", str(nosite), "--mask", mask, "-o", str(out), "-q"]) == 1
    assert main(["measure", str(nosite), "--mask", mask, "-o", str(out), "-q",
                 "--site", "35.2133,-12.4418,1850"]) == 0
    cfg = tmp_path / "c.toml"
    cfg.write_text(f'[site]\nlon = 35.2133\nlat = -12.4418\nheight = 1850.0\n[measure]\nmask = "{mask}"\n')
    out2 = tmp_path / "o2.csv"
    assert main(["measure", str(nosite), "--config", str(cfg), "-o", str(out2), "-q"]) == 0
    a, b = pd.read_csv(out, comment="#"), pd.read_csv(out2, comment="#")
    assert a.rv[0] == b.rv[0]


def test_workers_give_identical_results(sample_set, tmp_path):
    directory, mask, _ = sample_set
    one, two = tmp_path / "one.csv", tmp_path / "two.csv"
    assert main(["measure", directory, "--mask", mask, "-o", str(one), "-q"]) == 0
    assert main(["measure", directory, "--mask", mask, "-o", str(two), "-q", "--workers", "2"]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(one, comment="#"), pd.read_csv(two, comment="#"))


def test_inspect(sample_set, tmp_path, capsys):
    directory, _, rows = sample_set
    f = os.path.join(directory, next(r["file"] for r in rows if r["layout"] == "wcs-1d"))
    assert main(["inspect", f]) == 0
    out = capsys.readouterr().out
    for word in ("layout:   wcs-1d", "orders:   1", "medium:   air", "time:", "target:   Vessa-9", "site:",
                 "snr:", "missing:  nothing"):
        assert word in out
    bad = tmp_path / "nosite.fits"
    with fits.open(f) as h:
        for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "OBSGEO-L", "OBSGEO-B", "OBSGEO-H"):
            h[0].header.remove(k, ignore_missing=True)
        h.writeto(bad)
    assert main(["inspect", str(bad)]) == 1
    assert "missing:  site" in capsys.readouterr().out


def test_simulate_command(tmp_path):
    out = tmp_path / "sim"
    assert main(["simulate", str(out), "--instrument", "demo-text:2", "--mask", str(tmp_path / "m.csv"), "-q"]) == 0
    assert len([n for n in os.listdir(out) if n.endswith(".csv.gz")]) == 2
    assert (out / "truth" / "truth.csv").exists()
    assert main(["simulate", str(out), "--instrument", "nonesuch"]) == 2


def test_python_dash_m_and_version():
    res = subprocess.run([sys.executable, "-m", "lineshift", "--version"], capture_output=True, text=True,
                         check=False)
    assert res.returncode == 0
    assert res.stdout.startswith("lineshift ")


def test_python_api_returns_quantities(sample_set):
    import astropy.units as u

    from lineshift.api import measure

    directory, mask, rows = sample_set
    table = measure([os.path.join(directory, r["file"]) for r in rows[:2]], mask,
                    velocity_range=(-100 * u.km / u.s, 100 * u.km / u.s))
    assert table["rv"].unit == u.m / u.s
    assert table["bjd_tdb"].unit == u.day
    assert list(table.colnames[: len(COLUMNS)]) == COLUMNS
    assert np.all(np.isfinite(table["rv"].value))
    with pytest.raises(Exception, match="velocity Quantity"):
        measure([os.path.join(directory, rows[0]["file"])], mask, velocity_step=5 * u.s)


def test_velocity_range_and_step_overrides(sample_set, tmp_path):
    directory, mask, rows = sample_set
    f = os.path.join(directory, rows[0]["file"])
    a, b, c = tmp_path / "a.csv", tmp_path / "b.csv", tmp_path / "c.csv"
    assert main(["measure", f, "--mask", mask, "-o", str(a), "-q"]) == 0
    assert main(["measure", f, "--mask", mask, "-o", str(b), "-q", "--velocity-range", "0,30000",
                 "--velocity-step", "400"]) == 0
    ra, rb = pd.read_csv(a, comment="#"), pd.read_csv(b, comment="#")
    # the same velocity within a fraction of its error (different grid, same data)
    assert abs(ra.rv[0] - rb.rv[0]) < 0.5 * ra.rv_err[0]
    # a range that excludes the star finds no peak there
    assert main(["measure", f, "--mask", mask, "-o", str(c), "-q", "--velocity-range", "-250000,-150000"]) == 1
    assert pd.read_csv(c, comment="#").status[0] in ("no correlation peak", "peak fit failed")


def test_progress_reports(capsys, monkeypatch):
    from lineshift.cli import common as cli

    quiet = cli.Progress(100, quiet=True)
    for _ in range(100):
        quiet.update()
    assert capsys.readouterr().err == ""
    clock = iter(float(t) for t in range(0, 10000, 7))
    monkeypatch.setattr(cli.time, "monotonic", lambda: next(clock))
    log = cli.Progress(100, quiet=False)  # stderr is not a terminal under pytest: one-line log
    for _ in range(10):
        log.update()
    err = capsys.readouterr().err.splitlines()
    assert err and all(line.startswith("lineshift: ") and "spectra" in line and "/s" in line for line in err)


def test_a_mistyped_command_names_the_program_once(capsys):
    assert main(["measur", "x.fits"]) == 2
    err = capsys.readouterr().err.strip()
    assert "see 'lineshift --help'" in err and "lineshift lineshift" not in err
    assert main(["measure", "x.fits", "--box-width", "wide"]) == 2
    assert "see 'lineshift measure --help'" in capsys.readouterr().err


def test_progress_bar_on_a_terminal(sample_set, tmp_path):
    """On a real (pseudo-)terminal the bar is drawn in place and ends at 100 %; -q draws nothing."""
    import fcntl
    import pty
    import struct
    import subprocess
    import sys
    import termios

    directory, mask, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows[:4]]

    def run(*extra):
        leader, follower = pty.openpty()
        fcntl.ioctl(follower, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))  # a 100-column terminal
        cmd = [sys.executable, "-m", "lineshift", "measure", *files, "--mask", mask,
               "-o", str(tmp_path / "t.csv"), *extra]
        proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=follower,
                                env=os.environ.copy())
        os.close(follower)
        chunks = []
        while True:
            try:
                data = os.read(leader, 4096)
            except OSError:  # EIO: the child closed the terminal
                break
            if not data:
                break
            chunks.append(data)
        os.close(leader)
        assert proc.wait(timeout=120) == 0
        return b"".join(chunks).decode("utf-8", "replace")

    text = run()
    assert "\r" in text                                  # redrawn in place, the way a terminal bar is
    assert "100%" in text and "4/4" in text and "spectrum" in text
    assert run("-q") == ""
