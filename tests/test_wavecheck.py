"""Wavelength-calibration check: injected per-order offsets and tilts, drift, lamp lines, statuses."""

import os

import astropy.units as u
import numpy as np
import pandas as pd
import pytest
from specutils.utils.wcs_utils import vac_to_air

from lineshift import sim
from lineshift.calib.wavecheck import WavecheckSettings, check_spectrum, file_summary
from lineshift.cli import main
from lineshift.io.linelists import read_lab_lines
from plotcheck import check_plot

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
LAMP_LIST = os.path.join(ROOT, "line_lists", "lamp_lines_hg_ne_ar.csv")
ECHELLE = sim.INSTRUMENTS["echelle"]          # 36 orders x 4096 pixels, R 110 000
DISTORTION = {5: (60.0, 0.0), 17: (-25.0, 0.0), 23: (0.0, 30.0), 30: (0.0, -30.0)}


@pytest.fixture(scope="module")
def invented_lamp():
    w = ECHELLE.wavelengths()
    return sim.invented_lamp_lines(w.min(), w.max())


def _orders(lam, counts, seed, **kw):
    exp = sim.lamp_exposure(ECHELLE, lam, counts, np.random.default_rng(seed), distortion=DISTORTION, **kw)
    lines, orders = check_spectrum(sim.to_spectrum(exp), lam, WavecheckSettings())
    return lines, {r["order"]: r for r in orders}


def test_injected_offsets_and_tilts_are_recovered(invented_lamp):
    lam, counts = invented_lamp
    lines, orders = _orders(lam, counts, seed=1)
    assert len(orders) == 36
    for k, row in orders.items():
        offset, tilt = DISTORTION.get(k, (0.0, 0.0))
        assert abs(row["offset"] - offset) < 5.0, (k, row["offset"])   # issue: within 5 m/s
        if tilt:
            assert abs(row["slope"] - tilt) < 10.0, (k, row["slope"])   # issue: within 10 m/s
        assert row["n_lines"] >= 10
    assert {k for k, r in orders.items() if r["flagged"]} == {5, 17}
    # the per-line errors are the real ones (undistorted orders)
    z = np.array([r["residual"] / r["residual_err"] for r in lines if r["status"] == "ok" and r["order"] not in
                  DISTORTION])
    assert 0.85 < np.std(z) < 1.15


def test_a_drifting_exposure_flags_only_the_distorted_order(invented_lamp):
    # the whole exposure 50 m/s off (drift 50 m/s at t=0): judged against zero alone every order would be
    # flagged; judged against the exposure's global offset as well, only the distorted orders are
    lam, counts = invented_lamp
    exp = sim.lamp_exposure(ECHELLE, lam, counts, np.random.default_rng(4), distortion=DISTORTION, drift=50.0)
    _, rows = check_spectrum(sim.to_spectrum(exp), lam, WavecheckSettings())
    assert sum(r["offset"] > 20 for r in rows) >= 30              # every order is off zero ...
    assert {r["order"] for r in rows if r["flagged"]} == {5, 17}  # ... but only the distorted ones are flagged
    summ = file_summary(rows, WavecheckSettings())
    assert abs(summ["offset"] - 50.0) < 2.0 and summ["global_flagged"]   # injected 50 m/s (within 2)
    by = {r["order"]: r for r in rows}
    assert abs(by[5]["offset_from_global"] - 60.0) < 5.0 and abs(by[17]["offset_from_global"] + 25.0) < 5.0


def test_drift_series_is_recovered(tmp_path, invented_lamp, drawn):
    lam, counts = invented_lamp
    lines_csv = tmp_path / "lamp.csv"
    pd.DataFrame({"wavelength": lam}).to_csv(lines_csv, index=False)
    rng = np.random.default_rng(9)
    rate = 1.5  # m/s per hour
    ins = sim.replace_instrument(ECHELLE, n_orders=6)
    files = []
    for k in range(6):
        hours = 1.2 * k
        exp = sim.lamp_exposure(ins, lam, counts, rng, mjd_start=61000.7 + hours / 24, drift=rate * hours)
        files.append(sim.write_observation(exp, str(tmp_path / f"lamp{k}.fits"), style=k))
    drift = tmp_path / "drift.csv"
    code = main(["wavecheck", *files[::-1], "--lines", str(lines_csv), "-o", str(tmp_path / "l.csv"),
                 "--summary", str(tmp_path / "o.csv"), "--drift", str(drift), "--plots", str(tmp_path / "p"), "-q"])
    assert code == 0
    table = pd.read_csv(drift, comment="#")
    assert list(table.file) == files                                    # time order
    t = (table.mjd_mid - table.mjd_mid.min()) * 24
    slope, _ = np.polyfit(t, table.offset, 1)
    assert slope == pytest.approx(rate, abs=0.15)
    check_plot(drawn, tmp_path / "p" / "drift.png", points=6)                 # one point per exposure
    orders = pd.read_csv(tmp_path / "o.csv", comment="#")
    check_plot(drawn, tmp_path / "p" / "lamp0_orders.png", points=int((orders.file == files[0]).sum()))
    lines = pd.read_csv(tmp_path / "l.csv", comment="#")
    check_plot(drawn, tmp_path / "p" / "lamp0_residuals.png", points=int((lines.file == files[0]).sum()))


def test_lamp_list_vacuum_values_come_from_specutils():
    table = pd.read_csv(LAMP_LIST, comment="#")
    # reference: specutils vac_to_air (Morton 2000) back to the listed air values
    air = vac_to_air(table.wavelength.to_numpy() * u.AA, method="Morton2000").to_value(u.AA)
    assert np.max(np.abs(air - table.wavelength_air)) < 1e-3
    assert set(table.species) == {"Hg I", "Ne I", "Ar I"}
    with open(LAMP_LIST) as a, open(os.path.join(ROOT, "src", "lineshift", "data", "lamp_lines_hg_ne_ar.csv")) as b:
        assert a.read() == b.read()


def test_lamp_spectrum_in_air_reads_zero_against_the_vacuum_list(tmp_path):
    lab, _ = read_lab_lines(LAMP_LIST)
    ins = sim.Instrument("lamp-1d", "wcs-1d", 65_000, 1, 160_000, 4000.0, sampling=3.0, medium="air", blaze=False,
                         dispersion="log")
    counts = np.full(lab.wavelength.size, 2e5)
    exp = sim.lamp_exposure(ins, lab.wavelength, counts, np.random.default_rng(2))
    path = sim.write_observation(exp, str(tmp_path / "lamp_air.fits"))
    out, summ = tmp_path / "l.csv", tmp_path / "o.csv"
    assert main(["wavecheck", path, "--lines", LAMP_LIST, "-o", str(out), "--summary", str(summ), "-q"]) == 0
    lines = pd.read_csv(out, comment="#")
    ok = lines[lines.status == "ok"]
    assert len(ok) >= 15
    assert set(ok.species) >= {"Ne I", "Ar I", "Hg I"}
    # an air/vacuum mix-up would be ~80 km/s; everything reads zero within its errors
    assert np.all(np.abs(ok.residual) < 4 * ok.residual_err + 1.0)
    row = pd.read_csv(summ, comment="#").iloc[0]
    assert list(pd.read_csv(summ, comment="#").columns[:7]) == \
        ["file", "order", "n_lines", "offset", "offset_err", "slope", "rms"]
    assert abs(row.offset) < 3 * row.offset_err


def test_statuses(invented_lamp):
    lam, counts = invented_lamp
    ins = sim.replace_instrument(ECHELLE, n_orders=4)
    w = ins.wavelengths()
    weak = 0.5 * (w[2, 1000] + w[2, 1001])                # a faint line
    lab = np.sort(np.concatenate((lam, [weak])))
    cts = np.interp(lab, lam, counts)
    cts[np.searchsorted(lab, weak)] = 250.0   # detectable, but below 10 sigma
    exp = sim.lamp_exposure(ins, lab, cts, np.random.default_rng(5))
    wrong = lab.copy()
    probe = np.flatnonzero((lab > w[3, 500]) & (lab < w[3, 3500]))[5]
    wrong[probe] *= 1 + 300.0 / 299792458.0               # a wrong laboratory value: an outlier
    sat = float(np.percentile(exp.flux, 99.95))
    # a bad pixel (NaN uncertainty) next to a line of order 0
    flagged_line = lab[np.flatnonzero((lab > w[0, 1500]) & (lab < w[0, 3000]))[3]]
    exp.err[0, np.searchsorted(w[0], flagged_line) + 1] = np.nan
    lines, _ = check_spectrum(sim.to_spectrum(exp), wrong, WavecheckSettings(saturation=sat))
    by = {round(r["wavelength_lab"], 5): r["status"] for r in lines}
    statuses = {r["status"] for r in lines}
    assert {"ok", "blend", "saturated", "low snr", "outlier", "edge"} <= statuses
    assert by[round(wrong[probe], 5)] == "outlier"
    assert by.get(round(weak, 5)) == "low snr"
    assert by[round(flagged_line, 5)] == "edge"


def test_absorption_mode(invented_lamp):
    lam, counts = invented_lamp
    ins = sim.replace_instrument(ECHELLE, n_orders=3)
    continuum = 5e4
    depth = 0.2 + 0.4 * (counts - counts.min()) / np.ptp(counts)
    removed = depth * continuum * 3.5   # depth x continuum x ~FWHM in pixels (3.3 px per resolution element)
    exp = sim.lamp_exposure(ins, lam, removed, np.random.default_rng(6), background=continuum, absorption=True,
                            distortion={1: (40.0, 0.0)})
    _, orders = check_spectrum(sim.to_spectrum(exp), lam, WavecheckSettings(kind="absorption"))
    summ = file_summary(orders)
    assert summ["flagged"] == [1]
    assert abs(orders[1]["offset"] - 40.0) < 5.0
    assert abs(orders[0]["offset"]) < 5.0


def test_usage_errors(tmp_path, invented_lamp, capfd):
    lam, counts = invented_lamp
    ins = sim.replace_instrument(ECHELLE, n_orders=2)
    path = sim.write_observation(sim.lamp_exposure(ins, lam, counts, np.random.default_rng(1)),
                                 str(tmp_path / "lamp.fits"))
    common = ["-o", str(tmp_path / "l.csv"), "--summary", str(tmp_path / "o.csv")]
    assert main(["wavecheck", path, "--lines", str(tmp_path / "none.csv"), *common]) == 2
    assert main(["wavecheck", path, "--lines", LAMP_LIST, *common, "--window-pixels", "1"]) == 2
    bad = tmp_path / "bad.fits"
    bad.write_bytes(b"nonsense")
    lines_csv = tmp_path / "lamp.csv"
    pd.DataFrame({"wavelength": lam}).to_csv(lines_csv, index=False)
    assert main(["wavecheck", path, str(bad), "--lines", str(lines_csv), *common, "-q"]) == 1
    err = capfd.readouterr().err
    assert "bad.fits" in err and "Traceback" not in err
    assert len(pd.read_csv(tmp_path / "o.csv", comment="#")) == 2


def test_simulate_lamp_command(tmp_path, capfd):
    out = tmp_path / "lamps"
    assert main(["simulate", str(out), "--lamp", "invented", "--instrument", "demo-echelle:2", "--distort", "2:50:0",
                 "--no-compress", "-q"]) == 0
    files = sorted(str(p) for p in out.glob("lamp_*.fits"))
    assert len(files) == 2
    lines = out / "truth" / "lamp_lines_demo-echelle.csv"
    summ = tmp_path / "o.csv"
    assert main(["wavecheck", *files, "--lines", str(lines), "-o", str(tmp_path / "l.csv"), "--summary", str(summ),
                 "-q"]) == 0
    orders = pd.read_csv(summ, comment="#")
    row = orders[(orders.file == files[0]) & (orders.order == 2)].iloc[0]
    assert abs(row.offset - 50.0) < 5.0 and bool(row.flagged)
    assert main(["simulate", str(out), "--lamp", "invented", "--distort", "x"]) == 2


def test_drift_table_gives_bjd_tdb_with_barycentric(tmp_path):
    lamps = tmp_path / "lamps"
    assert main(["simulate", str(lamps), "--lamp", "invented", "--instrument", "demo-echelle:2", "-q"]) == 0
    drift = tmp_path / "d.csv"
    assert main(["wavecheck", str(lamps), "--barycentric", "--ra", "131.4", "--dec", "-18.7", "--lines",
                 str(lamps / "truth" / "lamp_lines_demo-echelle.csv"), "-o", str(tmp_path / "l.csv"),
                 "--summary", str(tmp_path / "o.csv"), "--drift", str(drift), "-q"]) == 0
    table = pd.read_csv(drift, comment="#")
    # BJD_TDB - JD_UTC = TT-UTC (69.184 s in 2025, IERS Bulletin C) + Roemer delay (|.| <= ~500 s: 1 au / c)
    delta_s = (table.bjd_tdb - (table.mjd_mid + 2400000.5)) * 86400
    assert (table.time_scale == "utc").all()
    assert np.all(np.abs(delta_s - 69.184) < 510)
