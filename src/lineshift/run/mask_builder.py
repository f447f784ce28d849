"""Building a line mask from the spectra themselves (``lineshift mask``).

1. Survey the inputs and compute their barycentric corrections (as ``measure`` does).
2. First-pass velocities: measured with a starting mask when one is given; otherwise zero, so the
   first template is co-added in the barycentric frame.
3. Iterate: co-add the spectra in the star's frame (:mod:`.coadd`), find and fit the template's lines
   (:mod:`.linefind`), measure every spectrum against the provisional mask, and co-add again with the
   new velocities, until they change by less than a tenth of their errors.
4. The final template gives the mask.  Its zero point is *relative*: the template's frame, in which
   the inputs' mean velocity is about zero (or the starting mask's frame).  ``anchor`` matches
   strong lines to laboratory wavelengths and shifts the mask to an absolute zero point, with the
   offset's error.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace

import numpy as np

from lineshift._version import __version__
from lineshift.calib.barycentric import BarycentricResult, barycentric_batch
from lineshift.calib.linefind import (
    FoundLines,
    LineSettings,
    expected_error_per_snr,
    find_lines,
    follow_continuum,
    measure_lines,
)
from lineshift.errors import MeasurementError
from lineshift.io.linelists import read_lab_lines, read_telluric_bands
from lineshift.io.loaders import load_spectrum
from lineshift.measure.coadd import Template, TemplateAccumulator, log_grid
from lineshift.measure.prepare import prepare_spectrum
from lineshift.model import C_MS, LineMask, Observation
from lineshift.run.pipeline import MeasureSettings, measure_files, survey

__all__ = ["AnchorResult", "MaskBuild", "MaskBuildSettings", "Refinement", "anchor_mask", "build_mask",
           "refine_positions", "write_changes_file", "write_mask_file"]


@dataclass(frozen=True)
class MaskBuildSettings:
    """Options of mask building."""

    lines: LineSettings = field(default_factory=LineSettings)
    iterations: int = 4
    oversample: float = 2.0          # template points per detector pixel
    anchor_tolerance: float = 0.5    # match window, in units of the median line FWHM


@dataclass(frozen=True)
class AnchorResult:
    """Offset of the relative frame from the laboratory frame (m/s) and how it was found."""

    offset: float
    offset_err: float
    n_matched: int
    n_lab: int
    chi2_red: float


@dataclass
class Refinement:
    """What refining a starting mask changed (velocities in m/s, start-mask frame).

    Per given line (arrays in the starting mask's order): ``status`` is ``kept`` (position
    re-measured, consistent with the start within 3 sigma), ``moved`` (the start position is off by
    more than 3 sigma of the measurement) or ``dropped`` (``reason`` says why: one of the
    rejection reasons of :mod:`lineshift.calib.linefind`, or ``inconsistent`` when the start and
    the co-add disagree by more than 4 sigma of both their errors).  ``shift`` is the final minus the
    starting position, ``measured_shift`` the co-add's measurement minus the start (both after
    removing ``frame_offset``, the offset of the template frame from the starting mask's), and
    ``shift_err`` the measurement's error.  ``start_scatter`` is the scatter of the starting
    positions about the truth estimated from the data (0 when the measurement errors explain it).
    """

    wavelength_start: np.ndarray
    weight_start: np.ndarray
    wavelength: np.ndarray
    weight: np.ndarray
    shift: np.ndarray
    measured_shift: np.ndarray
    shift_err: np.ndarray
    status: np.ndarray
    reason: np.ndarray
    frame_offset: float
    frame_offset_err: float
    start_scatter: float

    def counts(self) -> dict[str, int]:
        out = {k: int(np.sum(self.status == k)) for k in ("kept", "moved", "dropped")}
        out.update({r: int(np.sum(self.reason == r)) for r in sorted(set(self.reason) - {""})})
        return out

    @property
    def median_shift(self) -> float:
        k = self.status != "dropped"
        return float(np.median(self.shift[k])) if k.any() else float("nan")

    @property
    def median_abs_shift(self) -> float:
        k = self.status != "dropped"
        return float(np.median(np.abs(self.shift[k]))) if k.any() else float("nan")

    def summary(self) -> str:
        c = self.counts()
        why = ", ".join(f"{c[r]} {r}" for r in sorted(set(self.reason) - {""}))
        return (f"{len(self.status)} start lines: {c['kept'] + c['moved']} kept ({c['moved']} moved by more than "
                f"3 sigma), {c['dropped']} dropped" + (f" ({why})" if why else "")
                + f"; median shift {self.median_shift:+.1f} m/s, median |shift| {self.median_abs_shift:.1f} m/s; "
                f"start positions scatter {self.start_scatter:.1f} m/s about the co-add's; template frame offset "
                f"{self.frame_offset:+.1f} +- {self.frame_offset_err:.1f} m/s from the start mask removed")


def refine_positions(measured: np.ndarray, start: np.ndarray, err: np.ndarray, *, clip: float = 5.0,
                     n_iter: int = 8) -> tuple[np.ndarray, float, float, float]:
    """Combine measured and starting line positions (velocities, m/s) by inverse variance.

    ``d = measured - start`` carries the measurement error ``err`` and the starting positions'
    own scatter ``s`` (unknown): the frame offset is the weighted mean of ``d`` with weights
    ``1 / (err^2 + s^2)``, and ``s`` is the value that brings the robust standard deviation
    (1.4826 MAD) of ``(d - offset) / sqrt(err^2 + s^2)`` to one (0 when the errors alone explain
    the differences); lines beyond ``clip`` such sigma are left out of both estimates.  The
    combined shift of each line is ``(d - offset) s^2 / (s^2 + err^2)``: the inverse-variance mean
    of the two estimates (common practice; the scatter estimated from the data, as in empirical
    Bayes shrinkage).  Returns (shift per line, offset, offset error, s).
    """
    d, e = np.asarray(measured - start, dtype=float), np.asarray(err, dtype=float)
    if d.size == 0:
        return d, 0.0, float("nan"), 0.0
    off, s = float(np.median(d)), 0.0
    use = np.ones(d.size, dtype=bool)

    def spread(sv, off):
        z = (d - off) / np.sqrt(e**2 + sv**2)
        return 1.4826 * np.median(np.abs(z[use] - np.median(z[use])))

    for _ in range(n_iter):
        if spread(0.0, off) <= 1.0:
            s = 0.0
        else:
            lo, hi = 0.0, float(np.max(np.abs(d - off))) + float(np.max(e)) + 1.0
            for _ in range(60):
                mid = 0.5 * (lo + hi)
                lo, hi = (mid, hi) if spread(mid, off) > 1.0 else (lo, mid)
            s = 0.5 * (lo + hi)
        tot2 = e**2 + s**2
        use = np.abs(d - off) < clip * np.sqrt(tot2)
        if not use.any():
            use[:] = True
        w = 1.0 / tot2[use]
        off = float(np.sum(w * d[use]) / np.sum(w))
    chi2 = float(np.sum(w * (d[use] - off) ** 2) / max(use.sum() - 1, 1))
    off_err = float(np.sqrt(1.0 / np.sum(w)) * max(1.0, np.sqrt(chi2)))
    shift = (d - off) * (s**2 / (s**2 + e**2)) if s > 0 else np.zeros(d.size)
    return shift, off, off_err, s


_CLIP = 4.0  # sigma: start and co-add positions that disagree by more are not combined


def _refine(found: FoundLines, start: LineMask) -> tuple[FoundLines, Refinement]:
    """Positions, weights and fates of the starting mask's lines from their re-measurement."""
    k = found.kept
    v_meas = C_MS * (found.wavelength / start.wavelength - 1)
    shift = np.full(k.size, np.nan)
    sh, off, off_err, s = refine_positions(v_meas[k], np.zeros(int(k.sum())), found.centre_err[k], clip=_CLIP)
    shift[k] = sh
    # start and co-add disagree beyond both their errors: a blend the tests missed or a wrong
    # starting wavelength; neither position can be trusted
    bad = k & (np.abs(v_meas - off) > _CLIP * np.sqrt(found.centre_err**2 + s**2))
    reason = np.where(bad, "inconsistent", found.reason)
    found = replace(found, reason=reason)
    k = found.kept
    measured = np.where(k, v_meas - off, np.nan)
    lam = np.where(k, start.wavelength * (1 + np.where(k, shift, 0.0) / C_MS), start.wavelength)
    moved = k & (np.abs(measured) > 3 * found.centre_err)
    status = np.where(k, np.where(moved, "moved", "kept"), "dropped")
    refined = FoundLines(lam, found.centre_err, found.depth, found.fwhm, found.reason,
                         np.where(k, found.weight, 0.0))
    return refined, Refinement(start.wavelength.copy(), np.asarray(start.weight, dtype=float).copy(),
                               np.where(k, lam, np.nan), np.where(k, found.weight, np.nan), shift, measured,
                               np.where(k, found.centre_err, np.nan), status, found.reason.copy(), off, off_err, s)


@dataclass
class MaskBuild:
    """Everything a mask build produced."""

    mask: LineMask
    found: FoundLines
    template: Template
    paths: list[str]
    velocities: np.ndarray
    failures: list[tuple[str, str]]
    error_per_snr: float
    anchor: AnchorResult | None = None
    refinement: Refinement | None = None
    refinement_source: str = ""
    iterations: int = 0
    notes: list[str] = field(default_factory=list)


def _estimate_fwhm(t: Template) -> float:
    """Median half-depth width (m/s) of up to 100 clean template minima of depth 0.15-0.7.

    The width runs between the linearly interpolated half-depth crossings; a minimum whose
    crossings are not found within 60 points either side, or whose surroundings lack coverage, is
    not a line of the instrument's width and is skipped.
    """
    f = t.flux
    finite = np.isfinite(f)
    fz = np.where(finite, f, np.inf)
    m = np.flatnonzero((fz[1:-1] < fz[:-2]) & (fz[1:-1] <= fz[2:])) + 1
    d = 1 - f[m]
    m = m[(d > 0.15) & (d < 0.7)]
    m = m[np.argsort(f[m])[:100]]
    widths = []
    reach = 60
    for i in m:
        if i < reach or i >= f.size - reach or not finite[i - reach:i + reach + 1].all():
            continue
        half = 1 - 0.5 * (1 - f[i])
        left = f[i - reach:i + 1][::-1]
        right = f[i:i + reach + 1]
        a, b = np.flatnonzero(left >= half), np.flatnonzero(right >= half)
        if not a.size or not b.size:
            continue
        ja, jb = a[0], b[0]
        xa = ja - 1 + (half - left[ja - 1]) / (left[ja] - left[ja - 1])
        xb = jb - 1 + (half - right[jb - 1]) / (right[jb] - right[jb - 1])
        widths.append((xa + xb) * t.step)
    return float(np.median(widths)) if widths else 10_000.0


def _ranges(paths) -> tuple[float, float, float]:
    """Overall wavelength range (Angstrom, observatory frame) and median pixel velocity width (m/s)."""
    lo, hi, dv = np.inf, 0.0, []
    for path in paths:
        sp = load_spectrum(path)
        a, b = sp.wavelength_range
        lo, hi = min(lo, a), max(hi, b)
        dv.append(float(np.median(np.concatenate([C_MS * np.diff(o.wave) / o.wave[1:] for o in sp.orders]))))
    return lo, hi, float(np.median(dv))


def _screen(use, objects: dict) -> tuple[list, list[tuple[str, str]]]:
    """Keep the inputs that belong: readable with finite flux, the majority's object, and a
    wavelength range overlapping at least one other input's.  Returns (kept, [(path, reason)])."""
    from collections import Counter

    from lineshift.errors import LineshiftError

    kept, out, ranges = [], [], {}
    for p, b in use:
        try:
            with np.errstate(all="ignore"):
                sp = load_spectrum(p)
                if not any(np.isfinite(o.flux).sum() > 10 for o in sp.orders):
                    raise MeasurementError("no finite flux", path=p, status="no valid flux")
                if not prepare_spectrum(sp):
                    raise MeasurementError("no usable order (too few valid pixels)", path=p, status="no valid pixels")
            ranges[p] = sp.wavelength_range
            kept.append((p, b))
        except (LineshiftError, MemoryError, OSError) as exc:
            out.append((p, f"{p}: not used for the mask ({getattr(exc, 'reason', exc)})"))
    named = Counter(objects[p] for p, _ in kept if objects.get(p))
    if named:
        major, n = named.most_common(1)[0]
        if n > len(kept) / 2:
            out += [(p, f"{p}: not used for the mask (object {objects[p]!r}, the majority is {major!r})")
                    for p, _ in kept if objects.get(p) and objects[p] != major]
            kept = [(p, b) for p, b in kept if not objects.get(p) or objects[p] == major]
    if len(kept) >= 3:  # a spectrum whose range overlaps no other input's does not belong
        def overlaps(p, q):
            return ranges[p][0] < ranges[q][1] and ranges[q][0] < ranges[p][1]

        far = [p for p, _ in kept if not any(overlaps(p, q) for q, _ in kept if q != p)]
        out += [(p, f"{p}: not used for the mask ({ranges[p][0]:.0f}-{ranges[p][1]:.0f} A overlaps "
                    "no other input)") for p in far]
        kept = [(p, b) for p, b in kept if p not in far]
    return kept, out


class _CleanAccumulator(TemplateAccumulator):
    """A co-add for line finding: contributions near an order edge or a bad pixel count only where
    no spectrum covers a point cleanly (and such points are flagged), instead of flagging the
    point for every spectrum.  With overlapping orders a line at one order's end is measured from
    its neighbour, and one spectrum's cosmic ray costs only that spectrum's pixels."""

    def __init__(self, grid, **kw):
        super().__init__(grid, **kw)
        self._fallback = [np.zeros(grid.size) for _ in range(3)] + [np.zeros(grid.size, dtype=np.int64)]

    def add(self, orders, factor) -> None:
        self.n_spectra += 1
        for o in orders:
            self._pixel_steps.append(float(np.median(C_MS * np.diff(o.wave) / o.wave[1:])))
        fw, fwf, fw2v, fcount = self._fallback
        seg = self.segments[-1]   # one co-add of every order (not per_order)
        for _, sl, w, wf, w2v, flags in self.contributions(orders, factor):
            keep = ~flags
            seg.sw[sl] += w * keep
            seg.swf[sl] += wf * keep
            seg.sw2v[sl] += w2v * keep
            seg.count[sl] += (w * keep > 0).astype(np.int64)
            fw[sl] += w * flags
            fwf[sl] += wf * flags
            fw2v[sl] += w2v * flags
            fcount[sl] += (w * flags > 0).astype(np.int64)

    def result(self) -> Template:
        t = super().result()
        fw, fwf, fw2v, fcount = self._fallback
        only = (self.segments[-1].sw <= 0) & (fw > 0)
        with np.errstate(invalid="ignore", divide="ignore"):
            flux = np.where(only, fwf / fw, t.flux)
            var = np.where(only, fw2v / fw**2, t.var)
        return replace(t, flux=flux, var=var, count=np.where(only, fcount, t.count), flagged=only)


def _coadd(paths, factors, grid, bands) -> Template:
    """One streaming pass over the spectra: a template in the frame given by ``factors``.

    Each prepared order is re-normalised by a spline upper envelope (:func:`follow_continuum`), so
    a steep blaze that the file does not give leaves no false dips at the order ends."""
    acc = _CleanAccumulator(grid, bands=bands)
    for path, factor in zip(paths, factors, strict=True):
        orders = follow_continuum(prepare_spectrum(load_spectrum(path)))
        if orders:
            acc.add(orders, factor)
    if acc.n_spectra == 0:
        raise MeasurementError("no usable spectrum to co-add", status="no valid pixels")
    return acc.result()


def anchor_mask(found: FoundLines, lab: LineMask, lab_err: np.ndarray, *, tolerance: float,
                max_offset: float = 500_000.0) -> AnchorResult:
    """Offset (m/s) of the template frame from laboratory wavelengths.

    Every pairing of a kept template line with a laboratory line within ``max_offset`` proposes an
    offset; the offset that pairs the most laboratory lines within ``tolerance`` (m/s) wins, and the
    matched pairs give a weighted mean with an error from the centre errors and the laboratory
    uncertainties (scaled up by the reduced chi-square when it exceeds 1).
    """
    k = found.kept
    lam, err = found.wavelength[k], found.centre_err[k]
    lab_lam = lab.wavelength
    lab_v_err = C_MS * lab_err / lab_lam
    cands = []
    for ll in lab_lam:
        sel = np.flatnonzero(np.abs(lam / ll - 1) * C_MS < max_offset)
        cands.extend(C_MS * (lam[sel] / ll - 1))
    if not cands:
        raise MeasurementError("no template line lies near any laboratory line", status="anchor failed")
    cands = np.asarray(cands)
    offs = C_MS * (lam[None, :] / lab_lam[:, None] - 1)          # (lab, template)
    best, best_n = None, 0
    for v0 in cands:
        n = int(np.sum(np.any(np.abs(offs - v0) < tolerance, axis=1)))
        if n > best_n:
            best, best_n = v0, n
    if best_n < 3:
        raise MeasurementError(f"only {best_n} laboratory line(s) matched; need at least 3", status="anchor failed")
    for _ in range(3):  # refine around the weighted mean
        j = np.argmin(np.abs(offs - best), axis=1)
        o = offs[np.arange(offs.shape[0]), j]
        use = np.abs(o - best) < tolerance
        e = np.sqrt(err[j] ** 2 + lab_v_err**2)[use]
        w = 1 / e**2
        best = float(np.sum(w * o[use]) / np.sum(w))
    chi2 = float(np.sum(w * (o[use] - best) ** 2) / max(use.sum() - 1, 1))
    sigma = float(1 / np.sqrt(np.sum(w)) * max(1.0, np.sqrt(chi2)))
    return AnchorResult(best, sigma, int(use.sum()), int(lab_lam.size), chi2)


def build_mask(paths: list[str], settings: MeasureSettings, build: MaskBuildSettings | None = None, *,
               start_mask: LineMask | None = None, anchor: str | None = None, progress=None) -> MaskBuild:
    """Build a line mask from spectra of one star (see the module docstring).

    Raises
    ------
    MeasurementError
        No usable input, or no line found.
    """
    build = build or MaskBuildSettings()
    obs = survey(paths, settings)
    failures: list[tuple[str, str]] = [(p, str(o)) for p, o in zip(paths, obs, strict=True)
                                       if not isinstance(o, Observation)]
    ok = [(p, o) for p, o in zip(paths, obs, strict=True) if isinstance(o, Observation)]
    bary = barycentric_batch([o for _, o in ok], target=settings.target, ephemeris=settings.ephemeris)
    use = [(p, b) for (p, _), b in zip(ok, bary, strict=True) if isinstance(b, BarycentricResult)]
    failures += [(p, str(b)) for (p, _), b in zip(ok, bary, strict=True) if not isinstance(b, BarycentricResult)]
    objects = {p: o.object for p, o in ok}
    use, excluded = _screen(use, objects)
    failures += excluded
    if not use:
        raise MeasurementError("no usable input spectrum", status="no usable input")
    upaths = [p for p, _ in use]
    bervs = np.array([b.berv for _, b in use])                 # composed with the file's wavelengths
    bervs_obs = np.array([b.observed_berv for _, b in use])    # of the observation: telluric positions
    bands = (np.zeros((0, 2)) if settings.telluric_bands is False
             else read_telluric_bands(settings.telluric_bands or None))
    measure_settings = replace(settings, telluric_bands=False, keep_ccf=False)
    notes: list[str] = []

    def velocities_with(mask: LineMask) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        rows = measure_files(upaths, mask, measure_settings)
        rv = np.array([r["rv"] if r["status"] == "ok" else np.nan for r in rows], dtype=float)
        err = np.array([r["rv_err"] if r["status"] == "ok" else np.nan for r in rows], dtype=float)
        fwhm = np.array([r["fwhm"] if r["status"] == "ok" else np.nan for r in rows], dtype=float)
        return rv, err, fwhm

    if start_mask is not None:
        rv, _, _ = velocities_with(start_mask)
        if not np.isfinite(rv).any():
            raise MeasurementError(f"no spectrum gives a velocity with the starting mask {start_mask.source}",
                                   status="no velocity")
        notes.append(f"first-pass velocities from the starting mask {start_mask.source}")
    else:
        rv = np.zeros(len(upaths))
        notes.append("first pass: co-added in the barycentric frame")
    # line width for the fit windows: first from the template's minima, then the median fitted
    # FWHM of the kept lines (the template's own lines, whatever their broadening)
    fwhm_guess = None
    lo, hi, dv_pix = _ranges(upaths)
    n_iter = 0       # co-adds made (progress count)
    n_measured = 0   # velocity re-measurements against the template's mask: what --iterations bounds

    def template_for(rv):
        good = np.isfinite(rv)
        factors = (1 + bervs / C_MS) / (1 + np.where(good, rv, 0.0) / C_MS)
        grid = log_grid(lo * factors[good].min() * (1 - 1e-4), hi * factors[good].max() * (1 + 1e-4),
                        dv_pix / build.oversample)
        sel = np.flatnonzero(good)
        return _coadd([upaths[i] for i in sel], factors[sel], grid, bands)

    def topo_range(rv):
        """The template frame seen from the observatory, as a 'BERV' range for the telluric test.

        A template line at lambda_t appears at lambda_t (1 + rv_i/c) / (1 + berv_i/c) in spectrum i;
        ``reject_telluric_lines`` with rv_star = 0 and BERV b covers lambda_t / (1 + b/c), so
        b_i = c ((1 + berv_i/c) / (1 + rv_i/c) - 1), with the observation's BERV also for a file
        already barycentric (its tellurics sit where the observatory saw them).
        """
        r = np.where(np.isfinite(rv), rv, 0.0)
        b = C_MS * ((1 + bervs_obs / C_MS) / (1 + r / C_MS) - 1)
        return float(b.min()), float(b.max())

    while True:
        template = template_for(rv)
        if fwhm_guess is None:
            fwhm_guess = _estimate_fwhm(template)
        found = find_lines(template, build.lines, fwhm_guess=fwhm_guess, bands=bands,
                           berv_range=topo_range(rv), rv_star=0.0)
        if found.kept.sum() >= 10:
            fwhm_guess = float(np.median(found.fwhm[found.kept]))
        if found.kept.sum() < 3:
            raise MeasurementError(f"only {int(found.kept.sum())} usable line(s) found in the co-added template",
                                   status="no lines")
        n_iter += 1
        if progress is not None:
            progress(n_iter)
        if n_iter > build.iterations:
            break
        mask = found.mask("provisional")
        new_rv, new_err, _ = velocities_with(mask)
        n_measured += 1
        change = np.nanmax(np.abs(new_rv - rv)) if np.isfinite(new_rv).any() else np.inf
        tol = 0.1 * np.nanmedian(new_err) if np.isfinite(new_err).any() else 0.0
        rv = new_rv
        if change < tol:
            # one more co-add with the converged velocities, then stop
            template = template_for(rv)
            found = find_lines(template, build.lines, fwhm_guess=fwhm_guess, bands=bands,
                               berv_range=topo_range(rv), rv_star=0.0)
            break
    for p, r in zip(upaths, rv, strict=True):
        if not np.isfinite(r):
            failures.append((p, f"{p}: no velocity against the provisional mask; left out of the template"))
    error_per_snr = expected_error_per_snr(template)
    refinement = None
    if start_mask is not None:
        # refine the starting mask on the final template: its lines re-measured and judged, the
        # template frame tied back to the starting mask's, positions combined by inverse variance
        again = measure_lines(template, start_mask.wavelength, build.lines, fwhm_guess=fwhm_guess, bands=bands,
                              berv_range=topo_range(rv), rv_star=0.0)
        found, refinement = _refine(again, start_mask)
        if found.kept.sum() < 3:
            raise MeasurementError(f"only {int(found.kept.sum())} line(s) of the starting mask found in the "
                                   "co-added template", status="no lines")
    result = MaskBuild(found.mask("refined" if start_mask is not None else "built"), found, template, upaths, rv,
                       failures, error_per_snr, iterations=n_measured, notes=notes, refinement=refinement,
                       refinement_source=os.path.basename(start_mask.source) if start_mask is not None else "")
    if anchor is not None:
        lab, lab_err = read_lab_lines(anchor)
        tol = build.anchor_tolerance * float(np.median(found.fwhm[found.kept]))
        result.anchor = anchor_mask(found, lab, lab_err, tolerance=tol)
        shift = 1 + result.anchor.offset / C_MS
        found.wavelength = found.wavelength / shift
        result.mask = found.mask("refined" if start_mask is not None else "built")
        if refinement is not None:
            refinement.wavelength = refinement.wavelength / shift
    result.mask = replace(result.mask, provenance=tuple(_provenance(result, build, paths, anchor)))
    return result


def _provenance(res: MaskBuild, build: MaskBuildSettings, paths, anchor) -> list[str]:
    c = res.found.counts()
    ls = build.lines
    lines = [
        f"Line mask built by lineshift {__version__} (`lineshift mask`) from {len(res.paths)} spectra "
        f"({len(paths)} given, {len(res.failures)} unusable).",
        "Inputs: " + ", ".join(os.path.basename(p) for p in res.paths[:20]) + (" ..." if len(res.paths) > 20 else ""),
        f"Settings: min_depth={ls.min_depth}, blend_fraction={ls.blend_fraction}, "
        f"max_width_ratio={ls.max_width_ratio}, "
        f"max_centre_error={ls.max_centre_error} m/s, core fit +-{ls.core_fwhm} FWHM, "
        f"template step {res.template.step:.1f} m/s, {res.iterations} co-add / measure iteration(s) "
        f"(at most {build.iterations}).",
        f"Lines: {c['kept']} kept; rejected: " + ", ".join(
            f"{c[r]} {r}" for r in ("blend", "edge", "telluric", "centre", "shallow", "fit", "absent", "outside",
                                   "inconsistent") if r in ("blend", "edge", "telluric", "centre", "shallow", "fit")
            or c[r]) + ".",
        "Weights: depth x (median FWHM / FWHM), normalised to 1 (velocity information of depth and sharpness, "
        "after the quality factor of Bouchy, Pepe & Queloz 2001).",
        f"Expected photon-limited velocity error per unit SNR: {res.error_per_snr:.0f} m/s "
        f"(i.e. {res.error_per_snr / 100:.2f} m/s at SNR 100 per pixel).",
    ]
    lines += [f"Note: {n}" for n in res.notes]
    if res.refinement is not None:
        lines.append(f"Refined from the starting mask {res.refinement_source}: {res.refinement.summary()}.")
    if res.anchor is None and res.refinement is not None:
        lines.append(f"Zero point: that of the starting mask {res.refinement_source} (the template frame tied to "
                     f"it to +- {res.refinement.frame_offset_err:.1f} m/s); absolute only if the starting mask's is.")
    elif res.anchor is None:
        lines.append("Zero point: RELATIVE - the co-added template's frame (the inputs' mean velocity is about "
                     "zero in it); velocities measured with this mask are differential only.")
    else:
        a = res.anchor
        lines.append(f"Zero point: ANCHORED to laboratory wavelengths ({os.path.basename(anchor)}): "
                     f"{a.n_matched} of {a.n_lab} lines matched, template frame offset "
                     f"{a.offset:+.1f} +- {a.offset_err:.1f} m/s (reduced chi2 {a.chi2_red:.2f}) removed. "
                     "Absolute only to the laboratory values' accuracy; includes gravitational redshift and "
                     "convective shifts of the star.")
    lines.append("medium: vacuum")
    return lines


def write_mask_file(mask: LineMask, path: str) -> None:
    """Write a mask CSV with its provenance comment lines, atomically."""
    from lineshift.io.table import atomic_path

    with atomic_path(path) as tmp, open(tmp, "w", newline="") as fh:
        for line in mask.provenance:
            fh.write(f"# {line}\n")
        fh.write("wavelength,weight\n")
        for w, wt in zip(mask.wavelength, mask.weight, strict=True):
            fh.write(f"{w:.6f},{wt:.5f}\n")



#: Columns of the per-line changes table of a refined mask, with units ("" for none).
CHANGES_COLUMNS = (("wavelength_start", "Angstrom"), ("wavelength", "Angstrom"), ("shift", "m / s"),
                   ("measured_shift", "m / s"), ("shift_err", "m / s"), ("weight_start", ""), ("weight", ""),
                   ("status", ""), ("reason", ""))


def write_changes_file(ref: Refinement, path: str, provenance: tuple[str, ...] = ()) -> None:
    """Write the per-line changes of a refined mask as CSV (``#`` provenance lines, a ``# UNITS:``
    line, then one row per starting line; empty fields for dropped lines), atomically."""
    from lineshift.io.table import atomic_path

    def fmt(x, digits):
        return "" if not np.isfinite(x) else f"{x:.{digits}f}"

    units = ", ".join(f"{c} [{u}]" for c, u in CHANGES_COLUMNS if u)
    with atomic_path(path) as tmp, open(tmp, "w", newline="") as fh:
        for line in provenance:
            fh.write(f"# {line}\n")
        fh.write(f"# UNITS: {units}\n")
        fh.write(",".join(c for c, _ in CHANGES_COLUMNS) + "\n")
        for i in range(ref.status.size):
            fh.write(",".join((fmt(ref.wavelength_start[i], 6), fmt(ref.wavelength[i], 6), fmt(ref.shift[i], 2),
                               fmt(ref.measured_shift[i], 2), fmt(ref.shift_err[i], 2),
                               fmt(ref.weight_start[i], 5), fmt(ref.weight[i], 5), ref.status[i],
                               ref.reason[i])) + "\n")
