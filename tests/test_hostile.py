"""Hostile inputs mixed with good files: every bad one gets its own row, the good rows are unchanged."""

import os
import shutil

import numpy as np
import pandas as pd
import pytest
from astropy.io import fits

from lineshift.calib.barycentric import check_mjd
from lineshift.cli import main


def _fits_inputs(sample_set):
    directory, mask, rows = sample_set
    return [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"], mask


@pytest.mark.parametrize(("mjd", "words"), [
    (1e20, "outside the accepted range"), (-3e6, "outside the accepted range"),
    (1e9, "outside the accepted range"), (2460000.5, "looks like a Julian Date"),
    (float("nan"), "not a finite number")])
def test_dates_refused_before_astropy(mjd, words):
    assert words in check_mjd(mjd)


def test_sane_dates_accepted():
    # MJD 60000 is 2023-02-25 (common practice: MJD = JD - 2400000.5)
    assert check_mjd(60000.0) is None
    assert check_mjd(0.0) is None


def test_hostile_batch_keeps_the_good_rows(sample_set, tmp_path, capfd):
    good, mask = _fits_inputs(sample_set)
    clean_dir, mixed = tmp_path / "clean", tmp_path / "mixed"
    clean_dir.mkdir()
    mixed.mkdir()
    for g in good:
        shutil.copy(g, clean_dir)
        shutil.copy(g, mixed)
    hostile = {}
    for name, mjd in [("mjd_huge.fits", 1e20), ("mjd_negative.fits", -3e6), ("mjd_1e9.fits", 1e9),
                      ("mjd_is_jd.fits", 2460000.5)]:
        path = mixed / name
        shutil.copy(good[0], path)
        with fits.open(path, mode="update") as hdul:
            for hdu in hdul:
                for key in ("MJD-OBS", "MJD-BEG", "MJD-END", "MJD-AVG", "DATE-OBS", "DATE-BEG", "DATE-END"):
                    hdu.header.remove(key, ignore_missing=True, remove_all=True)
            hdul[0].header["MJD-OBS"] = mjd
        hostile[name] = "bad time"
    # a file name that is not UTF-8: a copy of a good spectrum, which must still be measured
    raw = os.path.join(os.fsencode(mixed), b"caf\xe9.fits")
    shutil.copy(good[1], raw)
    clean_out, mixed_out = tmp_path / "clean.csv", tmp_path / "mixed.csv"
    assert main(["measure", str(clean_dir), "--mask", mask, "-o", str(clean_out), "-q"]) == 0
    code = main(["measure", str(mixed), "--mask", mask, "-o", str(mixed_out), "-q"])
    err = capfd.readouterr().err
    assert code == 1
    assert "Traceback" not in err and "unexpected error" not in err
    clean = pd.read_csv(clean_out, keep_default_na=False, comment="#")
    table = pd.read_csv(mixed_out, keep_default_na=False, comment="#")
    assert len(table) == len(good) + len(hostile) + 1
    by_name = {os.path.basename(f): row for f, row in zip(table.file, table.to_dict("records"), strict=True)}
    for name, status in hostile.items():
        assert by_name[name]["status"] == status, (name, by_name[name]["notes"])
    assert "looks like a Julian Date" in by_name["mjd_is_jd.fits"]["notes"]
    # the undecodable byte is written as \xe9 (documented form) and the spectrum is measured
    assert by_name["caf\\xe9.fits"]["status"] == "ok"
    for row in clean.to_dict("records"):
        other = by_name[os.path.basename(row["file"])]
        assert other["status"] == row["status"]
        for col in ("rv", "rv_err", "berv", "bjd_tdb", "fwhm"):
            assert float(other[col]) == float(row[col]), col  # identical, not merely close
    np.testing.assert_equal(float(by_name["caf\\xe9.fits"]["rv"]),
                            float(clean.set_index(clean.file.map(os.path.basename)).loc[
                                os.path.basename(good[1]), "rv"]))


@pytest.mark.parametrize(("extra", "toml", "message"), [
    (["--velocity-step", "inf"], None, "must be a finite number"),
    (["--velocity-step", "nan"], None, "must be a finite number"),
    (["--box-width", "inf"], None, "must be a finite number"),
    (["--velocity-range", "nan,100000"], None, "must be a finite number"),
    (["--velocity-range", "-inf,inf"], None, "must be a finite number"),
    (["--velocity-range", "-4e8,0"], None, "speed of light"),
    (["--velocity-step", "0.01"], None, "GiB for the CCF grid"),
    (["--systemic-velocity", "nan"], None, "must be a finite number"),
    (["--systemic-velocity", "1e300"], None, "speed of light"),
    (["--site", "0,0,-6378137"], None, "not a place on the Earth"),
    ([], "[measure]\nvelocity_step = nan\n", "must be a finite number"),
    ([], "[site]\nx = 0.0\ny = 0.0\nz = 0.0\n", "from the Earth's surface"),
    ([], "[target]\npm_ra_cosdec = 1.0\npm_dec = 1.0\nparallax = 1e-300\nepoch = 2016.0\n", "parallax"),
])
def test_absurd_settings_refused_before_any_work(sample_set, tmp_path, capfd, extra, toml, message):
    directory, mask, _ = sample_set
    argv = ["measure", directory, "--mask", mask, "-o", str(tmp_path / "out.csv"), "-q", *extra]
    if toml is not None:
        (tmp_path / "c.toml").write_text(toml)
        argv += ["--config", str(tmp_path / "c.toml")]
    assert main(argv) == 2
    err = capfd.readouterr().err
    assert message in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out.csv").exists()


def test_site_check_against_astropy_wgs84():
    # a point 8.8 km above the WGS84 ellipsoid (Everest-like) passes; the geocentre does not
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    from lineshift.errors import ConfigError
    from lineshift.run.config import check_site

    top = EarthLocation.from_geodetic(86.9 * u.deg, 27.99 * u.deg, 8848 * u.m)
    check_site(tuple(top.to_value(u.m)))
    with pytest.raises(ConfigError):
        check_site((0.0, 0.0, 0.0))


def test_unwritable_output_refused_before_work(sample_set, tmp_path, capfd):
    # a regular file where a directory should be: no one, not even root, can write beneath it
    directory, mask, _ = sample_set
    blocker = tmp_path / "blocker"
    blocker.write_text("not a directory")
    for extra in (["-o", str(blocker / "out.csv")], ["--plots", str(blocker / "plots")],
                  ["--store", str(blocker / "s.sqlite")], ["--orders-table", str(blocker / "o.csv")]):
        assert main(["measure", directory, "--mask", mask, "-q", *extra]) == 2
        err = capfd.readouterr().err
        assert "cannot write in" in err and len(err.strip().splitlines()) == 1, err


def test_plot_names_unique_and_outputs_honour_umask(tmp_path):
    from lineshift.cli.measure import unique_plot_names
    from lineshift.io.table import atomic_path

    names = unique_plot_names(["a/x.fits.gz", "b/x.fits.gz", "a/x.csv.gz", "c/y.fits"])
    assert len(set(names.values())) == 4 and names["c/y.fits"] == "y"
    old = os.umask(0o027)
    try:
        with atomic_path(str(tmp_path / "t.csv")) as tmp:
            open(tmp, "w").close()
    finally:
        os.umask(old)
    assert (tmp_path / "t.csv").stat().st_mode & 0o777 == 0o640  # 0666 & ~0027 (POSIX creat semantics)


def test_a_failing_plot_never_costs_the_table(sample_set, tmp_path, capfd, monkeypatch):
    from lineshift.plots import figures

    def broken(*args, **kwargs):
        raise RuntimeError("renderer exploded")

    monkeypatch.setattr(figures, "plot_ccf", broken)
    monkeypatch.setattr(figures, "plot_rv_time", broken)
    good, mask = _fits_inputs(sample_set)
    out = tmp_path / "t.csv"
    assert main(["measure", *good, "--mask", mask, "-o", str(out), "--plots", str(tmp_path / "p"), "-q"]) == 0
    assert len(pd.read_csv(out, comment="#")) == len(good)
    assert "renderer exploded" in capfd.readouterr().err


def test_a_foreign_sqlite_file_is_refused_untouched(tmp_path):
    import hashlib
    import sqlite3

    from lineshift.errors import ConfigError
    from lineshift.run.store import ResultStore

    foreign = tmp_path / "theirs.sqlite"
    db = sqlite3.connect(foreign)
    db.execute("CREATE TABLE results (a INTEGER)")
    db.execute("INSERT INTO results VALUES (1)")
    db.commit()
    db.close()
    before = hashlib.sha256(foreign.read_bytes()).hexdigest()
    with pytest.raises(ConfigError, match="not a lineshift results store"):
        ResultStore(str(foreign))
    assert hashlib.sha256(foreign.read_bytes()).hexdigest() == before
    assert sorted(os.listdir(tmp_path)) == ["theirs.sqlite"]  # no -wal / -shm left either
    (tmp_path / "text.sqlite").write_text("hello")
    with pytest.raises(ConfigError, match="not an SQLite database"):
        ResultStore(str(tmp_path / "text.sqlite"))


def test_store_is_durable_by_default(tmp_path):
    from lineshift.run.store import ResultStore

    # PRAGMA synchronous: 2 = FULL, 1 = NORMAL (SQLite documentation)
    with ResultStore(str(tmp_path / "a.sqlite")) as st:
        assert st._db.execute("PRAGMA synchronous").fetchone()[0] == 2
    with ResultStore(str(tmp_path / "a.sqlite"), durable=False) as st:
        assert st._db.execute("PRAGMA synchronous").fetchone()[0] == 1


def test_stale_temporary_files_are_cleaned(tmp_path):
    from lineshift.io.table import atomic_path

    stale, fresh = tmp_path / ".t.csv.abc123.tmp", tmp_path / ".t.csv.def456.tmp"
    stale.write_text("killed")
    fresh.write_text("another writer, now")
    os.utime(stale, (0, 0))
    with atomic_path(str(tmp_path / "t.csv")) as tmp:
        open(tmp, "w").close()
    assert not stale.exists() and fresh.exists()


def test_gzip_bomb_stopped_while_streaming(tmp_path, monkeypatch):
    import gzip
    import tracemalloc

    from lineshift.errors import SpectrumFormatError
    from lineshift.io import loaders

    monkeypatch.setattr(loaders, "MAX_INPUT_BYTES", 8 * 2**20)
    bomb = tmp_path / "bomb.fits.gz"
    with gzip.open(bomb, "wb", compresslevel=9) as gz:  # 256 MiB of zeros packs into ~250 kB
        block = b"\0" * 2**20
        for _ in range(256):
            gz.write(block)
    assert bomb.stat().st_size < 2**20
    tracemalloc.start()
    with pytest.raises(SpectrumFormatError, match="decompressed content exceeds the input limit") as info:
        loaders.load_spectrum(str(bomb))
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert info.value.status == "too large"
    assert peak < 64 * 2**20  # never near the 256 MiB a full unpack would take


def test_pixel_limit_from_the_header(tmp_path, monkeypatch):
    from lineshift.errors import SpectrumFormatError
    from lineshift.io import loaders

    monkeypatch.setattr(loaders, "MAX_PIXELS", 1000)
    path = tmp_path / "big.fits"
    fits.PrimaryHDU(np.ones((2, 1000), dtype="f4")).writeto(path)
    with pytest.raises(SpectrumFormatError, match="2,000 pixels, more than the limit") as info:
        loaders.load_spectrum(str(path))
    assert info.value.status == "too large"


def test_cluster_failures_are_not_stored(sample_set, tmp_path, monkeypatch):
    # a stand-in for a Dask cluster whose workers cannot see the files: every task fails to read
    from lineshift.io.linelists import read_mask
    from lineshift.run import pipeline
    from lineshift.run.store import ResultStore

    good, mask = _fits_inputs(sample_set)
    shipped = []

    def fake_cluster(fn, tasks, ctx, *, workers=1, scheduler=None):
        for t in tasks:
            shipped.append(t.path)
            row = pipeline._empty_row(t.path, None, "unreadable", f"{t.path}: cannot be read (No such file)",
                                      ctx.settings)
            yield t, row

    monkeypatch.setattr(pipeline, "run_tasks", fake_cluster)
    monkeypatch.chdir(os.path.dirname(good[0]))
    rel = [os.path.basename(g) for g in good]
    with ResultStore(str(tmp_path / "s.sqlite")) as store:
        rows = pipeline.measure_files(rel, read_mask(mask), pipeline.MeasureSettings(telluric_bands=False),
                                      scheduler="tcp://127.0.0.1:1", store=store)
        assert len(store) == 0  # nothing replayed later as "already in the store"
    assert all(os.path.isabs(p) for p in shipped)
    assert [r["file"] for r in rows] == rel


def test_messages_name_the_real_fault(tmp_path):
    from lineshift.errors import SpectrumFormatError
    from lineshift.io.loaders import load_spectrum

    def one_d(name, flux, **cards):
        hdu = fits.PrimaryHDU(np.asarray(flux, dtype="f8"))
        hdu.header.update({"CRVAL1": 5000.0, "CDELT1": 0.05, "CRPIX1": 1.0, "CTYPE1": "WAVE", **cards})
        hdu.writeto(tmp_path / name)
        return str(tmp_path / name)

    with pytest.raises(SpectrumFormatError, match="beyond any spectrograph's range"):
        load_spectrum(one_d("huge.fits", np.ones(500), CRVAL1=1e300))
    with pytest.raises(SpectrumFormatError, match="NaN or infinite"):
        load_spectrum(one_d("inf.fits", np.full(500, np.inf)))


def test_directory_entries_that_are_not_files_get_rows(sample_set, tmp_path):
    from lineshift.run.pipeline import expand_inputs, survey

    good, _ = _fits_inputs(sample_set)
    d = tmp_path / "d"
    d.mkdir()
    shutil.copy(good[0], d / "good.fits")
    os.symlink(d / "nowhere.fits", d / "dangling.fits")
    os.symlink(d / "loop_b.fits", d / "loop_a.fits")
    os.symlink(d / "loop_a.fits", d / "loop_b.fits")
    (d / "sub.fits").mkdir()
    paths = expand_inputs([str(d)])
    assert sorted(os.path.basename(p) for p in paths) == ["dangling.fits", "good.fits", "loop_a.fits",
                                                         "loop_b.fits", "sub.fits"]
    from lineshift.run.pipeline import MeasureSettings

    found = {os.path.basename(p): o for p, o in zip(paths, survey(paths, MeasureSettings()), strict=True)}
    assert "is a directory" in str(found["sub.fits"])
    assert "cannot be read" in str(found["dangling.fits"])
    assert "cannot be read" in str(found["loop_a.fits"])
    assert not isinstance(found["good.fits"], Exception)


def test_mask_screen_excludes_and_names_outliers(sample_set, tmp_path):
    from lineshift.io.loaders import read_observation
    from lineshift.run.mask_builder import _screen

    directory, _, rows = sample_set
    good = [os.path.join(directory, r["file"]) for r in rows if r["layout"] in ("multi-order", "wcs-1d")]
    wcs = next(os.path.join(directory, r["file"]) for r in rows if r["layout"] == "wcs-1d")
    foreign, nan = str(tmp_path / "foreign.fits"), str(tmp_path / "nanflux.fits")
    shutil.copy(wcs, foreign)
    with fits.open(foreign, mode="update") as hdul:
        hdul[0].header["CRVAL1"] = 20011.0
    shutil.copy(wcs, nan)
    with fits.open(nan, mode="update") as hdul:
        hdul[0].data = np.full_like(hdul[0].data, np.nan)
    paths = [*good, foreign, nan]
    objects = {p: read_observation(p).object for p in paths}
    kept, out = _screen([(p, None) for p in paths], objects)
    assert [p for p, _ in kept] == good
    reasons = dict(out)
    assert "overlaps no other input" in reasons[foreign]
    assert "no finite flux" in reasons[nan] or "NaN" in reasons[nan]
