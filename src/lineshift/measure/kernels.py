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
* :func:`prepare_finish`: the normalised flux, its variance and the photon weight of every pixel
  (:func:`.prepare._prepare_block`; plain form :func:`.prepare._finish_numpy`), the same operations
  pixel by pixel instead of array by array: the same results to the last bit.

The compiled forms are used when numba imports, from the :data:`WARMUP_SPECTRA`-th spectrum a process
prepares on (``LINESHIFT_JIT=1``: from the first, ``0``: never; see :func:`compiled`).  Each is
compiled on first use and cached on disk by numba (beside this file, or in the user's cache directory
when that is read-only, or in ``NUMBA_CACHE_DIR``), so later runs load it.
"""

from __future__ import annotations

import os
from types import SimpleNamespace

import numpy as np

__all__ = ["WARMUP_SPECTRA", "ccf_pairs", "compiled", "count_spectrum", "cumsums", "prepare_finish",
           "term_variances"]

_COMPILED: SimpleNamespace | bool | None = None


def _ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, r, m):   # pragma: no cover (compiled)
    npair = plam.size
    ncol = fac.size
    x = np.empty((npair, ncol))
    bnum = np.empty((npair, m))
    bden = np.empty((npair, m))
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
        for k in range(m):
            hi = k + r if r else m + k
            bnum[p, k] = cnum[hi] - cnum[k]
            bden[p, k] = cden[hi] - cden[k]
    return x, bnum, bden


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


def count_spectrum() -> None:
    """Note one more prepared spectrum in this process (:data:`WARMUP_SPECTRA`)."""
    global _prepared
    _prepared += 1


def _load() -> SimpleNamespace | None:
    """The compiled kernels (compiled or loaded from numba's cache on first use), None without numba."""
    global _COMPILED
    if _COMPILED is None:
        _COMPILED = False
        try:
            import numba
        except ImportError:
            pass
        else:
            jit = numba.njit(cache=True, nogil=True)
            _COMPILED = SimpleNamespace(ccf_pairs=jit(_ccf_pairs), term_variances=jit(_term_variances),
                                        cumsums=jit(_cumsums), prepare_finish=jit(_prepare_finish))
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


def _kernels() -> SimpleNamespace:
    k = _load()
    if k is None:
        raise RuntimeError("the compiled kernels need numba (pip install numba)")
    return k


def ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, r, m):
    """Pixel coordinates ``x`` (pairs, edge columns) of the box edges of each (order, line) pair and
    the box integrals of the numerator and denominator (pairs, m).

    ``edges``, ``snum``, ``sden`` are the orders' pixel edges and cumulative sums concatenated
    (``n + 1`` per order, order ``o`` from ``estart[o]``), ``gnum``, ``gden`` their pixel values
    (``n`` per order); pair ``p`` is line wavelength ``plam[p]`` on order ``porder[p]``, its edge
    ``c`` at ``plam[p] * fac[c]``; ``r`` is the edge layout of :func:`.ccf._edge_layout`."""
    return _kernels().ccf_pairs(edges, estart, snum, gnum, sden, gden, porder, plam, fac, int(r), int(m))


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


def _prepare_finish(f, v, good, cont, mc, mv, alpha, floor):   # pragma: no cover (compiled)
    rows, n = f.shape
    gout = np.empty((rows, n), dtype=np.bool_)
    fn = np.empty((rows, n))
    vn = np.empty((rows, n))
    q = np.empty((rows, n))
    for r in range(rows):
        for i in range(n):
            cn = cont[r, i]
            gd = good[r, i] and np.isfinite(cn) and cn > 0
            c = cn if gd else 1.0
            c2 = c * c
            gout[r, i] = gd
            fn[r, i] = f[r, i] / c if gd else 0.0
            vn[r, i] = v[r, i] / c2 if gd else 0.0
            vcont = mv[r] + alpha[r] * (c - mc[r])
            if np.isnan(vcont) or np.isnan(floor[r]):
                den = np.nan                       # np.maximum propagates NaN
            else:
                den = max(vcont, floor[r])
            q[r, i] = c2 / den if (gd and den > 0) else 0.0
    return gout, fn, vn, q


def prepare_finish(f, v, good, cont, mc, mv, alpha, floor):
    """(good, normalised flux, its variance, photon weight) of every pixel of a block of orders
    (:func:`.prepare._finish_numpy` is the plain form: the same operations on whole arrays)."""
    return _kernels().prepare_finish(np.ascontiguousarray(f), np.ascontiguousarray(v), np.ascontiguousarray(good),
                                     np.ascontiguousarray(cont), mc, mv, alpha, floor)
