"""Spike (cosmic ray / hot pixel) and bad-pixel finders on simple arrays (injection-recovery)."""

import numpy as np

from lineshift.measure.badpixels import bad_pixels
from lineshift.measure.outliers import find_spikes, running_median


def _spectrum(rng, n=4000, counts=4e4, fwhm_px=4.0, nlines=60):
    """Continuum with resolved Gaussian absorption lines and photon noise (invented data)."""
    x = np.arange(n, dtype=float)
    model = np.full(n, counts)
    sig = fwhm_px / 2.3548
    for c, d in zip(rng.uniform(10, n - 10, nlines), rng.uniform(0.1, 0.9, nlines), strict=True):
        model *= 1 - d * np.exp(-0.5 * ((x - c) / sig) ** 2)
    flux = rng.normal(model, np.sqrt(model))
    return flux, model.copy(), model


def test_running_median_passes_monotonic_and_removes_short_spike():
    # A running median passes monotonic data unchanged and removes spikes shorter than half
    # the window (Tukey's median smoother; common practice).
    y = np.linspace(1.0, 2.0, 50)
    assert np.allclose(running_median(y, np.zeros(50, bool), 3)[3:-3], y[3:-3])
    y2 = y.copy()
    y2[20:23] += 100
    assert np.allclose(running_median(y2, np.zeros(50, bool), 3)[20:23], y[20:23], atol=0.1)


def test_no_false_spikes_on_clean_spectra():
    # 8 sigma one-sided Gaussian tail ~6e-16 per pixel (standard normal table): on 20 clean
    # spectra of 4000 pixels no pixel may be flagged.
    rng = np.random.default_rng(1)
    for _ in range(20):
        flux, var, _m = _spectrum(rng)
        assert not find_spikes(flux, var).any()


def test_injected_cosmic_rays_found_running_median_and_template():
    rng = np.random.default_rng(2)
    flux, var, model = _spectrum(rng)
    truth = np.zeros(flux.size, bool)
    for start in rng.choice(np.arange(20, flux.size - 20, 40), 30, replace=False):
        w = rng.integers(1, 4)                      # 1-3 pixels
        flux[start:start + w] += rng.uniform(3, 30) * model[start:start + w]   # 3-30x the counts
        truth[start:start + w] = True
    for kwargs in ({}, {"model": model}):
        found = find_spikes(flux, var, **kwargs)
        assert found[truth].all()
        # Apart from the grown neighbours, nothing else is flagged.
        grown = truth | np.roll(truth, 1) | np.roll(truth, -1)
        assert not (found & ~grown).any()


def test_wide_excess_is_not_a_spike():
    # An emission feature wider than max_width is real spectrum, not a cosmic ray.
    flux = np.full(200, 1e4)
    flux[100:110] *= 3
    assert not find_spikes(flux, flux.copy(), max_width=3).any()


def test_bad_pixels_nan_runs_zero_negative_saturated_grown():
    flux = np.full(100, 1000.0)
    flux[0:5] = np.nan          # NaN run at the order end
    flux[40] = 0.0              # zero counts
    flux[60] = -3.0             # negative counts
    flux[80] = 7e4              # saturated
    var = flux.copy()
    bad = bad_pixels(flux, var, saturation=6e4, grow=2)
    expected = np.zeros(100, bool)
    for a, b in ((0, 7), (38, 43), (58, 63), (78, 83)):
        expected[a:b] = True
    assert np.array_equal(bad, expected)
    assert not bad_pixels(np.full(10, 5.0), np.full(10, 5.0)).any()



def test_pipeline_counts_rejected_pixels(tmp_path):
    # Injection-recovery through measure_files on a shipped sample file: the clean file reports
    # 0 rejected pixels; with three 2-pixel cosmic rays at 10x the counts it reports exactly those
    # 6 pixels plus one grown neighbour on each side (12), and the notes say why.
    import os

    from astropy.io import fits

    from lineshift.io.linelists import read_mask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    root = os.path.join(os.path.dirname(__file__), os.pardir)
    clean = os.path.join(root, "sample_spectra", "vessa-9_demo-echelle_000.fits.gz")
    hit = str(tmp_path / "hit.fits")
    with fits.open(clean) as h:
        flux = h["FLUX"].data.astype(float)
        for start in (300, 700, 1100):
            flux[2, start:start + 2] *= 10
        h["FLUX"].data = flux.astype(np.float32)
        h.writeto(hit)
    mask = read_mask(os.path.join(root, "line_lists", "vessa9_mask.csv"))
    rows = measure_files([clean, hit], mask, MeasureSettings())
    assert rows[0]["status"] == "ok" and rows[1]["status"] == "ok"
    assert rows[0]["n_rejected_pixels"] == 0
    assert rows[1]["n_rejected_pixels"] == 12
    assert "12 pixel(s) rejected" in rows[1]["notes"]


def test_running_median_fast_path_equals_the_plain_nanmedian():
    """The C median filter (scipy.ndimage) on gap-free windows gives exactly what the obvious
    nanmedian over every sliding window gives (the slow reference kept here)."""
    from numpy.lib.stride_tricks import sliding_window_view

    from lineshift.measure.outliers import running_median

    def reference(flux, bad, half):
        x = np.where(bad, np.nan, flux)
        win = sliding_window_view(np.pad(x, half, constant_values=np.nan), 2 * half + 1)
        out = np.full(x.size, np.nan)
        ok = np.isfinite(win).any(axis=1)
        out[ok] = np.nanmedian(win[ok], axis=1)
        return out

    rng = np.random.default_rng(12)
    for half in (1, 3):
        flux = 1000 + 100 * rng.normal(size=3000)
        bad = rng.random(3000) < 0.03
        bad[200:220] = True
        np.testing.assert_array_equal(running_median(flux, bad, half), reference(flux, bad, half))
