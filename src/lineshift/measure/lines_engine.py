"""Line-by-line velocities against the co-added template: the third velocity engine (``--method lines``).

Every mask line gets its own velocity, so lines can be chosen afterwards by depth, species or
sensitivity, and the spectrum's velocity is a combination of the lines that a few bad ones (a blend
that moves, a telluric line the mask rejection missed, a cosmic ray the spike finder missed) cannot
pull away.

Template
    The template engine's co-add (:mod:`.coadd`, :class:`.template_engine.TemplateState`), each spectrum
    against the template without its own contribution.

Per line (Bouchy, Pepe & Queloz 2001, A&A 374, 733, applied line by line as in Dumusque 2018, A&A 620,
A47, and Artigau et al. 2022, AJ 164, 84)
    Per order the template is shifted to the current velocity and scaled by a low-order polynomial in pixel
    position fitted to the spectrum (iteratively clipped at ``clip`` sigma, so a spike or a strong foreign
    line does not tilt it).  Each pixel belongs to the mask line nearest to it in the star's frame, within
    ``half_window`` (m/s); so the lines' domains never overlap, and their velocities have independent errors.
    With the model derivative ``g_i = dM_i/dv`` (analytic, from the cubic B-spline of the template) and
    the residual ``r_i = F_i - M_i`` the line's shift and its photon error are

        dv = sum(w g r) / sum(w g^2),        sigma = 1 / sqrt(sum(w g^2)),

    with ``w = 1 / (var_spectrum + P^2 var_template)``: the Bouchy et al. optimal weights
    ``W = (dA/dv)^2 / var`` restricted to the line's pixels; a line seen in two overlapping orders adds
    the sums of both.

Combination (Artigau et al. 2022, sect. 2.3: a Gaussian core plus a broad outlier component)
    The line velocities ``v_k`` with errors ``s_k`` are modelled as drawn from
    ``(1 - f) N(v, s_k^2) + f N(v, s_k^2 + S^2)``: a core at the spectrum's velocity v with the lines'
    own errors, and a broad component of width S for lines that something else moved.  v, f and S are
    fitted by expectation-maximisation (Dempster, Laird & Rubin 1977); each line's
    ``outlier_probability`` is its posterior membership of the broad component.  The error of v is
    from the curvature of the mixture log-likelihood at its maximum (f and S held), which is
    ``1 / sqrt(sum 1/s_k^2)`` when no line is an outlier.  The linearisation is repeated at the new
    velocity until it moves by less than 1e-3 of its error.

Notes
    Pixels farther than ``half_window`` from every mask line (weak lines the mask does not list) are not
    used, while the template engine uses every pixel: with a sparse mask this engine's error is the
    larger one (about 8 % on the demo echelle; equal when every pixel is given to its nearest line).
    A line with fewer than ``min_pixels`` usable pixels, or none with a slope in the template, has no
    velocity (NaN in its row, not combined).  Velocities are topocentric, relative to the template's
    frame, like the template engine's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from lineshift.errors import MeasurementError
from lineshift.measure.coadd import bspline, on_common_continuum
from lineshift.measure.prepare import PreparedOrder
from lineshift.measure.tellurics import drop_bands
from lineshift.model import C_MS, LineMask

__all__ = ["LinesResult", "LinesSettings", "combine_lines", "measure_lines"]


@dataclass(frozen=True)
class LinesSettings:
    """Settings of the line-by-line engine.

    Attributes
    ----------
    half_window : float, m/s; pixels farther than this from every mask line (star's frame) are not used
    poly_degree : int, degree of the per-order multiplicative polynomial
    clip : float, sigma; pixels beyond this from the polynomial-times-template model do not set the polynomial
    edge_pixels : int, pixels at each order end left out
    min_pixels : int, usable pixels a line needs
    iterations : int, most linearisations (re-shifts of the template)
    """

    half_window: float = 12_000.0
    poly_degree: int = 3
    clip: float = 5.0
    edge_pixels: int = 10
    min_pixels: int = 5
    iterations: int = 5


@dataclass(frozen=True)
class LinesResult:
    """One spectrum's line-by-line measurement (topocentric, template frame).

    Attributes
    ----------
    rv, rv_err : float, m/s, the combined velocity and its error
    snr : float, median signal-to-noise per pixel
    n_lines : int, lines with a velocity
    n_orders : int, orders with at least one line
    outlier_fraction : float, fitted weight f of the broad component
    outlier_width : float, m/s, fitted width S of the broad component
    lines : tuple of dict, one per mask line inside the spectrum: ``wavelength`` (rest, vacuum A),
        ``species``, ``depth`` (1 - template flux at the line), ``rv``, ``rv_err`` (m/s),
        ``outlier_probability``, ``n_pixels``, ``chi2_red``
    orders : tuple of dict, per order ``order``, ``wavelength``, ``rv``, ``rv_err``, ``n_lines``, ``chi2_red``,
        ``flag`` (the plain inverse-variance mean of the order's lines, for the orders table)
    """

    rv: float
    rv_err: float
    snr: float
    n_lines: int
    n_orders: int
    outlier_fraction: float
    outlier_width: float
    lines: tuple[dict, ...]
    orders: tuple[dict, ...]


def _normal(x: np.ndarray, var: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * x * x / var) / np.sqrt(2 * np.pi * var)


def combine_lines(v: np.ndarray, err: np.ndarray, *, max_iter: int = 200) -> tuple[float, float, float, float,
                                                                                    np.ndarray]:
    """Outlier-resistant velocity of many line velocities: a Gaussian core plus a broad component.

    Mixture ``(1 - f) N(v0, err^2) + f N(v0, err^2 + S^2)`` fitted by EM (Artigau et al. 2022, AJ 164, 84;
    Dempster, Laird & Rubin 1977).  Returns ``(v0, v0_err, f, S, p_outlier)``; ``v0_err`` from the
    curvature of the log-likelihood in v0 at the maximum.

    The broad width is kept at least ``5 x median(err)`` so the components stay distinct; f is kept in
    [1e-6, 0.5] so the core is always the majority.
    """
    v = np.asarray(v, float)
    err = np.asarray(err, float)
    var = err * err
    if v.size == 0:
        raise ValueError("no line velocities to combine")
    if v.size < 3:
        w = 1 / var
        return float(np.sum(w * v) / np.sum(w)), float(1 / np.sqrt(np.sum(w))), 0.0, 0.0, np.zeros(v.size)
    order = np.argsort(v)
    cw = np.cumsum(1 / var[order])
    v0 = float(v[order][np.searchsorted(cw, 0.5 * cw[-1])])          # weighted median to start
    floor = 5.0 * float(np.median(err))
    spread = 1.4826 * float(np.median(np.abs(v - v0)))
    S2 = max((10 * spread) ** 2, floor**2)
    f = 0.05
    for _ in range(max_iter):
        core = (1 - f) * _normal(v - v0, var)
        broad = f * _normal(v - v0, var + S2)
        tot = core + broad
        p = np.where(tot > 0, broad / np.where(tot > 0, tot, 1.0), 1.0)
        wk = (1 - p) / var + p / (var + S2)
        v_new = float(np.sum(wk * v) / np.sum(wk))
        f_new = float(np.clip(p.mean(), 1e-6, 0.5))
        if p.sum() > 1e-9:
            # one fixed-point step of the broad width's M-step: sum p ((v-v0)^2 - S^2 - var) / (var+S^2)^2 = 0
            r2 = (v - v_new) ** 2
            num = np.sum(p * (r2 - var) / (var + S2) ** 2)
            den = np.sum(p / (var + S2) ** 2)
            S2_new = max(float(num / den), floor**2)
        else:
            S2_new = S2
        done = abs(v_new - v0) < 1e-6 * float(np.min(err)) and abs(f_new - f) < 1e-8
        v0, f, S2 = v_new, f_new, S2_new
        if done:
            break
    core = (1 - f) * _normal(v - v0, var)
    broad = f * _normal(v - v0, var + S2)
    p = broad / np.maximum(core + broad, 1e-300)
    # observed information in v0: -d2/dv0^2 of sum log((1-f) N_c + f N_b), analytic
    info = 0.0
    for comp, vv in ((core, var), (broad, var + S2)):
        share = comp / np.maximum(core + broad, 1e-300)
        info += np.sum(share * (1 / vv - ((v - v0) / vv) ** 2))
    mean_score = (1 - p) * (v - v0) / var + p * (v - v0) / (var + S2)
    info += np.sum(mean_score**2)
    info_val = float(info)
    if not math.isfinite(info_val) or info_val <= 0:
        info_val = float(np.sum((1 - p) / var + p / (var + S2)))
    return v0, 1 / math.sqrt(info_val), f, math.sqrt(S2), p


def _poly_fit(flux, var, T, vt, powers, m, clip, P0):
    """Weighted, iteratively clipped fit of ``flux ~ P(x) T`` (the template shifted); returns P."""
    P = P0
    use = m.copy()
    for _ in range(4):
        w = np.where(use, 1.0 / (var + P * P * vt), 0.0)
        A = (powers * (w * T * T)) @ powers.T
        b = powers @ (w * T * flux)
        try:
            c = np.linalg.solve(A, b)
        except np.linalg.LinAlgError:
            return None
        P = c @ powers
        r = (flux - P * T) * np.sqrt(np.where(m, 1.0 / (var + P * P * vt), 0.0))
        new = m & (np.abs(r) <= clip)
        if np.array_equal(new, use):
            break
        use = new
    return P


def measure_lines(orders: list[PreparedOrder], state, mask: LineMask, settings: LinesSettings | None = None, *,
                  delta0: float, factor: float | None, path: str | None = None,
                  band_factor: float = 1.0) -> LinesResult:
    """Line-by-line topocentric velocity of one prepared spectrum against the template ``state``.

    Parameters
    ----------
    orders : list of PreparedOrder
    state : TemplateState, the co-added template (the template engine's)
    mask : LineMask, rest vacuum wavelengths (Angstrom); ``species`` labels are carried to the lines
    settings : LinesSettings
    delta0 : float, starting ln(1 + rv_topo/c) relative to the template's frame
    factor : float or None, the co-adding factor this spectrum entered the template with (None: not in it)
    path : str, for error messages
    band_factor : float, file-frame / observatory-frame wavelength (telluric bands; 1 unless barycentric)

    Raises
    ------
    MeasurementError
        No order, or no line with a velocity.
    """
    s = settings or LinesSettings()
    if not orders:
        raise MeasurementError("no usable order (too few valid pixels)", path=path, status="no valid pixels")
    orders = on_common_continuum(orders, state.continua)
    orders = state.screened(orders, factor if factor is not None else float(np.exp(-delta0)))
    flux_t, var_t, ok_t = state.smoothed(*state.without(orders, factor, band_factor))
    orders = [drop_bands(o, state.bands * band_factor) for o in orders]   # telluric pixels, in this spectrum's frame
    coef = state.prefilter(flux_t)
    ok_t = ok_t & np.isfinite(var_t)
    var_t = np.where(ok_t, var_t, 0.0)
    lnl = np.log(mask.wavelength)
    species = mask.species if mask.species else ("",) * len(mask)
    half = np.log1p(s.half_window / C_MS)
    delta = float(delta0)
    polys: dict[int, np.ndarray] = {}
    combined = None
    for _ in range(s.iterations):
        sgr = np.zeros(len(mask))
        sgg = np.zeros(len(mask))
        srr = np.zeros(len(mask))
        npx = np.zeros(len(mask), dtype=np.int64)
        per_order = []
        for o in orders:
            n = o.flux.size
            u = np.log(o.wave)
            seg = state.segment(o.index)   # (first grid index, offset in the arrays, length) of its template
            if seg is None:
                continue
            start, off_t, n_seg = seg
            xi = (u - delta - state.lng0) / state.dlng + (off_t - start)
            inside = (xi > off_t + 2) & (xi < off_t + n_seg - 3)
            xi = np.clip(xi, off_t + 2, off_t + n_seg - 3)
            T, dT = bspline(coef, xi)
            i0 = np.floor(xi).astype(np.intp)
            fr = xi - i0
            m = o.good & inside & ok_t[i0] & ok_t[i0 + 1]
            m[: s.edge_pixels] = False
            m[n - s.edge_pixels:] = False
            if m.sum() < 4 * (s.poly_degree + 1):
                continue
            vt = (1 - fr) * var_t[i0] + fr * var_t[i0 + 1]
            x = np.linspace(-1.0, 1.0, n)
            powers = np.stack([x**j for j in range(s.poly_degree + 1)])
            P0 = polys.get(o.index)
            if P0 is None:
                P0 = np.full(n, np.median(o.flux[m] / np.maximum(T[m], 1e-3)))
            P = _poly_fit(o.flux, o.var, T, vt, powers, m, s.clip, P0)
            if P is None:
                continue
            polys[o.index] = P
            # domains: the nearest mask line in the star's frame, within half_window
            rest = u - delta
            j = np.clip(np.searchsorted(lnl, rest), 1, lnl.size - 1) if lnl.size > 1 else np.zeros(n, np.intp)
            if lnl.size > 1:
                left = rest - lnl[j - 1]
                right = lnl[j] - rest
                j = np.where(left < right, j - 1, j)
            label = np.where(m & (np.abs(rest - lnl[j]) <= half), j, -1)
            sel = label >= 0
            if not sel.any():
                continue
            w = 1.0 / (o.var[sel] + P[sel] ** 2 * vt[sel])
            # d/dv of P T(ln lambda - ln(1 + v/c)) = -P T' / (c + v), T' per unit ln lambda
            g = -P[sel] * dT[sel] / state.dlng / (C_MS * math.exp(delta))
            r = o.flux[sel] - P[sel] * T[sel]
            lab = label[sel]
            sgr += np.bincount(lab, w * g * r, len(mask))
            sgg += np.bincount(lab, w * g * g, len(mask))
            srr += np.bincount(lab, w * r * r, len(mask))
            npx += np.bincount(lab, minlength=len(mask))
            per_order.append((o, float(np.sum(w * g * r)), float(np.sum(w * g * g)), np.unique(lab)))
        has = (npx >= s.min_pixels) & (sgg > 0)
        if not has.any():
            raise MeasurementError("no mask line could be measured against the template", path=path,
                                   status="template fit failed")
        dv = np.full(len(mask), np.nan)
        ev = np.full(len(mask), np.nan)
        dv[has] = sgr[has] / sgg[has]
        ev[has] = 1 / np.sqrt(sgg[has])
        v_cur = C_MS * math.expm1(delta)
        off, off_err, f, S, p = combine_lines(dv[has], ev[has])
        combined = (v_cur, off, off_err, f, S, p, dv, ev, has, sgr, sgg, srr, npx, per_order)
        delta = math.log1p((v_cur + off) / C_MS)
        if abs(off) < 1e-3 * off_err:
            break
    v_cur, off, off_err, f, S, p, dv, ev, has, sgr, sgg, srr, npx, per_order = combined
    pout = np.full(len(mask), np.nan)
    pout[has] = p
    depth = np.full(len(mask), np.nan)   # from the first template segment that covers the line
    g = (lnl - state.lng0) / state.dlng
    for _, start, off_t, n_seg in state.segments:
        cover = np.isnan(depth) & (g > start + 2) & (g < start + n_seg - 3)
        if cover.any():
            depth[cover] = 1.0 - bspline(coef, g[cover] - start + off_t)[0]
    lines = []
    for k in np.flatnonzero(npx > 0):
        chi2 = (srr[k] - sgr[k] ** 2 / sgg[k]) / max(npx[k] - 1, 1) if has[k] else np.nan
        lines.append({"wavelength": float(mask.wavelength[k]), "species": species[k], "depth": float(depth[k]),
                      "rv": float(v_cur + dv[k]) if has[k] else np.nan, "rv_err": float(ev[k]),
                      "outlier_probability": float(pout[k]), "n_pixels": int(npx[k]), "chi2_red": float(chi2)})
    rows = []
    for o, a, b, labs in per_order:
        good = labs[has[labs]]
        rows.append({"order": int(o.index), "wavelength": float(np.median(o.wave)),
                     "rv": float(v_cur + a / b) if b > 0 else np.nan,
                     "rv_err": float(1 / np.sqrt(b)) if b > 0 else np.nan,
                     "n_lines": int(good.size), "chi2_red": np.nan, "flag": "" if b > 0 else "no fit"})
    rows.sort(key=lambda r: r["order"])
    snr = float(np.median(np.concatenate([o.flux[o.good][::4] / np.sqrt(o.var[o.good][::4]) for o in orders])))
    return LinesResult(float(v_cur + off), float(off_err), snr, int(has.sum()), len(rows), float(f), float(S),
                       tuple(lines), tuple(rows))
