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
from lineshift.calib.linefind import FoundLines, LineSettings, expected_error_per_snr, find_lines
from lineshift.errors import MeasurementError
from lineshift.io.linelists import read_lab_lines, read_telluric_bands
from lineshift.io.loaders import load_spectrum
from lineshift.measure.coadd import Template, TemplateAccumulator, log_grid
from lineshift.measure.prepare import prepare_spectrum
from lineshift.model import C_MS, LineMask, Observation
from lineshift.run.pipeline import MeasureSettings, measure_files, survey

__all__ = ["AnchorResult", "MaskBuild", "MaskBuildSettings", "anchor_mask", "build_mask", "write_mask_file"]


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
    iterations: int = 0
    notes: list[str] = field(default_factory=list)


def _estimate_fwhm(t: Template) -> float:
    """Median half-depth width (m/s) of the 50 deepest template minima."""
    f = np.where(np.isfinite(t.flux), t.flux, 1.0)
    m = np.flatnonzero((f[1:-1] < f[:-2]) & (f[1:-1] <= f[2:])) + 1
    m = m[np.argsort(f[m])[:50]]
    widths = []
    for i in m:
        half = 1 - 0.5 * (1 - f[i])
        lo, hi = i, i
        while lo > 0 and f[lo] < half and i - lo < 200:
            lo -= 1
        while hi < f.size - 1 and f[hi] < half and hi - i < 200:
            hi += 1
        widths.append((hi - lo) * t.step)
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


def _coadd(paths, factors, grid, bands) -> Template:
    """One streaming pass over the spectra: a template in the frame given by ``factors``."""
    acc = TemplateAccumulator(grid, bands=bands)
    for path, factor in zip(paths, factors, strict=True):
        orders = prepare_spectrum(load_spectrum(path))
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
    bervs = np.array([b.berv for _, b in use])
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
        rv, _, fwhm = velocities_with(start_mask)
        fwhm_guess = float(np.nanmedian(fwhm)) / np.sqrt(2) if np.isfinite(fwhm).any() else None
        notes.append(f"first-pass velocities from the starting mask {start_mask.source}")
    else:
        rv = np.zeros(len(upaths))
        fwhm_guess = None
        notes.append("first pass: co-added in the barycentric frame")
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
        b_i = c ((1 + berv_i/c) / (1 + rv_i/c) - 1).
        """
        r = np.where(np.isfinite(rv), rv, 0.0)
        b = C_MS * ((1 + bervs / C_MS) / (1 + r / C_MS) - 1)
        return float(b.min()), float(b.max())

    while True:
        template = template_for(rv)
        if fwhm_guess is None:
            fwhm_guess = _estimate_fwhm(template)
        found = find_lines(template, build.lines, fwhm_guess=fwhm_guess, bands=bands,
                           berv_range=topo_range(rv), rv_star=0.0)
        if found.kept.sum() < 3:
            raise MeasurementError(f"only {int(found.kept.sum())} usable line(s) found in the co-added template",
                                   status="no lines")
        n_iter += 1
        if progress is not None:
            progress(n_iter)
        if n_iter > build.iterations:
            break
        mask = found.mask("provisional")
        new_rv, new_err, fwhm = velocities_with(mask)
        n_measured += 1
        fwhm_guess = float(np.nanmedian(fwhm)) / np.sqrt(2) if np.isfinite(fwhm).any() else fwhm_guess
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
    result = MaskBuild(found.mask("built"), found, template, upaths, rv, failures, error_per_snr,
                       iterations=n_measured, notes=notes)
    if anchor is not None:
        lab, lab_err = read_lab_lines(anchor)
        tol = build.anchor_tolerance * float(np.median(found.fwhm[found.kept]))
        result.anchor = anchor_mask(found, lab, lab_err, tolerance=tol)
        shift = 1 + result.anchor.offset / C_MS
        found.wavelength = found.wavelength / shift
        result.mask = found.mask("built")
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
        f"Lines: {c['kept']} kept; rejected: " + ", ".join(f"{c[r]} {r}" for r in ("blend", "edge", "telluric",
                                                                                     "centre", "shallow", "fit"))
        + ".",
        "Weights: depth x (median FWHM / FWHM), normalised to 1 (velocity information of depth and sharpness, "
        "after the quality factor of Bouchy, Pepe & Queloz 2001).",
        f"Expected photon-limited velocity error per unit SNR: {res.error_per_snr:.0f} m/s "
        f"(i.e. {res.error_per_snr / 100:.2f} m/s at SNR 100 per pixel).",
    ]
    lines += [f"Note: {n}" for n in res.notes]
    if res.anchor is None:
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

