"""Cross-correlation of prepared orders with a weighted line mask (Baranne et al. 1996; Pepe et al.
2002).

Each mask line ``l`` (rest vacuum wavelength ``lambda_l``, weight ``w_l``) is a box of full velocity
width ``box_width`` centred on ``lambda_l (1 + v/c)``.  A pixel contributes by the exact fraction of
it that the box covers (flux is taken as constant across a pixel).  For one order the correlation at
velocity ``v`` is the photon-weighted mean of the normalised flux seen through the mask::

    CCF(v) = sum_l w_l sum_p o_lp(v) q_p f_p  /  sum_l w_l sum_p o_lp(v) q_p

and the orders are summed numerator and denominator alike, so the continuum of the CCF is 1 and its
depth is the contrast.  Everything is linear in the pixel fluxes, which makes the error propagation
exact (:func:`CorrelationData.pixel_sensitivity`).

Box integrals use cumulative sums over pixel coordinate, so the whole (velocity x line) grid is
evaluated with array operations: there is no Python loop over velocities or lines (only over orders).
:func:`reference_ccf` is the slow, obvious version the fast one is tested against.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift.measure import kernels
from lineshift.measure.prepare import PreparedOrder, block_rows, joined
from lineshift.model import C_MS, LineMask

__all__ = ["CorrelationData", "box_adjoint", "box_integrals", "correlate", "reference_ccf"]


def _pixel_coordinate(edges: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """Continuous pixel coordinate (pixel p spans [p, p+1]) of wavelengths, linear within a pixel."""
    return np.interp(lam, edges, np.arange(edges.size, dtype=float))


def _cum(S: np.ndarray, g: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Integral of ``g`` from pixel coordinate 0 to ``x`` (``S`` = cumulative sums of ``g``)."""
    i = np.minimum(x.astype(np.intp), g.size - 1)
    return S[i] + (x - i) * g[i]


def _cum_adjoint_at(a: np.ndarray, i: np.ndarray, f: np.ndarray, n: int) -> np.ndarray:
    """:func:`_cum_adjoint` with the integer parts ``i`` and fractions ``f`` of x already split."""
    cnt = np.bincount(i, a, minlength=n)            # _cum(x) = sum_{p < i} g_p + f g_i
    below = np.concatenate((np.cumsum(cnt[::-1])[::-1][1:], [0.0]))
    return below + np.bincount(i, a * f, minlength=n)


def _cum_adjoint(a: np.ndarray, x: np.ndarray, n: int) -> np.ndarray:
    """``h`` with ``sum(a * _cum(S, g, x)) == h @ g`` for every ``g`` of length ``n``."""
    i = np.minimum(x.ravel().astype(np.intp), n - 1)
    return _cum_adjoint_at(a.ravel(), i, x.ravel() - i, n)


def box_integrals(g: np.ndarray, xa: np.ndarray, xb: np.ndarray) -> np.ndarray:
    """Integral of the piecewise-constant pixel array ``g`` from pixel coordinate xa to xb."""
    S = np.concatenate(([0.0], np.cumsum(g)))
    return _cum(S, g, xb) - _cum(S, g, xa)


def box_adjoint(a: np.ndarray, xa: np.ndarray, xb: np.ndarray, n: int) -> np.ndarray:
    """Adjoint of :func:`box_integrals`: ``h`` with ``sum(a * box_integrals(g, xa, xb)) == h @ g``."""
    return _cum_adjoint(a, xb, n) - _cum_adjoint(a, xa, n)


@dataclass
class _OrderTerms:
    """One order's part of a CCF.  Box edges are stored once per line: ``edges_x[l, r + i]`` ends
    the box of line ``l`` at velocity ``i`` and ``edges_x[l, i]`` starts it (``r`` = box width in
    grid steps), or, when the box is not a whole number of steps, the first ``m`` columns are starts
    and the last ``m`` ends."""

    order: PreparedOrder
    weights: np.ndarray   # (k,) line weights
    lines: np.ndarray     # (k,) indices into the mask
    edges_x: np.ndarray   # (k, m + r) or (k, 2m): box edges in pixel coordinate
    r: int                # offset of the end rows (0: separate start/end blocks)
    num: np.ndarray       # (m,)
    den: np.ndarray       # (m,)
    line_wavelengths: np.ndarray = None  # (k,) rest wavelengths of the lines
    line_num: np.ndarray | None = None   # (k, m) each line's own box sums of q f (``keep_lines``)
    line_den: np.ndarray | None = None   # (k, m) and of q


def _edge_layout(velocity: np.ndarray, box_width: float) -> tuple[np.ndarray, int]:
    """Velocities of the box edges, and the row offset of the ends (0 if not shareable)."""
    half = 0.5 * box_width
    m = velocity.size
    if m > 1:
        step = velocity[1] - velocity[0]
        r = box_width / step
        # np.allclose(np.diff(velocity), step, rtol=1e-9, atol=1e-9), without its set-up (~20 us a call)
        uniform = bool(np.all(np.abs(np.diff(velocity) - step) <= 1e-9 + 1e-9 * abs(step)))
        if uniform and abs(r - round(r)) < 1e-9 and round(r) >= 1:
            r = round(r)
            return velocity[0] - half + step * np.arange(m + r), r
    return np.concatenate((velocity - half, velocity + half)), 0


@dataclass
class CorrelationData:
    """A CCF on a velocity grid, with what is needed to propagate pixel variances through it."""

    velocity: np.ndarray
    terms: list[_OrderTerms]
    n_cleared: int = 0    # lines left out because bad pixels meet their boxes (``clear_of_bad``)
    compiled: bool = False   # propagate errors with the compiled kernel (measure/kernels.py)

    @property
    def numerator(self) -> np.ndarray:
        return np.sum([t.num for t in self.terms], axis=0)

    @property
    def denominator(self) -> np.ndarray:
        return np.sum([t.den for t in self.terms], axis=0)

    @property
    def ccf(self) -> np.ndarray:
        return self.numerator / self.denominator

    @property
    def n_lines(self) -> int:
        if not self.terms:
            return 0
        return int(np.unique(np.concatenate([t.lines for t in self.terms])).size)

    def order_ccf(self) -> list[tuple[int, np.ndarray]]:
        """(order index, CCF) for each order that contributed."""
        return [(t.order.index, t.num / t.den) for t in self.terms]

    def variance_of(self, sensitivity: np.ndarray) -> float | np.ndarray:
        """Variance of ``sensitivity @ ccf`` from the pixel variances (exact for this linear map).

        ``d CCF_i / d f_p = q_p sum_l w_l o_lp(v_i) / D_i`` (the denominator D carries no pixel noise:
        ``q`` is smooth), so the pixel sensitivity is the box adjoint of ``s_i w_l / D_i`` times ``q``.
        The covariance between neighbouring CCF points, which share pixels, is included.

        ``sensitivity`` may be (m,) or (n_sens, m); the result is a float or an array (n_sens,).
        """
        sens = np.atleast_2d(np.asarray(sensitivity, dtype=float)) / self.denominator
        if not self.terms:
            return np.zeros(sens.shape[0]) if np.ndim(sensitivity) == 2 else 0.0
        if self.compiled:
            out = _compiled_variances(self.terms, sens, None)[0]
        else:
            out = np.sum([self._term_variance(t, sens) for t in self.terms], axis=0)
        return out if np.ndim(sensitivity) == 2 else float(out[0])

    def variances(self, sensitivity: np.ndarray, order_sensitivities: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`variance_of` for the rows of ``sensitivity``, and for each contributing order k the
        variance of ``order_sensitivities[k] @ order_ccf_k`` (that order's pixels, its own
        denominator), in one pass over the orders (they share the per-order set-up).

        With ``compiled`` every order in one call of :func:`.kernels.term_variances`; otherwise one
        :meth:`_term_variance` per order (the NumPy form it is tested against)."""
        sens = np.atleast_2d(np.asarray(sensitivity, dtype=float)) / self.denominator
        if self.compiled and self.terms:
            own = np.asarray(order_sensitivities, dtype=float) / np.array([t.den for t in self.terms])
            return _compiled_variances(self.terms, sens, own)
        total = np.zeros(sens.shape[0])
        per_order = np.zeros(len(self.terms))
        for k, t in enumerate(self.terms):
            v = self._term_variance(t, np.vstack((sens, order_sensitivities[k:k + 1] / t.den)))
            total += v[:-1]
            per_order[k] = v[-1]
        return total, per_order

    @staticmethod
    def _edge_sensitivities(t: _OrderTerms, sens: np.ndarray) -> np.ndarray:
        """Sensitivity of each box edge column (an end adds, a start subtracts), per row of ``sens``."""
        m = sens.shape[1]
        if t.r:
            e = np.zeros((sens.shape[0], m + t.r))
            e[:, t.r:] += sens
            e[:, :m] -= sens
            return e
        return np.concatenate((-sens, sens), axis=1)

    @staticmethod
    def _term_variance(t: _OrderTerms, sens: np.ndarray) -> np.ndarray:
        """sum_p h_p^2 var_p for one order, for each row of ``sens`` (already divided by D).

        All rows at once: one weighted bincount over (row, pixel) of the edges' integer parts and
        one of their fractions, a cumulative sum per row, then one matrix product with the pixel
        variances.  :meth:`_term_variance_reference` is the plain form (one adjoint per row) it is
        tested against."""
        n = t.order.flux.size
        rows = sens.shape[0]
        i = np.minimum(t.edges_x.astype(np.intp), n - 1).ravel()
        f = t.edges_x.ravel() - i
        e = CorrelationData._edge_sensitivities(t, sens)                      # (rows, cols)
        a = (t.weights[None, :, None] * e[:, None, :]).reshape(rows, -1)      # (rows, lines * cols)
        flat = (np.arange(rows)[:, None] * n + i[None, :]).ravel()
        cnt = np.bincount(flat, a.ravel(), minlength=rows * n).reshape(rows, n)
        h = np.bincount(flat, (a * f[None, :]).ravel(), minlength=rows * n).reshape(rows, n)
        # _cum(x) = sum_{p < i} g_p + f g_i: every pixel below an edge counts fully
        h[:, :-1] += np.cumsum(cnt[:, ::-1], axis=1)[:, ::-1][:, 1:]
        qv = t.order.weight * t.order.weight * t.order.var
        return (h * h) @ qv

    @staticmethod
    def _term_variance_reference(t: _OrderTerms, sens: np.ndarray) -> np.ndarray:
        """Plain form of :meth:`_term_variance`: the adjoint of the box integrals row by row."""
        n = t.order.flux.size
        i = np.minimum(t.edges_x.astype(np.intp), n - 1).ravel()
        f = t.edges_x.ravel() - i
        e = CorrelationData._edge_sensitivities(t, sens)
        qv = t.order.weight * t.order.weight * t.order.var
        out = np.empty(sens.shape[0])
        for k in range(sens.shape[0]):
            h = _cum_adjoint_at(np.multiply.outer(t.weights, e[k]).ravel(), i, f, n)
            out[k] = float(np.dot(h * h, qv))
        return out


def _compiled_variances(terms: list[_OrderTerms], sens: np.ndarray, own: np.ndarray | None):
    """:meth:`CorrelationData.variances` for every order in one call of the compiled kernel."""
    x = np.concatenate([t.edges_x for t in terms]) if len(terms) > 1 else terms[0].edges_x
    lstart = np.concatenate(([0], np.cumsum([t.lines.size for t in terms]))).astype(np.intp)
    pstart = np.concatenate(([0], np.cumsum([t.order.flux.size for t in terms]))).astype(np.intp)
    kept = [t.order for t in terms]
    q = joined(kept, "weight")
    qv = q * q * joined(kept, "var")
    w = np.concatenate([t.weights for t in terms])
    return kernels.term_variances(np.ascontiguousarray(x, dtype=float), terms[0].r, w, lstart, pstart, qv,
                                  np.ascontiguousarray(sens), None if own is None else np.ascontiguousarray(own))


def select_lines(order: PreparedOrder, mask: LineMask, v_lo: float, v_hi: float,
                 box_width: float, *, clear_of_bad: bool | tuple[float, float] = False) -> np.ndarray:
    """Indices of mask lines whose box stays inside the order's good pixels for all v in [v_lo, v_hi].

    With ``clear_of_bad`` a line is also dropped when its box meets a bad pixel *inside* the order
    anywhere on the grid: a pixel of zero weight under a box removes part of that line at some
    velocities and not at others, which reshapes the CCF around the line and moves its centre
    (a missing core pixel near the dip is the worst case).  The fine grid is narrow, so few lines go.
    ``clear_of_bad`` may be a velocity interval (lo, hi) inside the grid: only boxes placed within it
    must be clear (the core of the dip, where the fitted centre responds to the CCF).
    """
    good = np.flatnonzero(order.good)
    lam_min = order.edges[good[0]]
    lam_max = order.edges[good[-1] + 1]
    half = 0.5 * box_width
    lo = mask.wavelength * (1 + (v_lo - half) / C_MS)
    hi = mask.wavelength * (1 + (v_hi + half) / C_MS)
    inside = (lo >= lam_min) & (hi <= lam_max)
    if isinstance(clear_of_bad, tuple):
        lo = mask.wavelength * (1 + (clear_of_bad[0] - half) / C_MS)
        hi = mask.wavelength * (1 + (clear_of_bad[1] + half) / C_MS)
    if clear_of_bad is not False and not order.good[good[0]: good[-1] + 1].all():
        nbad = np.concatenate(([0], np.cumsum(~order.good)))
        pa = np.clip(np.searchsorted(order.edges, lo, side="right") - 1, 0, order.good.size)
        pb = np.clip(np.searchsorted(order.edges, hi, side="left"), 0, order.good.size)
        inside &= nbad[pb] - nbad[pa] == 0
    return np.flatnonzero(inside)


class _Orders:
    """What every CCF of one prepared spectrum needs of its orders, computed once and kept in the
    caller's ``sums`` across the coarse and fine grids: each order's span of good pixels, whether a
    bad pixel lies inside it, the pixel arrays ``q f`` and ``q`` with their cumulative sums, and
    (for the compiled kernel) all of it concatenated."""

    def __init__(self, orders: list[PreparedOrder], compiled: bool):
        self.orders = tuple(orders)
        good2 = block_rows(orders, "good")
        if good2 is not None and good2.shape[1] and good2.any(axis=1).all():   # a block's rows: no loop
            n = good2.shape[1]
            if compiled:
                first, last, count = kernels.good_spans(good2)
            else:
                first = np.argmax(good2, axis=1)
                last = n - 1 - np.argmax(good2[:, ::-1], axis=1)
                count = np.count_nonzero(good2, axis=1)
            k = np.arange(len(orders))
            edges2 = block_rows(orders, "edges")
            lo = edges2[k, first] if edges2 is not None else [o.edges[i] for o, i in zip(orders, first, strict=True)]
            hi = edges2[k, last + 1] if edges2 is not None else [o.edges[i + 1] for o, i in zip(orders, last,
                                                                                               strict=True)]
            holes = last + 1 - first != count
        else:
            lo, hi, holes = [], [], []
            for o in orders:
                good = np.flatnonzero(o.good)
                lo.append(o.edges[good[0]])
                hi.append(o.edges[good[-1] + 1])
                holes.append(good[-1] + 1 - good[0] != good.size)
        self.lam_min, self.lam_max, self.holes = np.array(lo), np.array(hi), np.array(holes, dtype=bool)
        self.sums: list | None = None
        self.packed: tuple | None = None
        if compiled:
            edges = joined(orders, "edges")
            estart = np.concatenate(([0], np.cumsum([o.edges.size for o in orders]))).astype(np.intp)
            gden = joined(orders, "weight")
            gnum = joined(orders, "flux") * gden
            self.packed = (edges, estart, kernels.cumsums(gnum, estart), gnum, kernels.cumsums(gden, estart), gden)
        else:
            self.sums = []
            for o in orders:
                g_num = o.flux * o.weight
                self.sums.append([(g, np.concatenate(([0.0], np.cumsum(g)))) for g in (g_num, o.weight)])


def _orders_of(orders: list[PreparedOrder], sums: dict | None, compiled: bool) -> _Orders:
    key = ("orders", compiled)
    kept = None if sums is None else sums.get(key)
    same = kept is not None and len(kept.orders) == len(orders)
    if same and all(a is b for a, b in zip(kept.orders, orders, strict=True)):
        return kept
    kept = _Orders(orders, compiled)
    if sums is not None:
        sums[key] = kept
    return kept


def _inside(info: _Orders, mask: LineMask, v_lo: float, v_hi: float, box_width: float,
            clear_of_bad: bool | tuple[float, float], orders: list[PreparedOrder]) -> np.ndarray:
    """:func:`select_lines` for every order at once: (orders, lines) booleans."""
    half = 0.5 * box_width
    lo = mask.wavelength * (1 + (v_lo - half) / C_MS)
    hi = mask.wavelength * (1 + (v_hi + half) / C_MS)
    inside = (lo[None, :] >= info.lam_min[:, None]) & (hi[None, :] <= info.lam_max[:, None])
    if clear_of_bad is not False and info.holes.any():
        if isinstance(clear_of_bad, tuple):
            lo = mask.wavelength * (1 + (clear_of_bad[0] - half) / C_MS)
            hi = mask.wavelength * (1 + (clear_of_bad[1] + half) / C_MS)
        for k in np.flatnonzero(info.holes & inside.any(axis=1)):
            order = orders[k]
            j = np.flatnonzero(inside[k])
            nbad = np.concatenate(([0], np.cumsum(~order.good)))
            pa = np.clip(np.searchsorted(order.edges, lo[j], side="right") - 1, 0, order.good.size)
            pb = np.clip(np.searchsorted(order.edges, hi[j], side="left"), 0, order.good.size)
            inside[k, j] = nbad[pb] - nbad[pa] == 0
    return inside


def correlate(orders: list[PreparedOrder], mask: LineMask, velocity: np.ndarray, box_width: float,
              *, lines: np.ndarray | None = None, clear_of_bad: bool = False, sums: dict | None = None,
              keep_lines: bool = False, compiled: bool | None = None,
              values_only: bool = False) -> CorrelationData | CCFValues:
    """CCF of prepared orders with a mask on a velocity grid (m/s, observatory frame).

    Parameters
    ----------
    orders : list of PreparedOrder
    mask : LineMask
    velocity : ndarray, m/s
        Velocity grid (increasing).
    box_width : float, m/s
        Full width of each mask box in velocity.
    lines : ndarray of int, optional
        Restrict to these mask lines (e.g. the strongest, for a coarse search).
    clear_of_bad : bool or (lo, hi)
        Use only lines whose boxes meet no bad pixel over the whole grid, or over the velocities
        lo..hi (:func:`select_lines`); for the fine grid the velocity is measured on (a coarse
        search only locates the dip).
    sums : dict, optional
        A dictionary kept by the caller across calls on the same orders (coarse and fine grids):
        each order's cumulative sums are computed once and reused from it.
    keep_lines : bool
        Keep each line's own box sums (``line_num``, ``line_den`` of each order's terms), the
        per-line CCFs that :mod:`.recentre` measures line offsets on.
    compiled : bool, optional
        Box integrals (and later the error propagation) by the compiled kernels of
        :mod:`.kernels` (default: when numba is there), or by the NumPy form below (``np.interp``
        and :func:`_cum` per order), which gives the same CCF to the last bit.
    values_only : bool
        Return the CCF's values alone (:class:`CCFValues`, the same values as the full result's
        ``ccf``), without the per-order terms the error propagation needs: for a search.
    """
    velocity = np.asarray(velocity, dtype=float)
    m = velocity.size
    edge_v, r = _edge_layout(velocity, box_width)
    lam_lines = mask.wavelength
    compiled = kernels.compiled() is not None if compiled is None else bool(compiled)
    info = _orders_of(orders, sums, compiled)
    inside = _inside(info, mask, velocity[0], velocity[-1], box_width, clear_of_bad, orders)
    if lines is not None:
        allowed = np.zeros(lam_lines.size, dtype=bool)
        allowed[lines] = True
    n_cleared = 0
    if keep_lines and clear_of_bad:
        plain = _inside(info, mask, velocity[0], velocity[-1], box_width, False, orders)
        n_cleared = int(plain.sum()) - int(inside.sum() if lines is None else (plain & allowed).sum())
    if lines is not None:
        inside &= allowed
    pair_order, pair_line = np.nonzero(inside)          # order by order, lines ascending
    bounds = np.searchsorted(pair_order, np.arange(len(orders) + 1))
    fac = 1 + edge_v / C_MS
    present = np.flatnonzero(bounds[1:] > bounds[:-1])
    if compiled and pair_line.size:
        x_all, bnum, bden, num_all, den_all, positive = _compiled_sums(info, mask, pair_order, pair_line, bounds,
                                                                       present, fac, r, m)
        if values_only:
            if not positive.any():
                return CCFValues(velocity, np.zeros(0), 0)
            # CorrelationData.ccf's sums over the same rows in the same order
            return CCFValues(velocity, np.sum(num_all[positive], axis=0) / np.sum(den_all[positive], axis=0),
                             int(positive.sum()))
    terms = []
    for j, k in enumerate(present):
        order = orders[k]
        sl = slice(bounds[k], bounds[k + 1])
        idx = pair_line[sl]
        w = mask.weight[idx]
        if compiled:
            x, boxes = x_all[sl], [bnum[sl], bden[sl]]
            num, den, ok = num_all[j], den_all[j], positive[j]
        else:
            # line-major layout (lines x edges): consecutive queries are neighbouring pixels, which
            # numpy's interp finds from its previous answer without a full binary search
            x = _pixel_coordinate(order.edges, lam_lines[idx][:, None] * fac[None, :])
            boxes = []
            for g, S in info.sums[k]:
                c = _cum(S, g, x)
                boxes.append(c[:, r:] - c[:, :m] if r else c[:, m:] - c[:, :m])
            # the lines added in turn (np.cumsum is sequential), as the compiled kernel adds them
            num, den = (np.cumsum(w[:, None] * b, axis=0)[-1] for b in boxes)
            ok = (den > 0).all()
        if ok:
            terms.append(_OrderTerms(order, w, idx, x, r, num, den, lam_lines[idx],
                                     *(boxes if keep_lines else (None, None))))
    data = CorrelationData(velocity, terms, n_cleared, compiled)
    if values_only:
        return CCFValues(velocity, data.ccf if terms else np.zeros(0), len(terms))
    return data


def _compiled_sums(info, mask, pair_order, pair_line, bounds, present, fac, r, m):
    """The compiled box integrals of every (order, line) pair, and every order's weighted sums, formed
    in the kernel line after line within each order, as the plain form's cumulative sum adds them
    (the same sums to the last bit)."""
    x_all, bnum, bden, onum, oden = kernels.ccf_pairs(*info.packed, pair_order.astype(np.intp),
                                                      mask.wavelength[pair_line], fac, r, m, mask.weight[pair_line])
    num_all, den_all = onum[present], oden[present]
    return x_all, bnum, bden, num_all, den_all, (den_all > 0).all(axis=1)


@dataclass(frozen=True)
class CCFValues:
    """A CCF's values alone (``correlate(..., values_only=True)``): what a search needs of it."""

    velocity: np.ndarray
    ccf: np.ndarray     # empty when no order contributed
    n_orders: int


def reference_ccf(orders: list[PreparedOrder], mask: LineMask, velocity: np.ndarray,
                  box_width: float) -> np.ndarray:
    """Slow, obvious CCF (explicit loops and overlap fractions) for testing :func:`correlate`."""
    num = np.zeros(len(velocity))
    den = np.zeros(len(velocity))
    for order in orders:
        idx = select_lines(order, mask, velocity[0], velocity[-1], box_width)
        for i, v in enumerate(velocity):
            for j in idx:
                a = mask.wavelength[j] * (1 + (v - box_width / 2) / C_MS)
                b = mask.wavelength[j] * (1 + (v + box_width / 2) / C_MS)
                for p in range(order.flux.size):
                    lo, hi = order.edges[p], order.edges[p + 1]
                    overlap = max(0.0, min(b, hi) - max(a, lo)) / (hi - lo)
                    if overlap > 0:
                        num[i] += mask.weight[j] * overlap * order.weight[p] * order.flux[p]
                        den[i] += mask.weight[j] * overlap * order.weight[p]
    return num / den
