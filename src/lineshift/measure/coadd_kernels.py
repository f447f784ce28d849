"""Compiled forms (numba) of the co-add's inner loops (:mod:`.coadd`) and of the response estimate's
normal equations (:mod:`.response`), each one fused loop where the plain NumPy forms beside their
callers make many passes over whole arrays.  tests/test_coadd_kernels.py compares each with its plain form.

* :func:`contribution`: one order's co-add contribution (:meth:`.coadd.TemplateAccumulator._contribution`):
  the grid points' fractional pixel index (as ``np.interp``), the bad-pixel fill and its reach, the
  cubic B-spline prefilter (the recursive filter of Unser, Aldroubi & Eden 1993, IEEE Trans. Signal
  Process. 41, 821, mirror ends, in place of ``scipy.ndimage.spline_filter1d``: the same coefficients
  to ~1e-16), the spline's value, the interpolated variance and weight, the level, the telluric
  bands and the edge flags, in one pass over the grid points.  ``ln lambda`` of the pixels comes
  from NumPy (an ulp of it is ~5e-10 of a pixel: numba's logarithm, an ulp off NumPy's SIMD one
  here and there, would move the interpolated values by that much); the exponentials that place
  the telluric band edges are numba's (a grid point on a band edge to the last bit could fall to
  the other side); on a common level the divisions by the level and its square are products with
  their inverses.  Weights and flags are the same, the other values agree to ~1e-15.
* :func:`pixel_step <_pixel_step>`: one order's median pixel width of :func:`.coadd.pixel_steps` (the
  same values, the median by selection).
* :func:`accumulate`: :meth:`.coadd.TemplateAccumulator.add`'s five sums in one loop (the same sums).
* :func:`common_continuum`: one order of :func:`.coadd.on_common_continuum` (the same operations).
* :func:`reject_order`: one order of :func:`.coadd.reject_above`: the shifted reference, the block
  medians of the ratio and their interpolation (as ``np.interp``), the test and the growth: the
  same operations (the same pixels rejected); the medians are skipped where no pixel stands above
  a lower bound of the interpolated scale (the least ratios of the bracketing blocks), which any
  rejected pixel must pass.

Medians (the level of an order, the blocks of the screening, pixel widths) are exact ranks as
``np.median`` takes them, found without comparisons the processor has to guess: a few dozen values
by counting ranks, more through a histogram of the values (:func:`_median_inplace`).
* :func:`response_equations <_response_equations>`: the normal equations of
  :func:`.response.detector_response` for one order, every spectrum's projection taken through the
  banded design matrix (see the kernel): the same sums in another order, ~1e-15 relative.

Used when :func:`lineshift.measure.kernels.compiled` is not None (``LINESHIFT_JIT`` and the warm-up
rule apply alike); compiled on first use and cached on disk by numba.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

from lineshift.measure import kernels

__all__ = ["active", "contribution", "median_of", "prefilter", "reject_order"]

_COMPILED: SimpleNamespace | bool | None = None

#: The pole of the cubic B-spline's recursive prefilter, sqrt(3) - 2 (Unser et al. 1993).
_POLE = np.sqrt(3.0) - 2.0


def _prefilter(s, out):   # pragma: no cover (compiled)
    """Cubic B-spline coefficients of ``s`` (mirror-symmetric ends: ``s[-k] = s[k]``) into ``out``:
    gain 6, a causal and an anticausal first-order recursion with pole z = sqrt(3) - 2."""
    n = s.size
    if n == 1:
        out[0] = s[0]
        return
    z = _POLE
    gain = (1.0 - z) * (1.0 - 1.0 / z)
    # causal start: sum_k z^k s_mirror[k] over one period (2n - 2) / (1 - z^(2n - 2)), cut where z^k < 1e-30
    period = 2 * n - 2
    zk = 1.0
    acc = 0.0
    full = True
    for k in range(period):
        idx = k if k < n else period - k
        acc += zk * s[idx]
        zk *= z
        if abs(zk) < 1e-30:
            full = False
            break
    if full:
        acc /= 1.0 - zk
    out[0] = gain * acc
    for i in range(1, n):
        out[i] = gain * s[i] + z * out[i - 1]
    out[n - 1] = z / (z * z - 1.0) * (out[n - 1] + z * out[n - 2])
    for i in range(n - 2, -1, -1):
        out[i] = z * (out[i + 1] - out[i])


def _contribution(wave, lnw, flux, var, weight, good, lng, lnf, edge_margin, levelled, reach, blo, bhi,
                  band_factor):   # pragma: no cover (compiled)
    n = wave.size
    u = np.empty(n)
    for p in range(n):
        u[p] = lnw[p] + lnf
    i0 = np.searchsorted(lng, u[0], side="left")
    i1 = np.searchsorted(lng, u[n - 1], side="right")
    m = max(i1 - i0, 0)
    w = np.empty(m)
    wf = np.empty(m)
    w2v = np.empty(m)
    flags = np.empty(m, dtype=np.bool_)
    if m == 0:
        return i0, i1, w, wf, w2v, flags
    nbad = 0
    for p in range(n):
        if not good[p]:
            nbad += 1
    clean = np.ones(n, dtype=np.bool_)
    if nbad:
        # the bad pixels filled by linear interpolation between good ones (held beyond the ends), as
        # np.interp(idx, idx[good], flux[good])
        filled = np.empty(n)
        prev = -1
        for p in range(n):
            if good[p]:
                if prev < 0:
                    for q in range(p):
                        filled[q] = flux[p]
                elif p > prev + 1:
                    slope = (flux[p] - flux[prev]) / (float(p) - float(prev))
                    for q in range(prev + 1, p):
                        filled[q] = slope * (float(q) - float(prev)) + flux[prev]
                filled[p] = flux[p]
                prev = p
        for q in range(prev + 1, n):
            filled[q] = flux[prev]
        # clean: no bad pixel within ``reach``
        last = -n - reach - 1
        for p in range(n):
            if not good[p]:
                last = p
            clean[p] = p - last > reach
        nxt = 2 * n + reach + 1
        for p in range(n - 1, -1, -1):
            if not good[p]:
                nxt = p
            if nxt - p <= reach:
                clean[p] = False
    else:
        filled = flux
    coef = np.empty(n)
    _prefilter(filled, coef)
    scale = False
    level = 1.0
    if levelled:
        ng = n - nbad
        if ng > 0:
            buf = np.empty(ng)
            k = 0
            nan = False
            for p in range(n):
                if good[p]:
                    buf[k] = flux[p]
                    nan |= np.isnan(flux[p])
                    k += 1
            level = np.nan if nan else _median_inplace(buf, ng)
        scale = np.isfinite(level) and level > 0
    # on a common level: f / L, var / L^2, weight * L^2, the divisions as products with 1 / L and
    # 1 / L^2 (an ulp apart at most)
    inv = 1.0 / level
    level2 = level ** 2
    inv2 = 1.0 / level2
    # per pixel: the slope of np.interp, and the B-spline's power-basis coefficients (coadd.value_tables)
    slope = np.empty(n)
    for p in range(n - 1):
        slope[p] = 1.0 / (u[p + 1] - u[p])
    q0 = np.empty(n)
    q1 = np.empty(n)
    q2 = np.empty(n)
    q3 = np.empty(n)
    for k in range(n - 3):
        c0, c1, c2, c3 = coef[k], coef[k + 1], coef[k + 2], coef[k + 3]
        q0[k] = (c0 + 4.0 * c1 + c2) / 6.0
        q1[k] = (c2 - c0) / 2.0
        q2[k] = (c0 - 2.0 * c1 + c2) / 2.0
        q3[k] = (3.0 * (c1 - c2) + c3 - c0) / 6.0
    j = 0
    for g in range(m):
        x = lng[i0 + g]
        while j < n - 1 and u[j + 1] <= x:
            j += 1
        if j == n - 1 or u[j] == x:            # np.interp(pts, u, arange(n)), the same formula
            fidx = float(j)
        else:
            fidx = slope[j] * (x - u[j]) + j
        ii = int(fidx)                         # fidx >= 0: the floor
        jj = min(ii, n - 2)
        t = fidx - jj
        ib = min(max(ii, 1), n - 3)
        tb = fidx - ib
        k = ib - 1
        f = q0[k] + tb * (q1[k] + tb * (q2[k] + tb * q3[k]))
        v = (1 - t) * var[jj] + t * var[jj + 1]
        wv = (1 - t) * weight[jj] + t * weight[jj + 1]
        ok = clean[jj] and clean[jj + 1]
        if not ok:
            wv = 0.0
        if scale:
            f, v, wv = f * inv, v * inv2, wv * level2
        edge = jj < edge_margin or jj > n - 2 - edge_margin
        if not levelled and not ok:
            edge = True
        w[g] = wv
        wf[g] = f
        w2v[g] = v
        flags[g] = edge
    # telluric bands (observatory frame): the grid points in each band nearby get no weight; the
    # observatory wavelength increases along the grid, so each band is a run found by bisection
    for b in range(blo.size):
        if bhi[b] < wave[0] or blo[b] > wave[n - 1]:
            continue
        lo, hi = 0, m                           # first point with lam_obs >= blo
        while lo < hi:
            mid = (lo + hi) // 2
            if np.exp(lng[i0 + mid] - lnf) / band_factor >= blo[b]:
                hi = mid
            else:
                lo = mid + 1
        start = lo
        lo, hi = start, m                       # first point with lam_obs > bhi
        while lo < hi:
            mid = (lo + hi) // 2
            if np.exp(lng[i0 + mid] - lnf) / band_factor > bhi[b]:
                hi = mid
            else:
                lo = mid + 1
        for g in range(start, lo):
            w[g] = 0.0
    for g in range(m):
        wv = w[g]
        wf[g] = wv * wf[g]
        w2v[g] = wv * wv * w2v[g]
    return i0, i1, w, wf, w2v, flags


def _accumulate(sw, swf, sw2v, count, flagged, lo, w, wf, w2v, flags):   # pragma: no cover (compiled)
    for g in range(w.size):
        k = lo + g
        sw[k] += w[g]
        swf[k] += wf[g]
        sw2v[k] += w2v[g]
        if w[g] > 0:
            count[k] += 1
        flagged[k] |= flags[g]


def _common_continuum(cont, ref, good, flux, var, weight):   # pragma: no cover (compiled)
    n = flux.size
    r = np.empty(n)
    for p in range(n):
        if good[p]:
            rp = cont[p] / ref[p]
            if not (np.isfinite(rp) and rp > 0):
                return False, r, r, r
            r[p] = rp
        else:
            r[p] = 1.0
    fo = np.empty(n)
    vo = np.empty(n)
    wo = np.empty(n)
    for p in range(n):
        rp = r[p]
        fo[p] = flux[p] * rp
        vo[p] = var[p] * rp * rp
        wo[p] = weight[p] / (rp * rp)
    return True, fo, vo, wo


def _select_rank(buf, k, m):   # pragma: no cover (compiled)
    """The m-th smallest of ``buf[:k]`` (0-based) by counting ranks: branch-free inner loops, which on
    the few dozen values of a block beat a selection whose comparisons the processor cannot predict."""
    for i in range(k):
        x = buf[i]
        less = 0
        leq = 0
        for q in range(k):
            less += buf[q] < x
            leq += buf[q] <= x
        if less <= m < leq:
            return x
    return np.nan


def _rank_hist(buf, k, ranks, out):   # pragma: no cover (compiled)
    """The values of the given ranks (0-based, ascending) of ``buf[:k]`` (finite, not all equal) into
    ``out``: a histogram over [min, max] (the bin is monotone in the value, so its bins keep the order)
    finds each rank's bin, and the few values in it are ranked by counting.  Exact, and its passes
    have no comparison the processor has to guess."""
    lo = buf[0]
    hi = buf[0]
    for i in range(1, k):
        lo = min(lo, buf[i])
        hi = max(hi, buf[i])
    nbins = 1024
    scale = nbins / (hi - lo)
    counts = np.zeros(nbins + 1, dtype=np.int64)
    for i in range(k):
        counts[min(int((buf[i] - lo) * scale), nbins - 1)] += 1
    for j in range(ranks.size):
        r = ranks[j]
        below = 0
        b = 0
        while below + counts[b] <= r:
            below += counts[b]
            b += 1
        inbin = np.empty(counts[b])
        m = 0
        for i in range(k):
            if min(int((buf[i] - lo) * scale), nbins - 1) == b:
                inbin[m] = buf[i]
                m += 1
        out[j] = _select_rank(inbin, m, r - below)


def _median_inplace(buf, k):   # pragma: no cover (compiled)
    """The median of ``buf[:k]`` (values without NaN) as np.median gives it: the middle value, or the
    mean (a + b) / 2 of the middle two.  A few dozen values by rank counting, more through a
    histogram (:func:`_rank_hist`); with infinities, Hoare's selection (quickselect, reordering
    ``buf`` in place)."""
    m = k // 2
    if k <= 96:
        if k % 2 == 1:
            return _select_rank(buf, k, m)
        return (_select_rank(buf, k, m - 1) + _select_rank(buf, k, m)) / 2
    lo = buf[0]
    hi = buf[0]
    for i in range(1, k):
        lo = min(lo, buf[i])
        hi = max(hi, buf[i])
    if lo == hi:
        return lo
    if np.isfinite(lo) and np.isfinite(hi) and np.isfinite(hi - lo):
        ranks = np.array([m]) if k % 2 == 1 else np.array([m - 1, m])
        out = np.empty(ranks.size)
        _rank_hist(buf, k, ranks, out)
        return out[0] if k % 2 == 1 else (out[0] + out[1]) / 2
    lo, hi = 0, k - 1
    while lo < hi:
        pivot = buf[(lo + hi) // 2]
        i, j = lo, hi
        while i <= j:
            while buf[i] < pivot:
                i += 1
            while buf[j] > pivot:
                j -= 1
            if i <= j:
                buf[i], buf[j] = buf[j], buf[i]
                i += 1
                j -= 1
        if m <= j:
            hi = j
        elif m >= i:
            lo = i
        else:
            break
    if k % 2 == 1:
        return buf[m]
    below = buf[0]                             # everything before m is at most buf[m]
    for q in range(1, m):
        below = max(below, buf[q])
    return (below + buf[m]) / 2


def _pixel_step(wave, c, buf):   # pragma: no cover (compiled)
    """np.median(c * np.diff(wave) / wave[1:]) (``buf``: scratch of at least wave.size - 1)."""
    k = wave.size - 1
    for p in range(k):
        buf[p] = c * (wave[p + 1] - wave[p]) / wave[p + 1]
    for p in range(k):
        if np.isnan(buf[p]):
            return np.nan
    return _median_inplace(buf, k)


def _median_bin_step(u, bstart):   # pragma: no cover (compiled)
    """The median over the spectra (bins ``bstart[j]:bstart[j + 1]`` of ``u``) of the median step
    between their bins: ``np.median([np.median(np.diff(u_j)) for j])``, the same values."""
    nspec = bstart.size - 1
    meds = np.empty(nspec)
    buf = np.empty(u.size)
    for j in range(nspec):
        a, b = bstart[j], bstart[j + 1]
        k = b - a - 1
        nan = False
        for p in range(k):
            buf[p] = u[a + p + 1] - u[a + p]
            nan |= np.isnan(buf[p])
        meds[j] = np.nan if (nan or k < 1) else _median_inplace(buf, k)
    for j in range(nspec):
        if np.isnan(meds[j]):
            return np.nan
    return _median_inplace(meds, nspec)


def _reject_order(lnw, flux, var, good, coef, ok_ref, lnf, lng0, dlng, start, off, nseg, half, nsigma,
                  grow):   # pragma: no cover (compiled)
    n = lnw.size
    T = np.empty(n)
    usable = np.empty(n, dtype=np.bool_)
    grown = np.zeros(n, dtype=np.bool_)
    ncoef = coef.size
    count = 0
    for p in range(n):
        xi = (lnw[p] + lnf - lng0) / dlng - start
        inside = xi > 1 and xi < nseg - 3
        xc = min(max(xi, 1.0), nseg - 3.0) + off
        i0 = int(np.floor(xc))
        i = min(max(i0, 1), ncoef - 3)
        t = xc - i
        # coadd.bspline_value: the entries of coadd.value_tables formed here (a quarter of the memory
        # traffic of reading the four tables, which decides the time on a template of 36 orders)
        c0, c1, c2, c3 = coef[i - 1], coef[i], coef[i + 1], coef[i + 2]
        q0 = (c0 + 4.0 * c1 + c2) / 6.0
        q1 = (c2 - c0) / 2.0
        q2 = (c0 - 2.0 * c1 + c2) / 2.0
        q3 = (3.0 * (c1 - c2) + c3 - c0) / 6.0
        T[p] = q0 + t * (q1 + t * (q2 + t * q3))
        u = good[p] and inside and ok_ref[i0] and ok_ref[i0 + 1] and T[p] > 0
        usable[p] = u
        count += u
    width = 2 * half + 1
    if count < width:
        return False, grown
    nb = max(n // width, 1)
    width = n // nb
    centre = np.empty(nb)
    med = np.empty(nb)
    low = np.empty(nb)
    vals = np.empty(n)                       # each block's finite ratios, from its first pixel
    kcount = np.empty(nb, dtype=np.int64)
    nk = 0
    for b in range(nb):
        k = 0
        lo = np.inf
        for p in range(b * width, (b + 1) * width):
            if usable[p]:
                r = flux[p] / T[p]
                if np.isfinite(r):
                    vals[b * width + k] = r
                    lo = min(lo, r)
                    k += 1
        if k == 0:
            continue
        centre[nk] = (b + 0.5) * width - 0.5
        low[nk] = lo
        kcount[nk] = k
        nk += 1
    if nk == 0:
        return False, grown
    # A pixel is rejected only if it stands out above the scale interpolated between the block
    # medians, which is at least the smaller of the two bracketing blocks' least ratios (less a
    # margin for rounding): pixels that do not stand out above that bound cannot be rejected, and
    # when none does (the rule, hits are rare) no median is needed
    if nsigma >= 0:
        candidate = False
        kn = 0
        for p in range(n):
            x = float(p)
            while kn < nk - 1 and centre[kn + 1] <= x:
                kn += 1
            if usable[p]:
                if nk == 1 or x <= centre[0]:
                    bound = low[0]
                elif kn == nk - 1:
                    bound = low[kn]
                else:
                    bound = min(low[kn], low[kn + 1])
                bound -= 1e-9 * abs(bound)
                d = flux[p] - bound * T[p]
                if d > 0 and d > nsigma * np.sqrt(var[p]):
                    candidate = True
                    break
        if not candidate:
            return False, grown
    for q in range(nk):
        start = int(centre[q] + 0.5) - (width - 1) // 2      # the block's first pixel
        med[q] = _median_inplace(vals[start:start + kcount[q]], kcount[q])
    hit = np.zeros(n, dtype=np.bool_)
    anyhit = False
    kn = 0                                   # np.interp(p, centre, med): the knot at or below p
    for p in range(n):
        x = float(p)
        while kn < nk - 1 and centre[kn + 1] <= x:
            kn += 1
        if usable[p]:
            if nk == 1 or x <= centre[0]:
                scale = med[0]
            elif kn == nk - 1 or centre[kn] == x:
                scale = med[kn]
            else:
                scale = (med[kn + 1] - med[kn]) / (centre[kn + 1] - centre[kn]) * (x - centre[kn]) + med[kn]
            d = flux[p] - scale * T[p]
            if (d > 0 or nsigma < 0) and d > nsigma * np.sqrt(var[p]):
                hit[p] = True
                anyhit = True
    if not anyhit:
        return False, grown
    for p in range(n):
        if hit[p]:
            for q in range(max(p - grow, 0), min(p + grow + 1, n)):
                grown[q] = True
    return True, grown


#: The uniform cubic B-spline basis in powers of t (response._B): weight of coefficient i + k is
#: sum_p _BSPL[p, k] t^p.
_BSPL = np.array([[1.0, 4.0, 1.0, 0.0], [-3.0, 0.0, 3.0, 0.0], [3.0, -6.0, 3.0, 0.0], [-1.0, 3.0, -3.0, 1.0]]) / 6.0


def _weights_at(xj, uj, Wj, sx, sw, lnf, s, h, ncoef, wout, iout, qout):   # pragma: no cover (compiled)
    """Spectrum j's weight at the star-frame points ``s`` and the first column of its four B-spline
    basis values there (into ``wout``, ``iout``, ``qout``), as ``contribution`` in
    :func:`.response.detector_response`; ``sx``, ``sw``: the slopes of the two interpolations per bin
    (np.interp's own).  Each interval is walked to from the last one's (np.interp's search finds the same)."""
    nb = xj.size
    lo1 = 0
    lo2 = 0
    for r in range(s.size):
        at = s[r] - lnf
        # pos = np.interp(at, uj, xj), the ends held
        if at <= uj[0]:
            pos = xj[0]
        elif at >= uj[nb - 1]:
            pos = xj[nb - 1]
        else:
            while uj[lo1 + 1] <= at:        # uj[lo1] <= at < uj[lo1 + 1]
                lo1 += 1
            while uj[lo1] > at:
                lo1 -= 1
            pos = xj[lo1] if uj[lo1] == at else sx[lo1] * (at - uj[lo1]) + xj[lo1]
        wj = 0.0
        if at >= uj[0] and at <= uj[nb - 1]:    # np.interp(pos, xj, Wj)
            if pos <= xj[0]:
                wj = Wj[0]
            elif pos >= xj[nb - 1]:
                wj = Wj[nb - 1]
            else:
                while xj[lo2 + 1] <= pos:
                    lo2 += 1
                while xj[lo2] > pos:
                    lo2 -= 1
                wj = Wj[lo2] if xj[lo2] == pos else sw[lo2] * (pos - xj[lo2]) + Wj[lo2]
        t = pos / h
        i = min(max(int(np.floor(t)), 0), ncoef - 4)
        f = t - i
        f2 = f * f
        f3 = f2 * f
        for k in range(4):                   # (1, f, f^2, f^3) @ _BSPL
            qout[r, k] = _BSPL[0, k] + f * _BSPL[1, k] + f2 * _BSPL[2, k] + f3 * _BSPL[3, k]
        wout[r] = wj
        iout[r] = i


def _slopes(xp, fp, out):   # pragma: no cover (compiled)
    """np.interp's slopes between the points (fp[i + 1] - fp[i]) / (xp[i + 1] - xp[i]) into ``out``."""
    for i in range(xp.size - 1):
        out[i] = (fp[i + 1] - fp[i]) / (xp[i + 1] - xp[i])


def _response_equations(x, u, rho, W, cross, info, bstart, lnf, sgrid, s0, ds, n, h, ncoef,
                        poly_degree):   # pragma: no cover (compiled)
    nspec = bstart.size - 1
    nsg = sgrid.size
    S = np.zeros((nsg, ncoef))
    lo_col = np.full(nsg, ncoef, dtype=np.int64)   # the columns of S's row that hold anything
    hi_col = np.full(nsg, -1, dtype=np.int64)
    Wsum = np.zeros(nsg)
    sx = np.empty(x.size)
    sW = np.empty(x.size)
    for j in range(nspec):
        a, b = bstart[j], bstart[j + 1]
        _slopes(u[a:b], x[a:b], sx[a:b])
        _slopes(x[a:b], W[a:b], sW[a:b])
    wv = np.empty(nsg)
    iv = np.empty(nsg, dtype=np.int64)
    qv = np.empty((nsg, 4))
    for j in range(nspec):
        a, b = bstart[j], bstart[j + 1]
        _weights_at(x[a:b], u[a:b], W[a:b], sx[a:b], sW[a:b], lnf[j], sgrid, h, ncoef, wv, iv, qv)
        for r in range(nsg):
            wj, i = wv[r], iv[r]
            Wsum[r] += wj
            for k in range(4):
                S[r, i + k] += wj * qv[r, k]
            if wj != 0.0:
                lo_col[r] = min(lo_col[r], i)
                hi_col[r] = max(hi_col[r], i + 3)
    G = np.zeros((ncoef, ncoef))
    g = np.zeros(ncoef)
    wmax = 0.0
    for r in range(nsg):
        wmax = max(wmax, Wsum[r])
    floor = 1e-9 * wmax
    nl0 = poly_degree + 1
    used = 0
    for i in range(nspec):
        a, b = bstart[i], bstart[i + 1]
        nuse = 0
        for k in range(a, b):
            nuse += W[k] > 0
        if nuse <= poly_degree + 2:
            continue
        used += 1
        shift = info[i] > 0 and cross.size > 0
        rows = nuse + 1 if shift else nuse
        nl = nl0 + 1 if shift else nl0
        A = np.zeros((rows, ncoef))
        y = np.zeros(rows)
        L = np.zeros((rows, nl))
        lo_r = np.empty(rows, dtype=np.int64)
        hi_r = np.empty(rows, dtype=np.int64)
        colsq = 0.0
        # the spectrum's own weight and basis at the two grid nodes around each of its used bins
        nodes = np.empty(2 * nuse)
        r = 0
        for k in range(a, b):
            if W[k] > 0:
                i0 = min(max(int(np.floor((u[k] + lnf[i] - s0) / ds)), 0), nsg - 2)
                nodes[2 * r], nodes[2 * r + 1] = sgrid[i0], sgrid[i0 + 1]
                r += 1
        ow = np.empty(2 * nuse)
        oi = np.empty(2 * nuse, dtype=np.int64)
        oq = np.empty((2 * nuse, 4))
        _weights_at(x[a:b], u[a:b], W[a:b], sx[a:b], sW[a:b], lnf[i], nodes, h, ncoef, ow, oi, oq)
        r = 0
        for k in range(a, b):
            if not W[k] > 0:
                continue
            gi = (u[k] + lnf[i] - s0) / ds
            i0 = min(max(int(np.floor(gi)), 0), nsg - 2)
            f = gi - i0
            ok = True
            lo, hi = ncoef, -1
            for e in range(2):
                node = i0 + e
                wt = 1 - f if e == 0 else f
                own, c = ow[2 * r + e], oi[2 * r + e]
                others = Wsum[node] - own
                ok = ok and others > floor and own > 0
                safe = others if ok else 1.0
                for col in range(lo_col[node], hi_col[node] + 1):
                    A[r, col] -= wt * (S[node, col] / safe)
                ownv = own if ok else 0.0
                for m in range(4):
                    A[r, c + m] += wt * oq[2 * r + e, m] * (1.0 + ownv / safe)
                lo = min(lo, lo_col[node], c)
                hi = max(hi, hi_col[node], c + 3)
            lo_r[r], hi_r[r] = lo, hi
            sw = np.sqrt(W[k]) * (1.0 if ok else 0.0)
            for col in range(lo, hi + 1):
                A[r, col] *= sw
            y[r] = rho[k] * sw
            xp = 2 * x[k] / (n - 1) - 1
            for p in range(nl0):
                L[r, p] = xp ** p * sw
            if shift:
                col = cross[k] * (1.0 if ok else 0.0) / np.sqrt(W[k])
                L[r, nl0] = col
                colsq += col * col
            r += 1
        if shift:
            lo_r[rows - 1], hi_r[rows - 1] = 0, -1          # the shift's row: no response term
            L[rows - 1, nl0] = np.sqrt(max(info[i] - colsq, 0.0))
            root = np.sqrt(info[i])
            for rr in range(rows):
                L[rr, nl0] /= root
        Q, _ = np.linalg.qr(L)
        # the projection off this spectrum's polynomial (and shift): X = (1 - Q Q^T) A, z = (1 - Q Q^T) y;
        # X^T X = A^T A - (Q^T A)^T (Q^T A) and X^T z = A^T y - (Q^T A)^T (Q^T y), with A banded
        B = np.zeros((nl, ncoef))
        Qy = np.zeros(nl)
        for rr in range(rows):
            yr = y[rr]
            for p in range(nl):
                Qy[p] += Q[rr, p] * yr
            for c1 in range(lo_r[rr], hi_r[rr] + 1):
                av = A[rr, c1]
                g[c1] += av * yr
                for p in range(nl):
                    B[p, c1] += Q[rr, p] * av
                for c2 in range(lo_r[rr], hi_r[rr] + 1):
                    G[c1, c2] += av * A[rr, c2]
        for c1 in range(ncoef):
            for p in range(nl):
                g[c1] -= B[p, c1] * Qy[p]
            for c2 in range(ncoef):
                s = 0.0
                for p in range(nl):
                    s += B[p, c1] * B[p, c2]
                G[c1, c2] -= s
    return G, g, used


def _load() -> SimpleNamespace:
    global _COMPILED
    if _COMPILED is None:
        jit = kernels.numba_jit(error_model="numpy")   # active() has checked that numba is there
        global _prefilter, _weights_at, _slopes, _median_inplace, _select_rank, _rank_hist
        _prefilter = jit(_prefilter)          # called from kernels: numba needs them compiled too
        _select_rank = jit(_select_rank)
        _rank_hist = jit(_rank_hist)
        _median_inplace = jit(_median_inplace)
        _weights_at = jit(_weights_at)
        _slopes = jit(_slopes)
        _COMPILED = SimpleNamespace(
            prefilter=_prefilter, median=_median_inplace, pixel_step=jit(_pixel_step),
            contribution=jit(_contribution), accumulate=jit(_accumulate), common_continuum=jit(_common_continuum),
            reject_order=jit(_reject_order), response_equations=jit(_response_equations),
            median_bin_step=jit(_median_bin_step))
    return _COMPILED


def active() -> SimpleNamespace | None:
    """The compiled co-add kernels if the callers should use them now (the gate of
    :func:`lineshift.measure.kernels.compiled`), else None."""
    if kernels.compiled() is None:
        return None
    return _load()


def prefilter(s: np.ndarray) -> np.ndarray:
    """Cubic B-spline coefficients of ``s`` with mirror ends (``spline_filter1d(s, order=3, mode="mirror")``)."""
    out = np.empty(s.size)
    _load().prefilter(np.ascontiguousarray(s, dtype=float), out)
    return out


def median_of(buf: np.ndarray, k: int) -> float:
    """The median of ``buf[:k]`` by the compiled selection (on a copy)."""
    return float(_load().median(np.array(buf, dtype=float), int(k)))


def contribution(o, lng, lnf, edge_margin, levelled, reach, bands, band_factor):
    """(first grid index, end, weight, weight x flux, weight^2 x variance, flags) of one order."""
    return _load().contribution(o.wave, np.log(o.wave), o.flux, o.var, o.weight, o.good, lng, float(lnf),
                                int(edge_margin), bool(levelled), int(reach), bands[0], bands[1], float(band_factor))


def reject_order(o, coef, ok_ref, lnf, lng0, dlng, start, off, nseg, half, nsigma, grow):
    """(any pixel rejected, rejected pixels grown) of one order against the reference (``coef``: its
    B-spline coefficients)."""
    return _load().reject_order(np.log(o.wave), o.flux, o.var, o.good, coef, ok_ref, float(lnf), float(lng0),
                                float(dlng), float(start), int(off), float(nseg), int(half), float(nsigma),
                                int(grow))

