"""Wavelength-calibration check against laboratory lines (``lineshift wavecheck``).

Per line, in the frame of the file's own wavelength solution (no barycentric correction unless
asked):  ``residual = c (lambda_measured - lambda_lab) / lambda_lab`` (m/s).  ``lambda_measured``
is the centre of a Gaussian integrated over the pixels (the right model for undersampled lamp
lines) on a linear background, fitted with the pixel variances; its error is the fit's.

Lines are rejected with a reason in ``status``: ``edge`` (window leaves the order or holds a bad
pixel), ``blend`` (another listed line within the fit window plus ``blend_fwhm`` FWHM, or a fit
wider than ``max_width_ratio`` x the order's median), ``saturated`` (a pixel at or above the saturation level),
``low snr`` (amplitude below ``min_snr`` times its error), ``fit failed``, and ``outlier`` (robust
clipping about the order's straight-line fit at ``clip`` sigma).

Per order: ``offset`` = weighted mean residual of the good lines with its error (inflated by
sqrt(reduced chi-square) when that exceeds 1), ``slope`` = the change of the residual from the
first to the last pixel of a weighted straight-line fit against pixel, ``rms`` = the scatter about
that line.  Orders are flagged when the offset exceeds both ``threshold_ms`` and
``threshold_sigma`` times its error, both from zero and from the exposure's global offset (the
weighted mean over the orders, after leaving out orders far from their median): a drift of the
whole exposure is reported as the global offset, not as every order flagged.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift.linefit import batched_fit, gaussian_pixels, weighted_line
from lineshift.measure.peak import FWHM_PER_SIGMA
from lineshift.measure.prepare import pixel_edges
from lineshift.model import C_MS, Spectrum

__all__ = ["WavecheckSettings", "check_spectrum", "fit_drift"]


@dataclass(frozen=True)
class WavecheckSettings:
    """Options of the calibration check."""

    kind: str = "emission"
    window_pixels: int = 7
    min_snr: float = 10.0
    clip: float = 4.0
    blend_fwhm: float = 1.5
    max_width_ratio: float = 1.5
    saturation: float | None = None
    threshold_ms: float = 20.0
    threshold_sigma: float = 3.0

    def __post_init__(self):
        if self.kind not in ("emission", "absorption"):
            raise ValueError(f"kind must be 'emission' or 'absorption', not {self.kind!r}")


def _order_candidates(wave, lab, W):
    """Indices of lab lines whose window (+-W pixels around the nearest pixel) lies inside the order."""
    i = np.searchsorted(wave, lab)
    inside = (lab > wave[0]) & (lab < wave[-1]) & (i - W >= 0) & (i + W < wave.size)
    return np.flatnonzero(inside), i


def check_spectrum(spectrum: Spectrum, lab_wave: np.ndarray, settings: WavecheckSettings, *,
                   lab_species: tuple[str, ...] = (), berv: float | None = None) -> tuple[list[dict], list[dict]]:
    """Residuals of laboratory lines in one spectrum; returns (line rows, order rows).

    ``lab_wave`` are vacuum wavelengths (Angstrom).  With ``berv`` (m/s), measured wavelengths are
    moved to the barycentric frame first (for lines that are fixed there).
    """
    W = settings.window_pixels
    sign = 1.0 if settings.kind == "emission" else -1.0
    path = spectrum.obs.path
    line_rows: list[dict] = []
    order_rows: list[dict] = []
    lab_wave = np.asarray(lab_wave, dtype=float)
    # gather every (order, line) window into one batch
    batch = []
    for order in spectrum.orders:
        wave, flux, var = order.wave, order.flux, order.var
        good = np.isfinite(flux) & np.isfinite(var) & (var > 0)
        cand, near = _order_candidates(wave, lab_wave, W)
        edges = pixel_edges(wave)
        for j in cand:
            sl = slice(near[j] - W, near[j] + W + 1)
            batch.append((order.index, j, wave.size, near[j], edges[near[j] - W:near[j] + W + 2],
                          flux[sl], var[sl], good[sl]))
    if not batch:
        return line_rows, order_rows
    n = len(batch)
    k = 2 * W + 1
    lo = np.array([b[4][:-1] for b in batch]) - lab_wave[[b[1] for b in batch]][:, None]
    hi = np.array([b[4][1:] for b in batch]) - lab_wave[[b[1] for b in batch]][:, None]
    y = np.array([b[5] for b in batch])
    v = np.array([b[6] for b in batch])
    g = np.array([b[7] for b in batch])
    edge_bad = ~g.all(axis=1)
    w = np.where(g, 1.0 / np.where(g, v, 1.0), 0.0)
    y = np.where(g, y, 0.0)
    u = np.tile(np.linspace(-1, 1, k), (n, 1))
    centre = 0.5 * (lo + hi)
    bg = np.median(np.concatenate((y[:, :2], y[:, -2:]), axis=1), axis=1)
    amp = sign * np.max(sign * (y - bg[:, None]), axis=1)
    dl = np.median(hi - lo, axis=1)
    peak_at = centre[np.arange(n), np.argmax(sign * (y - bg[:, None]), axis=1)]
    p0 = np.column_stack((bg, np.zeros(n), amp, peak_at, 1.5 * dl))
    p, cov, _, ok = batched_fit(gaussian_pixels(lo, hi, u), p0, y, w, positive=(4,))
    _, _, A, mu, s = p.T
    mu_err = np.sqrt(np.abs(cov[:, 3, 3]))
    a_err = np.sqrt(np.abs(cov[:, 2, 2]))
    lab = lab_wave[[b[1] for b in batch]]
    orders_of = np.array([b[0] for b in batch])
    residual = C_MS * mu / lab
    residual_err = C_MS * mu_err / lab
    measured = lab + mu
    if berv is not None:
        measured = measured * (1 + berv / C_MS)
        residual = C_MS * (measured / lab - 1)
    status = np.full(n, "ok", dtype=object)
    status[edge_bad] = "edge"
    fitbad = ~ok | (sign * A <= 0) | (np.abs(mu) > (hi[:, -1] - lo[:, 0]) / 2) | (s < 0.2 * dl)
    status[(status == "ok") & fitbad] = "fit failed"
    if settings.saturation is not None:
        sat = np.nanmax(np.where(g, y, -np.inf), axis=1) >= settings.saturation
        status[(status == "ok") & sat] = "saturated"
    status[(status == "ok") & (np.abs(A) < settings.min_snr * a_err)] = "low snr"
    fwhm_a = FWHM_PER_SIGMA * s
    for idx in np.unique(orders_of):
        sel = (orders_of == idx) & (status == "ok")
        if sel.sum() >= 3:
            med = np.median(fwhm_a[sel])
            wide = (orders_of == idx) & (fwhm_a > settings.max_width_ratio * med)
            status[(status == "ok") & wide] = "blend"
    # another listed line whose profile reaches into this line's fit window
    fw_order = np.array([np.median(fwhm_a[(orders_of == o) & (status == "ok")]) if np.any((orders_of == o) &
                         (status == "ok")) else np.median(fwhm_a) for o in orders_of])
    reach = W * dl + settings.blend_fwhm * fw_order
    sorted_lab = np.sort(lab_wave)
    left = np.searchsorted(sorted_lab, lab - reach, side="left")
    right = np.searchsorted(sorted_lab, lab + reach, side="right")
    status[(status == "ok") & ((right - left) > 1)] = "blend"
    pix = np.array([b[3] for b in batch], dtype=float) + mu / dl
    npix = {b[0]: b[2] for b in batch}
    for idx in np.unique(orders_of):
        sel = np.flatnonzero(orders_of == idx)
        _clip_order(residual, residual_err, pix, status, sel, settings.clip)
        order_rows.append(_order_summary(path, int(idx), residual, residual_err, pix, status, sel, npix[idx], settings))
    for t in range(n):
        j = batch[t][1]
        line_rows.append({
            "file": path, "order": int(orders_of[t]), "wavelength_lab": float(lab[t]),
            "wavelength_measured": float(measured[t]) if status[t] != "fit failed" else np.nan,
            "residual": float(residual[t]) if status[t] != "fit failed" else np.nan,
            "residual_err": float(residual_err[t]) if status[t] != "fit failed" else np.nan,
            "status": str(status[t]), "species": lab_species[j] if lab_species else "",
            "pixel": float(pix[t]), "fwhm": float(C_MS * fwhm_a[t] / lab[t]), "snr": float(abs(A[t]) / a_err[t])
            if a_err[t] > 0 else np.nan,
        })
    flag_orders(order_rows, settings)
    return line_rows, order_rows


def _clip_order(residual, err, pix, status, sel, clip):
    for _ in range(5):
        use = sel[status[sel] == "ok"]
        if use.size < 4:
            return
        coef, _ = weighted_line(pix[use], residual[use], err[use])
        z = (residual[use] - coef[0] - coef[1] * pix[use]) / err[use]
        scale = max(1.0, 1.4826 * np.median(np.abs(z - np.median(z))))
        out = use[np.abs(z) > clip * scale]
        if out.size == 0:
            return
        status[out] = "outlier"


def _order_summary(path, idx, residual, err, pix, status, sel, npix, settings) -> dict:
    use = sel[status[sel] == "ok"]
    row = {"file": path, "order": idx, "n_lines": int(use.size), "offset": np.nan, "offset_err": np.nan,
           "slope": np.nan, "rms": np.nan, "slope_err": np.nan, "chi2_red": np.nan, "offset_from_global": np.nan,
           "flagged": False}
    if use.size == 0:
        return row
    w = 1 / err[use] ** 2
    mean = float(np.sum(w * residual[use]) / np.sum(w))
    chi2 = float(np.sum(w * (residual[use] - mean) ** 2) / max(use.size - 1, 1))
    row.update(offset=mean, offset_err=float(np.sqrt(1 / np.sum(w)) * np.sqrt(max(1.0, chi2)) if use.size > 1
                                           else np.sqrt(1 / np.sum(w))), chi2_red=chi2)
    if use.size >= 2:
        coef, cov = weighted_line(pix[use], residual[use], err[use])
        fit = coef[0] + coef[1] * pix[use]
        chi2l = float(np.sum(w * (residual[use] - fit) ** 2) / max(use.size - 2, 1))
        span = npix - 1
        row.update(slope=float(coef[1] * span),
                   slope_err=float(np.sqrt(cov[1, 1]) * span * np.sqrt(max(1.0, chi2l))),
                   rms=float(np.sqrt(np.mean((residual[use] - fit) ** 2))))
    return row


def _off(value: float, err: float, settings) -> bool:
    return bool(abs(value) > settings.threshold_ms and abs(value) > settings.threshold_sigma * err)


def global_offset(order_rows: list[dict], settings: WavecheckSettings | None = None) -> tuple[float, float, int]:
    """The exposure's global offset: weighted mean of the order offsets (m/s), its error and the orders used.

    With ``settings``, orders off the median of the order offsets by more than the flag thresholds
    are left out first (one pass), so that a few distorted orders do not drag the reference.
    """
    off = np.array([r["offset"] for r in order_rows], dtype=float)
    err = np.array([r["offset_err"] for r in order_rows], dtype=float)
    ok = np.isfinite(off) & np.isfinite(err) & (err > 0)
    if not ok.any():
        return np.nan, np.nan, 0
    if settings is not None and ok.sum() >= 3:
        med = float(np.median(off[ok]))
        far = np.abs(off - med)
        keep = ok & ~((far > settings.threshold_ms) & (far > settings.threshold_sigma * err))
        ok = keep if keep.any() else ok
    w = 1 / err[ok] ** 2
    return float(np.sum(w * off[ok]) / np.sum(w)), float(np.sqrt(1 / np.sum(w))), int(ok.sum())


def flag_orders(order_rows: list[dict], settings: WavecheckSettings) -> None:
    """Set ``offset_from_global`` and ``flagged``: an order is flagged when its offset is off both zero and the
    exposure's global offset (by more than ``threshold_ms`` and ``threshold_sigma`` times its error), so a drift
    of the whole exposure does not flag every order and hide the one that is really distorted."""
    ref, ref_err, _ = global_offset(order_rows, settings)
    for row in order_rows:
        d = row["offset"] - ref
        row["offset_from_global"] = float(d)
        row["flagged"] = bool(np.isfinite(row["offset"]) and _off(row["offset"], row["offset_err"], settings)
                              and np.isfinite(d) and _off(d, float(np.hypot(row["offset_err"], ref_err)), settings))


def file_summary(order_rows: list[dict], settings: WavecheckSettings | None = None) -> dict:
    """Global offset (weighted over orders; with ``settings`` robust to distorted orders, see
    :func:`global_offset`), rms over orders, flagged orders, and whether the global offset itself is off zero."""
    off = np.array([r["offset"] for r in order_rows], dtype=float)
    err = np.array([r["offset_err"] for r in order_rows], dtype=float)
    ok = np.isfinite(off) & np.isfinite(err) & (err > 0)
    mean, mean_err, n = global_offset(order_rows, settings)
    if n == 0:
        return {"offset": np.nan, "offset_err": np.nan, "rms": np.nan, "flagged": [], "n_orders": 0,
                "global_flagged": False}
    return {"offset": mean, "offset_err": mean_err, "rms": float(np.std(off[ok])),
            "flagged": [r["order"] for r in order_rows if r.get("flagged")], "n_orders": int(ok.sum()),
            "global_flagged": _off(mean, mean_err, settings) if settings is not None else False}


def fit_drift(t_days: np.ndarray, offset: np.ndarray, err: np.ndarray) -> tuple[float, float, float]:
    """Linear drift of the global offset: (rate in m/s per hour, its error, offset at the first time)."""
    t = (np.asarray(t_days) - np.min(t_days)) * 24.0
    coef, cov = weighted_line(t, np.asarray(offset), np.asarray(err))
    return float(coef[1]), float(np.sqrt(cov[1, 1])), float(coef[0])
