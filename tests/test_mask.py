"""Building masks from spectra, anchoring to laboratory lines, and the shipped line lists."""

import os
from dataclasses import replace

import astropy.units as u
import numpy as np
import pandas as pd
import pytest
from specutils.utils.wcs_utils import vac_to_air

from lineshift import sim
from lineshift.calib.linefind import LineSettings
from lineshift.cli import main
from lineshift.io.linelists import DEFAULT_LAB_LINES, read_lab_lines, read_mask
from lineshift.model import C_MS
from lineshift.run.mask_builder import MaskBuildSettings, build_mask
from lineshift.run.pipeline import MeasureSettings
from plotcheck import check_plot

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


# --------------------------------------------------------------------------- shipped lists

def test_lab_list_air_values_agree_with_specutils():
    table = pd.read_csv(os.path.join(ROOT, "line_lists", "lab_lines_optical.csv"), comment="#")
    # reference: specutils vac_to_air (Morton 2000), within each line's listed precision
    air = vac_to_air(table.wavelength.to_numpy() * u.AA, method="Morton2000").to_value(u.AA)
    assert np.all(np.abs(air - table.wavelength_air) <= np.maximum(table.uncertainty, 1e-3) / 2 + 1e-4)
    for name in ("H alpha", "H beta", "Na I D2", "Na I D1", "Mg I b1", "Mg I b2", "Mg I b4", "Ca II K",
                 "Ca II H"):
        assert name in set(table.species), name
    assert (table.species == "Ca II").sum() == 3       # the infrared triplet
    assert (table.species == "Fe I").sum() >= 5


@pytest.mark.parametrize(("species", "vacuum"), [
    ("Na I D2", 5891.583),  # science notes [calc]: Morton 2000, iterated inverse
    ("Ca II K", 3934.777),
    ("H alpha", 6564.613),  # the notes print 6564.612 (truncated); specutils' iteration gives 6564.61298
])
def test_lab_list_check_values(species, vacuum):
    lab, _ = read_lab_lines(DEFAULT_LAB_LINES)
    lam = lab.wavelength[list(lab.species).index(species)]
    assert lam == pytest.approx(vacuum, abs=6e-4)


def test_shipped_lab_list_is_the_packaged_copy():
    with open(os.path.join(ROOT, "line_lists", "lab_lines_optical.csv")) as a, open(DEFAULT_LAB_LINES) as b:
        assert a.read() == b.read()


def test_demo_mask_has_provenance():
    mask = read_mask(os.path.join(ROOT, "line_lists", "vessa9_mask.csv"))
    assert any("Provenance" in line for line in mask.provenance)
    assert len(mask) > 1000


# --------------------------------------------------------------------------- building

SMALL_ECHELLE = sim.Instrument("mk-echelle", "multi-order", 110_000, 4, 1024, 5000.0, snr=150)


@pytest.fixture(scope="module")
def many_spectra(tmp_path_factory):
    """300 small echelle spectra of the demo star (with its companion), plain FITS."""
    out = tmp_path_factory.mktemp("many")
    rows = sim.simulate_set(str(out), [(SMALL_ECHELLE, 300)], seed=31, compress=False)
    return str(out), pd.DataFrame(rows)


@pytest.mark.slow
def test_measure_without_mask_reaches_the_photon_limit(many_spectra, tmp_path, capfd):
    directory, truth = many_spectra
    out = tmp_path / "rv.csv"
    assert main(["measure", directory, "-o", str(out), "--save-mask", str(tmp_path / "built.csv")]) == 0
    assert "built a relative mask" in capfd.readouterr().err
    table = pd.read_csv(out, comment="#")
    table["name"] = table.file.map(os.path.basename)
    m = table.merge(truth, left_on="name", right_on="file", suffixes=("", "_true"))
    d = m.rv - m.rv_true
    # differential: the relative mask's zero point is the template's frame (about minus gamma here)
    assert abs(d.mean() + sim.DEMO_STAR.gamma) < 200.0
    ratio = d.std() / m.rv_bound.mean()
    pulls = (d - d.mean()) / m.rv_err
    assert ratio < 1.3, ratio                 # issue: within 1.3x of the photon-noise bound
    assert 0.9 <= pulls.std() <= 1.1, pulls.std()
    assert "Zero point: RELATIVE" in (tmp_path / "built.csv").read_text()


@pytest.mark.slow
def test_built_line_positions_match_the_simulated_ones(tmp_path):
    ins = sim.Instrument("mk-wide", "multi-order", 110_000, 8, 2048, 5000.0, snr=150)
    rows = sim.simulate_set(str(tmp_path), [(ins, 30)], seed=5, compress=False)
    res = build_mask([os.path.join(tmp_path, r["file"]) for r in rows], MeasureSettings())
    lam_true, depth_true = sim.DEMO_STAR.line_list()
    k = res.found.kept
    found, err, fwhm = res.found.wavelength[k], res.found.centre_err[k], res.found.fwhm[k]
    # the relative frame is the star's mean frame: lines sit at lambda_rest (1 + gamma/c) in it
    rest = found / (1 + sim.DEMO_STAR.gamma / C_MS)
    j = np.clip(np.searchsorted(lam_true, rest), 1, lam_true.size - 1)
    nearest = np.where(np.abs(lam_true[j] - rest) < np.abs(lam_true[j - 1] - rest), j, j - 1)
    dv = C_MS * (found / lam_true[nearest] - 1)
    # lines with a true neighbour (deeper than 2 %) within 2 FWHM are blends no fit can undo
    visible = lam_true[depth_true > 0.02]
    sep = np.array([np.sort(np.abs(visible - lam))[1] / lam * C_MS for lam in lam_true[nearest]])
    isolated = sep > 2 * np.median(fwhm)
    assert isolated.sum() > 40
    # remove the known systemic shift: the frame sits at gamma plus the orbit's mean over the inputs
    offset = np.median(dv[isolated])
    assert abs(offset - sim.DEMO_STAR.gamma) < 50.0
    pulls = (dv - offset) / err
    assert 0.7 < np.std(pulls[isolated]) < 1.3              # the fitted errors are the real ones
    assert np.mean(np.abs(pulls[isolated]) < 3) > 0.95
    assert np.mean(np.abs(pulls) < 3) > 0.85                # blends included


def test_rejection_reasons(tmp_path):
    # a star with a planted close pair (a blend) observed across the O2 B band (telluric)
    ins = sim.Instrument("mk-red", "multi-order", 110_000, 3, 2048, 6790.0, snr=200, order_overlap=-0.6)
    # a line planted right at the red end of the first order (rest frame of the star)
    edge = ins.wavelengths()[0, -3] / (1 + sim.DEMO_STAR.gamma / C_MS)
    star = replace(sim.DEMO_STAR, orbit=None, wave_range=(6700.0, 7000.0),
                   extra_lines=((6801.00, 0.5), (6801.085, 0.5), (edge, 0.5)))
    rows = sim.simulate_set(str(tmp_path), [(ins, 6)], star=star, seed=4, compress=False)
    paths = [os.path.join(tmp_path, r["file"]) for r in rows]
    res = build_mask(paths, MeasureSettings())
    c = res.found.counts()
    assert c["telluric"] > 0 and c["blend"] > 0 and c["edge"] > 0
    kept = res.found.wavelength[res.found.kept]
    # nothing kept inside the B band (6867-6884 A in air, listed generously)
    assert not np.any((kept > 6860 * 1.000276) & (kept < 6940 * 1.000277))
    # the planted pair (0.8 FWHM apart: one merged, over-wide minimum) is rejected as a blend
    near = np.abs(res.found.wavelength - 6801.04 * (1 + sim.DEMO_STAR.gamma / C_MS)) < 0.2
    assert near.any() and np.all(res.found.reason[near] == "blend")


def test_weights_follow_depth_and_sharpness():
    from lineshift.calib.linefind import find_lines
    from lineshift.measure.coadd import Template

    step = 400.0
    lnw = np.log(5000.0) + np.arange(20000) * step / C_MS
    wave = np.exp(lnw)
    flux = np.ones_like(wave)
    for centre, depth, sigma in ((5010.0, 0.6, 2000.0), (5030.0, 0.3, 2000.0), (5050.0, 0.6, 4000.0)):
        flux *= 1 - depth * np.exp(-0.5 * (C_MS * np.log(wave / centre) / sigma) ** 2)
    t = Template(wave, flux, np.full(wave.size, 1e-6), np.ones(wave.size, int), np.zeros(wave.size, bool),
                 step, 1)
    found = find_lines(t, LineSettings(core_fwhm=1.0, max_width_ratio=3.0), fwhm_guess=2.3548 * 2500.0)
    assert found.kept.sum() == 3
    w = dict(zip(np.round(found.wavelength[found.kept]).astype(int), found.weight[found.kept], strict=True))
    assert w[5030] / w[5010] == pytest.approx(0.5, rel=0.03)       # half the depth, same width
    assert w[5050] / w[5010] == pytest.approx(0.5, rel=0.05)       # same depth, twice the width
    assert max(w.values()) == 1.0


@pytest.mark.slow
def test_anchor_gives_the_absolute_zero_point(tmp_path, capfd):
    lab, _ = read_lab_lines(DEFAULT_LAB_LINES)
    star = sim.with_lab_lines(sim.DEMO_STAR, lab.wavelength)
    ins = sim.Instrument("mk-anchor", "multi-order", 110_000, 10, 2048, 5150.0, snr=150)
    rows = sim.simulate_set(str(tmp_path / "s"), [(ins, 12)], star=star, seed=8, compress=False)
    mask = tmp_path / "anchored.csv"
    assert main(["mask", str(tmp_path / "s"), "-o", str(mask), "--anchor"]) == 0
    err = capfd.readouterr().err
    assert "anchored to" in err
    text = mask.read_text()
    assert "Zero point: ANCHORED" in text
    out = tmp_path / "rv.csv"
    assert main(["measure", str(tmp_path / "s"), "--mask", str(mask), "-o", str(out), "-q"]) == 0
    table = pd.read_csv(out, comment="#")
    truth = pd.DataFrame(rows)
    d = table.rv.to_numpy() - truth.rv_true.to_numpy()
    anchored = next(line for line in text.splitlines() if "Zero point: ANCHORED" in line)
    offset_err = float(anchored.split("offset")[1].split("+-")[1].split("m/s")[0])
    sigma = np.hypot(offset_err, d.std() / np.sqrt(d.size))
    assert abs(d.mean()) < 3 * sigma, (d.mean(), sigma)
    assert sigma < 30.0


def test_mask_command_usage(tmp_path, sample_set, capfd, drawn):
    directory, mask, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    assert main(["mask", *files, "-o", str(tmp_path / "m.csv"), "--start-mask", mask, "--plot",
                 str(tmp_path / "t.png")]) == 0
    err = capfd.readouterr().err
    assert "expected photon-limited error" in err and "zero point is the starting mask's" in err
    built = read_mask(str(tmp_path / "m.csv"))
    assert len(built) > 10
    assert any(line.startswith("Refined from the starting mask") for line in built.provenance)
    assert main(["mask", *files, "-o", str(tmp_path / "z.csv"), "--changes", str(tmp_path / "c.csv")]) == 2
    fig = check_plot(drawn, tmp_path / "t.png", min_points=0, axes_with_data=5)    # overview + 4 zooms
    kept_marks = sum(1 for ax in fig.axes[1:] for line in ax.lines if line.get_color() == "tab:red")
    assert 0 < kept_marks <= len(built)                      # kept lines marked in the zooms, no more than kept
    assert main(["mask", *files, "-o", str(tmp_path / "x.csv"), "--min-depth", "2"]) == 2
    assert main(["mask", *files, "-o", files[0]]) == 2
    assert main(["mask", *files, "-o", str(tmp_path / "y.csv"), "--anchor",
                 "--lab-lines", str(tmp_path / "none.csv")]) == 2


def test_build_settings_are_used(sample_set):
    directory, _, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows if r["layout"] == "multi-order"]
    loose = build_mask(files, MeasureSettings(), MaskBuildSettings(lines=LineSettings(min_depth=0.03)))
    strict = build_mask(files, MeasureSettings(), MaskBuildSettings(lines=LineSettings(min_depth=0.3)))
    assert len(strict.mask) < len(loose.mask)
    assert np.all(strict.found.depth[strict.found.kept] >= 0.3)
