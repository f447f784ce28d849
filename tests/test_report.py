"""The run report: rendered from the shipped sample spectra and opened in headless Chromium.

The browser checks drive Debian's ``chromium`` without network (``--host-resolver-rules`` maps every host
to nothing): console messages are read from ``--enable-logging=stderr`` (lines tagged ``CONSOLE``), the DOM
from ``--dump-dom``, and the screenshot from ``--screenshot``.  ``.ci/run`` installs chromium when missing.
"""

from __future__ import annotations

import glob
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import pytest

import lineshift
from lineshift.cli import main
from lineshift.report import CCFKeeper

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SAMPLE = os.path.join(ROOT, "sample_spectra")
MASK = os.path.join(ROOT, "line_lists", "vessa9_mask.csv")
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
needs_browser = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed and a test may not use the "
                                   "network to install it; .ci/run runs 'apt-get install -y chromium'")


def _browser(tmp_path, url: str, *extra: str) -> subprocess.CompletedProcess:
    return subprocess.run([CHROMIUM, "--headless", "--disable-gpu", "--no-sandbox", "--no-first-run",
                           f"--user-data-dir={tmp_path / 'chromium-profile'}", "--host-resolver-rules=MAP * ~NOTFOUND",
                           "--enable-logging=stderr", "--v=0", "--window-size=1280,2000", *extra, url],
                          capture_output=True, text=True, timeout=120, check=False)


def _console(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


class _Dom(HTMLParser):
    def __init__(self):
        super().__init__()
        self.sections, self.rows, self.cards, self.svg, self.img, self.external = [], [], 0, 0, 0, []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.sections.append(a.get("id"))
        elif tag == "tr" and a.get("class") in ("ok", "rejected"):
            self.rows.append(a["class"])
        elif tag == "div" and "card" in (a.get("class") or ""):
            self.cards += 1
        elif tag == "svg":
            self.svg += 1
        elif tag == "img":
            self.img += 1
        for key in ("src", "href"):
            if a.get(key) and not a[key].startswith(("data:", "#")):
                self.external.append(a[key])


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    """measure --report over the sample spectra plus one broken file (so one row is rejected)."""
    d = tmp_path_factory.mktemp("report")
    for f in glob.glob(os.path.join(SAMPLE, "*.gz")):
        shutil.copy(f, d)
    (d / "broken.fits").write_text("not a spectrum\n")
    report, table, orders = d / "run.html", d / "run.ecsv", d / "orders.csv"
    rc = main(["measure", str(d), "--mask", MASK, "-o", str(table), "--orders-table", str(orders),
               "--report", str(report), "-q"])
    assert rc == 1  # one unusable input, named in its row
    return d, report, table, orders


@needs_browser
def test_report_opens_in_chromium(measured, tmp_path):
    _d, report, _table, _orders = measured
    n_files = len(glob.glob(os.path.join(SAMPLE, "*.gz")))
    url = "file://" + str(report)
    res = _browser(tmp_path, url, "--dump-dom")
    assert res.returncode == 0, res.stderr[-2000:]
    assert _console(res.stderr) == []
    dom = _Dom()
    dom.feed(res.stdout)
    assert dom.sections == ["summary", "velocities", "periodogram", "gallery", "orders", "rows"]
    assert len(dom.rows) == n_files + 1 and dom.rows[0] == "rejected" and dom.rows.count("rejected") == 1
    assert dom.cards == n_files  # 32 spectra: under the gallery limit, every CCF is shown
    assert dom.svg + dom.img >= 3 + n_files
    assert dom.external == []  # self-contained: nothing fetched from anywhere
    assert "broken.fits" in res.stdout and "32 used, 1 rejected" in res.stdout
    shot = tmp_path / "shot.png"
    res = _browser(tmp_path, url, f"--screenshot={shot}")
    assert res.returncode == 0 and shot.is_file(), res.stderr[-2000:]
    from matplotlib.image import imread

    grey = imread(str(shot))[..., :3].mean(axis=2)
    # not blank: a white page has zero variance; text and plots put several per cent of pixels below mid-grey
    assert grey.std() > 0.05 and (grey < 0.5).mean() > 0.01


@needs_browser
def test_console_check_sees_an_error(tmp_path):
    """The console check itself (not a test that cannot fail): a page with a script error is caught."""
    page = tmp_path / "bad.html"
    page.write_text("<html><body><p>x</p><script>console.error('boom'); notDefined();</script></body></html>")
    res = _browser(tmp_path, "file://" + str(page), "--dump-dom")
    lines = _console(res.stderr)
    assert any("boom" in x for x in lines) and any("notDefined" in x for x in lines)


def test_report_command_from_tables(measured):
    d, _report, table, orders = measured
    out = d / "from_table.html"
    assert main(["report", str(table), "--orders", str(orders), "--fit-orbit", "-o", str(out), "-q"]) == 0
    text = out.read_text()
    assert "No CCFs: tables do not store them" in text
    # version and settings come from the ECSV table's metadata (written by measure's provenance)
    assert f"<dt>lineshift</dt><dd>lineshift {lineshift.__version__}" in text
    assert "<dt>method</dt><dd>mask</dd>" in text and "<dt>mask</dt><dd>" in text
    # sample_spectra/README.md: the invented companion has P = 11.73 d, K = 38 m/s (the simulator's input)
    m = re.search(r"rms about the fitted orbit</dt><dd>([\d.]+) m/s \(P = ([\d.]+) d, K = ([\d.]+) m/s", text)
    assert m, "no orbit in the header"
    rms, period, k = map(float, m.groups())
    assert abs(period - 11.73) < 0.05 and abs(k - 38) < 6
    assert rms < 15  # median error ~6 m/s plus zero points between layouts
    # with the mask, the CCFs of the table's files are recomputed for the gallery
    out2 = d / "recomputed.html"
    assert main(["report", str(table), "--mask", MASK, "-o", str(out2), "-q"]) == 0
    text2 = out2.read_text()
    n_ok = len(glob.glob(os.path.join(SAMPLE, "*.gz")))
    assert text2.count('<div class="card') == n_ok and "CCFs recomputed from 32 files" in text2
    assert main(["report", str(table), "-o", str(table)]) == 2  # never overwrite an input
    assert main(["report", str(d / "missing.ecsv"), "-o", str(d / "x.html")]) == 2


def test_gallery_is_bounded_for_ten_thousand_rows():
    """10 000 rows: arrays kept for at most 4 x k candidates; outliers found from the scores of all rows."""
    keeper = CCFKeeper(k=12)
    rng = np.random.default_rng(1)
    v = np.linspace(-30e3, 30e3, 120)
    for i in range(10_000):
        model = 1 - 0.3 * np.exp(-0.5 * (v / 3e3) ** 2)
        noise = 0.002 * (20 if i in (17, 5000) else 1)  # two CCFs with a 20x residual
        keeper.add({"file": f"s{i:05d}.fits", "status": "ok", "contrast": 0.3, "notes": "",
                    "_ccf": (v, model + rng.normal(0, noise, v.size), model, None)})
        assert len(keeper._arrays) <= 4 * 12
    assert set(keeper.outliers()) == {"s00017.fits", "s05000.fits"}
    chosen, note = keeper.selection(limit=30)
    # both outliers first, then the random sample of k = 12 others
    assert len(chosen) == 2 + 12 and [c[0] for c in chosen[:2]] == ["s00017.fits", "s05000.fits"]
    assert "14 of 10000 CCFs shown" in note


def test_wavecheck_summary_section():
    """Calibration-check section: per file, the inverse-variance weighted mean of the order offsets
    (common practice), written in the page's table."""
    import pandas as pd

    from lineshift.report import build_report

    frame = pd.DataFrame({"file": ["a.fits"], "status": ["ok"], "rv": [1.0], "rv_err": [1.0], "bjd_tdb": [2460000.5]})
    wc = pd.DataFrame({"file": ["lamp.fits"] * 3, "order": [0, 1, 2], "offset": [10.0, 20.0, 40.0],
                       "offset_err": [1.0, 2.0, 2.0], "flagged": [False, False, True]})
    text = build_report(frame, {}, wavecheck=wc)
    # (10/1 + 20/4 + 40/4) / (1 + 1/4 + 1/4) = 25 / 1.5
    assert "<section id='wavecheck'>" in text and f"<td>{25 / 1.5:.6g}</td>" in text
    assert "<td>2</td></tr>" in text  # the flagged order
