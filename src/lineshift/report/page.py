"""The run report: one self-contained HTML file (no network, no scripts, no external fonts).

Figures are drawn with matplotlib on bare :class:`matplotlib.figure.Figure` objects (no pyplot, no global
state) and embedded: inline SVG when a figure has few points, base64 PNG when it has many.  Colours come
from the Okabe & Ito (2008) palette ("Color Universal Design", jfly.uni-koeln.de/color), readable with
the common colour-vision deficiencies.
"""

from __future__ import annotations

import base64
import html
import io
import os

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from lineshift._version import __version__
from lineshift.errors import ConfigError, LineshiftError
from lineshift.io.table import atomic_path, rows_to_frame

__all__ = ["OKABE_ITO", "build_report", "read_tables", "write_report"]

#: Okabe & Ito (2008): black, orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple.
OKABE_ITO = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")
BLUE, ORANGE, VERMILLION, GREEN, SKY, PURPLE = (OKABE_ITO[5], OKABE_ITO[1], OKABE_ITO[6], OKABE_ITO[3],
                                                OKABE_ITO[2], OKABE_ITO[7])
#: Figures with more plotted points than this go in as PNG, smaller ones as SVG.
SVG_MAX_POINTS = 3000

_CSS = """body{font-family:sans-serif;margin:1.5em;color:#111;max-width:1200px}
h1{font-size:1.4em}h2{font-size:1.15em;border-bottom:1px solid #999;margin-top:1.6em}
table{border-collapse:collapse;font-size:0.8em}td,th{border:1px solid #ccc;padding:2px 5px;text-align:left}
tr.rejected{background:#fbe3d6}dl.head{display:grid;grid-template-columns:max-content auto;gap:2px 12px}
dt{font-weight:bold}.gallery{display:flex;flex-wrap:wrap;gap:8px}.card{border:2px solid #ccc;padding:3px;width:360px}
.card.outlier{border-color:#D55E00}.card p{font-size:0.75em;margin:2px}.note{font-size:0.85em;color:#333}
svg{max-width:100%;height:auto}img{max-width:100%}"""


def _text(col: pd.Series) -> pd.Series:
    """A column as strings, missing values as ''."""
    return col.astype(object).where(col.notna(), "").astype(str)


def _embed(fig: Figure, n_points: int, label: str) -> str:
    """The figure as inline SVG (few points) or a base64 PNG (many)."""
    buf = io.BytesIO()
    if n_points <= SVG_MAX_POINTS:
        fig.savefig(buf, format="svg", metadata={"Date": None})
        text = buf.getvalue().decode("utf-8")
        text = text[text.index("<svg"):]
        return f'<figure class="plot" data-kind="svg" aria-label="{html.escape(label)}">{text}</figure>'
    fig.savefig(buf, format="png", dpi=100)
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return (f'<figure class="plot" data-kind="png"><img alt="{html.escape(label)}" '
            f'src="data:image/png;base64,{data}"></figure>')


# --------------------------------------------------------------------------- reading tables

def _meta_of(path: str) -> dict[str, str]:
    ext = os.path.splitext(path)[1].lower()
    try:
        if ext == ".parquet":
            import pyarrow.parquet as pq

            md = pq.read_schema(path).metadata or {}
            return {k.decode()[10:]: v.decode() for k, v in md.items() if k.startswith(b"lineshift.")
                    and k != b"lineshift.units"}
        if ext in (".ecsv", ".fits", ".fit"):
            from astropy.table import Table

            meta = dict(Table.read(path).meta)
            out = {str(k): str(v) for k, v in meta.items() if k != "comments"}
            for c in meta.get("comments", []):
                if ": " in str(c):
                    k, v = str(c).split(": ", 1)
                    out[k.strip()] = v.strip()
            return out
    except (OSError, ValueError) as exc:
        raise ConfigError(f"cannot read its metadata ({str(exc).splitlines()[0][:120]})", path=path) from None
    return {}


def read_tables(paths: list[str]) -> tuple[pd.DataFrame, dict[str, str]]:
    """Rows and metadata of one or more ``measure`` tables (metadata of the first that has any)."""
    from lineshift.model import OLD_COLUMN_NAMES
    from lineshift.series.analysis import _read_table

    frames, meta = [], {}
    for path in paths:
        df = _read_table(path)
        df = df.rename(columns={old: new for old, new in OLD_COLUMN_NAMES.items() if old in df and new not in df})
        if not {"file", "status", "rv", "rv_err", "bjd_tdb"} <= set(df.columns):
            raise ConfigError("is not a measure table (needs file, status, rv, rv_err, bjd_tdb)", path=path)
        frames.append(df)
        meta = meta or _meta_of(path)
    return pd.concat(frames, ignore_index=True), meta


# --------------------------------------------------------------------------- figures

def _ok(frame: pd.DataFrame) -> pd.DataFrame:
    good = (frame["status"].astype(str) == "ok") & np.isfinite(pd.to_numeric(frame["rv"], errors="coerce"))
    return frame[good].sort_values("bjd_tdb")


def _rv_figure(ok: pd.DataFrame, orbit_model=None) -> str:
    t = ok["bjd_tdb"].to_numpy(float)
    ref = float(np.floor(t.min()))
    rv, err = ok["rv"].to_numpy(float), ok["rv_err"].to_numpy(float)
    mean = float(np.average(rv, weights=1 / err**2))
    indicators = [(c, lab, scale) for c, lab, scale in (("fwhm", "FWHM (km/s)", 1e-3),
                                                        ("contrast", "contrast (%)", 100.0),
                                                        ("bisector_span", "bisector span (m/s)", 1.0))
                  if c in ok and np.isfinite(pd.to_numeric(ok[c], errors="coerce")).any()]
    fig = Figure(figsize=(9, 3.2 + 1.4 * len(indicators)))
    axes = fig.subplots(1 + len(indicators), 1, sharex=True,
                        gridspec_kw={"height_ratios": [3] + [1] * len(indicators)}, squeeze=False)[:, 0]
    layouts = _text(ok["layout"]).to_numpy() if "layout" in ok else np.full(len(ok), "")
    colours = (BLUE, ORANGE, GREEN, PURPLE, SKY, VERMILLION)
    for k, lay in enumerate(sorted(set(layouts))):
        m = layouts == lay
        axes[0].errorbar(t[m] - ref, rv[m] - mean, err[m], fmt="o", ms=4, capsize=2, color=colours[k % 6],
                         ecolor="0.55", label=lay or "unknown layout")
        for ax, (c, _lab, scale) in zip(axes[1:], indicators, strict=True):
            y = pd.to_numeric(ok[c], errors="coerce").to_numpy(float)[m] * scale
            e = (pd.to_numeric(ok[c + "_err"], errors="coerce").to_numpy(float)[m] * scale
                 if c + "_err" in ok else None)
            ax.errorbar(t[m] - ref, y, e, fmt="o", ms=3, capsize=1.5, color=colours[k % 6], ecolor="0.6")
    if orbit_model is not None:
        tt, vv = orbit_model
        axes[0].plot(tt - ref, vv - mean, "-", color="0.2", lw=1, label="fitted orbit")
    axes[0].legend(fontsize=7, title="layout (zero points may differ)", title_fontsize=7)
    axes[0].set_ylabel(f"rv - {mean / 1e3:.4f} km/s (m/s)")
    for ax, (_c, lab, _s) in zip(axes[1:], indicators, strict=True):
        ax.set_ylabel(lab, fontsize=8)
    for ax in axes:
        ax.grid(alpha=0.3)
    axes[-1].set_xlabel(f"BJD_TDB - {ref:.0f} (d)")
    fig.tight_layout()
    return _embed(fig, len(ok) * (1 + len(indicators)) + (0 if orbit_model is None else len(orbit_model[0])),
                  "velocity and indicators against time")


def _periodogram_figure(pg) -> str:
    period = 1 / pg.frequency
    fig = Figure(figsize=(9, 4.2))
    ax, aw = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    ax.semilogx(period, pg.power, lw=0.7, color="0.15")
    for p, level in pg.fap_levels.items():
        ax.axhline(level, ls=":", lw=0.8, color=SKY)
        ax.text(period.min(), level, f" FAP {p:g}", fontsize=7, va="bottom")
    for k, peak in enumerate(pg.peaks[:3]):
        ax.plot(peak["period"], peak["power"], "v", color=VERMILLION if k == 0 else ORANGE, ms=6)
        ax.annotate(f"{peak['period']:.3f} d", (peak["period"], peak["power"]), textcoords="offset points",
                    xytext=(4, 4), fontsize=7)
    ax.set_ylabel("GLS power (standard normalisation, dimensionless)", fontsize=7)
    aw.semilogx(period, pg.window, lw=0.7, color=BLUE)
    aw.set_ylabel("window power", fontsize=7)
    aw.set_xlabel("period (d)")
    fig.tight_layout()
    return _embed(fig, 2 * period.size, "periodogram")


def _ccf_card(name: str, arrays, reasons: list[str], row: dict | None) -> str:
    v, y, model = arrays
    fig = Figure(figsize=(3.6, 2.6))
    ax, ar = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.3]})
    ax.plot(v / 1e3, y, ".", ms=2.5, color="0.15", label="observed")
    ax.plot(v / 1e3, model, "-", lw=1, color=VERMILLION if reasons else BLUE, label="fitted model")
    ax.set_ylabel("CCF (normalised)", fontsize=7)
    ax.legend(fontsize=6, loc="lower left")
    ar.plot(v / 1e3, y - model, ".", ms=2, color="0.15")
    ar.axhline(0, color=BLUE, lw=0.6)
    ar.set_ylabel("residual", fontsize=7)
    ar.set_xlabel("velocity, observatory frame (km/s)", fontsize=7)
    for a in (ax, ar):
        a.tick_params(labelsize=6)
    fig.tight_layout()
    detail = ""
    if row is not None:
        detail = (f"rv {row.get('rv', np.nan):.2f} ± {row.get('rv_err', np.nan):.2f} m/s, "
                  f"contrast {100 * float(row.get('contrast') or np.nan):.1f}%")
    why = f"<p><b>outlier:</b> {html.escape('; '.join(reasons))}</p>" if reasons else ""
    cls = "card outlier" if reasons else "card"
    return (f'<div class="{cls}" data-file="{html.escape(name)}"><p>{html.escape(os.path.basename(name))}'
            f"</p><p>{detail}</p>{why}{_embed(fig, 3 * v.size, 'CCF of ' + os.path.basename(name))}</div>")


def _orders_figure(orders: pd.DataFrame, name: str) -> str:
    o = orders.sort_values("order")
    x = o["wavelength"].to_numpy(float) if "wavelength" in o and np.isfinite(o["wavelength"]).all() else None
    fig = Figure(figsize=(8, 3.2))
    ax = fig.subplots()
    rv, err = o["rv"].to_numpy(float), o["rv_err"].to_numpy(float)
    flag = _text(o["flag"]).str.strip().to_numpy() if "flag" in o else np.full(len(o), "")
    bad = (flag != "") & (flag != "ok") & (flag != "False")
    xs = x if x is not None else o["order"].to_numpy(float)
    good = ~bad & np.isfinite(rv)
    ax.errorbar(xs[good], rv[good], err[good], fmt="o", ms=4, capsize=2, color=BLUE, label="order velocity")
    if (bad & np.isfinite(rv)).any():
        ax.errorbar(xs[bad], rv[bad], err[bad], fmt="s", ms=4, capsize=2, color=VERMILLION, label="flagged order")
    ax.set_xlabel("order central wavelength, vacuum (A)" if x is not None else "order index")
    ax.set_ylabel("per-order topocentric rv (m/s)")
    ax.set_title(os.path.basename(name), fontsize=8)
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return _embed(fig, len(o), "per-order velocities")


def _wavecheck_figure(wc: pd.DataFrame) -> str:
    fig = Figure(figsize=(8, 3.2))
    ax = fig.subplots()
    flag = wc["flagged"].astype(str).str.lower().isin(("true", "1")).to_numpy()
    o, off, err = wc["order"].to_numpy(float), wc["offset"].to_numpy(float), wc["offset_err"].to_numpy(float)
    ax.errorbar(o[~flag], off[~flag], err[~flag], fmt="o", ms=3, capsize=1.5, color=BLUE, label="order offset")
    if flag.any():
        ax.errorbar(o[flag], off[flag], err[flag], fmt="s", ms=4, capsize=1.5, color=VERMILLION, label="flagged")
    ax.axhline(0, color="0.2", lw=0.5)
    ax.set_xlabel("order index")
    ax.set_ylabel("calibration offset (m/s)")
    ax.legend(fontsize=7)
    fig.tight_layout()
    return _embed(fig, len(wc), "calibration check offsets")


# --------------------------------------------------------------------------- the page

#: Number formats of the row table (time to 0.1 s, velocities to 1 cm/s).
_FORMATS = {"bjd_tdb": ".6f", "rv": ".2f", "rv_err": ".2f", "fwhm": ".1f", "contrast": ".4f", "snr": ".1f"}


def _esc(x, fmt: str = ".6g") -> str:
    if x is None or x is pd.NA or x is np.ma.masked or (np.isscalar(x) and pd.isna(x)):
        return ""
    if isinstance(x, float):
        return "" if not np.isfinite(x) else format(x, fmt)
    return html.escape(str(x))


def _fit_orbit(ok: pd.DataFrame):
    from lineshift.series import analysis as ser

    s = ser.Series(ok["bjd_tdb"].to_numpy(float), ok["rv"].to_numpy(float), ok["rv_err"].to_numpy(float),
                   (_text(ok["layout"]) if "layout" in ok else pd.Series([""] * len(ok)))
                   .to_numpy(object), ok["file"].astype(str).to_numpy(object))
    offsets = ser.dataset_offsets(s)
    pg = ser.periodogram(s, offsets=offsets)
    return s, pg


def build_report(frame: pd.DataFrame, meta: dict[str, str], *, ccfs=None, orders: pd.DataFrame | None = None,
                 orders_spectrum: str | None = None, wavecheck: pd.DataFrame | None = None,
                 fit_orbit: bool = False, gallery_limit: int = 60, title: str = "lineshift run report",
                 gallery_note: str = "") -> str:
    """The report's HTML text. ``ccfs``: a :class:`~lineshift.report.gallery.CCFKeeper` (or None)."""
    status = _text(frame["status"])
    ok = _ok(frame)
    n_rej = int((status != "ok").sum())
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{_esc(title)}</title>"
             f"<style>{_CSS}</style></head><body><h1>{_esc(title)}</h1>"]
    # header
    head = {"objects": ", ".join(sorted(set(_text(ok.get("object", pd.Series(dtype=str)))) - {""}))
            or "(none named)",
            "spectra": f"{len(ok)} used, {n_rej} rejected, {len(frame)} in all"}
    orbit_model = None
    sections_pg = "<p class='note'>No periodogram: it needs at least four velocities at different times.</p>"
    if len(ok):
        t, rv, err = ok["bjd_tdb"].to_numpy(float), ok["rv"].to_numpy(float), ok["rv_err"].to_numpy(float)
        mean = float(np.average(rv, weights=1 / err**2))
        head["time span"] = f"BJD_TDB {t.min():.4f} to {t.max():.4f} ({np.ptp(t):.2f} d)"
        head["median error"] = f"{np.median(err):.2f} m/s"
        head["rms about the weighted mean"] = f"{np.sqrt(np.mean((rv - mean) ** 2)):.2f} m/s (all layouts together)"
        try:
            s, pg = _fit_orbit(ok)
            sections_pg = _periodogram_figure(pg)
            if pg.peaks:
                best = pg.peaks[0]
                sections_pg += (f"<p class='note'>Strongest peak {best['period']:.4f} d, FAP {best['fap']:.2g} "
                                "(generalised Lomb-Scargle, Zechmeister &amp; Kuerster 2009; FAP by Baluev 2008). "
                                "A peak can be an alias of the sampling or stellar activity.</p>")
            if fit_orbit:
                from lineshift.series import analysis as ser
                from lineshift.series.orbit import radial_velocity

                fit = ser.fit_orbit(s, [p["period"] for p in pg.peaks[:3]])
                o = fit.orbit
                head["rms about the fitted orbit"] = (f"{fit.rms:.2f} m/s (P = {o.period:.4f} d, "
                                                      f"K = {o.semi_amplitude:.2f} m/s, e = {o.eccentricity:.3f})")
                tt = np.linspace(t.min(), t.max(), 800)
                gamma = float(np.mean(list(fit.gammas.values())))
                orbit_model = (tt, radial_velocity(tt, o, gamma))
        except (ConfigError, LineshiftError, ValueError, np.linalg.LinAlgError) as exc:
            sections_pg = f"<p class='note'>No periodogram or orbit: {_esc(str(exc))}</p>"
    head["lineshift"] = meta.get("SOFTWARE", "") + f" (report by lineshift {__version__})"
    for k, v in meta.items():
        if k != "SOFTWARE":
            head[k.lower()] = v
    if not meta:
        head["settings"] = "not recorded in this table (CSV tables carry no metadata; use .ecsv, .fits or .parquet)"
    parts.append("<section id='summary'><h2>Summary</h2><dl class='head'>"
                 + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(v)}</dd>" for k, v in head.items()) + "</dl></section>")
    # velocity against time
    parts.append("<section id='velocities'><h2>Velocities and indicators against time</h2>"
                 + (_rv_figure(ok, orbit_model) if len(ok) else "<p class='note'>No velocity measured.</p>")
                 + "</section>")
    parts.append(f"<section id='periodogram'><h2>Periodogram</h2>{sections_pg}</section>")
    # gallery
    rows_by_file = {str(r["file"]): r for r in frame.to_dict("records")}
    parts.append("<section id='gallery'><h2>CCF gallery</h2>")
    if gallery_note:
        parts.append(f"<p class='note'>{_esc(gallery_note)}.</p>")
    if ccfs is None:
        parts.append("<p class='note'>No CCFs: tables do not store them. Run <code>lineshift measure ... "
                     "--report REPORT.html</code>, or give <code>lineshift report</code> the line mask "
                     "(<code>--mask</code>) to recompute them.</p>")
    elif len(ccfs) == 0:
        parts.append("<p class='note'>No CCFs were kept in this run (the template engine and rows taken from "
                     "the results store have none).</p>")
    else:
        chosen, note = ccfs.selection(gallery_limit)
        n_out = len(ccfs.outliers())
        parts.append(f"<p class='note'>{_esc(note)}; {n_out} outlier(s) in all, highlighted in vermillion "
                     "(residual rms above 3 x the batch median, contrast below half the median, or notes).</p>"
                     "<div class='gallery'>")
        parts += [_ccf_card(n, ccfs.arrays(n), why, rows_by_file.get(n)) for n, why in chosen]
        parts.append("</div>")
    parts.append("</section>")
    # per-order
    if orders is not None and len(orders):
        names = [n for n in ok["file"].astype(str) if n in set(orders["file"].astype(str))]
        pick = None
        if orders_spectrum:
            hits = [n for n in orders["file"].astype(str).unique()
                    if n == orders_spectrum or os.path.basename(n) == os.path.basename(orders_spectrum)]
            if not hits:
                raise ConfigError(f"spectrum {orders_spectrum!r} is not in the per-order table")
            pick = hits[0]
        elif names:
            pick = names[0]
        if pick is not None:
            parts.append(f"<section id='orders'><h2>Per-order velocities</h2><p class='note'>Spectrum "
                         f"{_esc(pick)} (choose another with <code>--orders-spectrum</code>).</p>"
                         + _orders_figure(orders[orders["file"].astype(str) == pick], pick) + "</section>")
    # wavecheck
    if wavecheck is not None and len(wavecheck):
        from lineshift.calib.wavecheck import file_summary

        rows = []
        for name, grp in wavecheck.groupby("file", sort=True):
            fs = file_summary(grp.to_dict("records"))
            rows.append(f"<tr><td>{_esc(os.path.basename(str(name)))}</td><td>{_esc(fs['offset'])}</td>"
                        f"<td>{_esc(fs['offset_err'])}</td><td>{_esc(fs['rms'])}</td><td>{fs['n_orders']}</td>"
                        f"<td>{_esc(', '.join(str(o) for o in fs['flagged']))}</td></tr>")
        parts.append("<section id='wavecheck'><h2>Calibration check</h2>" + _wavecheck_figure(wavecheck)
                     + "<table><tr><th>file</th><th>offset (m/s)</th><th>error (m/s)</th><th>rms over orders "
                     "(m/s)</th><th>orders</th><th>flagged orders</th></tr>" + "".join(rows) + "</table></section>")
    # rows, rejected first
    cols = [c for c in ("file", "object", "bjd_tdb", "rv", "rv_err", "fwhm", "contrast", "snr", "n_lines",
                        "status", "notes") if c in frame]
    order = np.argsort((status == "ok").to_numpy(), kind="stable")
    body = []
    for i in order:
        r = frame.iloc[i]
        cls = "ok" if status.iloc[i] == "ok" else "rejected"
        cells = "".join(f"<td>{_esc(os.path.basename(str(r[c])) if c == 'file' else r[c], _FORMATS.get(c, '.6g'))}"
                        "</td>" for c in cols)
        body.append(f"<tr class='{cls}'>{cells}</tr>")
    units = {"bjd_tdb": " (d)", "rv": " (m/s)", "rv_err": " (m/s)", "fwhm": " (m/s)"}
    parts.append(f"<section id='rows'><h2>Rows ({n_rej} rejected first)</h2><table><thead><tr>"
                 + "".join(f"<th>{c}{units.get(c, '')}</th>" for c in cols) + "</tr></thead><tbody>"
                 + "".join(body) + "</tbody></table></section></body></html>\n")
    return "".join(parts)


def write_report(path: str, rows_or_frame, meta: dict[str, str] | None = None, **kwargs) -> str:
    """Build the report from ``measure`` rows (dicts) or a table frame and write it atomically to ``path``."""
    frame = rows_or_frame if isinstance(rows_or_frame, pd.DataFrame) else rows_to_frame(rows_or_frame)
    if not isinstance(rows_or_frame, pd.DataFrame):
        errors = [r.get("_error") or "" for r in rows_or_frame]
        if "notes" in frame:
            frame["notes"] = [n if not e or e in n else (f"{n}; {e}" if n else e)
                              for n, e in zip(frame["notes"], errors, strict=True)]
    text = build_report(frame, meta or {}, **kwargs)
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
    return path
