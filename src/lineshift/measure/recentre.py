"""Line offsets measured over a batch, and a mask whose lines are centred on them.

Every line of a real mask has its own offset from the star's velocity: blends with unlisted lines,
errors in its rest wavelength, a line list made for another star.  The mask CCF's centre is the
weighted mean of its lines' centres, so when the set of lines changes from spectrum to spectrum
(a line dropped because a cosmic ray, a dead run or a NaN run meets its box, a line pushed off an
order by the barycentric motion) that mean moves, by about the offset of each lost line times its
share of the weight: scatter the pixel noise does not explain.  Measured once over the batch and
taken out of the mask, the offsets no longer depend on which lines a spectrum keeps.

Offset of one line in one spectrum: its own CCF ``c_l(v) = N_l(v) / D_l(v)`` on the fine grid,
regressed on ``[1, g, dg/dmu]`` where ``g`` is the Gaussian fitted to the summed CCF (centre mu,
width sigma).  A line ``c0 - A g(v - mu - d)`` gives the coefficients ``(c0, -A, -A d)`` to first
order in ``d / sigma`` (Taylor expansion; the first-order shift estimate of a profile is common
practice, e.g. Bouchy, Pepe & Queloz 2001 for a spectrum's shift).  The coefficients are linear in
the line's CCF, so summed over the batch they are those of the batch-mean line CCF in the star's
frame, and ``d = e / b`` is formed only from the sums (never from one noisy spectrum).

The recentred mask moves line ``l`` to ``lambda_l (1 + d_l / c)``.  Lines that show no dip in the
batch mean, or whose centre lies more than half a sigma from the star's (it is not the line the mask
says it is), are dropped; lines no spectrum measured are kept unchanged.  Velocities are then those
of the batch-mean line centres: the zero point stays that of the full mask.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from lineshift.measure.ccf import CorrelationData
from lineshift.model import C_MS, LineMask

__all__ = ["LineMoments", "MomentSums", "batch_offsets", "line_moments", "recentred_mask"]


@dataclass(frozen=True)
class LineMoments:
    """One spectrum's per-line regression coefficients (indices into the mask, b = -depth, e = -depth x offset)."""

    lines: np.ndarray
    b: np.ndarray
    e: np.ndarray
    a: np.ndarray    # d(fitted centre) / d(shift of this line): its pull on the summed CCF's centre
    sigma: float
    n_cleared: int = 0   # lines this spectrum left out because bad pixels meet their boxes


def line_moments(data: CorrelationData, mu: float, sigma: float, gain_mu: np.ndarray) -> LineMoments:
    """Per-line coefficients of ``[1, g, dg/dmu]`` on ``data`` (a :func:`~.ccf.correlate` made with
    ``keep_lines``), for the Gaussian of centre ``mu`` and width ``sigma`` fitted to its sum, and
    each line's pull on that fit's centre: shifting line l by d changes the CCF by
    ``-w_l dN_l/dv d / D`` and the centre by ``gain_mu`` times that (the fit's linear response).

    A line that appears in two overlapping orders gets the sum of both coefficients.
    """
    v = data.velocity
    z = (v - mu) / sigma
    g = np.exp(-0.5 * z * z)
    # the Gaussian fit's own design (c0, amp, mu, sigma): a line's width does not leak into its centre
    X = np.column_stack((np.ones_like(v), g, g * z / sigma, g * z * z / sigma))
    P = X @ np.linalg.inv(X.T @ X)          # (m, 4): least-squares coefficients = c @ P
    if not data.terms:
        return LineMoments(np.zeros(0, dtype=np.intp), np.zeros(0), np.zeros(0), np.zeros(0), float(sigma),
                           data.n_cleared)
    if any(t.line_num is None for t in data.terms):
        raise ValueError("line_moments needs a correlation made with keep_lines=True")
    # every line of every order at once (the same arithmetic per line as one order at a time)
    num = np.concatenate([t.line_num for t in data.terms])
    den_l = np.concatenate([t.line_den for t in data.terms])
    with np.errstate(invalid="ignore", divide="ignore"):
        c = num / den_l
    ok = np.all(np.isfinite(c) & (den_l > 0), axis=1)
    coef = np.where(ok[:, None], c, 0.0) @ P
    weights = np.concatenate([t.weights for t in data.terms])
    # each line's pull (np.gradient(num, v, axis=1) * w / D) @ gain_mu, through the gradient's
    # transpose applied to gain_mu / D once (np.gradient is linear: its matrix's rows are the gradients
    # of the unit vectors) instead of the gradient of every line's CCF
    gt = np.gradient(np.eye(v.size), v, axis=1)             # gt[i, j] = d gradient_j / d num_i
    pull = (num @ (gt @ (gain_mu / data.denominator))) * weights
    lines = np.concatenate([t.lines for t in data.terms])[ok]
    u, inv = np.unique(lines, return_inverse=True)
    return LineMoments(u, np.bincount(inv, coef[ok, 1], u.size), np.bincount(inv, coef[ok, 2], u.size),
                       np.bincount(inv, -pull[ok], u.size), float(sigma), data.n_cleared)


class MomentSums:
    """What :func:`batch_offsets` needs of a batch's line moments, summed one spectrum at a time
    (:meth:`add`), so that a batch holds a few arrays of the mask's size instead of every spectrum's
    moments (~30 kB each for a mask of 1000 lines)."""

    def __init__(self, n_lines: int):
        self.B = np.zeros(n_lines)
        self.E = np.zeros(n_lines)
        self.W = np.zeros(n_lines)
        self.measured = np.zeros(n_lines, dtype=bool)
        self.sigmas: list[float] = []
        self.cleared = False      # some spectrum left lines out because bad pixels met their boxes

    def add(self, m: LineMoments) -> None:
        np.add.at(self.B, m.lines, m.b)
        np.add.at(self.E, m.lines, m.e)
        np.add.at(self.W, m.lines, m.a)
        self.measured[m.lines] = True
        self.sigmas.append(m.sigma)
        self.cleared |= m.n_cleared > 0

    def __len__(self) -> int:
        return len(self.sigmas)

    @classmethod
    def of(cls, moments: list[LineMoments], n_lines: int) -> MomentSums:
        sums = cls(n_lines)
        for m in moments:
            sums.add(m)
        return sums


def batch_offsets(moments: list[LineMoments] | MomentSums, n_lines: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Offsets (m/s) of the mask's ``n_lines`` lines from the batch's summed coefficients.

    ``moments``: every spectrum's :class:`LineMoments`, or their :class:`MomentSums`.  Returns
    (offset, measured, usable): ``measured`` lines entered at least one spectrum; ``usable`` is false
    for measured lines with no dip in the batch mean or a centre more than half the median sigma away.
    """
    sums = moments if isinstance(moments, MomentSums) else MomentSums.of(moments, n_lines)
    B, E, W, measured = sums.B, sums.E, sums.W, sums.measured
    sigma = float(np.median(sums.sigmas)) if sums.sigmas else np.inf
    with np.errstate(invalid="ignore", divide="ignore"):
        off = np.where(measured & (B < 0), E / B, 0.0)
    usable = ~measured | ((B < 0) & (np.abs(off) < 0.5 * sigma))
    # offsets are taken relative to their mean weighted by each line's pull on the fitted centre, over
    # every line with a dip (those dropped too), so recentring leaves the zero point where it was
    use = measured & (B < 0)
    if use.any() and W[use].sum() != 0:
        off = off - np.sum(W[use] * off[use]) / W[use].sum()
    return np.where(usable, off, 0.0), measured, usable


def recentred_mask(mask: LineMask, moments: list[LineMoments] | MomentSums) -> tuple[LineMask, str]:
    """The mask with each line moved to its batch-mean centre (unusable lines dropped), and a note."""
    off, measured, usable = batch_offsets(moments, len(mask))
    out = LineMask(mask.wavelength * (1 + off / C_MS), mask.weight, mask.species, mask.source,
                   mask.provenance).select(usable)
    order = np.argsort(out.wavelength, kind="stable")
    if np.any(np.diff(order) != 1):
        out = LineMask(out.wavelength[order], out.weight[order],
                       tuple(out.species[i] for i in order) if out.species else (), out.source, out.provenance)
    rms = float(np.sqrt(np.mean(off[measured & usable] ** 2))) if (measured & usable).any() else 0.0
    note = (f"mask lines recentred on their batch-mean offsets ({int((measured & usable).sum())} lines, "
            f"rms {rms:.0f} m/s; {int((~usable).sum())} without a matching dip dropped)")
    return out, note
