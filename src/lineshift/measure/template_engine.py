"""Least-squares template matching: the second velocity engine (``--method template``).

A mask CCF throws information away (weak and blended lines, line wings); fitting every pixel
against a high-SNR template of the star itself reaches the photon limit (the bound of Bouchy,
Pepe & Queloz 2001; an efficient estimator attains the Cramer-Rao bound).

Template
    The inputs co-added in the star's frame (:mod:`.coadd`: barycentric correction and first-pass
    velocities, iterated), normalised flux on a grid uniform in ln(lambda) with two points per
    pixel, its own per-pixel noise tracked, telluric bands and bad pixels carried through; one
    template per order, co-added from that order of every spectrum only, so the continuum errors of
    overlapping neighbour orders do not mix into it (:mod:`.coadd`); what the common continuum
    leaves of the true response is estimated from the binned fit residuals (:attr:`TemplateResult.residuals`,
    :mod:`.response`) and divided out between the pipeline's template passes.  Each
    spectrum is fitted against the template *without its own contribution* (its sums are recomputed
    and subtracted), so no spectrum pulls the template towards itself.

Fit
    Per order, the normalised flux is modelled as ``P(x) T(ln lambda - delta)`` with P a polynomial
    of degree ``poly_degree`` (default 3) in the pixel position x in -1..1, fitted together with the
    shift so a continuum mismatch between spectrum and template can neither bias nor inflate it (the
    standard least-squares template matching with a multiplicative low-order polynomial, e.g.
    Anglada-Escude & Butler 2012, ApJS 200, 15; Zechmeister et al. 2018, A&A 609, A12), with
    ``delta = ln(1 + rv_topo/c)`` relative to the template's frame, by Gauss-Newton (with the exact
    curvature term for the velocity) and variances
    ``var_spectrum + P(x)^2 var_template``: the template's noise
    enters the weights and hence the error from the curvature of chi-square.  The template is an
    exact cubic B-spline through its points (prefiltered with ``scipy.ndimage.spline_filter1d``),
    evaluated with its analytic derivative; a noise-free spectrum shifted by sub-pixel amounts is
    recovered to ~0.01 m/s.  Order velocities are combined by inverse variance after rejecting
    orders more than ``clip`` sigma from the median; an order is flagged when its reduced chi-square
    exceeds ``poor_chi2`` or it was rejected.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy.ndimage import gaussian_filter1d, spline_filter1d

from lineshift.errors import MeasurementError
from lineshift.measure import fit_kernels
from lineshift.measure.coadd import (
    TemplateAccumulator,
    bspline,
    on_common_continuum,
    reference_coefficients,
    reject_above,
    value_tables,
)
from lineshift.measure.prepare import PreparedOrder
from lineshift.measure.response import bin_residuals
from lineshift.measure.tellurics import drop_bands
from lineshift.model import C_MS

__all__ = ["TemplateSettings", "TemplateState", "measure_template", "template_smoothing"]


#: Upper bound of the memory a template keeps of its inputs for their fits (:meth:`TemplateState.keep`), bytes.
KEEP_BYTES = 256 * 2**20


@dataclass(frozen=True)
class TemplateSettings:
    clip: float = 5.0
    poor_chi2: float = 2.0
    edge_pixels: int = 10
    iterations: int = 6
    poly_degree: int = 3
    smooth_fraction: float = 0.15


def template_smoothing(ccf_fwhm: float, settings: TemplateSettings = TemplateSettings()) -> float:
    """Gaussian sigma (m/s) to smooth the template with, from the lines' CCF FWHM (m/s).

    A noisy template interpolated at the data pixels has a noise level that depends on where the
    pixels fall between its points (largest on them): chi-square then has local minima spaced by the
    template's points, and the noise in its derivative inflates the curvature (errors too small).
    Both matter when the lines are broad (a fast rotator: little true curvature), not for sharp ones.
    Smoothing with ``smooth_fraction`` of the lines' sigma averages the noise over many points while
    widening the lines by only sqrt(1 + 0.15^2) - 1 = 1.1 % (common practice: a template need not
    keep frequencies the star does not have).
    """
    if not np.isfinite(ccf_fwhm) or ccf_fwhm <= 0:
        return 0.0
    return float(settings.smooth_fraction * ccf_fwhm / (2.0 * np.sqrt(2.0 * np.log(2.0))))


@dataclass
class TemplateState:
    """A co-added template as plain arrays (picklable: sent to workers once).

    ``sw``, ``swf``, ``sw2v`` and ``flagged`` are segments of the grid ``exp(lng0 + dlng * i)`` laid
    end to end; ``segments`` has a row (order index, first grid index, offset in the arrays, length)
    per segment.  Order index -1 is a template for every order (one co-add of all of them); otherwise
    each order is fitted against the segment of its own index (:mod:`.coadd`, ``per_order``).
    """

    lng0: float
    dlng: float
    sw: np.ndarray
    swf: np.ndarray
    sw2v: np.ndarray
    flagged: np.ndarray
    bands: np.ndarray
    edge_margin: int
    n_spectra: int
    segments: np.ndarray | None = None
    smooth: float = 0.0        # Gaussian sigma (m/s) the template is smoothed with before the fit
    pixel_step: float = 0.0    # median detector pixel width of the inputs in velocity (m/s)
    continua: dict | None = None   # order index -> common continuum (counts) the inputs were normalised by
    #: the template every input was screened against before it was co-added (:meth:`screened`): its
    #: flux (NaN where empty) laid out as ``ref_segments``; None when nothing was screened
    ref_flux: np.ndarray | None = None
    ref_segments: np.ndarray | None = None
    levelled: bool = False     # contributions co-added on a common level (:class:`.coadd.TemplateAccumulator`)

    def __post_init__(self):
        if self.segments is None:
            self.segments = np.array([[-1, 0, 0, self.sw.size]], dtype=np.int64)
        self.segments = np.asarray(self.segments, dtype=np.int64).reshape(-1, 4)

    @classmethod
    def from_accumulator(cls, acc: TemplateAccumulator, smooth: float = 0.0,
                         continua: dict | None = None) -> TemplateState:
        rows, off = [], 0
        keys = sorted(acc.segments)
        for k in keys:
            seg = acc.segments[k]
            rows.append((k, seg.start, off, seg.sw.size))
            off += seg.sw.size
        segs = [acc.segments[k] for k in keys]
        return cls(float(acc.lng[0]), float(acc.lng[1] - acc.lng[0]),
                   *(np.concatenate([getattr(g, name) for g in segs]) for name in ("sw", "swf", "sw2v", "flagged")),
                   acc.bands, acc.edge_margin, acc.n_spectra, np.array(rows, dtype=np.int64), smooth,
                   float(np.median(acc._pixel_steps)) if acc._pixel_steps else 0.0, continua,
                   levelled=acc.levelled)

    def flux(self) -> np.ndarray:
        """The co-added flux laid out as the segments (NaN where nothing contributed)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.sw > 0, self.swf / np.where(self.sw > 0, self.sw, 1.0), np.nan)

    def screened(self, orders: list[PreparedOrder], factor: float) -> list[PreparedOrder]:
        """The orders with the pixels far above the screening template marked bad
        (:func:`.coadd.reject_above`; ``factor`` as the spectrum is co-added with).  Applied alike
        before a spectrum is co-added and before it is fitted, so its own contribution is removed
        exactly and a hit the spike finder missed enters neither the template nor the fit."""
        if self.ref_flux is None:
            return orders
        coef = self.__dict__.get("_ref_coef")
        if coef is None:
            coef = self.__dict__["_ref_coef"] = reference_coefficients(self.ref_flux, self.ref_segments)
        tables = self.__dict__.get("_ref_tables")
        if tables is None:
            tables = self.__dict__["_ref_tables"] = value_tables(coef)
        return reject_above(orders, self.ref_flux, self.ref_segments, self.lng0, self.dlng, factor, coef=coef,
                            tables=tables)

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Plain arrays (for the results store): the inverse of :meth:`from_arrays`."""
        return {"lng0": np.array(self.lng0), "dlng": np.array(self.dlng), "sw": self.sw, "swf": self.swf,
                "sw2v": self.sw2v, "flagged": self.flagged, "bands": np.asarray(self.bands, float),
                "edge_margin": np.array(self.edge_margin), "n_spectra": np.array(self.n_spectra),
                "segments": self.segments, "smooth": np.array(self.smooth), "pixel_step": np.array(self.pixel_step),
                **_pack_continua(self.continua),
                "levelled": np.array(self.levelled),
                **({} if self.ref_flux is None else {"ref_flux": self.ref_flux, "ref_segments": self.ref_segments})}

    @classmethod
    def from_arrays(cls, a: dict[str, np.ndarray]) -> TemplateState:
        return cls(float(a["lng0"]), float(a["dlng"]), a["sw"], a["swf"], a["sw2v"], a["flagged"].astype(bool),
                   a["bands"].reshape(-1, 2), int(a["edge_margin"]), int(a["n_spectra"]), a.get("segments"),
                   float(a.get("smooth", 0.0)), float(a.get("pixel_step", 0.0)), _unpack_continua(a),
                   a.get("ref_flux"), None if a.get("ref_segments") is None else a["ref_segments"].reshape(-1, 4),
                   bool(a.get("levelled", False)))

    def segment(self, index: int) -> tuple[int, int, int] | None:
        """(first grid index, offset in the arrays, length) of the template for order ``index``."""
        table = self.__dict__.get("_seg")
        if table is None:
            table = {int(k): (int(a), int(b), int(n)) for k, a, b, n in self.segments}
            self.__dict__["_seg"] = table
        return table.get(-1, table.get(int(index)))

    def _grid(self) -> TemplateAccumulator:
        """An empty accumulator on this template's grid (built once, for recomputing contributions)."""
        acc = self.__dict__.get("_acc")
        if acc is None:
            n = int(np.max(self.segments[:, 1] + self.segments[:, 3]))
            acc = TemplateAccumulator(np.exp(self.lng0 + self.dlng * np.arange(n)),
                                      edge_margin=self.edge_margin, bands=self.bands, levelled=self.levelled)
            self.__dict__["_acc"] = acc
        return acc

    def keep(self, key, factor: float, band_factor: float, goods: list, contributions: list) -> None:
        """Keep, for the fit of the spectrum ``key`` (e.g. its path) that was co-added with ``factor``
        and ``band_factor``, what the co-add computed of it: per order the screened good-pixel mask
        (None where screening left the order as it was) and its contribution (as
        :meth:`.coadd.TemplateAccumulator.contribution_list`), so :func:`measure_template` called with
        the same ``key`` neither screens it again nor recomputes its contribution.  In this process
        only (not pickled), within :data:`KEEP_BYTES`; beyond that the fit recomputes both."""
        size = sum(a.nbytes for c in contributions if c is not None for a in c[2:])
        used = self.__dict__.get("_kept_bytes", 0)
        if used + size > KEEP_BYTES:
            return
        self.__dict__["_kept_bytes"] = used + size
        self.__dict__.setdefault("_kept", {})[key] = (factor, band_factor, goods, contributions)

    def kept(self, key, factor: float | None, band_factor: float):
        """(goods, contributions) kept by :meth:`keep` for ``key`` with these factors, or None."""
        entry = self.__dict__.get("_kept", {}).get(key) if key is not None else None
        if entry is None or entry[0] != factor or entry[1] != band_factor:
            return None
        return entry[2], entry[3]

    @property
    def n_kept(self) -> int:
        """How many spectra :meth:`keep` kept (their fits are cheapest in this process)."""
        return len(self.__dict__.get("_kept", {}))

    def forget(self) -> None:
        """Drop what :meth:`keep` kept."""
        self.__dict__.pop("_kept", None)
        self.__dict__.pop("_kept_bytes", None)

    def __getstate__(self):   # what it keeps in this process, and what is quicker made again than sent
        return {k: v for k, v in self.__dict__.items() if k not in ("_kept", "_kept_bytes", "_ref_tables", "_acc")}

    def without(self, orders: list[PreparedOrder], factor: float | None, band_factor: float = 1.0,
                contributions: list | None = None):
        """Template flux and variance (laid out as the segments) with this spectrum's own contribution
        removed, and which points are usable (``band_factor`` as it was added with).  ``contributions``:
        the spectrum's contributions as it was co-added, when kept (else they are recomputed)."""
        sw, swf, sw2v = self.sw, self.swf, self.sw2v
        if factor is not None:
            sw, swf, sw2v = sw.copy(), swf.copy(), sw2v.copy()
            if contributions is None:
                contributions = self._grid().contribution_list(orders, factor, band_factor)
            for c in contributions:
                if c is None:
                    continue
                index, sl, w, wf, w2v, _ = c
                seg = self.segment(index)
                if seg is None:
                    continue
                start, off, n = seg
                lo, hi = max(sl.start, start), min(sl.stop, start + n)
                if hi <= lo:
                    continue
                dst, src = slice(off + lo - start, off + hi - start), slice(lo - sl.start, hi - sl.start)
                sw[dst] -= w[src]
                swf[dst] -= wf[src]
                sw2v[dst] -= w2v[src]
        ok = sw > 1e-12 * np.max(self.sw)
        flux = np.where(ok, swf / np.where(ok, sw, 1.0), 1.0)
        var = np.where(ok, sw2v / np.where(ok, sw, 1.0) ** 2, np.inf)
        return flux, np.maximum(var, 0.0), ok & ~self.flagged

    def smoothed(self, flux: np.ndarray, var: np.ndarray, ok: np.ndarray, *, compiled: bool | None = None):
        """The template convolved with a Gaussian of sigma :attr:`smooth` (m/s), each segment on its
        own, as a normalised convolution over the usable points; its variance propagated through the
        kernel (node values a pixel apart are nearly independent: ``pixel_step / step`` of them per
        pixel share its noise), never above the unsmoothed variance.  ``compiled`` as in
        :meth:`fit_arrays` (each segment by :func:`.fit_kernels.smooth_segment`: the same numbers)."""
        fast = fit_kernels.compiled() if compiled is None else (fit_kernels.compiled_always() if compiled else None)
        step = C_MS * np.expm1(self.dlng)
        sig = self.smooth / step
        if sig < 0.3:
            return flux, var, ok
        corr = max(self.pixel_step / step, 1.0) if self.pixel_step else 1.0
        flux, var, ok = flux.copy(), var.copy(), ok.copy()
        if fast is not None:
            smooth = (fit_kernels.gaussian_weights(sig), fit_kernels.gaussian_weights(sig / np.sqrt(2)),
                      2 * np.sqrt(np.pi) * sig, corr)
            for _, _, off, n in self.segments:
                sl = slice(off, off + n)
                fit_kernels.smooth_segment(flux[sl], var[sl], ok[sl], smooth)
            return flux, var, ok
        for _, _, off, n in self.segments:
            sl = slice(off, off + n)
            w = ok[sl].astype(float)
            den = gaussian_filter1d(w, sig, mode="constant")
            num = gaussian_filter1d(np.where(ok[sl], flux[sl], 0.0), sig, mode="constant")
            # sum_j k_j^2 v_j: k^2 is a Gaussian of sigma / sqrt 2 with total 1 / (2 sqrt(pi) sigma)
            v2 = gaussian_filter1d(np.where(ok[sl], var[sl], 0.0), sig / np.sqrt(2), mode="constant") / (
                2 * np.sqrt(np.pi) * sig)
            good = ok[sl] & (den > 0.95)
            safe = np.where(good, den, 1.0)
            flux[sl] = np.where(good, num / safe, flux[sl])
            var[sl] = np.where(good, np.minimum(corr * v2 / safe**2, var[sl]), var[sl])
            ok[sl] = good
        return flux, var, ok

    def fit_arrays(self, orders: list[PreparedOrder], factor: float | None, band_factor: float = 1.0,
                   contributions: list | None = None, *, compiled: bool | None = None, out: tuple | None = None):
        """What :func:`measure_template` fits against: (B-spline coefficients, variance, usable) of the
        template without this spectrum (:meth:`without`), smoothed (:meth:`smoothed`), prefiltered
        (:meth:`prefilter`), with the variance 0 where it is not usable.  The same numbers as those
        three in turn, computed one segment at a time (no temporaries of the whole template).

        ``compiled``: each segment by :func:`.fit_kernels.template_segment` (True), by the array steps
        below, its plain form (False), or as :func:`.fit_kernels.compiled` says (None): the same
        numbers to the last bit (tests/test_fit_kernels.py).  ``out``: three arrays of the template's
        size (float, float, bool) to fill and return instead of new ones."""
        fast = fit_kernels.compiled() if compiled is None else (fit_kernels.compiled_always() if compiled else None)
        own: dict[int, list] = {}     # segment offset -> this spectrum's contributions to it
        if factor is not None:
            if contributions is None:
                contributions = self._grid().contribution_list(orders, factor, band_factor)
            for c in contributions:
                if c is None or self.segment(c[0]) is None:
                    continue
                start, off, n = self.segment(c[0])
                sl = c[1]
                lo, hi = max(sl.start, start), min(sl.stop, start + n)
                if hi > lo:
                    own.setdefault(off, []).append((slice(lo - start, hi - start),
                                                    slice(lo - sl.start, hi - sl.start), *c[2:5]))
        floor = self.__dict__.get("_sw_floor")
        if floor is None:
            floor = self.__dict__["_sw_floor"] = 1e-12 * np.max(self.sw)
        sig = self.smooth / (C_MS * np.expm1(self.dlng))
        corr = max(self.pixel_step / (C_MS * np.expm1(self.dlng)), 1.0) if self.pixel_step else 1.0
        if out is None:
            out = np.empty(self.sw.size), np.empty(self.sw.size), np.empty(self.sw.size, dtype=bool)
        coef, var_out, ok_out = out
        smooth = None
        if fast is not None and sig >= 0.3:
            smooth = (fit_kernels.gaussian_weights(sig), fit_kernels.gaussian_weights(sig / np.sqrt(2)),
                      2 * np.sqrt(np.pi) * sig, corr)
        for _, _, off, n in self.segments:
            sl = slice(off, off + n)
            if fast is not None:
                pieces = own.get(off)
                sw, swf, sw2v, piece = self.sw[sl], self.swf[sl], self.sw2v[sl], None
                if pieces is not None and len(pieces) == 1:
                    piece = pieces[0]
                elif pieces is not None:          # several contributions to one segment: taken off here
                    sw, swf, sw2v = sw.copy(), swf.copy(), sw2v.copy()
                    for dst, src, w, wf, w2v in pieces:
                        sw[dst] -= w[src]
                        swf[dst] -= wf[src]
                        sw2v[dst] -= w2v[src]
                fit_kernels.template_segment(sw, swf, sw2v, self.flagged[sl], piece, floor, smooth, coef[sl],
                                             var_out[sl], ok_out[sl])
                continue
            sw, swf, sw2v = self.sw[sl], self.swf[sl], self.sw2v[sl]
            if off in own:
                sw, swf, sw2v = sw.copy(), swf.copy(), sw2v.copy()
                for dst, src, w, wf, w2v in own[off]:
                    sw[dst] -= w[src]
                    swf[dst] -= wf[src]
                    sw2v[dst] -= w2v[src]
            ok = sw > floor
            flux = np.where(ok, swf / np.where(ok, sw, 1.0), 1.0)
            var = np.maximum(np.where(ok, sw2v / np.where(ok, sw, 1.0) ** 2, np.inf), 0.0)
            ok &= ~self.flagged[sl]
            if sig >= 0.3:   # as smoothed()
                den = gaussian_filter1d(ok.astype(float), sig, mode="constant")
                num = gaussian_filter1d(np.where(ok, flux, 0.0), sig, mode="constant")
                v2 = gaussian_filter1d(np.where(ok, var, 0.0), sig / np.sqrt(2), mode="constant") / (
                    2 * np.sqrt(np.pi) * sig)
                good = ok & (den > 0.95)
                safe = np.where(good, den, 1.0)
                flux = np.where(good, num / safe, flux)
                var = np.where(good, np.minimum(corr * v2 / safe**2, var), var)
                ok = good
            coef[sl] = spline_filter1d(flux, order=3, mode="mirror")
            ok &= np.isfinite(var)
            var_out[sl] = np.where(ok, var, 0.0)
            ok_out[sl] = ok
        if fast is not None:   # the flux of every segment is in place: its B-spline coefficients
            fit_kernels.prefilter_segments(coef, self.segments)
        return coef, var_out, ok_out

    def prefilter(self, flux: np.ndarray, *, compiled: bool | None = None) -> np.ndarray:
        """Cubic B-spline coefficients of ``flux``, each segment on its own (mirror at its ends);
        ``compiled`` as in :meth:`fit_arrays` (:func:`.fit_kernels.prefilter_segments`: the same numbers)."""
        fast = fit_kernels.compiled() if compiled is None else (fit_kernels.compiled_always() if compiled else None)
        if fast is not None:
            coef = np.array(flux, dtype=float)
            fit_kernels.prefilter_segments(coef, self.segments)
            return coef
        coef = np.empty_like(flux)
        for _, _, off, n in self.segments:
            coef[off:off + n] = spline_filter1d(flux[off:off + n], order=3, mode="mirror")
        return coef


def _pack_continua(continua: dict | None) -> dict[str, np.ndarray]:
    if not continua:
        return {}
    keys = sorted(continua)
    return {"continua_index": np.array(keys, dtype=np.int64),
            "continua_length": np.array([continua[k].size for k in keys], dtype=np.int64),
            "continua": np.concatenate([continua[k] for k in keys])}


def _unpack_continua(a: dict[str, np.ndarray]) -> dict | None:
    if "continua" not in a:
        return None
    ends = np.cumsum(a["continua_length"])
    return {int(k): a["continua"][e - n:e] for k, n, e in zip(a["continua_index"], a["continua_length"], ends,
                                                              strict=True)}


@dataclass(frozen=True)
class TemplateResult:
    rv: float
    rv_err: float
    snr: float
    n_orders: int
    orders: tuple[dict, ...]
    chi2_red: float
    #: order index -> binned relative residuals of its fit (:func:`.response.bin_residuals`), for the
    #: estimate of the response common to all spectra (:func:`.response.detector_response`)
    residuals: dict = field(default_factory=dict)


def measure_template(orders: list[PreparedOrder], state: TemplateState, settings: TemplateSettings, *,
                     delta0: float, factor: float | None, berv: float = 0.0, path: str | None = None,
                     band_factor: float = 1.0, key=None, compiled: bool | None = None) -> TemplateResult:
    """Topocentric velocity (relative to the template's frame) of one prepared spectrum.

    ``delta0`` is the starting ln(1 + rv_topo/c); ``factor`` the co-adding factor this spectrum
    entered the template with (None when it is not part of it: nothing is subtracted);
    ``band_factor`` file-frame / observatory-frame wavelength, placing the telluric bands (1 unless
    the file is barycentric); ``key`` the name the co-add kept this spectrum's screening and
    contribution under (:meth:`TemplateState.keep`), if any; ``compiled``: the template arrays and the
    fits by the compiled kernels of :mod:`.fit_kernels` (True), by their NumPy forms (False), or as
    :func:`.fit_kernels.compiled` says (None).
    """
    fast = fit_kernels.compiled() if compiled is None else (fit_kernels.compiled_always() if compiled else None)
    if not orders:
        raise MeasurementError("no usable order (too few valid pixels)", path=path, status="no valid pixels")
    kept = state.kept(key, factor, band_factor)
    orders = on_common_continuum(orders, state.continua)
    if kept is None:
        orders = state.screened(orders, factor if factor is not None else float(np.exp(-delta0)))
        own = None
    else:   # as the co-add screened and added it
        goods, own = kept
        orders = [o if g is None else replace(o, good=g) for o, g in zip(orders, goods, strict=True)]
    # with the compiled kernels in work arrays of this thread (allocating them anew costs more than filling)
    out = None if fast is None else (fit_kernels.scratch("template_coef", state.sw.shape),
                                     fit_kernels.scratch("template_var", state.sw.shape),
                                     fit_kernels.scratch("template_ok", state.sw.shape, bool))
    coef, var_t, ok_t = state.fit_arrays(orders, factor, band_factor, own, compiled=fast is not None, out=out)
    # this spectrum's telluric pixels (listed bands and lines found in the batch), in its own frame
    orders = [drop_bands(o, state.bands * band_factor) for o in orders]
    rows = []
    by_len: dict[int, list[PreparedOrder]] = {}
    for o in orders:
        if state.segment(o.index) is None:   # no template for this order
            rows.append({"order": int(o.index), "wavelength": float(np.median(o.wave)), "rv": np.nan,
                         "rv_err": np.nan, "chi2_red": np.nan, "flag": "no template"})
            continue
        by_len.setdefault(o.flux.size, []).append(o)
    residuals = {}
    if fast is not None:
        blocks = (fb for group in by_len.values()
                  for fb in _fit_compiled(group, coef, var_t, ok_t, state, settings, delta0))
    else:
        pair = (ok_t[:-1] & ok_t[1:], np.diff(var_t))
        blocks = ((block, *_fit_block(block, coef, var_t, ok_t, state, settings, delta0, pair))
                  for block in _chunks(by_len.values()))
    for block, fits, bins in blocks:
        for o, (v, e, chi2), b in zip(block, fits, bins, strict=True):
            if np.isfinite(v):
                residuals[int(o.index)] = b
            if not np.isfinite(v):
                rows.append({"order": int(o.index), "wavelength": _median_wavelength(o, fast), "rv": np.nan,
                             "rv_err": np.nan, "chi2_red": np.nan, "flag": "no fit"})
                continue
            rows.append({"order": int(o.index), "wavelength": _median_wavelength(o, fast), "rv": float(v),
                         "rv_err": float(e), "chi2_red": float(chi2),
                         "flag": "poor fit" if chi2 > settings.poor_chi2 else ""})
    rows.sort(key=lambda r: r["order"])
    fitted = [r for r in rows if np.isfinite(r["rv"])]
    vel = np.array([r["rv"] for r in fitted])
    err = np.array([r["rv_err"] for r in fitted])
    if vel.size == 0:
        raise MeasurementError("no order could be fitted against the template", path=path, status="template fit failed")
    med = np.median(vel)
    scatter = 1.4826 * np.median(np.abs(vel - med)) if vel.size >= 3 else 0.0
    keep = np.abs(vel - med) <= settings.clip * np.maximum(err, scatter)
    for r, k in zip(fitted, keep, strict=True):
        if not k:
            r["flag"] = "rejected"
    w = 1 / err[keep] ** 2
    rv = float(np.sum(w * vel[keep]) / np.sum(w))
    chi2_orders = float(np.sum(w * (vel[keep] - rv) ** 2) / max(keep.sum() - 1, 1))
    if fast is not None:
        snr = fit_kernels.median_snr(orders)
    else:
        snr = float(np.median(np.concatenate([o.flux[o.good][::4] / np.sqrt(o.var[o.good][::4]) for o in orders])))
    return TemplateResult(rv, float(1 / np.sqrt(np.sum(w))), snr, int(keep.sum()), tuple(rows), chi2_orders,
                          residuals)


#: Pixels per block of orders fitted at once: the fit's temporaries then stay below the size (128 KB)
#: from which the C allocator maps every new array afresh from the system, whose page faults cost more
#: than the arithmetic on them (measured: the B-spline evaluation of 36 orders x 4096 pixels 5x faster
#: in blocks of 4 orders); the orders of a block are independent, so the blocks change nothing else.
BLOCK_PIXELS = 16384


def _chunks(blocks):
    """Orders of equal length (``blocks``: lists of them) in lists of at most :data:`BLOCK_PIXELS` pixels."""
    for block in blocks:
        rows = max(BLOCK_PIXELS // block[0].flux.size, 1)
        for start in range(0, len(block), rows):
            yield block[start:start + rows]


@lru_cache(maxsize=16)
def _powers(n: int, deg: int) -> np.ndarray:
    """``x^j`` for j = 0..deg at n points x evenly spaced over -1..1, as columns (read-only)."""
    x = np.linspace(-1.0, 1.0, n)
    out = np.stack([x ** j for j in range(deg + 1)], axis=1)
    out.flags.writeable = False
    return out


def _block_arrays(block: list[PreparedOrder], state: TemplateState, settings: TemplateSettings,
                  scratch: bool = False):
    """A block of orders stacked for a fit: grid-index offset into the segment arrays and the usable
    template index range per order, wavelengths, fluxes, variances, and the usable pixels (order
    ends of ``settings.edge_pixels`` left out); ``scratch``: the stacked arrays in this thread's work
    arrays (:func:`.fit_kernels.scratch`), overwritten by the next call."""
    seg = np.array([state.segment(o.index) for o in block], dtype=float)   # (k, 3): start, offset, length
    base = (seg[:, 1] - seg[:, 0])[:, None]          # grid index -> index in the segment arrays
    lo_i, hi_i = seg[:, 1:2] + 2, seg[:, 1:2] + seg[:, 2:3] - 3
    if scratch:
        shape = (len(block), block[0].flux.size)
        wave, flux, var = (np.stack([getattr(o, name) for o in block], out=fit_kernels.scratch("block_" + name, shape))
                           for name in ("wave", "flux", "var"))
        use = np.stack([o.good for o in block], out=fit_kernels.scratch("block_good", shape, bool))
    else:
        wave = np.vstack([o.wave for o in block])
        flux = np.vstack([o.flux for o in block])
        var = np.vstack([o.var for o in block])
        use = np.vstack([o.good for o in block])
    n = flux.shape[1]
    use[:, : settings.edge_pixels] = False
    use[:, n - settings.edge_pixels:] = False
    return base, lo_i, hi_i, wave, flux, var, use


def _fit_block(block: list[PreparedOrder], coef, var_t, ok_t, state: TemplateState, settings: TemplateSettings,
               delta0: float, pair=None):
    """Gauss-Newton for (delta, c0..c_deg) of several orders of equal length at once.

    Returns per order (rv_topo, rv_err, reduced chi-square), NaN where the fit is impossible, and
    per order its binned relative residuals (:func:`.response.bin_residuals`).

    The model is ``P(x) T``, so its derivatives are ``g = -P dT`` (the shift) and ``x^j T`` (the
    polynomial): the normal equations need only the moments ``sum w T^2 x^m`` (m up to twice the
    degree), ``sum w T g x^j``, ``sum w g^2`` and the like with the residual, each a matrix product
    with the powers of x; the B-spline is evaluated in place (its interval and fraction serve the
    template's usable points and variances too).  :func:`_fit_block_reference` builds the Jacobian
    instead: the same sums in another order.  ``pair``: (usable and the next point usable, variance
    step to the next point) of the template, when the caller has them for several blocks.
    """
    if pair is None:
        pair = (ok_t[:-1] & ok_t[1:], np.diff(var_t))
    ok2, dvar = pair
    base, lo_i, hi_i, wave, flux, var, use = _block_arrays(block, state, settings)
    k, n = flux.shape
    xi0 = (np.log(wave) - state.lng0) / state.dlng + base   # template index at delta = 0
    deg = settings.poly_degree
    npar = deg + 2
    pw = _powers(n, 2 * deg)                                      # (n, 2 deg + 1): 1, x, x^2, ...
    powers = pw[:, :deg + 1]
    moment = np.add.outer(np.arange(deg + 1), np.arange(deg + 1))  # x^i x^j = x^(i+j)
    p = np.zeros((k, npar))
    p[:, 0] = delta0
    p[:, 1] = 1.0
    alive = np.ones(k, dtype=bool)
    A = np.empty((k, npar, npar))
    b = np.empty((k, npar))
    for _ in range(settings.iterations):
        xi = xi0 - p[:, 0:1] / state.dlng
        inside = (xi > lo_i) & (xi < hi_i)
        xi = np.clip(xi, lo_i, hi_i)
        i0 = xi.astype(np.intp)                      # xi >= 2: truncation is the floor
        fr = xi - i0
        # the cubic B-spline and its derivatives per grid step (as coadd.bspline)
        c0, c1, c2, c3 = coef[i0 - 1], coef[i0], coef[i0 + 1], coef[i0 + 2]
        q1 = (c2 - c0) / 2.0
        q2 = (c0 - 2.0 * c1 + c2) / 2.0
        q3 = (3.0 * (c1 - c2) + c3 - c0) / 6.0
        T = (c0 + 4.0 * c1 + c2) / 6.0 + fr * (q1 + fr * (q2 + fr * q3))
        dT = q1 + fr * (2 * q2 + 3 * fr * q3)       # per grid step
        d2T = 2 * q2 + 6 * fr * q3
        m = use & inside & ok2[i0]
        poly = p[:, 1:] @ powers.T
        w = np.where(m, 1.0 / (var + poly * poly * (var_t[i0] + fr * dvar[i0])), 0.0)
        r = np.where(m, flux - poly * T, 0.0)
        g = poly * dT * (-1.0 / state.dlng)                    # d model / d delta
        wT, wr = w * T, w * r
        A[:, 1:, 1:] = ((wT * T) @ pw)[:, moment]
        A[:, 0, 1:] = (wT * g) @ powers
        A[:, 1:, 0] = A[:, 0, 1:]
        A[:, 0, 0] = np.einsum("ij,ij->i", w * g, g)
        b[:, 0] = np.einsum("ij,ij->i", wr, g)
        b[:, 1:] = (wr * T) @ powers
        info = A.copy()                              # expected information, for the errors
        # Newton in delta: the residual x curvature term Gauss-Newton leaves out (a noisy template has
        # a large curvature; without it the iteration converges only linearly)
        A[:, 0, 0] -= np.einsum("ij,ij->i", wr * poly, d2T) / state.dlng**2
        A[:, 0, 0] = np.where(A[:, 0, 0] > 0.1 * info[:, 0, 0], A[:, 0, 0], info[:, 0, 0])
        used = np.count_nonzero(m, axis=1)
        alive &= used >= 20
        A[~alive] = np.eye(npar)
        b[~alive] = 0.0
        dp = np.linalg.solve(A, b[..., None])[..., 0]
        p += dp
        chi2 = np.einsum("ij,ij->i", wr, r) / np.maximum(used - npar, 1)
        # Newton converges quadratically: after a step below 1e-9 (0.3 m/s) what remains is ~1e-11
        # (3 mm/s), so stop there
        if np.all(np.abs(dp[:, 0]) < 1e-9):
            break
    return _block_results(p, info, alive, chi2), bin_residuals(wave, r, poly * T, w, g)


def _fit_compiled(group: list[PreparedOrder], coef, var_t, ok_t, state: TemplateState, settings: TemplateSettings,
                  delta0: float):
    """:func:`_fit_block` of each block of :func:`_chunks` of ``group`` (orders of one length) by the
    compiled loop of :func:`.fit_kernels.fit_orders`, yielding (block, fits, bins): the whole group
    stacked once in work arrays, each block fitted on its rows (so the iterations stop per block,
    as there).  The template's usable points and variance steps are read where they are used (no
    ``pair``).  The NumPy form for a degree above 3, and for a block whose elimination met an exactly
    zero pivot, so a singular system fails as it does there."""
    deg = settings.poly_degree
    if deg > 3:   # the compiled loop keeps its sums in scalars for degrees up to 3
        for block in _chunks([group]):
            yield block, *_fit_block(block, coef, var_t, ok_t, state, settings, delta0)
        return
    base, lo_i, hi_i, wave, flux, var, use = _block_arrays(group, state, settings, scratch=True)
    k, n = flux.shape
    lnw = np.log(wave, out=fit_kernels.scratch("block_lnw", (k, n)))
    width = 16                               # response.bin_residuals' bins (tests/test_fit_kernels.py)
    bx, cnt = _bin_centres(n, width)
    u = _binned(lnw, width) / np.maximum(cnt, 1)
    pw = _powers(n, 6)
    rows = max(BLOCK_PIXELS // n, 1)         # as _chunks
    for r0 in range(0, k, rows):
        sl = slice(r0, min(r0 + rows, k))
        block = group[sl]
        p = np.zeros((len(block), deg + 2))
        p[:, 0] = delta0
        p[:, 1] = 1.0
        ok, alive, chi2, cov00, num, den, cross, info = fit_kernels.fit_orders(
            coef, var_t, ok_t, lnw[sl], state.lng0, base[sl, 0], lo_i[sl, 0], hi_i[sl, 0], flux[sl], var[sl], use[sl],
            pw, p, state.dlng, settings.iterations, width)
        if not ok:
            yield block, *_fit_block(block, coef, var_t, ok_t, state, settings, delta0)
            continue
        v = C_MS * np.expm1(p[:, 0])
        e = C_MS * np.exp(p[:, 0]) * np.sqrt(np.abs(cov00))
        bad = ~alive | ~np.isfinite(p).all(axis=1)
        # as response.bin_residuals(wave, resid, model, weight, deriv), from the kernel's sums
        rho = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        bins = [(bx, u[r0 + j], rho[j], den[j].copy(), cross[j].copy(), float(info[j])) for j in range(len(block))]
        yield block, [(np.nan, np.nan, np.nan) if bad[j] else (v[j], e[j], chi2[j]) for j in range(len(block))], bins


def _binned(a: np.ndarray, width: int) -> np.ndarray:
    """Sums of ``a`` (rows) in bins of ``width`` columns, the last one short (as response.bin_residuals)."""
    n = a.shape[1]
    nb = -(-n // width)
    pad = nb * width - n
    return (np.pad(a, ((0, 0), (0, pad))) if pad else a).reshape(a.shape[0], nb, width).sum(axis=2)


@lru_cache(maxsize=16)
def _bin_centres(n: int, width: int) -> tuple[np.ndarray, np.ndarray]:
    """(mean pixel index, pixel count) of each bin of ``width`` of n pixels (read-only)."""
    cnt = _binned(np.ones((1, n)), width)
    x = _binned(np.arange(n, dtype=float)[None, :], width)[0] / cnt[0]
    x.flags.writeable = False
    cnt.flags.writeable = False
    return x, cnt


def _median_wavelength(o: PreparedOrder, fast) -> float:
    """``np.median(o.wave)``; with the compiled kernels the middle of the array when it is monotone."""
    if fast is not None:
        m = fast.monotone_median(o.wave)
        if m == m:
            return float(m)
    return float(np.median(o.wave))


def _block_results(p: np.ndarray, info: np.ndarray, alive: np.ndarray, chi2: np.ndarray) -> list[tuple]:
    """(velocity, its error, reduced chi^2) of each order of a block from the fitted parameters (the
    first is ln(1 + v/c)) and their information matrices; NaNs for an order the fit lost."""
    info[~alive] = np.eye(info.shape[1])
    cov = np.linalg.inv(info)
    v = C_MS * np.expm1(p[:, 0])
    e = C_MS * np.exp(p[:, 0]) * np.sqrt(np.abs(cov[:, 0, 0]))
    bad = ~alive | ~np.isfinite(p).all(axis=1)
    return [(np.nan, np.nan, np.nan) if bad[j] else (v[j], e[j], chi2[j]) for j in range(p.shape[0])]


def _fit_block_reference(block: list[PreparedOrder], coef, var_t, ok_t, state: TemplateState,
                         settings: TemplateSettings, delta0: float, pair=None):
    """Plain form of :func:`_fit_block`: the Jacobian built column by column, normal equations by a
    batched product with it."""
    base, lo_i, hi_i, wave, flux, var, use = _block_arrays(block, state, settings)
    k, n = flux.shape
    u = np.log(wave)
    x = np.linspace(-1.0, 1.0, n)[None, :]
    deg = settings.poly_degree
    npar = deg + 2
    powers = np.stack([x[0] ** j for j in range(deg + 1)])          # (deg+1, n): 1, x, x^2, ...
    p = np.zeros((k, npar))
    p[:, 0] = delta0
    p[:, 1] = 1.0
    alive = np.ones(k, dtype=bool)
    for _ in range(settings.iterations):
        xi = (u - p[:, 0:1] - state.lng0) / state.dlng + base
        inside = (xi > lo_i) & (xi < hi_i)
        xi = np.clip(xi, lo_i, hi_i)
        T, dT, d2T = bspline(coef, xi, second=True)
        dT = dT / state.dlng                                   # d T / d ln(lambda)
        d2T = d2T / state.dlng**2
        i0 = np.floor(xi).astype(np.intp)
        fr = xi - i0
        m = use & inside & ok_t[i0] & ok_t[i0 + 1]
        poly = p[:, 1:] @ powers
        vt = (1 - fr) * var_t[i0] + fr * var_t[i0 + 1]
        w = np.where(m, 1.0 / (var + poly * poly * vt), 0.0)
        r = np.where(m, flux - poly * T, 0.0)
        J = np.concatenate(((-poly * dT)[:, :, None], T[:, :, None] * powers.T[None, :, :]), axis=2)
        JW = J * w[:, :, None]
        JWt = JW.transpose(0, 2, 1)
        A = JWt @ J                                  # batched BLAS (einsum is far slower here)
        b = (JWt @ r[:, :, None])[..., 0]
        info = A.copy()                              # expected information, for the errors
        # Newton in delta: the residual x curvature term Gauss-Newton leaves out (a noisy template has
        # a large curvature; without it the iteration converges only linearly)
        A[:, 0, 0] -= np.sum(w * r * poly * d2T, axis=1)
        A[:, 0, 0] = np.where(A[:, 0, 0] > 0.1 * info[:, 0, 0], A[:, 0, 0], info[:, 0, 0])
        alive &= m.sum(axis=1) >= 20
        A[~alive] = np.eye(npar)
        b[~alive] = 0.0
        dp = np.linalg.solve(A, b[..., None])[..., 0]
        p += dp
        chi2 = np.sum(w * r * r, axis=1) / np.maximum(m.sum(axis=1) - npar, 1)
        # Newton converges quadratically: after a step below 1e-9 (0.3 m/s) what remains is ~1e-11
        # (3 mm/s), so stop there
        if np.all(np.abs(dp[:, 0]) < 1e-9):
            break
    return _block_results(p, info, alive, chi2), bin_residuals(wave, r, poly * T, w, J[:, :, 0])
