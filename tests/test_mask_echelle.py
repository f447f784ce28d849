"""`lineshift mask` on echelle files from the independent generator (tests/independent/forward.py).

Overlapping orders with a steep, tilted sinc^2 blaze that the files do not carry, cosmic rays (1-3
pixels, 3-30x the counts) and NaN runs at order ends: the mask built with the defaults is scored
against the generator's own line list (rest frame, vacuum), and a deliberately wrong starting mask
(lines missing, wavelengths jittered, weights random, lines where the star has none) is refined and
scored against the same truth.  Invented data for injection-recovery only.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr

from independent import forward as fwd
from lineshift.cli import main
from lineshift.io.linelists import read_mask
from lineshift.model import LineMask
from lineshift.run.mask_builder import refine_positions
from lineshift.run.pipeline import MeasureSettings, measure_files

C = fwd.C
RV = 12_000.0
LINES = fwd.make_lines(11, 4300.0, 7200.0)
SETUP = fwd.echelle_setup(3, n_orders=36, blaze=True)   # 15 % order overlap, blaze to ~5 % at the ends
N_SPECTRA = 6
MATCH = 1500.0   # m/s: a mask line within this of a true line is that line (random coincidence ~2 %)


def _rv(i: int) -> float:
    return RV + 300.0 * (i % 5 - 2)


@pytest.fixture(scope="module")
def echelle_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("blazed")
    berv = fwd.berv_astropy()       # astropy radial_velocity_correction for the header's time and site
    rng = np.random.default_rng(2)
    for i in range(N_SPECTRA):
        model = fwd.model_counts(SETUP, LINES, fwd.topocentric(_rv(i), berv))
        draw = fwd.draw_noise(model, rng, SETUP.read_noise)
        for k, f in enumerate(draw.flux):
            for _ in range(3):          # cosmic rays
                j, w = rng.integers(0, f.size - 3), rng.integers(1, 4)
                f[j:j + w] += rng.uniform(3, 30) * model[k][j:j + w]
            if rng.uniform() < 0.3:     # a NaN run at the blue end
                f[:rng.integers(5, 40)] = np.nan
        fwd.write_echelle(str(out / f"s{i}.fits"), SETUP, draw)
    return out


def _covered_deep_lines() -> np.ndarray:
    """Rest wavelengths of the generator's lines deeper than 0.1 inside the files' range."""
    lo = SETUP.edges[0][0] / (1 + (RV - 600) / C)
    hi = SETUP.edges[-1][-1] / (1 + (RV + 600) / C)
    d = fwd.line_depths(LINES)
    return LINES.wave[(d > 0.1) & (LINES.wave > lo * (1 + 2e-5)) & (LINES.wave < hi * (1 - 2e-5))]


def _nearest_dv(lam: np.ndarray, ref: np.ndarray) -> np.ndarray:
    """Velocity (m/s) from each ``lam`` to the nearest ``ref`` wavelength (both sorted)."""
    j = np.clip(np.searchsorted(ref, lam), 1, ref.size - 1)
    near = np.where(np.abs(ref[j] - lam) < np.abs(ref[j - 1] - lam), j, j - 1)
    return C * (lam / ref[near] - 1)


def test_mask_with_defaults_on_a_blazed_overlapping_echelle(echelle_dir, tmp_path, capfd):
    out = tmp_path / "m.csv"
    assert main(["mask", str(echelle_dir), "-o", str(out)]) == 0
    assert "usable line" not in capfd.readouterr().err
    mask = read_mask(str(out))
    # the relative frame sits near the inputs' mean velocity; remove it with the median offset
    # (a frame, not an error: the zero point of a relative mask is the template's)
    mean_rv = np.mean([_rv(i) for i in range(N_SPECTRA)])
    rest = mask.wavelength / (1 + mean_rv / C)
    dv = _nearest_dv(rest, LINES.wave)
    offset = np.median(dv[np.abs(dv) < MATCH])
    assert abs(offset) < 200.0
    rest = rest / (1 + offset / C)
    genuine = np.abs(_nearest_dv(rest, LINES.wave)) < MATCH
    # issue target: fewer than 5 % of the mask lines spurious (no line of the generator there)
    assert np.mean(~genuine) < 0.05, np.mean(~genuine)
    # issue target: at least 80 % of the generator's lines deeper than 0.1 found (blended pairs
    # closer than a line width included in the count, so some loss is unavoidable)
    deep = _covered_deep_lines()
    found = np.abs(_nearest_dv(deep, np.sort(rest))) < MATCH
    assert found.mean() >= 0.80, (found.mean(), deep.size)


def _bad_start_mask(path, rng):
    """A mask that does not match the star: 20 % of the deep lines missing, the rest jittered by
    40 m/s rms, random weights, and 15 % extra lines where the star has none (no generator line
    within 15 km/s).  Returns the true rest wavelength per written line (NaN for spurious ones)."""
    deep = _covered_deep_lines()
    keep = deep[rng.uniform(size=deep.size) > 0.2]
    jittered = keep * (1 + rng.normal(0.0, 40.0, keep.size) / C)
    spurious = []
    while len(spurious) < int(0.15 * keep.size):
        x = rng.uniform(deep[0], deep[-1])
        if np.min(np.abs(LINES.wave - x)) / x * C > 15_000.0:
            spurious.append(x)
    lam = np.concatenate([jittered, spurious])
    truth = np.concatenate([keep, np.full(len(spurious), np.nan)])
    order = np.argsort(lam)
    pd.DataFrame({"wavelength": lam[order], "weight": rng.uniform(0.1, 1.0, lam.size)}).to_csv(path, index=False)
    return truth[order]


@pytest.fixture(scope="module")
def refined(echelle_dir, tmp_path_factory):
    tmp = tmp_path_factory.mktemp("refine")
    truth = _bad_start_mask(tmp / "start.csv", np.random.default_rng(7))
    argv = ["mask", str(echelle_dir), "-o", str(tmp / "refined.csv"), "--start-mask", str(tmp / "start.csv"),
            "--changes", str(tmp / "changes.csv")]
    return tmp, truth, argv


def test_refining_a_mismatched_start_mask(refined, capfd):
    tmp, truth, argv = refined
    assert main(argv) == 0
    err = capfd.readouterr().err
    assert "refined" in err and "zero point is the starting mask's" in err
    changes = pd.read_csv(tmp / "changes.csv", comment="#")
    # columns and units as docs/reference.md lists them
    ref = (Path(__file__).parents[1] / "docs" / "reference.md").read_text()
    section = ref.split("### Table: mask changes (`--changes`)")[1].split("\n## ")[0]
    rows = [[c.strip().strip("`") for c in line.strip("|").split(" | ")] for line in section.splitlines()
            if line.startswith("| `")]
    assert list(changes.columns) == [r[0] for r in rows]
    units = next(line for line in (tmp / "changes.csv").read_text().splitlines() if line.startswith("# UNITS:"))
    assert units == "# UNITS: " + ", ".join(f"{r[0]} [{r[1]}]" for r in rows if r[1] != "—")
    start = read_mask(str(tmp / "start.csv"))
    assert np.allclose(changes.wavelength_start, start.wavelength, atol=2e-6)
    real = np.isfinite(truth)
    kept = (changes.status != "dropped").to_numpy()
    # every line where the star has none is dropped, most of the real ones stay
    assert not np.any(kept & ~real)
    assert np.mean(kept[real]) > 0.75, np.mean(kept[real])
    # positions: closer to the truth than the start's (the start's scatter is 40 m/s)
    m = kept & real
    e_start = C * (changes.wavelength_start.to_numpy()[m] / truth[m] - 1)
    e_new = C * (changes.wavelength.to_numpy()[m] / truth[m] - 1)
    # (measured today: rms 37.6 -> 28.8 m/s, median |error| 25.9 -> 14.8 m/s; the rms keeps the lines
    # that an unseen weak neighbour pulls, the median shows the typical line)
    assert np.sqrt(np.mean(e_new**2)) < 0.9 * np.sqrt(np.mean(e_start**2)), (e_new.std(), e_start.std())
    assert np.median(np.abs(e_new)) < 0.75 * np.median(np.abs(e_start))
    # weights from the data: they follow the lines' true depths (the start's were random)
    depth = fwd.line_depths(LINES)[np.searchsorted(LINES.wave, truth[m])]
    assert spearmanr(changes.weight.to_numpy()[m], depth).statistic > 0.5
    # the header and the table agree on what changed
    mask = read_mask(str(tmp / "refined.csv"))
    assert len(mask) == kept.sum()
    header = next(line for line in mask.provenance if line.startswith("Refined from the starting mask"))
    c = changes.status.value_counts()
    assert f"{c.get('moved', 0)} moved" in header and f"{c.get('dropped', 0)} dropped" in header
    assert f"{len(start)} start lines: {kept.sum()} kept" in header
    assert "median shift" in header


def test_refined_mask_has_no_zero_point_bias(refined, echelle_dir):
    tmp, _, argv = refined
    if not (tmp / "refined.csv").exists():
        assert main([*argv, "-q"]) == 0
    mask = read_mask(str(tmp / "refined.csv"))
    header = next(line for line in mask.provenance if line.startswith("Zero point:"))
    tie = float(header.split("+-")[1].split("m/s")[0])    # the frame tie's error, from the start's scatter
    paths = [str(echelle_dir / f"s{i}.fits") for i in range(N_SPECTRA)]
    depth = fwd.line_depths(LINES)
    true_mask = LineMask(LINES.wave[depth > 0.1], depth[depth > 0.1], (), "the generator's line list")
    rv = {}
    for name, m in (("refined", mask), ("true", true_mask)):
        rows = measure_files(paths, m, MeasureSettings())
        assert all(r["status"] == "ok" for r in rows)
        rv[name] = np.array([r["rv"] for r in rows])
    # the mask's own zero point: against the generator's true line list on the same spectra (the
    # engine's zero point on these files is not the mask's doing; tested in test_independent_precision)
    d = rv["refined"] - rv["true"]
    # the refined mask keeps the start's frame (truth + the kept lines' mean jitter, whose error
    # is the tie's): no bias beyond the errors (3 sigma, common practice)
    sigma = np.hypot(tie, d.std(ddof=1) / np.sqrt(d.size))
    assert abs(d.mean()) < 3 * sigma, (d.mean(), sigma)
    # and that frame is the start's (rest) frame, not the template's relative one (~12 km/s away)
    assert abs(np.mean(rv["refined"]) - np.mean([_rv(i) for i in range(N_SPECTRA)])) < 30.0


def test_refine_positions_combines_by_inverse_variance():
    # simulated differences (numpy draws, common practice): start scatter 30 m/s, measurement
    # errors 5-60 m/s, frame offset 20 m/s; the estimate of the scatter and the offset, and the
    # combined positions beat both inputs
    rng = np.random.default_rng(3)
    n = 400
    err = rng.uniform(5, 60, n)
    true = np.zeros(n)
    start = rng.normal(0, 30.0, n)
    meas = rng.normal(0, err) + 20.0
    shift, off, off_err, s = refine_positions(meas, start, err)
    assert abs(off - 20.0) < 3 * off_err
    assert s == pytest.approx(30.0, rel=0.15)          # 400 draws: ~5 % error on a scatter
    final = start + shift
    rms = np.sqrt(np.mean((final - true) ** 2))
    assert rms < np.sqrt(np.mean(start**2)) and rms < np.sqrt(np.mean((meas - off) ** 2))
    # a perfect start: nothing to learn from noisier measurements, positions stay
    shift, _, _, s = refine_positions(rng.normal(0, err), np.zeros(n), err)
    assert s < 5.0 and np.max(np.abs(shift)) < 10.0


def test_start_mask_usage_errors(echelle_dir, tmp_path, capfd):
    far = tmp_path / "far.csv"       # a mask nowhere near the spectra's range
    pd.DataFrame({"wavelength": [9100.0, 9200.0, 9300.0, 9400.0], "weight": 1.0}).to_csv(far, index=False)
    assert main(["mask", str(echelle_dir), "-o", str(tmp_path / "m.csv"), "--start-mask", str(far)]) == 1
    err = capfd.readouterr().err
    assert "cannot build a mask" in err and "starting mask" in err and "Traceback" not in err
    assert not (tmp_path / "m.csv").exists()
    blocked = tmp_path / "file"
    blocked.write_text("")
    assert main(["mask", str(echelle_dir), "-o", str(tmp_path / "m.csv"), "--start-mask", str(far),
                 "--changes", str(blocked / "c.csv")]) == 2
    assert "--changes" in capfd.readouterr().err
