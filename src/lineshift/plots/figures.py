"""Plots people would rather look at than tables: the CCF of each spectrum, velocities against time.

Drawn on ``matplotlib.figure.Figure`` objects without pyplot, so importing this module neither selects
nor changes the host's matplotlib backend; PNGs are rendered by Agg (no screen needed), each file
atomically.
"""

from __future__ import annotations

import os

import numpy as np
from matplotlib.figure import Figure

from lineshift.io.table import atomic_path

__all__ = ["plot_ccf", "plot_drift", "plot_indicator_periodograms", "plot_orbit", "plot_order_offsets",
           "plot_periodogram", "plot_residuals", "plot_rv_bisector", "plot_rv_time", "plot_template"]


def _save(fig, path: str) -> str:
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)
    return path


class _Figures:
    """``figure`` and ``subplots`` as pyplot spells them, on bare Figures (no backend, no global state)."""

    @staticmethod
    def figure(figsize=None) -> Figure:
        return Figure(figsize=figsize)

    @staticmethod
    def subplots(nrows: int = 1, ncols: int = 1, *, figsize=None, **kwargs):
        fig = Figure(figsize=figsize)
        return fig, fig.subplots(nrows, ncols, **kwargs)


plt = _Figures()


def _stem(path: str) -> str:
    name = os.path.basename(path)
    for ext in (".gz", ".fits", ".fit", ".fts", ".csv", ".txt", ".dat", ".tsv"):
        if name.lower().endswith(ext):
            name = name[: -len(ext)]
    return name


def plot_ccf(row: dict, outdir: str, name: str | None = None) -> str:
    """CCF (observatory frame) with its fitted profile(s), residuals, and the bisector."""
    v, ccf, model, bis = row["_ccf"]
    fig = plt.figure(figsize=(8.4, 4.8))
    gs = fig.add_gridspec(2, 2, height_ratios=[3, 1], width_ratios=[3, 1.2])
    ax, axr, axb = fig.add_subplot(gs[0, 0]), fig.add_subplot(gs[1, 0]), fig.add_subplot(gs[:, 1])
    ax.plot(v / 1e3, ccf, ".", ms=4, color="0.2", label="CCF")
    ax.plot(v / 1e3, model, "-", color="tab:red", lw=1.2, label="fit")
    ax.axvline(row["rv_topo"] / 1e3, color="tab:red", lw=0.6, ls=":")
    if row.get("rv2_topo") is not None and np.isfinite(row.get("rv2_topo", np.nan)):
        ax.axvline(row["rv2_topo"] / 1e3, color="tab:blue", lw=0.6, ls=":")
    ax.set_ylabel("normalised CCF")
    rv = row.get("rv")
    bary = f"rv = {rv:.2f} ± {row['rv_err']:.2f} m/s (barycentric), " if rv is not None and np.isfinite(rv) else ""
    ax.set_title(f"{os.path.basename(row['file'])}\n{bary}rv_topo = {row['rv_topo']:.2f} m/s, "
                 f"FWHM {row['fwhm']:.0f} m/s, contrast {100 * row['contrast']:.1f}%", fontsize=8)
    ax.legend(fontsize=8, loc="lower left")
    axr.plot(v / 1e3, ccf - model, ".", ms=3, color="0.2")
    axr.axhline(0, color="tab:red", lw=0.6)
    axr.set_xlabel("velocity, observatory frame (km/s)")
    axr.set_ylabel("residual")
    if bis is not None:
        depth, vel = bis
        axb.plot(vel - row["rv_topo"], depth, "-", color="tab:purple", lw=1)
        for (lo, hi), colour in (((0.10, 0.40), "tab:green"), ((0.55, 0.90), "tab:orange")):
            axb.axhspan(lo, hi, color=colour, alpha=0.15)
        axb.invert_yaxis()
        axb.set_ylim(1, 0)
        axb.set_xlabel("bisector - rv_topo (m/s)")
        axb.set_ylabel("fractional depth")
        span = row.get("bisector_span", np.nan)
        axb.set_title(f"bisector span {span:+.1f} ± {row.get('bisector_span_err', np.nan):.1f} m/s", fontsize=8)
    fig.tight_layout()
    return _save(fig, os.path.join(outdir, f"{name or _stem(row['file'])}_ccf.png"))


def plot_rv_time(rows: list[dict], outdir: str, name: str = "rv_time.png") -> str | None:
    """Barycentric velocity against BJD_TDB for the rows that have one."""
    ok = [r for r in rows if r.get("status") == "ok" and r.get("rv") is not None]
    if not ok:
        return None
    t = np.array([r["bjd_tdb"] for r in ok])
    rv = np.array([r["rv"] for r in ok])
    err = np.array([r["rv_err"] for r in ok])
    ref = float(np.floor(t.min()))
    mean = np.average(rv, weights=1 / err**2)
    fig, ax = plt.subplots(figsize=(7, 4))
    layouts = np.array([r.get("layout") or "" for r in ok])
    colours = ("tab:blue", "tab:orange", "tab:green", "tab:purple", "tab:brown")
    for k, layout in enumerate(sorted(set(layouts))):
        sel = layouts == layout
        ax.errorbar(t[sel] - ref, rv[sel] - mean, err[sel], fmt="o", ms=4, color=colours[k % len(colours)],
                    ecolor="0.6", capsize=2, label=layout or "unknown layout")
    # scatter about each layout's own weighted mean: the layouts' zero points may differ
    resid = np.empty_like(rv)
    for layout in set(layouts):
        sel = layouts == layout
        resid[sel] = rv[sel] - np.average(rv[sel], weights=1 / err[sel] ** 2)
    if len(set(layouts)) > 1:   # beside the axes, where it hides no point
        ax.legend(fontsize=8, title="layout (zero points\nmay differ)", title_fontsize=8, loc="upper left",
                  bbox_to_anchor=(1.01, 1.0), borderaxespad=0)
    ax.set_xlabel(f"BJD_TDB - {ref:.0f} (d)")
    ax.set_ylabel(f"rv - {mean / 1e3:.4f} km/s (m/s)")
    objects = sorted({r.get("object") or "" for r in ok} - {""})
    ax.set_title(f"{', '.join(objects) or 'velocities'}: {len(ok)} spectra, "
                 f"rms {np.std(resid):.2f} m/s about each layout's mean, median error {np.median(err):.2f} m/s",
                 fontsize=9)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return _save(fig, os.path.join(outdir, name))


def plot_template(template, found, path: str, *, panels: int = 4, width: float = 12.0) -> str:
    """The co-added template with the kept lines (red) and rejected ones (grey): an overview and
    ``panels`` zooms of ``width`` Angstrom spread over the range."""
    fig, axes = plt.subplots(panels + 1, 1, figsize=(9, 2.0 * (panels + 1)))
    w, f = template.wave, template.flux
    axes[0].plot(w, f, lw=0.3, color="0.2")
    kept = found.kept
    axes[0].set_title(f"co-added template ({template.n_spectra} spectra): {int(kept.sum())} lines kept, "
                      f"{int((~kept).sum())} rejected", fontsize=9)
    axes[0].set_ylim(0, 1.15)
    axes[0].set_ylabel("normalised flux")
    # zoom on kept lines spread over the range (a window between orders would show nothing)
    lines = np.sort(found.wavelength[kept]) if kept.any() else np.linspace(w[0] + width, w[-1] - width, panels)
    centres = lines[np.linspace(0, lines.size - 1, panels).round().astype(int)]
    for ax, c in zip(axes[1:], centres, strict=True):
        sel = (w > c - width / 2) & (w < c + width / 2)
        ax.plot(w[sel], f[sel], lw=0.7, color="0.2")
        for lam, k in zip(found.wavelength, kept, strict=True):
            if c - width / 2 < lam < c + width / 2:
                ax.axvline(lam, color="tab:red" if k else "0.7", lw=0.8, ymax=0.12 if k else 0.06)
        ax.set_xlim(c - width / 2, c + width / 2)
        ax.set_ylim(0, 1.15)
        ax.set_ylabel("normalised flux")
    axes[-1].set_xlabel("vacuum wavelength, template frame (A)")
    fig.tight_layout()
    return _save(fig, path)


def plot_residuals(lines: list[dict], path: str, title: str = "") -> str:
    """Line residuals against wavelength, one colour per order (good lines; rejected ones grey)."""
    fig, ax = plt.subplots(figsize=(9, 4))
    ok = [r for r in lines if r["status"] == "ok"]
    bad = [r for r in lines if r["status"] != "ok" and np.isfinite(r["residual"])]
    if bad:
        ax.plot([r["wavelength_lab"] for r in bad], [r["residual"] for r in bad], "x", color="0.75", ms=3,
                label="rejected")
    if ok:
        orders = np.array([r["order"] for r in ok])
        sc = ax.scatter([r["wavelength_lab"] for r in ok], [r["residual"] for r in ok], c=orders, s=8,
                        cmap="viridis")
        fig.colorbar(sc, ax=ax, label="order")
        res = np.array([r["residual"] for r in ok])
        pad = 0.08 * max(np.ptp(res), 1.0)
        ax.set_ylim(res.min() - pad, res.max() + pad)  # every good line visible; rejected ones may fall outside
    ax.axhline(0, color="k", lw=0.5)
    ax.set_xlabel("laboratory wavelength, vacuum (A)")
    ax.set_ylabel("residual (m/s)")
    ax.set_title(title, fontsize=9)
    if bad:
        ax.legend(fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_order_offsets(orders: list[dict], path: str, title: str = "") -> str:
    """Per-order offset with its error; flagged orders in red."""
    fig, ax = plt.subplots(figsize=(9, 3.5))
    o = np.array([r["order"] for r in orders])
    off = np.array([r["offset"] for r in orders], dtype=float)
    err = np.array([r["offset_err"] for r in orders], dtype=float)
    flag = np.array([r["flagged"] for r in orders], dtype=bool)
    ax.errorbar(o[~flag], off[~flag], err[~flag], fmt="o", ms=4, color="tab:blue", capsize=2, label="order offset")
    if flag.any():
        ax.errorbar(o[flag], off[flag], err[flag], fmt="o", ms=5, color="tab:red", capsize=2, label="flagged")
    ax.axhline(0, color="k", lw=0.5)
    ax.set_xlabel("order")
    ax.set_ylabel("offset (m/s)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _save(fig, path)


def plot_drift(rows: list[dict], rate: tuple[float, float, float] | None, path: str) -> str:
    """Global calibration offset against time, with the fitted linear drift."""
    t = np.array([r["mjd_mid"] for r in rows], dtype=float)
    off = np.array([r["offset"] for r in rows], dtype=float)
    err = np.array([r["offset_err"] for r in rows], dtype=float)
    hours = (t - t.min()) * 24
    fig, ax = plt.subplots(figsize=(7, 3.5))
    ax.errorbar(hours, off, err, fmt="o", ms=4, capsize=2)
    if rate is not None:
        x = np.linspace(0, hours.max(), 2)
        ax.plot(x, rate[2] + rate[0] * x, "-", color="tab:red",
                label=f"drift {rate[0]:+.2f} +- {rate[1]:.2f} m/s per hour")
        ax.legend(fontsize=8)
    ax.set_xlabel(f"hours since MJD {t.min():.4f}")
    ax.set_ylabel("global offset (m/s)")
    fig.tight_layout()
    return _save(fig, path)


def plot_periodogram(pg, path: str) -> str:
    """GLS power against period, the window function, the strongest peaks and the best peak's aliases."""
    fig, (ax, aw) = plt.subplots(2, 1, figsize=(8, 5.5), sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    period = 1 / pg.frequency
    ax.semilogx(period, pg.power, lw=0.7, color="0.2")
    for p, level in pg.fap_levels.items():
        ax.axhline(level, ls=":", lw=0.7, color="tab:gray")
        ax.text(period.min(), level, f" FAP {p:g}", fontsize=7, va="bottom", color="tab:gray")
    for k, peak in enumerate(pg.peaks[:5]):
        ax.plot(peak["period"], peak["power"], "v", color="tab:red" if k == 0 else "tab:orange", ms=6)
        ax.annotate(f"{peak['period']:.3f} d\nFAP {peak['fap']:.1e}", (peak["period"], peak["power"]),
                    textcoords="offset points", xytext=(4, 4 + 14 * (k % 3)), fontsize=7)  # staggered
    if pg.peaks:
        for alias in pg.peaks[0]["aliases"]["1 d"] + pg.peaks[0]["aliases"]["1 yr"]:
            if period.min() <= alias <= period.max():
                ax.axvline(alias, color="tab:purple", lw=0.6, ls="--")
        ax.plot([], [], color="tab:purple", ls="--", lw=0.6, label="1 d / 1 yr aliases of the best peak")
        ax.legend(fontsize=7, loc="upper right")
    ax.set_ylabel("GLS power")
    aw.semilogx(period, pg.window, lw=0.7, color="tab:blue")
    aw.set_ylabel("window")
    aw.set_xlabel("period (d)")
    fig.tight_layout()
    return _save(fig, path)


def plot_orbit(series, fit, offsets_model, path: str) -> str:
    """Phase-folded velocities (data-set offsets removed) with the Keplerian, and residuals in time."""
    o = fit.orbit
    use = ~series.flag
    aligned = series.rv - np.array([fit.gammas.get(d, 0.0) for d in series.dataset])
    phase = np.mod((series.t - o.time_periastron) / o.period, 1.0)
    from lineshift.series.orbit import radial_velocity

    t_ref = float(np.floor(series.t.min()))   # a readable axis instead of a bare "+2.461e6" offset
    ph = np.linspace(0, 1, 500)
    curve = radial_velocity(o.time_periastron + ph * o.period, o)
    fig, (ax, ar) = plt.subplots(2, 1, figsize=(8, 6), gridspec_kw={"height_ratios": [3, 2]})
    colours = ("tab:blue", "tab:orange", "tab:green", "tab:purple", "tab:brown")
    for k, d in enumerate(series.datasets):
        m = (series.dataset == d) & use
        ax.errorbar(phase[m], aligned[m], series.err[m], fmt="o", ms=4, capsize=2, color=colours[k % 5], label=d)
        ar.errorbar(series.t[m] - t_ref, series.rv[m] - fit.model[m], series.err[m], fmt="o", ms=4, capsize=2,
                    color=colours[k % 5])
    if (~use).any():
        ax.plot(phase[~use], aligned[~use], "x", color="tab:red", label="flagged")
    ax.plot(ph, curve, "-", color="k", lw=1)
    ax.set_xlabel("orbital phase (from periastron)")
    ax.set_ylabel("rv - gamma (m/s)")
    ax.set_title(f"P = {o.period:.4f} d, K = {o.semi_amplitude:.2f} m/s, e = {o.eccentricity:.3f}", fontsize=9)
    ax.legend(fontsize=7)
    ar.axhline(0, color="k", lw=0.5)
    ar.set_xlabel(f"BJD_TDB - {t_ref:.0f} (d)")
    ar.set_ylabel(f"residual (m/s), rms {fit.rms:.2f}")
    fig.tight_layout()
    return _save(fig, path)


def plot_rv_bisector(series, offsets, corr: dict, path: str) -> str:
    """Bisector span against (offset-aligned) velocity, with the correlation coefficient."""
    use = ~series.flag & np.isfinite(series.bis)
    aligned = series.rv[use] - np.array([offsets.get(d, 0.0) for d in series.dataset[use]])
    fig, ax = plt.subplots(figsize=(6, 4.5))
    ax.errorbar(aligned, series.bis[use], series.bis_err[use], series.err[use], fmt="o", ms=4, capsize=2)
    x = np.linspace(aligned.min(), aligned.max(), 2)
    ax.plot(x, np.polyval(np.polyfit(aligned, series.bis[use], 1), x), "-", color="tab:red", lw=0.8)
    ax.set_xlabel("rv - data-set offset (m/s)")
    ax.set_ylabel("bisector span (m/s)")
    ax.set_title(f"r = {corr['r']:+.3f}, p = {corr['p_value']:.2g} ({corr['n']} spectra)"
                 + ("  SIGNIFICANT" if corr["significant"] else ""), fontsize=9)
    fig.tight_layout()
    return _save(fig, path)


def plot_indicator_grid(series, offsets, corr: dict[str, dict], path: str) -> str:
    """One panel per indicator: the indicator against (offset-aligned) velocity, with Pearson/Spearman r."""
    names = list(corr)
    ncol = min(3, len(names))
    nrow = -(-len(names) // ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(4.2 * ncol, 3.4 * nrow), squeeze=False)
    aligned = series.rv - np.array([offsets.get(d, 0.0) for d in series.dataset])
    for ax, name in zip(axes.flat, names, strict=False):
        v = series.indicators[name]
        use = ~series.flag & np.isfinite(v)
        ax.plot(aligned[use], v[use], "o", ms=3.5)
        c = corr[name]
        ax.set_xlabel("rv - data-set offset (m/s)", fontsize=8)
        ax.set_ylabel(name, fontsize=8)
        ax.set_title(f"r = {c['pearson_r']:+.2f} (p {c['pearson_p']:.2g}), rho = {c['spearman_r']:+.2f}"
                     + ("  SIGNIFICANT" if c["significant"] else ""), fontsize=8)
    for ax in list(axes.flat)[len(names):]:
        ax.set_visible(False)
    fig.tight_layout()
    return _save(fig, path)


def plot_indicator_periodograms(pg, indicators: dict, path: str) -> str:
    """The velocity periodogram above one periodogram per indicator, on one period axis; each panel's
    strongest peaks marked, and the velocity's strongest period as a dashed line through all panels."""
    names = list(indicators)
    fig, axes = plt.subplots(len(names) + 1, 1, figsize=(8, 1.9 * (len(names) + 1) + 0.6), sharex=True,
                             squeeze=False)
    axes = axes[:, 0]
    best = pg.peaks[0]["period"] if pg.peaks else None
    for ax, (label, q) in zip(axes, [("rv", pg)] + [(n, indicators[n]) for n in names], strict=True):
        ax.semilogx(1 / q.frequency, q.power, lw=0.7, color="0.2" if label == "rv" else "tab:blue")
        for k, peak in enumerate(q.peaks[:3]):
            ax.plot(peak["period"], peak["power"], "v", color="tab:red" if k == 0 else "tab:orange", ms=5)
            ax.annotate(f"{peak['period']:.3f} d", (peak["period"], peak["power"]), textcoords="offset points",
                        xytext=(4, 2 + 9 * k), fontsize=7)
        if best is not None:
            ax.axvline(best, color="tab:red", lw=0.6, ls="--")
        ax.set_ylabel(f"{label}\nGLS power", fontsize=8)
    axes[-1].set_xlabel("period (d)")
    fig.tight_layout()
    return _save(fig, path)
