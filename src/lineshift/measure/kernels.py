"""Compiled forms (numba) of the mask engine's innermost loops, each with a plain NumPy form beside
its caller that it is tested against (tests/test_fast_kernels.py).

* :func:`ccf_pairs`: the box edges in pixel coordinate of every (order, line) pair of a CCF and
  their cumulative-sum box integrals (:func:`.ccf.correlate`; plain form: ``np.interp`` and
  ``_cum`` per order).  It does the same floating-point operations as the plain form, in the same
  order, so the CCF is the same to the last bit.
* :func:`term_variances`: ``sum_p h_p^2 var_p`` of the pixel sensitivities of a CCF, for every
  order at once (:meth:`.ccf.CorrelationData.variances`; plain form: the adjoint of the box
  integrals, one row at a time).  Same arithmetic, summed in another order and over the pixels the
  boxes reach only (elsewhere the plain form adds rounding residues of ~1e-17): differences ~1e-15.
* :func:`pixel_screen`, :func:`prepare_blaze`, :func:`prepare_tail`: the preparation's per-pixel
  steps (:func:`.prepare._prepare_block`, whose array steps and :func:`.prepare._finish_numpy` are the
  plain form): the screening's first pass, the blaze and the bad-pixel zeros, the continuum, the
  photon weight's regression and the normalised flux, variance and weight; the same operations pixel
  by pixel (the regression's sums in sequence: ~1e-15 relative).
* :func:`continuum_iterations`: the clipping iterations of the continuum fit
  (:func:`.prepare._continuum_core`, whose array form is the plain one), the normal equations
  updated by the pixels that change between steps: the same pixels kept, coefficients ~1e-15 apart.

The compiled forms are used when numba imports, from the :data:`WARMUP_SPECTRA`-th spectrum a process
prepares on (``LINESHIFT_JIT=1``: from the first, ``0``: never; see :func:`compiled`).  Each is
compiled on first use and cached on disk by numba (beside this file, or in the user's cache directory
when that is read-only, or in ``NUMBA_CACHE_DIR``), so later runs load it.
"""

from __future__ import annotations

import os
from types import SimpleNamespace

import numpy as np

__all__ = ["WARMUP_SPECTRA", "ccf_pairs", "compiled", "compiled_always", "continuum_iterations", "count_spectrum",
           "cumsums", "gauss_fit", "good_snr", "good_spans", "numba_jit", "pixel_screen", "prepare_blaze",
           "prepare_tail", "solve_small", "term_variances"]

_COMPILED: SimpleNamespace | bool | None = None


def _ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, r, m, pw):   # pragma: no cover (compiled)
    npair = plam.size
    ncol = fac.size
    x = np.empty((npair, ncol))
    bnum = np.empty((npair, m))
    bden = np.empty((npair, m))
    onum = np.zeros((estart.size - 1, m))       # each order's weighted sums, its pairs added in turn
    oden = np.zeros((estart.size - 1, m))
    cnum = np.empty(ncol)
    cden = np.empty(ncol)
    for p in range(npair):
        o = porder[p]
        e0 = estart[o]
        ne = estart[o + 1] - e0          # n + 1 edges
        n = ne - 1
        g0 = e0 - o                      # pixel arrays hold n per order, edge arrays n + 1
        # the first edge by bisection, the others by walking on from the previous one
        j = max(np.searchsorted(edges[e0:e0 + ne], plam[p] * fac[0], side="right") - 1, 0)
        for c in range(ncol):
            q = plam[p] * fac[c]
            # np.interp(q, edges, arange(n + 1)): the same search result and the same formula
            if q < edges[e0]:
                xv = 0.0
            elif q > edges[e0 + n]:
                xv = float(n)
            else:
                while j < n and edges[e0 + j + 1] <= q:
                    j += 1
                while j > 0 and edges[e0 + j] > q:
                    j -= 1
                if j == n or edges[e0 + j] == q:
                    xv = float(j)
                else:
                    slope = ((j + 1.0) - j) / (edges[e0 + j + 1] - edges[e0 + j])
                    xv = slope * (q - edges[e0 + j]) + j
            x[p, c] = xv
            i = min(int(xv), n - 1)
            f = xv - i
            cnum[c] = snum[e0 + i] + f * gnum[g0 + i]
            cden[c] = sden[e0 + i] + f * gden[g0 + i]
        wp = pw[p]
        for k in range(m):
            hi = k + r if r else m + k
            bn = cnum[hi] - cnum[k]
            bd = cden[hi] - cden[k]
            bnum[p, k] = bn
            bden[p, k] = bd
            onum[o, k] += wp * bn
            oden[o, k] += wp * bd
    return x, bnum, bden, onum, oden


def _term_variances(x, r, w, lstart, pstart, qv, sens, own, has_own):   # pragma: no cover (compiled)
    nterm = lstart.size - 1
    nsens, m = sens.shape
    rows = nsens + 1 if has_own else nsens
    ncol = x.shape[1]
    out = np.zeros(nsens)
    per = np.zeros(nterm)
    nmax = 0
    for t in range(nterm):
        nmax = max(nmax, pstart[t + 1] - pstart[t])
    cnt = np.empty((nmax, rows))
    hf = np.empty((nmax, rows))
    span = np.empty(nmax + 1, dtype=np.intp)
    covered = np.empty(nmax, dtype=np.bool_)
    e = np.empty((rows, ncol))
    acc = np.empty(rows)
    run = np.empty(rows)
    for t in range(nterm):
        n = pstart[t + 1] - pstart[t]
        for row in range(rows):      # each edge column's sensitivity: an end adds, a start subtracts
            for c in range(ncol):
                e[row, c] = 0.0
            for k in range(m):
                s = sens[row, k] if row < nsens else own[t, k]
                if r:
                    e[row, k + r] += s
                    e[row, k] -= s
                else:
                    e[row, k] = -s
                    e[row, m + k] = s
        # pixels no box of this order reaches have h = 0 (below a line's first edge its edges cancel:
        # every start has its end), so only the pixels from each line's first edge to its last are
        # summed: ``span`` counts the lines whose reach covers a pixel
        cnt[:n, :] = 0.0
        hf[:n, :] = 0.0
        span[:n + 1] = 0
        for ln in range(lstart[t], lstart[t + 1]):
            span[min(int(x[ln, 0]), n - 1)] += 1
            span[min(int(x[ln, ncol - 1]), n - 1) + 1] -= 1
            for c in range(ncol):
                xv = x[ln, c]
                i = min(int(xv), n - 1)
                f = xv - i
                for row in range(rows):
                    a = w[ln] * e[row, c]
                    cnt[i, row] += a
                    hf[i, row] += a * f
        # h_p = (fractions at p) + (everything at pixels above p): _cum(x) = sum_{p < i} g_p + f g_i
        acc[:] = 0.0
        run[:] = 0.0
        reach = 0
        for p in range(n):
            reach += span[p]
            covered[p] = reach > 0
        for p in range(n - 1, -1, -1):
            if not covered[p]:
                run[:] = 0.0          # what lies above cancels exactly (up to rounding)
                continue
            q = qv[pstart[t] + p]
            for row in range(rows):
                h = hf[p, row] + run[row]
                acc[row] += h * h * q
                run[row] += cnt[p, row]
        for row in range(nsens):
            out[row] += acc[row]
        if has_own:
            per[t] = acc[nsens]
    return out, per


#: Spectra a process prepares with the NumPy forms before it turns to the compiled kernels (when
#: ``LINESHIFT_JIT`` is unset): loading numba and the cached kernels costs 0.4-0.8 s once per process,
#: what the kernels save (~6 ms each) on some 60-120 spectra of 36 x 4096 pixels, so a small run
#: never pays it.
WARMUP_SPECTRA = 64
_prepared = 0


def _pixel_screen(flux, var, h, nsigma, contrast):   # pragma: no cover (compiled)
    rows, n = flux.shape
    size = rows * n
    width = 2 * h + 1
    base_bad = np.empty((rows, n), dtype=np.bool_)
    bad = np.empty((rows, n), dtype=np.bool_)
    tie = np.zeros(rows, dtype=np.bool_)
    p = np.empty(size + 2 * h)                  # the rows laid end to end, the ends extended by their values
    for r in range(rows):
        anytie = False
        for i in range(n):                       # no branches: selects and bitwise ands on vector lanes
            f = flux[r, i]
            v = var[r, i]
            bb = ~(np.isfinite(f) & np.isfinite(v) & (v > 0))
            base_bad[r, i] = bb
            bad[r, i] = bb | ~(f > 0)
            p[h + r * n + i] = np.inf if bb else f
        for i in range(1, n):
            anytie |= (flux[r, i] == flux[r, i - 1]) & np.isfinite(flux[r, i])
        tie[r] = anytie
    for t in range(h):
        p[t] = p[h]
        p[h + size + t] = p[h + size - 1]
    # running minimum over width neighbours by doubling spans (as outliers._running_min does)
    m = p.size
    span = 1
    while 2 * span <= width:
        m -= span
        for t in range(m):
            p[t] = min(p[t], p[t + span])
        span *= 2
    cand = np.empty(size, dtype=np.intp)
    nc = 0
    for r in range(rows):
        for i in range(n):
            if base_bad[r, i]:
                continue
            q = r * n + i
            lo = min(p[q], p[q + width - span]) if span < width else p[q]
            lift = flux[r, i] - lo
            if lift > contrast * max(lo, 0.0) and lift > nsigma * np.sqrt(var[r, i]):
                cand[nc] = q
                nc += 1
    return base_bad, bad, tie, cand[:nc]


def _good_snr(flux, var, good, step):   # pragma: no cover (compiled)
    rows, n = flux.shape
    out = np.empty(rows * n)
    m = 0
    for r in range(rows):
        c = 0
        for i in range(n):
            if good[r, i]:
                if c % step == 0:
                    out[m] = flux[r, i] / np.sqrt(var[r, i])
                    m += 1
                c += 1
    return out[:m]


def _gauss_cost(v, y, p, scale, r):   # pragma: no cover (compiled)
    c0, a, mu, sg = p[0] * scale[0], p[1] * scale[1], p[2] * scale[2], p[3] * scale[3]
    s = 0.0
    for i in range(v.size):
        z = (v[i] - mu) / sg
        r[i] = c0 - a * np.exp(-0.5 * z * z) - y[i]
        s += r[i] * r[i]
    return s


def _gauss_fit(v, y, p0, scale, xtol, max_iter):   # pragma: no cover (compiled)
    m = v.size
    p = p0.copy()
    r = np.empty(m)
    rt = np.empty(m)
    trial = np.empty(4)
    A = np.empty((4, 4))
    M = np.empty((4, 4))
    g = np.empty(4)
    step = np.empty(4)
    J = np.empty((m, 4))
    cost = _gauss_cost(v, y, p, scale, r)
    lam = 1e-3
    polish = 2                      # Gauss-Newton steps after the first step below xtol
    for _ in range(max_iter):
        a, mu, sg = p[1] * scale[1], p[2] * scale[2], p[3] * scale[3]
        for i in range(m):
            z = (v[i] - mu) / sg
            e = np.exp(-0.5 * z * z)
            J[i, 0] = scale[0]
            J[i, 1] = -e * scale[1]
            J[i, 2] = -a * e * z / sg * scale[2]
            J[i, 3] = -a * e * z * z / sg * scale[3]
        for j in range(4):
            t = 0.0
            for i in range(m):
                t += J[i, j] * r[i]
            g[j] = -t
            for k in range(j, 4):
                t = 0.0
                for i in range(m):
                    t += J[i, j] * J[i, k]
                A[j, k] = t
                A[k, j] = t
        while True:
            for j in range(4):
                for k in range(4):
                    M[j, k] = A[j, k]
                M[j, j] += lam * A[j, j]
                step[j] = g[j]
            if not _solve_small(M, step, 4):
                return p, r, False          # a singular step: the plain form decides
            small = True
            for j in range(4):
                trial[j] = p[j] + step[j]
                if not abs(step[j]) <= xtol * (abs(trial[j]) + xtol):
                    small = False
            ct = _gauss_cost(v, y, trial, scale, rt)
            if np.isfinite(ct) and (ct <= cost or small):
                break
            lam = max(lam * 10.0, 1e-6)
            if lam > 1e16:
                return p, r, False
        for j in range(4):
            p[j] = trial[j]
        for i in range(m):
            r[i] = rt[i]
        cost = ct
        if small:
            polish -= 1
            lam = 0.0               # at the minimum: plain Gauss-Newton, which converges quadratically
            if polish == 0:
                return p, r, True
        else:
            lam = max(lam * 0.1, 1e-15)
    return p, r, False


def _prepare_blaze(flux, var, good, B, has_b, stride):   # pragma: no cover (compiled)
    rows, n = flux.shape
    ns = (n + stride - 1) // stride
    blaze = np.empty((rows, n))
    f = np.empty((rows, n))
    v = np.empty((rows, n))
    fs = np.empty((rows, ns))
    vs = np.empty((rows, ns))
    for r in range(rows):
        usable = has_b[r]
        if usable:
            for i in range(n):
                b = B[r, i]
                if not ((np.isfinite(b) and b > 0) or not good[r, i]):
                    usable = False
                    break
        for i in range(n):
            gd = good[r, i]
            blaze[r, i] = B[r, i] if (usable and gd) else 1.0
            f[r, i] = flux[r, i] if gd else 0.0
            v[r, i] = var[r, i] if gd else 0.0
        for t in range(ns):
            bs = blaze[r, t * stride]
            fs[r, t] = f[r, t * stride] / bs
            vs[r, t] = v[r, t * stride] / (bs * bs)
    return blaze, f, v, fs, vs


def _prepare_tail(coef, enough, V, blaze, good, f, v, used, stride):   # pragma: no cover (compiled)
    rows, n = f.shape
    k = coef.shape[1]
    ns = used.shape[1]
    cont = np.empty((rows, n))
    gout = np.empty((rows, n), dtype=np.bool_)
    fn = np.empty((rows, n))
    vn = np.empty((rows, n))
    q = np.empty((rows, n))
    for r in range(rows):
        if enough[r]:
            for i in range(n):
                t = 0.0
                for j in range(k):
                    t += coef[r, j] * V[i, j]
                cont[r, i] = t * blaze[r, i]
        else:
            for i in range(n):
                cont[r, i] = np.nan * blaze[r, i]
        # the photon weight's regression of variance on continuum, on the clipping's pixel subset
        nw = 0.0
        sc = 0.0
        sv = 0.0
        for t in range(ns):
            i = t * stride
            c = cont[r, i]
            gs = good[r, i] and np.isfinite(c) and c > 0
            u = used[r, t] and gs
            used[r, t] = u
            if u:
                nw += 1.0
                sc += c
                sv += v[r, i]
        nw = max(nw, 1.0)
        mc = sc / nw
        mv = sv / nw
        cov = 0.0
        scc = 0.0
        for t in range(ns):
            if used[r, t]:
                i = t * stride
                dc = cont[r, i] - mc
                cov += dc * (v[r, i] - mv)
                scc += dc * dc
        a = cov / scc if scc > 0 else 0.0
        fl = 0.25 * mv
        for i in range(n):            # no branches: selects on vector lanes
            cn = cont[r, i]
            gd = good[r, i] & np.isfinite(cn) & (cn > 0)
            c = cn if gd else 1.0
            c2 = c * c
            gout[r, i] = gd
            fn[r, i] = f[r, i] / c if gd else 0.0
            vn[r, i] = v[r, i] / c2 if gd else 0.0
            vcont = mv + a * (c - mc)
            den = np.nan if (np.isnan(vcont) | np.isnan(fl)) else (vcont if vcont > fl else fl)  # np.maximum
            qq = c2 / den
            q[r, i] = qq if (gd & (den > 0)) else 0.0
    return cont, gout, fn, vn, q


def _good_spans(good):   # pragma: no cover (compiled)
    rows, n = good.shape
    first = np.full(rows, -1, dtype=np.intp)
    last = np.full(rows, -1, dtype=np.intp)
    count = np.zeros(rows, dtype=np.intp)
    for r in range(rows):
        c = 0
        for i in range(n):
            c += good[r, i]
        count[r] = c
        for i in range(n):
            if good[r, i]:
                first[r] = i
                break
        for i in range(n - 1, -1, -1):
            if good[r, i]:
                last[r] = i
                break
    return first, last, count


def count_spectrum() -> None:
    """Note one more prepared spectrum in this process (:data:`WARMUP_SPECTRA`)."""
    global _prepared
    _prepared += 1


def numba_jit(**options):
    """``numba.njit`` with the options every kernel module compiles with (cached on disk, no GIL) and
    ``options``, or None without numba: the decorator of this module's and of :mod:`.fit_kernels`'
    and :mod:`.coadd_kernels`' loaders."""
    try:
        import numba
    except ImportError:
        return None
    return numba.njit(cache=True, nogil=True, **options)


def _load() -> SimpleNamespace | None:
    """The compiled kernels (compiled or loaded from numba's cache on first use), None without numba."""
    global _COMPILED
    if _COMPILED is None:
        _COMPILED = False
        jit = numba_jit()
        if jit is not None:
            # numpy's error model (a quotient by zero is inf or nan, not an exception): lets a loop of
            # quotients run on vector lanes; used where every such quotient is then replaced
            lanes = numba_jit(error_model="numpy")
            global _solve_small
            _solve_small = jit(solve_small)    # called from a kernel: numba needs it compiled too
            global _gauss_cost
            _gauss_cost = jit(_gauss_cost)
            _COMPILED = SimpleNamespace(ccf_pairs=jit(_ccf_pairs), term_variances=jit(_term_variances),
                                        cumsums=jit(_cumsums), continuum_iterations=jit(_continuum_iterations),
                                        pixel_screen=lanes(_pixel_screen), good_snr=jit(_good_snr),
                                        gauss_fit=jit(_gauss_fit), good_spans=jit(_good_spans),
                                        prepare_blaze=lanes(_prepare_blaze),
                                        prepare_tail=lanes(_prepare_tail))
    return _COMPILED or None


def compiled() -> SimpleNamespace | None:
    """The compiled kernels if the callers should use them now, else None.

    ``LINESHIFT_JIT=0``: never; ``LINESHIFT_JIT=1``: always (when numba is installed); unset: once
    this process has prepared :data:`WARMUP_SPECTRA` spectra.  Either way the results are the same
    (tests/test_fast_kernels.py)."""
    mode = os.environ.get("LINESHIFT_JIT", "").strip()
    if mode == "0" or (mode != "1" and _prepared < WARMUP_SPECTRA):
        return None
    return _load()


def compiled_always() -> SimpleNamespace:
    """The compiled kernels whatever the warm-up (for a caller told to use them); needs numba."""
    return _kernels()


def _kernels() -> SimpleNamespace:
    k = _load()
    if k is None:
        raise RuntimeError("the compiled kernels need numba (pip install numba)")
    return k


def ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, r, m, pw):
    """Pixel coordinates ``x`` (pairs, edge columns) of the box edges of each (order, line) pair, the
    box integrals of the numerator and denominator (pairs, m), and each order's sums of them weighted
    by the pairs' line weights ``pw`` (orders, m), its pairs added in turn (as ``np.cumsum`` adds).

    ``edges``, ``snum``, ``sden`` are the orders' pixel edges and cumulative sums concatenated
    (``n + 1`` per order, order ``o`` from ``estart[o]``), ``gnum``, ``gden`` their pixel values
    (``n`` per order); pair ``p`` is line wavelength ``plam[p]`` on order ``porder[p]``, its edge
    ``c`` at ``plam[p] * fac[c]``; ``r`` is the edge layout of :func:`.ccf._edge_layout`."""
    return _kernels().ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, int(r), int(m),
                                np.ascontiguousarray(pw, dtype=float))


def term_variances(x, r, w, lstart, pstart, qv, sens, own=None):
    """(``sum_p h_p^2 qv_p`` over all orders for each row of ``sens``, and for each order ``t`` the
    same for ``own[t]`` on its own pixels); box edges ``x`` of every line of every order stacked
    (order ``t``'s lines from ``lstart[t]``, its pixels from ``pstart[t]`` in ``qv``), weights ``w``."""
    has_own = own is not None
    own = own if has_own else np.zeros((lstart.size - 1, sens.shape[1]))
    return _kernels().term_variances(x, int(r), w, lstart, pstart, qv, sens, own, has_own)


def _cumsums(g, estart):   # pragma: no cover (compiled)
    out = np.empty(estart[-1])
    for o in range(estart.size - 1):
        e0 = estart[o]
        g0 = e0 - o
        s = 0.0
        out[e0] = 0.0
        for i in range(estart[o + 1] - e0 - 1):
            s += g[g0 + i]
            out[e0 + i + 1] = s
    return out


def cumsums(g, estart):
    """Each order's ``concatenate(([0], np.cumsum(g_o)))``, concatenated (``estart`` as in
    :func:`ccf_pairs`); sequential sums, as ``np.cumsum`` adds."""
    return _kernels().cumsums(g, estart)


def solve_small(M, x, k):   # pragma: no cover (compiled)
    """M x = b in place (b given in ``x``): Gaussian elimination with partial pivoting, as LAPACK's
    getrf/getrs do it for a small matrix; False (``x`` unfinished) when a pivot is zero.  The source the
    kernels of this module and of :mod:`.fit_kernels` compile their own copy from."""
    for c in range(k):
        p = c
        for i in range(c + 1, k):
            if abs(M[i, c]) > abs(M[p, c]):
                p = i
        if M[p, c] == 0.0:
            return False
        if p != c:
            for j in range(k):
                M[c, j], M[p, j] = M[p, j], M[c, j]
            x[c], x[p] = x[p], x[c]
        for i in range(c + 1, k):
            f = M[i, c] / M[c, c]
            for j in range(c, k):
                M[i, j] -= f * M[c, j]
            x[i] -= f * x[c]
    for c in range(k - 1, -1, -1):
        t = x[c]
        for j in range(c + 1, k):
            t -= M[c, j] * x[j]
        x[c] = t / M[c, c]
    return True


_solve_small = solve_small     # this module's kernels call it by this name (compiled in _load)

def _continuum_iterations(flux, var, good, V, A, b, clip_low, clip_high, max_iter):   # pragma: no cover (compiled)
    rows, n = flux.shape
    k = V.shape[1]
    y = np.empty((rows, n))
    v0 = np.empty((rows, n))
    for r in range(rows):
        for i in range(n):
            y[r, i] = flux[r, i] if good[r, i] else 0.0
            v0[r, i] = var[r, i] if good[r, i] else 0.0
    # A, b: the normal equations of the first step (every good pixel), kept and updated between steps
    nw = np.zeros(rows, dtype=np.int64)
    for r in range(rows):
        for i in range(n):
            nw[r] += good[r, i]
    w = good.copy()
    VV = np.empty((n, k * k))
    for i in range(n):
        for j in range(k):
            for m in range(k):
                VV[i, j * k + m] = V[i, j] * V[i, m]
    sig = np.empty(n)
    used = good.copy()
    new = np.empty((rows, n), dtype=np.bool_)
    coef = np.zeros((rows, k))
    scatter2 = np.zeros(rows)
    resid = np.empty(n)
    M = np.empty((k, k))
    rhs = np.empty(k)
    VT = np.ascontiguousarray(V.T)
    tol = 1e-3 * rows * n
    for _ in range(max_iter):
        changed = 0
        for r in range(rows):
            count = 0
            for i in range(n):
                count += used[r, i]
            enough = count > k
            for i in range(n):                       # only the pixels that joined or left the fit
                wi = used[r, i] if enough else good[r, i]
                if wi != w[r, i]:
                    sgn = 1.0 if wi else -1.0
                    for j in range(k * k):
                        A[r, j] += sgn * VV[i, j]
                    for j in range(k):
                        b[r, j] += sgn * y[r, i] * V[i, j]
                    nw[r] += 1 if wi else -1
                    w[r, i] = wi
            if nw[r] == 0:                            # no usable pixel: coefficients 0
                for j in range(k):
                    coef[r, j] = 0.0
            else:
                tr = 0.0
                for j in range(k):
                    tr += A[r, j * k + j]
                for j in range(k):
                    for m in range(k):
                        M[j, m] = A[r, j * k + m]
                    M[j, j] += 1e-12 * tr
                for j in range(k):
                    rhs[j] = b[r, j]
                _solve_small(M, rhs, k)
                for j in range(k):
                    coef[r, j] = rhs[j]
            for i in range(n):
                resid[i] = y[r, i]
            for j in range(k):                        # by columns of V: contiguous, vectorisable
                cj = coef[r, j]
                for i in range(n):
                    resid[i] -= cj * VT[j, i]
            # four running sums (a sequential sum waits on each add; the order of a sum is free here:
            # the plain form's np.sum adds pairwise)
            s0 = s1 = s2_ = s3 = 0.0
            i = 0
            while i + 4 <= n:
                s0 += (resid[i] * resid[i] - v0[r, i]) * used[r, i]
                s1 += (resid[i + 1] * resid[i + 1] - v0[r, i + 1]) * used[r, i + 1]
                s2_ += (resid[i + 2] * resid[i + 2] - v0[r, i + 2]) * used[r, i + 2]
                s3 += (resid[i + 3] * resid[i + 3] - v0[r, i + 3]) * used[r, i + 3]
                i += 4
            while i < n:
                s0 += (resid[i] * resid[i] - v0[r, i]) * used[r, i]
                i += 1
            s = (s0 + s1) + (s2_ + s3)
            s2 = max(s / max(count, 1), 0.0)
            scatter2[r] = s2
            for i in range(n):
                sig[i] = np.sqrt(v0[r, i] + s2)
            for i in range(n):
                ok = good[r, i] & (resid[i] > sig[i] * -clip_low) & (resid[i] < sig[i] * clip_high)
                new[r, i] = ok
                changed += ok != used[r, i]
        used, new = new, used
        if changed <= tol:
            break
    return coef, used, scatter2


def continuum_iterations(flux, var, good, V, VV, clip_low, clip_high, max_iter):
    """The clipping iterations of the continuum fit for a block of orders (:func:`.prepare._continuum_core`
    holds the plain array form): (coefficients, pixels kept, scatter^2 per order).  The same steps,
    with one change: the normal equations are kept between steps and updated by the pixels that
    joined or left the fit instead of being summed afresh, and sums run sequentially, so the
    coefficients differ from the plain form's in the last bits (~1e-15 relative)."""
    flux, var = np.ascontiguousarray(flux, dtype=float), np.ascontiguousarray(var, dtype=float)
    good = np.ascontiguousarray(good)
    g = good.astype(float)
    A = g @ VV                                        # the first step's sums by BLAS (every good pixel)
    b = (g * np.where(good, flux, 0.0)) @ V
    return _kernels().continuum_iterations(flux, var, good, np.ascontiguousarray(V), A, b, float(clip_low),
                                           float(clip_high), int(max_iter))


def gauss_fit(v, y, guess, scale, xtol=1e-12, max_iter=200):
    """Least squares of ``c0 - a exp(-(v - mu)^2 / (2 s^2)) - y`` over (c0, a, mu, s) = ``p * scale``
    from ``guess``: Levenberg-Marquardt steps (Marquardt 1963, the damping scaled by the diagonal of
    ``J^T J``) until a step changes every parameter by less than ``xtol`` relative (MINPACK's ``xtol``
    test, More 1978), then two Gauss-Newton steps.  Returns (p, residuals, converged).  The plain form
    is scipy.optimize.least_squares (:func:`.peak.fit_gaussian` with ``reference=True``)."""
    return _kernels().gauss_fit(np.ascontiguousarray(v, dtype=float), np.ascontiguousarray(y, dtype=float),
                                np.asarray(guess, dtype=float), np.asarray(scale, dtype=float), float(xtol),
                                int(max_iter))


def prepare_blaze(flux, var, good, blazes, stride):
    """The blaze of every pixel (the order's where it is given, finite and positive at every good
    pixel, else 1), the flux and variance zeroed at bad pixels, and both divided by the blaze (squared
    for the variance) at every ``stride``-th pixel, for the continuum's iterations: (blaze, f, v, fs, vs).
    ``blazes`` is one array or None per row.  The plain form is the array steps of
    :func:`.prepare._prepare_block`; the same operations, the same values."""
    has_b = np.array([b is not None for b in blazes], dtype=np.bool_)
    B = np.vstack([b if b is not None else flux[r] for r, b in enumerate(blazes)]) if has_b.any() else flux
    return _kernels().prepare_blaze(flux, var, np.ascontiguousarray(good), np.ascontiguousarray(B, dtype=float),
                                    has_b, int(stride))


def prepare_tail(coef, enough, V, blaze, good, f, v, used, stride):
    """The continuum ``coef @ V.T`` times the blaze (NaN for an order with too few pixels), the photon
    weight's regression of variance on continuum over the clipping's pixels (``used``, updated in
    place as the plain form updates it) and the per-pixel finish (:func:`.prepare._finish_numpy`'s
    operations pixel by pixel): (continuum, good, flux, variance, weight).  The plain form is
    :func:`.prepare._prepare_block`'s array steps; sums run in sequence instead of numpy's pairs
    (~1e-15 relative)."""
    return _kernels().prepare_tail(np.ascontiguousarray(coef), np.ascontiguousarray(enough), np.ascontiguousarray(V),
                                   blaze, np.ascontiguousarray(good), f, v, used, int(stride))


def good_spans(good):
    """First and last True column and the count of True of each row of a 2-D boolean array (-1 where a
    row has none): ``np.argmax`` from both ends and ``np.count_nonzero`` per row, in one pass."""
    return _kernels().good_spans(np.ascontiguousarray(good))


def good_snr(flux, var, good, step):
    """``flux / sqrt(var)`` at every ``step``-th good pixel of each row, rows one after another (the
    plain form: ``np.flatnonzero(good_row)[::step]`` row by row, in :func:`.mask_engine.measure_mask`)."""
    return _kernels().good_snr(flux, var, good, int(step))


def pixel_screen(flux, var, max_width, nsigma, contrast):
    """One pass over a block of orders (rows) for the screening of :mod:`.badpixels` and :mod:`.outliers`:
    (``base_bad``: non-finite flux or variance or variance <= 0; ``bad``: that or flux <= 0, before
    growing; ``tie``: rows where two finite neighbours are equal, the only rows that can have a clipped
    flat top; ``cand``: the flat indices of :func:`.outliers.find_spikes`' candidates, the pixels that
    stand out of the running minimum of ``2 max_width + 1`` neighbours by ``nsigma`` noise sigma and
    ``contrast`` times that minimum).  The plain forms are the array steps in those modules; the same
    comparisons on the same values, so the same pixels."""
    return _kernels().pixel_screen(np.ascontiguousarray(flux, dtype=float), np.ascontiguousarray(var, dtype=float),
                                   int(max_width), float(nsigma), float(contrast))


