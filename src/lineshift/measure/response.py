"""The detector-frame response left in every spectrum after the common continuum, estimated from the fit.

Every spectrum of an order is divided by one common continuum (:func:`.coadd.on_common_continuum`).
When that continuum cannot follow the true throughput (a steep blaze that the file does not give,
followed by a low-degree polynomial), all spectra share the same multiplicative residual ``R(x)``
in the detector frame (pixel ``x``).  The template, co-added in the star's frame from spectra at
different barycentric velocities, holds ``R`` averaged over their relative shifts; spectrum ``i``
divided by it leaves ``m_i(x) = ln R(x) - <ln R(x + s_ij)>_j``, to first order
``(s_i - <s>) d ln R / dx``: a mismatch proportional to the spectrum's offset from the mean shift.
Where ``ln R`` is not a low-degree polynomial the template fit's multiplicative polynomial cannot
absorb it, and it turns into a velocity error proportional to BERV.

The fit's relative residuals, averaged in bins of pixels (where the lines average out), measure
``m_i - p_i`` (``p_i``: the part the fit's polynomial took).  ``ln R`` is solved for by linear least
squares as a cubic B-spline in ``x`` with a second-difference penalty (a P-spline: Eilers & Marx
1996, Statistical Science 11, 89), each spectrum's polynomial and fitted shift (which took the
mismatch's projection onto the model's derivative) eliminated by projection, the template
term built from the other spectra's shifts and weights exactly as the co-add does (without the
spectrum itself).  A response that is a polynomial of degree ``poly_degree + 1`` or less is
invisible (and harmless), and so is every response when the spectra share one shift: only the
directions of the coefficients that the data fix to ``precision`` are estimated, the rest left at
zero (a truncated eigen-solution), so nothing is fitted to the noise.  Dividing every
spectrum by ``exp(ln R)``, i.e. multiplying the common continuum by it, removes the mismatch; the
template passes of the pipeline repeat co-add, fit and this estimate.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import eigh

__all__ = ["ResponseBins", "bin_residuals", "detector_response"]

#: Uniform cubic B-spline basis in powers of t (as in :mod:`.coadd`): weight of coefficient i+k.
_B = np.array([[1.0, 4.0, 1.0, 0.0], [-3.0, 0.0, 3.0, 0.0], [3.0, -6.0, 3.0, 0.0], [-1.0, 3.0, -3.0, 1.0]]) / 6.0

#: (bin-centre pixel index, bin-centre ln wavelength, relative residual, its inverse variance) of one
#: order, optionally followed by the shift's cross information per bin and its whole information
ResponseBins = tuple


def bin_residuals(wave: np.ndarray, resid: np.ndarray, model: np.ndarray, weight: np.ndarray,
                  deriv: np.ndarray | None = None, width: int = 16) -> list[ResponseBins]:
    """Relative residuals ``resid / model`` of fitted orders (rows), weighted means in bins of ``width``
    pixels, with the inverse variance of each mean (``sum weight * model^2``; 0 where nothing is used).

    With ``deriv`` (the model's derivative with respect to the fitted shift, per pixel) also, per bin,
    ``sum weight * model * deriv`` and, per order, the shift's whole information ``sum weight * deriv^2``:
    what the fit's shift took of a smooth mismatch (its projection onto the shift) follows from them.
    """
    k, n = resid.shape
    nb = -(-n // width)
    pad = nb * width - n

    def binned(a):
        return (np.pad(a, ((0, 0), (0, pad))) if pad else a).reshape(a.shape[0], nb, width).sum(axis=2)

    wm = weight * model
    num, den = binned(wm * resid), binned(wm * model)
    cnt = binned(np.ones((1, n)))          # the same for every row
    x = np.broadcast_to(binned(np.arange(n, dtype=float)[None, :]) / cnt, (k, nb))
    cnt = np.broadcast_to(cnt, (k, nb))
    u = binned(np.log(wave)) / np.maximum(cnt, 1)
    rho = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
    if deriv is None:
        return [(x[j], u[j], rho[j], den[j]) for j in range(k)]
    cross = binned(wm * deriv)
    info = np.sum(weight * deriv * deriv, axis=1)
    return [(x[j], u[j], rho[j], den[j], cross[j], float(info[j])) for j in range(k)]


def _basis_sparse(x: np.ndarray, h: float, ncoef: int) -> tuple[np.ndarray, np.ndarray]:
    """The cubic B-spline design matrix for ``x`` in 0..(ncoef - 3) h (knots spaced ``h``) by its
    non-zero entries: the first column of each row and the (m, 4) weights of columns i..i+3."""
    t = x / h
    i = np.clip(np.floor(t).astype(np.intp), 0, ncoef - 4)
    f = t - i
    return i, np.stack([f**0, f, f * f, f**3], axis=-1) @ _B


def _basis(x: np.ndarray, h: float, ncoef: int) -> np.ndarray:
    """Dense cubic B-spline design matrix for ``x`` in 0..(ncoef - 3) h, knots spaced ``h``."""
    i, q = _basis_sparse(x, h, ncoef)
    out = np.zeros((x.size, ncoef))
    rows = np.arange(x.size)[:, None]
    out[rows, i[:, None] + np.arange(4)] = q
    return out


def detector_response(spectra: list[tuple[float, dict[int, ResponseBins]]], sizes: dict[int, int], *,
                      poly_degree: int = 3, spacing: float = 64.0, penalty: float = 1e-3,
                      precision: float = 0.01) -> dict[int, np.ndarray]:
    """``ln R`` per pixel for each order (by order index), from the binned fit residuals of each
    spectrum: ``spectra`` holds (ln co-adding factor, {order index: bins}); ``sizes`` the orders'
    lengths in pixels.  Knots every ``spacing`` pixels; ``penalty`` scales the second-difference
    penalty relative to the mean information per direction; only combinations of coefficients that the
    data fix to ``precision`` in ``ln R`` (the information is that of the relative residuals, ``W`` of
    the bins) are estimated, the rest left at zero."""
    from lineshift.measure import coadd_kernels

    fast = coadd_kernels.active()
    out: dict[int, np.ndarray] = {}
    for index, n in sizes.items():
        have = [(lnf, bins[index]) for lnf, bins in spectra if index in bins]
        if len(have) < 3:
            continue
        nint = int(np.clip(round((n - 1) / spacing), 4, 64))
        h = (n - 1) / nint
        ncoef = nint + 3
        if fast is not None:   # the normal equations by one compiled pass (coadd_kernels.response_equations)
            G, g = _equations_fast(fast, have, n, h, ncoef, poly_degree)
            resp = _solve(G, g, ncoef, penalty, precision,
                          lambda c, n=n, h=h, ncoef=ncoef: _response_sparse(c, n, h, ncoef))
            if resp is not None:
                out[index] = resp
            continue

        def contribution(lnf_j, bins_j, s, h=h, ncoef=ncoef):
            """Spectrum j's weight at star-frame points s (ln wavelength) and its basis there (sparse)."""
            xj, uj, _, Wj = bins_j[:4]
            at = s - lnf_j
            pos = np.interp(at, uj, xj)
            wj = np.where((at >= uj[0]) & (at <= uj[-1]), np.interp(pos, xj, Wj), 0.0)
            return wj, *_basis_sparse(pos, h, ncoef)

        # the co-add's sums of every spectrum on a fine star-frame grid (a quarter bin apart): one pass
        # over the spectra, then each spectrum's template term is these sums less its own share
        ds = 0.25 * float(np.median([np.median(np.diff(b[1])) for _, b in have]))
        s0 = min(b[1][0] + lnf for lnf, b in have)
        sgrid = np.arange(s0, max(b[1][-1] + lnf for lnf, b in have) + 2 * ds, ds)
        S = np.zeros((sgrid.size, ncoef))
        Wsum = np.zeros(sgrid.size)
        rows, four = np.arange(sgrid.size)[:, None], np.arange(4)
        for lnf_j, bins_j in have:
            wj, cj, qj = contribution(lnf_j, bins_j, sgrid)
            Wsum += wj
            S[rows, cj[:, None] + four] += wj[:, None] * qj     # each (row, column) once: no lost sums
        G = np.zeros((ncoef, ncoef))
        g = np.zeros(ncoef)
        floor = 1e-9 * np.max(Wsum)
        for lnf_i, bins_i in have:
            x, u, rho, W = bins_i[:4]
            use = W > 0
            if use.sum() <= poly_degree + 2:
                continue
            xs = x[use]
            gi = (u[use] + lnf_i - s0) / ds
            i0 = np.clip(np.floor(gi).astype(np.intp), 0, sgrid.size - 2)
            f = (gi - i0)[:, None]
            # the template term (the others' weighted mean) and the spectrum itself, both at the two
            # star-frame grid nodes around each point, then interpolated alike: without any spread of
            # shifts they cancel (to rounding: no response can be seen, none is made up).  The
            # spectrum's own share s = own x basis enters as s / own + s / others = basis (1 + own / others),
            # on its four columns only
            A = np.zeros((xs.size, ncoef))
            ok = np.ones(xs.size, dtype=bool)
            at = np.arange(xs.size)[:, None]
            for node, wt in ((i0, 1 - f), (i0 + 1, f)):
                own, c, q = contribution(lnf_i, bins_i, sgrid[node])
                others = Wsum[node] - own
                ok &= (others > floor) & (own > 0)
                safe = np.where(ok, others, 1.0)[:, None]
                A -= wt * (S[node] / safe)
                A[at, c[:, None] + four] += wt * q * (1.0 + np.where(ok, own, 0.0)[:, None] / safe)
            sw = np.sqrt(W[use]) * ok
            X, y = A * sw[:, None], rho[use] * sw
            L = np.stack([(2 * xs / (n - 1) - 1) ** p for p in range(poly_degree + 1)], axis=1) * sw[:, None]
            if len(bins_i) > 4 and bins_i[5] > 0:
                # the fitted shift took the mismatch's projection onto the model's derivative (in the
                # full per-pixel metric): a column cross / sqrt(W) in the bins, and one row more that
                # carries the rest of its information, line-scale structure no smooth mismatch has
                cross, info = bins_i[4][use] * ok, bins_i[5]
                col = cross / np.sqrt(W[use])
                rest = np.sqrt(max(info - float(col @ col), 0.0))
                L = np.vstack([np.column_stack([L, col]), np.r_[np.zeros(L.shape[1]), rest]]) / np.r_[
                    np.ones(L.shape[1]), np.sqrt(info)]
                X = np.vstack([X, np.zeros(ncoef)])
                y = np.r_[y, 0.0]
            Q, _ = np.linalg.qr(L)
            X -= Q @ (Q.T @ X)                                # this spectrum's polynomial (and shift) eliminated
            y -= Q @ (Q.T @ y)
            G += X.T @ X
            g += X.T @ y
        resp = _solve(G, g, ncoef, penalty, precision, lambda c, n=n, h=h, ncoef=ncoef: _basis(
            np.arange(n, dtype=float), h, ncoef) @ c)
        if resp is not None:
            out[index] = resp
    return out


def _solve(G, g, ncoef, penalty, precision, evaluate):
    """``ln R`` per pixel (``evaluate`` of the coefficients) from the normal equations, or None."""
    # only what the data measure to ``precision`` or better: the eigen-directions of the
    # information G above 1 / precision^2 (without a spread of shifts, none: the response is
    # invisible, and harmless); the second-difference penalty smooths within them
    # LAPACK's relatively robust representations (syevr): numpy's divide-and-conquer driver took
    # 12 ms instead of 0.1 ms on these 35 x 35 matrices right after the fits' batched products
    lam, V = eigh(G, driver="evr")
    Vk = V[:, lam > 1.0 / precision**2]
    if Vk.shape[1] == 0:
        return None
    # the mean over the directions with information: eigenvalues at the rounding level of G (the
    # invisible polynomials) are left out, as a matrix rank leaves them out (numpy.linalg.matrix_rank's
    # tolerance: largest x size x machine epsilon), whatever sign rounding gave them
    D = np.diff(np.eye(ncoef), 2, axis=0)
    P = penalty * float(np.mean(lam[lam > lam[-1] * ncoef * np.finfo(float).eps])) * (D.T @ D)
    coef = Vk @ np.linalg.solve(Vk.T @ (G + P) @ Vk, Vk.T @ g)
    resp = evaluate(coef)
    return resp if np.all(np.isfinite(resp)) else None


def _equations_fast(fast, have, n, h, ncoef, poly_degree):
    """(G, g) of :func:`detector_response` for one order by :func:`.coadd_kernels.response_equations`."""
    sizes = np.array([b[0].size for _, b in have])
    bstart = np.concatenate(([0], np.cumsum(sizes)))
    cat = [np.ascontiguousarray(np.concatenate([b[k] for _, b in have]), dtype=float) for k in range(4)]
    ds = 0.25 * float(fast.median_bin_step(cat[1], bstart))     # the medians of the plain form, by selection
    s0 = min(b[1][0] + lnf for lnf, b in have)
    sgrid = np.arange(s0, max(b[1][-1] + lnf for lnf, b in have) + 2 * ds, ds)
    shift = [len(b) > 4 for _, b in have]
    cross = np.concatenate([b[4] if s else np.zeros(b[0].size) for (_, b), s in zip(have, shift, strict=True)])
    info = np.array([float(b[5]) if s else 0.0 for (_, b), s in zip(have, shift, strict=True)])
    lnf = np.array([float(v) for v, _ in have])
    G, g, _ = fast.response_equations(*cat, np.ascontiguousarray(cross, dtype=float), info, bstart, lnf, sgrid,
                                      float(s0), ds, int(n), float(h), int(ncoef), int(poly_degree))
    return G, g


_SPARSE: dict[tuple, tuple[np.ndarray, np.ndarray]] = {}


def _response_sparse(coef, n, h, ncoef):
    """The B-spline with coefficients ``coef`` at every pixel, from its four non-zero basis values
    per pixel (the same as the dense design matrix times ``coef``, summed in another order)."""
    key = (n, h, ncoef)
    if key not in _SPARSE:
        if len(_SPARSE) > 8:
            _SPARSE.clear()
        _SPARSE[key] = _basis_sparse(np.arange(n, dtype=float), h, ncoef)
    i, q = _SPARSE[key]
    return (q[:, 0] * coef[i] + q[:, 1] * coef[i + 1]) + (q[:, 2] * coef[i + 2] + q[:, 3] * coef[i + 3])
