"""What the plots say: titles and axis labels in one unit each, readable time axes."""

import numpy as np
import pytest

from lineshift.cli import main
from lineshift.plots import figures


@pytest.fixture
def figures_drawn(monkeypatch):
    drawn = {}
    real = figures._save

    def keep(fig, path):
        fig.canvas.draw()   # tick offsets are decided at draw time
        drawn[path] = (fig.axes[0].get_title(), [(a.get_xlabel(), a.get_ylabel()) for a in fig.axes],
                       [a.xaxis.get_major_formatter().get_offset() for a in fig.axes])
        return real(fig, path)

    monkeypatch.setattr(figures, "_save", keep)
    return drawn


def test_ccf_title_gives_both_velocities_in_m_s(sample_set, tmp_path, figures_drawn):
    directory, mask, _ = sample_set
    assert main(["measure", directory, "--mask", mask, "-o", str(tmp_path / "t.csv"), "--plots",
                 str(tmp_path / "p"), "-q"]) == 0
    titles = [t for p, (t, _, _) in figures_drawn.items() if not p.endswith("rv_time.png")]
    assert titles
    for title in titles:
        assert "km/s" not in title and "(barycentric)" in title and "rv_topo = " in title


def test_orbit_residual_axis_has_no_bare_offset(tmp_path, figures_drawn):
    import os

    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    t = tmp_path / "v.csv"
    assert main(["measure", os.path.join(root, "sample_spectra"), "--mask",
                 os.path.join(root, "line_lists", "vessa9_mask.csv"), "-o", str(t), "-q"]) == 0
    assert main(["series", str(t), "--fit-orbit", "-o", str(tmp_path / "s.csv"), "--plots", str(tmp_path / "p"),
                 "-q"]) == 0
    (key,) = [p for p in figures_drawn if p.endswith("orbit.png")]
    _, labels, offsets = figures_drawn[key]
    assert labels[1][0].startswith("BJD_TDB - 246") and labels[1][1].startswith("residual (m/s)")
    assert all(not o for o in offsets), offsets
    assert np.isfinite(float(labels[1][0].split(" - ")[1].split()[0]))


def test_rv_time_rms_is_about_each_layouts_mean_and_the_legend_hides_nothing(sample_set, tmp_path, monkeypatch):
    import pandas as pd

    directory, mask, _ = sample_set
    out = tmp_path / "t.csv"
    shown = {}
    real = figures._save

    def keep(fig, path):
        fig.canvas.draw()
        ax = fig.axes[0]
        shown["title"], shown["legend"] = ax.get_title(), ax.get_legend().get_window_extent()
        shown["axes"] = ax.get_window_extent()
        return real(fig, path)

    monkeypatch.setattr(figures, "_save", keep)
    assert main(["measure", directory, "--mask", mask, "-o", str(out), "--plots", str(tmp_path / "p"), "-q"]) == 0
    t = pd.read_csv(out, comment="#")
    # independent check: rms of rv minus each layout's weighted mean, by pandas (common practice)
    w = 1 / t.rv_err**2
    mean = (t.rv * w).groupby(t.layout).transform("sum") / w.groupby(t.layout).transform("sum")
    assert f"rms {np.std(t.rv - mean):.2f} m/s about each layout's mean" in shown["title"]
    assert shown["legend"].x0 >= shown["axes"].x1          # beside the axes, not over the points


def test_template_zooms_show_the_template(sample_set, tmp_path, monkeypatch):
    directory, _, _ = sample_set
    seen = {}
    real = figures._save

    def keep(fig, path):
        seen["axes"] = [(a.get_ylabel(), max(len(line.get_xdata()) for line in a.get_lines())) for a in fig.axes]
        return real(fig, path)

    monkeypatch.setattr(figures, "_save", keep)
    assert main(["mask", directory, "-o", str(tmp_path / "m.csv"), "--plot", str(tmp_path / "m.png"), "-q"]) == 0
    assert seen["axes"] and all(label == "normalised flux" and n > 10 for label, n in seen["axes"]), seen
