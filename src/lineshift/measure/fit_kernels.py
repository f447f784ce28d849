"""Compiled forms (numba) of the template engine's per-spectrum work (:mod:`.template_engine`), each
with its plain NumPy form kept in the caller and tested against it (tests/test_fit_kernels.py).

* :func:`template_segment` and :func:`prefilter_segments`: what a spectrum is fitted against
  (:meth:`.template_engine.TemplateState.fit_arrays`; plain form: the array steps there, which are
  :meth:`~.template_engine.TemplateState.without`, :meth:`~.template_engine.TemplateState.smoothed` and
  :meth:`~.template_engine.TemplateState.prefilter`): per segment its own contribution taken off,
  flux and variance, the Gaussian smoothing (a normalised convolution), then the cubic B-spline
  prefilter of every segment, instead of some thirty whole-array operations per segment.  The
  Gaussian is the kernel of ``scipy.ndimage.gaussian_filter1d`` (truncated at 4 sigma, normalised
  to a sum of 1, zeros outside the segment) applied with the same additions in the same order; the
  prefilter the recursive filter of Unser, Aldroubi & Eden (1991, IEEE PAMI 13, 277) with the
  mirror start of ``scipy.ndimage.spline_filter1d``, the recursions of four segments interleaved:
  the same numbers to the last bit (tested against scipy and against the plain form).
* :func:`fit_orders`: the Gauss-Newton iterations of a block of orders (:func:`.template_engine._fit_block`,
  whose plain forms are ``_fit_block`` itself and ``_fit_block_reference``): the B-spline (its
  power-basis coefficients per interval formed once), weights, residuals and the sums of the
  normal equations and of the residual bins (:func:`.response.bin_residuals`) in loops over the
  pixels, the 5 x 5 systems solved by Gaussian elimination with partial pivoting (as LAPACK's
  getrf/getrs).  The sums run sequentially over the pixels where the NumPy form's matrix products
  let BLAS block them, so results differ in the last bits: velocities of one fit by ~1e-12 of
  their errors, a whole template run (whose fits start from the mask pass and stop within 1e-9 of
  delta) by ~1e-6, as much as the mask engine's kernels alone move it.
* :func:`median_snr`: the spectrum's median S/N, its values gathered in one loop per order;
  :func:`monotone_median`: the median of an order's wavelengths, the middle of the array when it
  is monotone, NaN otherwise (the caller then takes ``np.median``): the same numbers as NumPy.

The compiled forms are used when :func:`.kernels.compiled` says so (``LINESHIFT_JIT``: ``1`` always,
``0`` never, unset: from the :data:`.kernels.WARMUP_SPECTRA`-th spectrum a process prepares on), each
compiled on first use and cached on disk by numba like those of :mod:`.kernels`, with NumPy's
floating-point rules (``error_model="numpy"``).  Their work arrays are this thread's
(:func:`scratch`): allocating arrays of this size anew costs more in page faults than the arithmetic.
"""

from __future__ import annotations

import threading
from types import SimpleNamespace

import numpy as np

from lineshift.measure import kernels

__all__ = ["compiled", "compiled_always", "fit_orders", "gaussian_weights", "median_snr", "monotone_median",
           "prefilter", "prefilter_segments", "scratch", "smooth_constant", "smooth_segment", "template_segment"]

_COMPILED: SimpleNamespace | bool | None = None
_SCRATCH = threading.local()

#: the pole of the cubic B-spline's recursive prefilter, sqrt(3) - 2 (Unser, Aldroubi & Eden 1991),
#: written out to double precision (``np.sqrt(3.0) - 2.0`` rounds one unit lower)
POLE = -0.267949192431122706472553658494127633


def gaussian_weights(sigma: float) -> np.ndarray:
    """The sampled Gaussian of ``scipy.ndimage.gaussian_filter1d`` (its default ``truncate=4``):
    ``exp(-x^2 / (2 sigma^2))`` at x = -r..r, r = int(4 sigma + 0.5), divided by its sum."""
    radius = int(4.0 * float(sigma) + 0.5)
    x = np.arange(-radius, radius + 1)
    phi = np.exp(-0.5 / (sigma * sigma) * x**2)
    return phi / phi.sum()


def _correlate(x, wts, out):   # pragma: no cover (compiled)
    """``out = sum_j wts[j] x[i + j - r]`` with zeros beyond the ends, for symmetric ``wts`` of length
    2r + 1: for every point the centre term first, then the pairs from the outermost in (scipy's
    symmetric loop)."""
    n = x.size
    r = (wts.size - 1) // 2
    xp = np.zeros(n + 2 * r)
    xp[r:r + n] = x
    _correlate_padded(xp, wts, out)


def _correlate_padded(xp, wts, out):   # pragma: no cover (compiled)
    """:func:`_correlate` of ``xp[r:r + n]``, its r zeros on either side already in ``xp``; the loops
    over the points innermost, so they run on vectors (views indexed by the loop counter alone: no
    index can be negative)."""
    n = out.size
    r = (wts.size - 1) // 2
    wc = wts[r]
    x = xp[r:r + n]
    if 1 <= r <= 4:   # the common radii in one pass over the points (the same additions, in the same order)
        w0 = wts[0]
        w1 = wts[1] if r >= 2 else 0.0
        w2 = wts[2] if r >= 3 else 0.0
        w3 = wts[3] if r >= 4 else 0.0
        a1, b1 = xp[r - 1:r - 1 + n], xp[r + 1:r + 1 + n]
        if r == 1:
            for i in range(n):
                out[i] = x[i] * wc + (a1[i] + b1[i]) * w0
            return
        a2, b2 = xp[r - 2:r - 2 + n], xp[r + 2:r + 2 + n]
        if r == 2:
            for i in range(n):
                out[i] = (x[i] * wc + (a2[i] + b2[i]) * w0) + (a1[i] + b1[i]) * w1
            return
        a3, b3 = xp[r - 3:r - 3 + n], xp[r + 3:r + 3 + n]
        if r == 3:
            for i in range(n):
                out[i] = ((x[i] * wc + (a3[i] + b3[i]) * w0) + (a2[i] + b2[i]) * w1) + (a1[i] + b1[i]) * w2
            return
        a4, b4 = xp[0:n], xp[8:8 + n]
        for i in range(n):
            out[i] = (((x[i] * wc + (a4[i] + b4[i]) * w0) + (a3[i] + b3[i]) * w1) + (a2[i] + b2[i]) * w2) + (
                a1[i] + b1[i]) * w3
        return
    for i in range(n):
        out[i] = x[i] * wc
    for j in range(r, 0, -1):
        wj = wts[r - j]
        a = xp[r - j:r - j + n]
        b = xp[r + j:r + j + n]
        for i in range(n):
            out[i] += (a[i] + b[i]) * wj


def _causal_start(c, z):   # pragma: no cover (compiled)
    """The first coefficient of the causal recursion for a mirror-symmetric extension of ``c`` (after
    the gain): ``sum_k z^k`` over the mirrored signal (its terms vanish once z^k underflows to 0)."""
    n = c.size
    zn1 = z ** (n - 1)
    c0 = c[0] + zn1 * c[n - 1]
    zi = z
    for i in range(1, n - 1):
        c0 += zi * (c[i] + zn1 * c[n - 1 - i])
        zi *= z
        if zi == 0.0:
            break
    return c0 / (1 - zn1 * zn1)


def _prefilter(c, z):   # pragma: no cover (compiled)
    """Cubic B-spline coefficients of ``c`` in place (mirror-symmetric extension): the gain, then a
    causal and an anti-causal first-order recursion with pole ``z``, started as for a mirrored signal."""
    n = c.size
    if n < 2:
        return
    gain = (1.0 - z) * (1.0 - 1.0 / z)
    for i in range(n):
        c[i] *= gain
    c[0] = _causal_start(c, z)
    prev = c[0]
    for i in range(1, n):
        prev = c[i] + z * prev
        c[i] = prev
    prev = (z * c[n - 2] + c[n - 1]) * z / (z * z - 1)
    c[n - 1] = prev
    for i in range(n - 2, -1, -1):
        prev = z * (prev - c[i])
        c[i] = prev


def _prefilter_segments(c, offsets, lengths, z):   # pragma: no cover (compiled)
    """:func:`_prefilter` of each segment ``c[offsets[s]:offsets[s] + lengths[s]]``; segments of one
    length four at a time, their recursions interleaved (each waits on its own previous value only,
    so four run in the time of one): the same operations on each, in the same order."""
    nseg = offsets.size
    gain = (1.0 - z) * (1.0 - 1.0 / z)
    order = np.argsort(lengths, kind="mergesort")
    s = 0
    while s < nseg:
        n = lengths[order[s]]
        if s + 4 <= nseg and lengths[order[s + 3]] == n and n >= 2:
            o0, o1, o2, o3 = offsets[order[s]], offsets[order[s + 1]], offsets[order[s + 2]], offsets[order[s + 3]]
            for o in (o0, o1, o2, o3):
                seg = c[o:o + n]
                for i in range(n):
                    seg[i] *= gain
                seg[0] = _causal_start(seg, z)
            p0, p1, p2, p3 = c[o0], c[o1], c[o2], c[o3]
            for i in range(1, n):
                p0 = c[o0 + i] + z * p0
                p1 = c[o1 + i] + z * p1
                p2 = c[o2 + i] + z * p2
                p3 = c[o3 + i] + z * p3
                c[o0 + i] = p0
                c[o1 + i] = p1
                c[o2 + i] = p2
                c[o3 + i] = p3
            e = n - 1
            p0 = (z * c[o0 + e - 1] + c[o0 + e]) * z / (z * z - 1)
            p1 = (z * c[o1 + e - 1] + c[o1 + e]) * z / (z * z - 1)
            p2 = (z * c[o2 + e - 1] + c[o2 + e]) * z / (z * z - 1)
            p3 = (z * c[o3 + e - 1] + c[o3 + e]) * z / (z * z - 1)
            c[o0 + e], c[o1 + e], c[o2 + e], c[o3 + e] = p0, p1, p2, p3
            for i in range(n - 2, -1, -1):
                p0 = z * (p0 - c[o0 + i])
                p1 = z * (p1 - c[o1 + i])
                p2 = z * (p2 - c[o2 + i])
                p3 = z * (p3 - c[o3 + i])
                c[o0 + i] = p0
                c[o1 + i] = p1
                c[o2 + i] = p2
                c[o3 + i] = p3
            s += 4
        else:
            o = offsets[order[s]]
            _prefilter(c[o:o + n], z)
            s += 1


def _flux_and_variance(sw, swf, sw2v, flagged, floor, flux, var, ok):   # pragma: no cover (compiled)
    """Template flux and variance of points with the sums ``sw``, ``swf``, ``sw2v`` (as :meth:`.template_engine.
    TemplateState.without`), and which are usable (above ``floor`` and not ``flagged``)."""
    for i in range(sw.size):
        s = sw[i]
        good = s > floor
        sd = s if good else 1.0
        f = swf[i] / sd
        v = sw2v[i] / (sd * sd)
        v = v if good else np.inf
        flux[i] = f if good else 1.0
        var[i] = 0.0 if v < 0.0 else v   # np.maximum(v, 0): NaN stays
        ok[i] = good & ~flagged[i]


def _flux_and_variance_less(sw, swf, sw2v, ow, owf, ow2v, flagged, floor, flux, var,
                            ok):   # pragma: no cover (compiled)
    """:func:`_flux_and_variance` of the sums less a spectrum's contribution ``ow``, ``owf``, ``ow2v``."""
    for i in range(sw.size):
        s = sw[i] - ow[i]
        good = s > floor
        sd = s if good else 1.0
        f = (swf[i] - owf[i]) / sd
        v = (sw2v[i] - ow2v[i]) / (sd * sd)
        v = v if good else np.inf
        flux[i] = f if good else 1.0
        var[i] = 0.0 if v < 0.0 else v
        ok[i] = good & ~flagged[i]


def _template_segment(sw, swf, sw2v, flagged, ow, owf, ow2v, d0, s0, m, floor, gw, vw, vden, corr, smooth,
                      flux, var_out, ok_out):   # pragma: no cover (compiled)
    """Flux (into ``flux``: the prefilter follows, :func:`_prefilter_segments`), variance and usable
    points of one segment; every loop free of branches, so they run on vectors."""
    n = sw.size
    var = np.empty(n)
    ok = np.empty(n, dtype=np.bool_)
    e = d0 + m
    # before, on and after this spectrum's own contribution (taken off where it is)
    _flux_and_variance(sw[:d0], swf[:d0], sw2v[:d0], flagged[:d0], floor, flux[:d0], var[:d0], ok[:d0])
    _flux_and_variance_less(sw[d0:e], swf[d0:e], sw2v[d0:e], ow[s0:s0 + m], owf[s0:s0 + m], ow2v[s0:s0 + m],
                            flagged[d0:e], floor, flux[d0:e], var[d0:e], ok[d0:e])
    _flux_and_variance(sw[e:], swf[e:], sw2v[e:], flagged[e:], floor, flux[e:], var[e:], ok[e:])
    if smooth:
        _smooth(flux, var, ok, gw, vw, vden, corr)
    for i in range(n):
        g = ok[i] & np.isfinite(var[i])
        ok_out[i] = g
        var_out[i] = var[i] if g else 0.0


def _smooth(flux, var, ok, gw, vw, vden, corr):   # pragma: no cover (compiled)
    """The smoothing of :meth:`.template_engine.TemplateState.smoothed` on one segment, in place:
    a normalised convolution with the weights ``gw`` over the usable points, the variance summed
    with ``vw`` (the squared kernel) divided by ``vden`` and times ``corr``, never above the
    unsmoothed variance; usable where the kernel's usable weight exceeds 0.95."""
    n = flux.size
    rg = (gw.size - 1) // 2
    rv = (vw.size - 1) // 2
    okp = np.zeros(n + 2 * rg)      # the three inputs of the convolutions, zero-padded
    fzp = np.zeros(n + 2 * rg)
    vzp = np.zeros(n + 2 * rv)
    okc, fzc, vzc = okp[rg:rg + n], fzp[rg:rg + n], vzp[rv:rv + n]
    for i in range(n):
        okc[i] = 1.0 if ok[i] else 0.0
        fzc[i] = flux[i] if ok[i] else 0.0
        vzc[i] = var[i] if ok[i] else 0.0
    den = np.empty(n)
    num = np.empty(n)
    v2 = np.empty(n)
    _correlate_padded(okp, gw, den)
    _correlate_padded(fzp, gw, num)
    _correlate_padded(vzp, vw, v2)
    for i in range(n):
        good = ok[i] & (den[i] > 0.95)
        safe = den[i] if good else 1.0
        f = num[i] / safe
        a = corr * (v2[i] / vden) / (safe * safe)
        b = var[i]
        lo = a if (a < b or a != a) else b     # np.minimum: NaN wins
        flux[i] = f if good else flux[i]
        var[i] = lo if good else b
        ok[i] = good


def _strided_snr(flux, var, good, out, start):   # pragma: no cover (compiled)
    """``flux[good][::4] / sqrt(var[good][::4])`` into ``out`` from ``start``; returns where it ended."""
    c = 0
    k = start
    for i in range(flux.size):
        if good[i]:
            if c % 4 == 0:
                out[k] = flux[i] / np.sqrt(var[i])
                k += 1
            c += 1
    return k


_solve = kernels.solve_small   # compiled below with this module's options (Gaussian elimination)

def _fit_orders(coef, var_t, ok_t, lnw, lng0, base, lo, hi, flux, var, use, pw, p, dlng, dlng2, iterations, xi0,
                tables, S, width, bnum, bden, bcross, binfo):   # pragma: no cover (compiled)
    # polynomial degree up to 3 (``pw`` holds x^0..x^6): the sums in scalars, which the compiler keeps
    # in registers (accumulators in an array are stored and loaded again at every pixel); the moments
    # with the powers of x in a second loop over the pixels (``S``: what it sums), which is quicker
    # than one loop that holds everything at once
    k, n = flux.shape
    npar = p.shape[1]
    deg = npar - 2
    ng = -1.0 / dlng
    alive = np.ones(k, dtype=np.bool_)
    chi2 = np.zeros(k)
    info = np.zeros((k, npar, npar))
    mom = np.empty(7)
    cross = np.empty(4)
    bt = np.empty(4)
    A = np.empty((npar, npar))
    b = np.empty(npar)
    dp = np.zeros((k, npar))
    ok = True
    for j in range(k):                # the template index of each pixel at delta = 0
        xr, lr, bj = xi0[j], lnw[j], base[j]
        for i in range(n):
            xr[i] = (lr[i] - lng0) / dlng + bj
    # the cubic's power-basis coefficients of every interval an order can reach (as coadd.value_tables),
    # formed once for all iterations, in loops over the intervals that run on vectors
    first = np.empty(k, dtype=np.intp)
    for j in range(k):
        first[j] = int(lo[j])
        f = first[j]
        nint = int(hi[j]) - f + 1
        cm, cz, cp, cq = coef[f - 1:f - 1 + nint], coef[f:f + nint], coef[f + 1:f + 1 + nint], coef[f + 2:f + 2 + nint]
        r0, r1, r2, r3 = tables[j, 0], tables[j, 1], tables[j, 2], tables[j, 3]
        for t in range(nint):
            c0, c1, c2, c3 = cm[t], cz[t], cp[t], cq[t]
            r0[t] = (c0 + 4.0 * c1 + c2) / 6.0
            r1[t] = (c2 - c0) / 2.0
            r2[t] = (c0 - 2.0 * c1 + c2) / 2.0
            r3[t] = (3.0 * (c1 - c2) + c3 - c0) / 6.0
    for _ in range(iterations):
        for j in range(k):
            c = np.zeros(4)
            for m in range(deg + 1):
                c[m] = p[j, m + 1]
            a0, a1, a2, a3 = c[0], c[1], c[2], c[3]
            m0 = m1 = m2 = m3 = m4 = m5 = m6 = 0.0
            x0 = x1 = x2 = x3 = 0.0
            y0 = y1 = y2 = y3 = 0.0
            sgg = sbg = curv = chi = 0.0
            used = 0
            lo_j, hi_j, f = lo[j], hi[j], first[j]
            r0, r1, r2, r3 = tables[j, 0], tables[j, 1], tables[j, 2], tables[j, 3]
            shift = p[j, 0] / dlng
            sa, sb, sc = S[0], S[1], S[2]
            bn, bd, bc = bnum[j], bden[j], bcross[j]
            for bb in range(bn.size):        # the pixels in bins of ``width``: the residuals' sums per bin
                bsn = bsd = bsc = 0.0
                for i in range(bb * width, min((bb + 1) * width, n)):
                    xi = xi0[j, i] - shift
                    inside = xi > lo_j and xi < hi_j
                    if xi < lo_j:             # np.clip: the lower bound, then the upper
                        xi = lo_j
                    if xi > hi_j:
                        xi = hi_j
                    i0 = int(xi)              # xi >= 2: truncation is the floor
                    fr = xi - i0
                    if not (use[j, i] and inside and ok_t[i0] and ok_t[i0 + 1]):
                        sa[i] = 0.0
                        sb[i] = 0.0
                        sc[i] = 0.0
                        continue
                    t = i0 - f
                    q0, q1, q2, q3 = r0[t], r1[t], r2[t], r3[t]
                    T = q0 + fr * (q1 + fr * (q2 + fr * q3))
                    dT = q1 + fr * (2 * q2 + 3 * fr * q3)
                    d2T = 2 * q2 + 6 * fr * q3
                    e0, e1, e2, e3 = pw[i, 0], pw[i, 1], pw[i, 2], pw[i, 3]
                    poly = a0 * e0 + a1 * e1 + a2 * e2 + a3 * e3
                    g = poly * dT * ng
                    mo = poly * T
                    w = 1.0 / (var[j, i] + poly * poly * (var_t[i0] + fr * (var_t[i0 + 1] - var_t[i0])))
                    r = flux[j, i] - mo
                    used += 1
                    wT = w * T
                    wr = w * r
                    sa[i] = wT * T
                    sb[i] = wT * g
                    sc[i] = wr * T
                    sgg += w * g * g
                    sbg += wr * g
                    curv += wr * poly * d2T
                    chi += wr * r
                    wm = w * mo
                    bsn += wm * r
                    bsd += wm * mo
                    bsc += wm * g
                bn[bb] = bsn
                bd[bb] = bsd
                bc[bb] = bsc
            binfo[j] = sgg
            for i in range(n):
                wTT, wTg, wrT = sa[i], sb[i], sc[i]
                e0, e1, e2, e3 = pw[i, 0], pw[i, 1], pw[i, 2], pw[i, 3]
                m0 += wTT * e0
                m1 += wTT * e1
                m2 += wTT * e2
                m3 += wTT * e3
                m4 += wTT * pw[i, 4]
                m5 += wTT * pw[i, 5]
                m6 += wTT * pw[i, 6]
                x0 += wTg * e0
                x1 += wTg * e1
                x2 += wTg * e2
                x3 += wTg * e3
                y0 += wrT * e0
                y1 += wrT * e1
                y2 += wrT * e2
                y3 += wrT * e3
            mom[0], mom[1], mom[2], mom[3], mom[4], mom[5], mom[6] = m0, m1, m2, m3, m4, m5, m6
            cross[0], cross[1], cross[2], cross[3] = x0, x1, x2, x3
            bt[0], bt[1], bt[2], bt[3] = y0, y1, y2, y3
            for a in range(deg + 1):
                for cc in range(deg + 1):
                    A[a + 1, cc + 1] = mom[a + cc]
                A[0, a + 1] = cross[a]
                A[a + 1, 0] = cross[a]
                b[a + 1] = bt[a]
            A[0, 0] = sgg
            b[0] = sbg
            for a in range(npar):
                for cc in range(npar):
                    info[j, a, cc] = A[a, cc]
            # Newton in delta: the residual x curvature term Gauss-Newton leaves out
            a00 = A[0, 0] - curv / dlng2
            A[0, 0] = a00 if a00 > 0.1 * info[j, 0, 0] else info[j, 0, 0]
            alive[j] = alive[j] and used >= 20
            if not alive[j]:
                for a in range(npar):
                    for cc in range(npar):
                        A[a, cc] = 1.0 if a == cc else 0.0
                    b[a] = 0.0
            ok = _solve(A, b, npar) and ok
            for a in range(npar):
                dp[j, a] = b[a]
                p[j, a] += b[a]
            chi2[j] = chi / max(used - npar, 1)
        done = True
        for j in range(k):
            if not abs(dp[j, 0]) < 1e-9:
                done = False
        if done:
            break
    cov00 = np.empty(k)
    e = np.empty(npar)
    for j in range(k):
        for a in range(npar):
            for cc in range(npar):
                A[a, cc] = info[j, a, cc] if alive[j] else (1.0 if a == cc else 0.0)
            e[a] = 1.0 if a == 0 else 0.0
        ok = _solve(A, e, npar) and ok
        cov00[j] = e[0]
    return ok, alive, chi2, cov00


def _monotone_median(a):   # pragma: no cover (compiled)
    n = a.size
    if n == 0:
        return np.nan
    up = True
    down = True
    for i in range(n - 1):
        if not a[i + 1] >= a[i]:
            up = False
        if not a[i + 1] <= a[i]:
            down = False
    if not (up or down):
        return np.nan
    if n % 2:
        return a[n // 2]
    lo, hi = (a[n // 2 - 1], a[n // 2]) if up else (a[n // 2], a[n // 2 - 1])
    return (lo + hi) / 2.0


def _load() -> SimpleNamespace | None:
    """The compiled kernels (compiled or loaded from numba's cache on first use), None without numba."""
    global _COMPILED
    if _COMPILED is None:
        _COMPILED = False
        # NumPy's floating-point rules (x / 0 is inf or NaN, as in the plain forms) rather than
        # Python's (ZeroDivisionError), which also lets the loops run on vectors
        jit = kernels.numba_jit(error_model="numpy")
        if jit is not None:
            global _correlate, _correlate_padded, _causal_start, _prefilter, _solve   # called from kernels
            global _flux_and_variance, _flux_and_variance_less, _smooth
            _correlate_padded, _causal_start, _solve = (jit(_correlate_padded), jit(_causal_start),
                                                         jit(kernels.solve_small))
            _correlate, _prefilter = jit(_correlate), jit(_prefilter)
            _flux_and_variance, _flux_and_variance_less = jit(_flux_and_variance), jit(_flux_and_variance_less)
            _smooth = jit(_smooth)
            _COMPILED = SimpleNamespace(template_segment=jit(_template_segment), fit_orders=jit(_fit_orders),
                                        prefilter_segments=jit(_prefilter_segments), strided_snr=jit(_strided_snr),
                                        smooth=_smooth,
                                        monotone_median=jit(_monotone_median), correlate=_correlate,
                                        prefilter=_prefilter)
    return _COMPILED or None


def compiled() -> SimpleNamespace | None:
    """The compiled kernels if the callers should use them now (:func:`.kernels.compiled` decides:
    ``LINESHIFT_JIT`` and the warm-up), else None."""
    if kernels.compiled() is None:
        return None
    return _load()


def compiled_always() -> SimpleNamespace:
    """The compiled kernels whatever the warm-up (for a caller told to use them); needs numba."""
    k = _load()
    if k is None:
        raise RuntimeError("the compiled kernels need numba (pip install numba)")
    return k


def template_segment(sw, swf, sw2v, flagged, own, floor: float, smooth: tuple | None, flux, var_out, ok_out):
    """One segment of :meth:`.template_engine.TemplateState.fit_arrays` into ``flux`` (not yet
    prefiltered: :func:`prefilter_segments`), ``var_out``, ``ok_out`` (views of the segment in the
    whole arrays).  ``own``: None or (destination slice in the segment, source slice in the arrays,
    weight, weight x flux, weight^2 x variance) of the spectrum's contribution to take off; ``smooth``:
    None or (flux weights, variance weights, divisor of the variance sum, correlation factor) as
    ``fit_arrays`` forms them."""
    k = compiled_always()
    if own is None:
        empty = np.zeros(0)
        ow = owf = ow2v = empty
        d0 = s0 = m = 0
    else:
        dst, src, ow, owf, ow2v = own
        d0, s0, m = dst.start, src.start, dst.stop - dst.start
    if smooth is None:
        gw = vw = np.ones(1)
        vden = corr = 1.0
    else:
        gw, vw, vden, corr = smooth
    k.template_segment(sw, swf, sw2v, flagged, ow, owf, ow2v, int(d0), int(s0), int(m), float(floor), gw, vw,
                       float(vden), float(corr), smooth is not None, flux, var_out, ok_out)


def smooth_segment(flux, var, ok, smooth: tuple) -> None:
    """:meth:`.template_engine.TemplateState.smoothed` of one segment in place (views of the segment
    in the whole arrays); ``smooth`` as :func:`template_segment` takes it."""
    gw, vw, vden, corr = smooth
    compiled_always().smooth(flux, var, ok, gw, vw, float(vden), float(corr))


def prefilter_segments(c, segments) -> None:
    """Cubic B-spline coefficients of each segment of ``c`` in place (``segments``: rows of
    :attr:`.template_engine.TemplateState.segments`), as ``scipy.ndimage.spline_filter1d(order=3,
    mode="mirror")`` of each."""
    compiled_always().prefilter_segments(c, np.ascontiguousarray(segments[:, 2]),
                                         np.ascontiguousarray(segments[:, 3]), POLE)


def fit_orders(coef, var_t, ok_t, lnw, lng0: float, base, lo, hi, flux, var, use, pw, p, dlng: float,
               iterations: int, width: int = 16):
    """Gauss-Newton for a block of orders (:func:`.template_engine._fit_block`, the same steps and
    stopping rule); ``lnw`` ln(wavelength) of the pixels, ``base`` per order the offset of its
    segment in the template arrays less its first grid index; ``p`` (orders, 2 + degree, degree up
    to 3) the start, updated in place; ``pw`` the powers x^0..x^6 of the pixel positions (n, 7).
    Returns (no pivot was zero, alive, reduced chi-square, the velocity's variance in delta^2, and
    of the last step per bin of ``width`` pixels the sums of :func:`.response.bin_residuals`
    (weight x model x residual, x model, x derivative with respect to delta; per order weight x
    derivative^2): :func:`scratch` arrays, overwritten by the next call in this thread)."""
    k, n = flux.shape
    size = int(np.max(np.floor(hi) - np.floor(lo))) + 1
    tables = scratch("fit_tables", (k, 4, size))
    nb = -(-n // width)
    bins = [scratch(name, (k, nb)) for name in ("bin_num", "bin_den", "bin_cross")]
    binfo = scratch("bin_info", (k,))
    fast = compiled_always()
    res = fast.fit_orders(coef, var_t, ok_t, lnw, float(lng0), base, lo, hi, flux, var, use, pw, p, float(dlng),
                          float(dlng) ** 2, int(iterations), scratch("fit_xi0", (k, n)), tables,
                          scratch("fit_sums", (3, n)), int(width), *bins, binfo)
    return (*res, *bins, binfo)


def scratch(name: str, shape: tuple, dtype=float) -> np.ndarray:
    """A work array of this thread: a view of the one buffer this thread keeps under ``name`` (grown
    to the largest size asked for), so its contents are whatever the last user left.  Arrays of a
    few hundred KB and more are mapped from the system afresh at each allocation, and the page
    faults of filling them (~1.4 us per 4 KB page here) cost more than the arithmetic: 5 MB of
    template arrays take 1.8 ms to allocate and fill, 75 us to fill again."""
    views = _SCRATCH.__dict__.setdefault("views", {})
    shape = tuple(shape)
    key = (name, shape, dtype)
    view = views.get(key)
    if view is not None:
        return view
    buffers = _SCRATCH.__dict__.setdefault("buffers", {})
    need = 1
    for d in shape:
        need *= int(d)
    buf = buffers.get(name)
    if buf is None or buf.size < need or buf.dtype != np.dtype(dtype):   # one buffer per name, the largest size
        buf = buffers[name] = np.empty(need, dtype=dtype)
        for k in [k for k in views if k[0] == name]:
            del views[k]
    if len(views) > 256:
        views.clear()
    view = views[key] = buf[:need].reshape(shape)
    return view


def median_snr(orders) -> float:
    """``np.median`` of every fourth usable pixel's flux / sqrt(variance) over ``orders`` (the S/N
    :func:`.template_engine.measure_template` reports): the same values, gathered by a compiled loop."""
    fast = compiled_always()
    out = scratch("snr", (sum(o.flux.size // 4 + 1 for o in orders),))
    k = 0
    for o in orders:
        k = fast.strided_snr(o.flux, o.var, o.good, out, k)
    return float(np.median(out[:k]))


def monotone_median(a) -> float:
    """``np.median(a)`` for a monotone array (NaN when ``a`` is not monotone or holds NaN)."""
    return float(compiled_always().monotone_median(np.ascontiguousarray(a)))


def prefilter(values) -> np.ndarray:
    """Cubic B-spline coefficients of ``values`` (mirror extension): the compiled recursion alone."""
    c = np.array(values, dtype=float)
    compiled_always().prefilter(c, POLE)
    return c


def smooth_constant(values, sigma: float) -> np.ndarray:
    """``values`` correlated with :func:`gaussian_weights` (zeros beyond the ends): the compiled loop alone."""
    x = np.ascontiguousarray(values, dtype=float)
    out = np.empty_like(x)
    compiled_always().correlate(x, gaussian_weights(sigma), out)
    return out
