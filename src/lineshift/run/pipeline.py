"""The measurement pipeline: files to barycentric velocities, one row per input.

Batch path (each phase streams; memory does not grow with the number of spectra beyond one small
record per input):

1. **survey** - read each file's observation record (headers only) and apply overrides;
2. **barycentric** - BERV and BJD_TDB for the whole batch, vectorised (:mod:`.barycentric`);
3. **mask** - drop mask lines that a telluric band can reach anywhere in the batch's BERV range
   (systemic velocity from the settings, or measured on the first usable spectrum);
4. **measure** - per spectrum, a pure function of (task, context): load, prepare, correlate, fit,
   compose with BERV.  Tasks run serially, on local processes, or on any executor with the
   ``concurrent.futures`` interface; the driver alone consumes the rows (``on_row``), in completion
   order, and returns them in input order.

A file that fails at any phase becomes a row with a non-ok ``status`` and an error message; it never
stops the batch.
"""

from __future__ import annotations

import glob
import os
import time
import warnings
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace

import numpy as np

from lineshift._version import __version__
from lineshift.calib.barycentric import BarycentricResult, Target, barycentric_batch, compose_velocity
from lineshift.errors import ConfigError, LineshiftError, MeasurementError, SpectrumFormatError
from lineshift.io import airvac
from lineshift.io.linelists import read_telluric_bands
from lineshift.io.loaders import load_spectrum, read_observation
from lineshift.io.table import COLUMNS, EXTRA_COLUMNS, SB2_COLUMNS, printable
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import prepare_spectrum, reject_telluric_lines, rejected_pixels
from lineshift.model import C_MS, LineMask, Observation, order_rows
from lineshift.run import reuse
from lineshift.run.config import check_settings
from lineshift.run.executors import default_workers, run_tasks

__all__ = ["COLUMNS", "MeasureSettings", "Overrides", "expand_inputs", "measure_files"]

SPECTRUM_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fts.gz", ".csv", ".csv.gz",
                     ".txt", ".txt.gz", ".dat", ".dat.gz", ".tsv", ".tsv.gz")

ENGINES: dict[str, Callable] = {"mask": measure_mask, "template": measure_mask,   # template, lines: first
                                 "lines": measure_mask}                            # pass by mask
#: Engines that fit each spectrum against the co-added template (second pass).
CO_ADDED = ("template", "lines")

#: Set by ``--debug``: unexpected errors propagate instead of becoming a row status.
DEBUG = False


@dataclass(frozen=True)
class Overrides:
    """Metadata given on the command line or in the config; each wins over the file's headers."""

    object: str | None = None
    ra_deg: float | None = None
    dec_deg: float | None = None
    frame: str | None = None
    equinox: str | None = None
    site_xyz: tuple[float, float, float] | None = None

    def apply(self, obs: Observation) -> Observation:
        changes = {k: v for k, v in (("object", self.object), ("ra_deg", self.ra_deg),
                                     ("dec_deg", self.dec_deg), ("frame", self.frame),
                                     ("equinox", self.equinox), ("site_xyz", self.site_xyz)) if v is not None}
        return replace(obs, **changes) if changes else obs


@dataclass(frozen=True)
class MeasureSettings:
    """Everything that determines a measurement besides the input file (part of the store key)."""

    method: str = "mask"
    search: SearchSettings = field(default_factory=SearchSettings)
    continuum_degree: int = 4
    medium: str | None = None
    overrides: Overrides = field(default_factory=Overrides)
    target: Target = field(default_factory=Target)
    ephemeris: str | None = None
    telluric_bands: str | bool | None = None     # None: shipped list; False: none; str: a file
    systemic_velocity: float | None = None
    keep_ccf: bool = False
    components: int = 1
    activity: bool = False                        # activity indices (lineshift.measure.activity)
    mount_wilson_calibration: tuple[float, float] | None = None   # S_MW = a + b S_instrument
    b_minus_v: float | None = None                # for log R'HK
    flux_time_key: str | None = None              # header keyword of a flux-weighted mid-exposure time

    def __post_init__(self):
        if self.method not in ENGINES:
            raise ConfigError(f"unknown method {self.method!r} (known: {', '.join(ENGINES)})")
        if self.components not in (1, 2):
            raise ConfigError(f"components must be 1 or 2, not {self.components}")
        if self.components == 2 and self.method in CO_ADDED:
            raise ConfigError("--components 2 works with the mask engine only (--method mask)")
        check_settings(self)


@dataclass(frozen=True)
class Task:
    """One spectrum's work, small enough to send to another process or machine."""

    index: int
    path: str
    berv: float
    bjd_tdb: float
    notes: tuple[str, ...]
    input_hash: str = ""
    delta0: float | None = None      # template engine: starting ln(1 + rv_topo/c) in the template frame
    factor: float | None = None      # template engine: the factor this spectrum entered the template with
    fwhm: float | None = None        # lines engine: first-pass FWHM (m/s), sets the per-line windows
    berv_obs: float | None = None    # BERV of the observation; differs from ``berv`` (0) for a barycentric file

    @property
    def observed_berv(self) -> float:
        """The BERV of the observation instant (``berv`` column, telluric bands, ``rv_topo``)."""
        return self.berv if self.berv_obs is None else self.berv_obs


def frame_velocities(task: Task, v_file: float) -> tuple[float, float]:
    """Barycentric and observatory-frame velocity (m/s) from a shift measured on the file's wavelengths.

    ``rv`` composes ``v_file`` with the BERV still to apply (``task.berv``, 0 for a file already
    barycentric); ``rv_topo`` is the velocity in the observatory frame, ``(1 + rv/c) / (1 + BERV/c)``
    with the observation's BERV (Wright & Eastman 2014 composition), equal to ``v_file`` for a
    topocentric file.
    """
    rv = float(compose_velocity(v_file, task.berv))
    b = task.observed_berv
    if b == task.berv:
        return rv, float(v_file)
    return rv, float(C_MS * ((1 + rv / C_MS) / (1 + b / C_MS) - 1))


def _band_factor(task: Task) -> float:
    """File-frame / observatory-frame wavelength of a task's spectrum: 1 for a topocentric file,
    ``(1 + BERV/c) / (1 + berv/c)`` for one already barycentric (``berv`` 0), so telluric bands fixed
    in the observatory frame land where the file shows them."""
    return float((1 + task.observed_berv / C_MS) / (1 + task.berv / C_MS))


def _orders_to_topo(orders, task: Task):
    """Per-order rows in the observatory frame (a barycentric file's shifts moved by its BERV), as
    compact columns (model.OrderRows)."""
    out = [dict(o) for o in orders]
    if task.observed_berv != task.berv:
        for o in out:
            if o.get("rv") is not None and np.isfinite(o["rv"]):
                o["rv"] = frame_velocities(task, float(o["rv"]))[1]
    return order_rows(out)


@dataclass(frozen=True)
class Context:
    """What every task of a batch shares."""

    mask: LineMask
    settings: MeasureSettings
    template: object = None          # TemplateState for the template engine's second pass
    line_moments: bool = False       # mask engine: keep each row's per-line offset coefficients
    hash_inputs: bool = False        # a task without an input hash gets its file's from the bytes it reads


def expand_inputs(items: Iterable[str]) -> list[str]:
    """Files, directories (their spectrum files, sorted, not recursive) and globs, in order given.

    A name that matches nothing is kept, so that it is reported as unreadable; so are directory
    entries named like spectra that are not readable files.
    """
    out: list[str] = []
    for item in items:
        if os.path.isdir(item):
            try:
                entries = os.listdir(item)
            except OSError as exc:
                raise ConfigError(f"directory {item!r} cannot be listed ({exc.strerror or exc})") from None
            # entries named like spectra that are not files (dangling links, link loops, a
            # directory called x.fits) are kept: each gets its own row saying what it is
            names = sorted(n for n in entries if not n.startswith(".") and n.lower().endswith(SPECTRUM_SUFFIXES))
            out.extend(os.path.join(item, n) for n in names)
        elif not os.path.exists(item) and any(ch in item for ch in "*?["):
            out.extend(sorted(glob.glob(item)))
        else:
            out.append(item)
    return out


def _empty_row(path: str, obs: Observation | None, status: str, message: str, settings) -> dict:
    row = dict.fromkeys(COLUMNS + EXTRA_COLUMNS)
    row.update(file=path, object=obs.object if obs else "", status=status, method=settings.method,
               notes=message)
    if obs is not None:
        row.update(mjd_mid=obs.mjd_mid, time_scale=obs.time_scale, time_source=obs.time_source,
                   layout=obs.layout, medium=obs.medium)
    return row


def _clean(row: dict) -> dict:
    for k, v in row.items():
        if isinstance(v, str):
            row[k] = printable(v)
    return row


def _failure(exc: BaseException, path: str) -> LineshiftError:
    """A specific, per-file error for what the operating system or the machine refused."""
    if isinstance(exc, MemoryError):
        return SpectrumFormatError("too large to hold in memory", path=path, status="too large")
    if isinstance(exc, UnicodeError):
        return SpectrumFormatError(f"text cannot be decoded ({exc.reason})", path=path, status="unreadable")
    if isinstance(exc, OSError):
        return SpectrumFormatError(f"cannot be read ({exc.strerror or exc})", path=path, status="unreadable")
    raise exc


def cluster_failure(row: dict) -> bool:
    """A row that failed because a cluster worker could not read a file this process surveyed.

    The survey has already read every task's file here, so "unreadable" on a worker is the
    cluster's fault (file not shared, worker lost), not the file's: such rows are never stored.
    """
    return row.get("status") in ("unreadable", "internal error", "cluster error")


def _survey_task(task: tuple, settings: MeasureSettings):
    """The observation record of one input, or the error that prevents reading it (picklable).

    ``task`` is ``(index, path)``, or ``(index, path, True)`` to return ``(record, content hash)``
    for the results store (the hash is "" when the record is an error)."""
    path = task[1]
    try:
        obs = settings.overrides.apply(read_observation(path, medium=settings.medium,
                                                                 flux_time_key=settings.flux_time_key))
    except LineshiftError as exc:
        exc.path = exc.path or path
        obs = exc
    except (MemoryError, UnicodeError, OSError) as exc:
        obs = _failure(exc, path)
    if len(task) < 3 or not task[2]:
        return obs
    if not isinstance(obs, Observation):
        return obs, ""
    from lineshift.run.store import content_hash

    try:
        return obs, content_hash(path)
    except OSError as exc:
        return SpectrumFormatError(f"cannot be read ({exc.strerror or exc})", path=path), ""


#: Seconds of survey left (at the rate of the files surveyed so far) above which the rest goes to the
#: workers: starting them costs ~2 s, the headers of a plain FITS file ~0.3 ms, a file astropy.io.fits
#: must read or unpack a few ms, a content hash ~3 ms (2.9 MB).
SURVEY_POOL_SECONDS = 4.0
#: Files surveyed in this process before their rate decides.
SURVEY_PROBE = 16


def survey(paths: list[str], settings: MeasureSettings, *, workers: int | None = 1, hashes: bool = False
           ) -> list:
    """Phase 1: the observation record of every input (or the error that prevents reading it).

    ``workers`` as in :func:`measure_files`: with more than one, the survey runs in this process while
    what is left would take less than :data:`SURVEY_POOL_SECONDS`, and hands the rest to the workers
    otherwise (a large batch of slow files, or content hashes); the result is the same list whichever
    runs it.  With ``hashes`` each item is ``(record, content hash)`` (for the results store; "" after
    an error)."""
    tasks = [(i, p, True) if hashes else (i, p) for i, p in enumerate(paths)]
    n = default_workers(len(paths)) if workers is None else workers
    out: list = []
    start = time.perf_counter()
    for task in tasks:
        out.append(_survey_task(task, settings))
        done = len(out)
        if n > 1 and done >= SURVEY_PROBE and (
                (time.perf_counter() - start) / done * (len(tasks) - done) > SURVEY_POOL_SECONDS):
            break
    rest = tasks[len(out):]
    out.extend([None] * len(rest))
    for task, obs in run_tasks(_survey_task, rest, settings, workers=n) if rest else ():
        out[task[0]] = obs
    return out


def effective_mask(mask: LineMask, settings: MeasureSettings, bervs: np.ndarray,
                   estimate_systemic: Callable[[], float | None]) -> tuple[LineMask, str]:
    """Phase 3: the mask with telluric-contaminated lines removed; returns it and a description."""
    if settings.telluric_bands is False or bervs.size == 0:
        return mask, "no telluric rejection"
    bands = read_telluric_bands(settings.telluric_bands or None)
    rv = settings.systemic_velocity
    if rv is None:
        rv = estimate_systemic()
    if rv is None:
        return mask, "no telluric rejection (no spectrum gave a systemic velocity)"
    box = settings.search.box_width or 2000.0
    keep = reject_telluric_lines(mask, bands, rv_star=rv, berv_min=float(bervs.min()),
                                 berv_max=float(bervs.max()), box_width=box, margin=2000.0)
    note = (f"{int((~keep).sum())} of {len(mask)} mask lines dropped for telluric bands "
            f"(BERV {bervs.min() / 1e3:+.2f}..{bervs.max() / 1e3:+.2f} km/s, systemic {rv / 1e3:+.2f} km/s)")
    return mask.select(keep), note


def _rejected_pixels(spectrum, orders) -> int:
    """Pixels the file gives as usable (finite, positive variance) that preparation masked.

    These are the neighbours of bad pixels, non-positive or saturated counts and cosmic-ray /
    hot-pixel spikes (measure/badpixels.py, measure/outliers.py), in the orders that were kept.
    """
    counted = rejected_pixels(orders)                 # as the preparation counted them
    if counted is not None:
        return counted
    raw = {id(o.wave): o for o in spectrum.orders}   # a prepared order keeps its order's wave array
    n = 0
    for p in orders:
        o = raw.get(id(p.wave))
        if o is not None and o.flux.size == p.good.size:
            ok = np.isfinite(o.flux) & np.isfinite(o.var) & (o.var > 0)
            n += int(np.count_nonzero(ok & ~p.good))
    return n


def _note_rejected(row: dict, n: int) -> dict:
    row["n_rejected_pixels"] = n
    if n:
        why = (f"{n} pixel(s) rejected (cosmic-ray/hot-pixel spikes, saturated or non-positive counts, "
               "neighbours of bad pixels)")
        row["notes"] = "; ".join(x for x in (row.get("notes") or "", why) if x)
    return row


def _load_prepared(path: str, s: MeasureSettings, digest: list | None = None):
    """(spectrum, prepared orders) of a file; kept for the batch in a template run (:mod:`.reuse`).
    ``digest``: as :func:`.load_spectrum`'s (the file is then read anew, never taken from the batch)."""
    def make():
        spectrum = load_spectrum(path, medium=s.medium, flux_time_key=s.flux_time_key, digest=digest)
        return spectrum, prepare_spectrum(spectrum, degree=s.continuum_degree)

    if digest is not None:
        return make()
    return reuse.prepared((path, s.medium, s.continuum_degree, s.flux_time_key), make)


def measure_task(task: Task, ctx: Context) -> dict:
    """Phase 4 for one spectrum: a pure function of its task and the batch context.

    Returns the output row (with ``_ccf`` holding the CCF arrays when ``keep_ccf``).  Never raises
    for bad input: the row's ``status`` says what went wrong and ``_error`` holds the message.
    With ``ctx.hash_inputs`` a task without an input hash has its file's content hash in the row's
    ``_input_hash`` ("" when the file could not be read), from the bytes it was measured on.
    """
    if not ctx.hash_inputs or task.input_hash:
        return _measure(task, ctx, None)
    digest: list[str] = []
    row = _measure(task, ctx, digest)
    row["_input_hash"] = digest[0] if digest else ""
    return row


def _measure(task: Task, ctx: Context, digest: list | None) -> dict:
    s = ctx.settings
    obs = None
    try:
        spectrum, orders = _load_prepared(task.path, s, digest)
        obs = s.overrides.apply(spectrum.obs)
        lo, hi = spectrum.wavelength_range
        inside = (ctx.mask.wavelength > lo) & (ctx.mask.wavelength < hi)
        if not inside.any():
            raise MeasurementError(
                f"spectrum ({lo:.1f}-{hi:.1f} A) lies outside the mask's range "
                f"({ctx.mask.wavelength[0]:.1f}-{ctx.mask.wavelength[-1]:.1f} A)", path=task.path,
                status="outside mask range")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            n_rej = _rejected_pixels(spectrum, orders)
            if s.components == 2:
                return _with_activity(_note_rejected(_two_component_row(task, obs, orders, ctx), n_rej), spectrum, s)
            if ctx.template is not None:
                engine_row = _lines_row if s.method == "lines" else _template_row
                return _with_activity(_note_rejected(engine_row(task, obs, orders, ctx), n_rej), spectrum, s)
            mom = [] if ctx.line_moments else None
            res = ENGINES[s.method](orders, ctx.mask, s.search, berv=task.berv, path=task.path, moments=mom)
    except (MemoryError, UnicodeError, OSError) as exc:
        err = _failure(exc, task.path)
        row = _empty_row(task.path, obs, err.status, str(err), s)
        row.update(bjd_tdb=task.bjd_tdb, berv=task.observed_berv, _error=str(err))
        return _clean(row)
    except LineshiftError as exc:
        exc.path = exc.path or task.path
        row = _empty_row(task.path, obs, exc.status, str(exc), s)
        row.update(bjd_tdb=task.bjd_tdb, berv=task.observed_berv, _error=str(exc))
        return row
    except Exception as exc:  # a bug must not stop the batch; --debug re-raises it
        if DEBUG:
            raise
        message = f"{task.path}: unexpected error ({type(exc).__name__}: {exc}); rerun with --debug"
        row = _empty_row(task.path, obs, "internal error", message, s)
        row.update(bjd_tdb=task.bjd_tdb, berv=task.observed_berv, _error=message)
        return row
    rv, rv_topo = frame_velocities(task, res.rv)
    notes = tuple(obs.notes) + task.notes
    row = _empty_row(task.path, obs, "ok", "; ".join(notes), s)
    row.update(
        bjd_tdb=task.bjd_tdb, rv=rv, rv_err=res.rv_err * (1 + task.berv / C_MS), berv=task.observed_berv,
        rv_topo=rv_topo, fwhm=res.fwhm, contrast=res.contrast, snr=res.snr, n_lines=res.n_lines,
        fwhm_err=res.fwhm_err, contrast_err=res.contrast_err, n_orders=res.n_orders,
        bisector_span=res.bis_span, bisector_span_err=res.bis_span_err, rv_chromatic_slope=res.chromatic_slope,
        rv_chromatic_slope_err=res.chromatic_slope_err)
    row["_orders"] = _orders_to_topo(res.orders, task)
    row["_v_file"] = float(res.rv)
    _note_rejected(row, n_rej)
    if mom:
        row["_line_moments"] = mom[0]
    if s.keep_ccf:
        row["_ccf"] = (res.velocity, res.ccf, res.model, res.bisector)
    if s.method == "template":   # first pass: what the co-add needs of this file, so it is not read again
        row["_span"] = _span(spectrum)
    return _with_activity(row, spectrum, s)


def _lost_on_cluster(task: Task, ctx: Context, exc: BaseException) -> dict:
    """The row of a task the Dask cluster lost (worker died, connection closed): never stored."""
    if DEBUG:
        raise exc
    message = (f"{task.path}: lost on the cluster ({type(exc).__name__}: {exc}); not stored, a later run "
               "measures it")
    row = _empty_row(task.path, None, "cluster error", message, ctx.settings)
    row.update(bjd_tdb=task.bjd_tdb, berv=task.berv, _error=message)
    return _clean(row)


measure_task.on_lost = _lost_on_cluster  # used by run/executors.py on a Dask cluster


def _span(spectrum) -> tuple[float, float, float]:
    """(lowest, highest wavelength, median pixel width in m/s) of a spectrum, for the template grid."""
    a, b = spectrum.wavelength_range
    step = float(np.median(np.concatenate([C_MS * np.diff(o.wave) / o.wave[1:] for o in spectrum.orders])))
    return a, b, step


def _with_activity(row: dict, spectrum, s: MeasureSettings) -> dict:
    """Add the activity indices (``--activity``) to a measured row; bands placed at its ``rv_topo``."""
    v_file = row.pop("_v_file", row.get("rv_topo"))   # the shift on the file's own wavelengths
    if not s.activity:
        return row
    from lineshift.measure.activity import measure_activity, vacuum_bands

    tell = None if s.telluric_bands is False else read_telluric_bands(s.telluric_bands or None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        res = measure_activity(spectrum.orders, float(v_file), vacuum_bands(airvac.air_to_vacuum),
                               telluric_bands=tell, calibration=s.mount_wilson_calibration, bv=s.b_minus_v)
    row.update(res.as_row())
    if res.notes:
        row["notes"] = "; ".join([n for n in (row.get("notes") or "",) if n] + res.notes)
    return row


def _template_row(task: Task, obs: Observation, orders, ctx: Context) -> dict:
    from lineshift.measure.template_engine import TemplateSettings, measure_template

    if task.delta0 is None:
        raise MeasurementError("no first-pass velocity to start the template fit from", path=task.path,
                               status="no velocity")
    res = measure_template(orders, ctx.template, TemplateSettings(), delta0=task.delta0, factor=task.factor,
                           berv=task.berv, path=task.path, band_factor=_band_factor(task), key=task.path)
    flagged = [o for o in res.orders if o["flag"]]
    notes = tuple(obs.notes) + task.notes + ((f"{len(flagged)} order(s) flagged (poor fit or rejected)",)
                                             if flagged else ())
    row = _empty_row(task.path, obs, "ok", "; ".join(notes), ctx.settings)
    rv, rv_topo = frame_velocities(task, res.rv)
    row.update(bjd_tdb=task.bjd_tdb, berv=task.observed_berv, rv=rv,
               rv_err=res.rv_err * (1 + task.berv / C_MS), rv_topo=rv_topo, snr=res.snr, n_orders=res.n_orders,
               method="template")
    row["_orders"] = _orders_to_topo(res.orders, task)
    row["_v_file"] = float(res.rv)
    row["_response"] = res.residuals
    return row


def _lines_row(task: Task, obs: Observation, orders, ctx: Context) -> dict:
    """The line-by-line engine's row (``--method lines``); per-line velocities in ``_lines``."""
    from lineshift.measure.lines_engine import LinesSettings, measure_lines

    if task.delta0 is None:
        raise MeasurementError("no first-pass velocity to start the line-by-line fit from", path=task.path,
                               status="no velocity")
    settings = LinesSettings()
    if task.fwhm is not None and np.isfinite(task.fwhm) and task.fwhm > 0:
        # the line and its wings: +-1.5 FWHM is +-3.5 sigma of a Gaussian profile
        settings = LinesSettings(half_window=1.5 * float(task.fwhm))
    res = measure_lines(orders, ctx.template, ctx.mask, settings, delta0=task.delta0, factor=task.factor,
                        path=task.path, band_factor=_band_factor(task))
    scale = 1 + task.berv / C_MS
    lines = []
    for line in res.lines:
        line = dict(line)
        v_file = line.pop("rv")
        line["rv_topo_err"] = line.pop("rv_err")
        line["rv"], line["rv_topo"] = frame_velocities(task, v_file) if np.isfinite(v_file) else (np.nan, np.nan)
        line["rv_err"] = line["rv_topo_err"] * scale
        lines.append(line)
    outliers = sum(1 for line in lines if line["outlier_probability"] > 0.5)
    notes = tuple(obs.notes) + task.notes + (
        (f"{outliers} of {res.n_lines} lines more likely outliers than not (line-by-line mixture, "
         f"outlier fraction {res.outlier_fraction:.3f}, width {res.outlier_width:.0f} m/s)",) if outliers else ())
    row = _empty_row(task.path, obs, "ok", "; ".join(notes), ctx.settings)
    rv, rv_topo = frame_velocities(task, res.rv)
    row.update(bjd_tdb=task.bjd_tdb, berv=task.observed_berv, rv=rv, rv_err=res.rv_err * scale, rv_topo=rv_topo,
               snr=res.snr, n_orders=res.n_orders, n_lines=res.n_lines, method="lines")
    row["_orders"] = _orders_to_topo(res.orders, task)
    row["_lines"] = lines
    return row


def _fit_against(tasks: list[Task], first: dict[int, dict], rv: dict[int, float], ctx: Context, state,
                 in_template: dict[int, float], *, workers: int | None, scheduler,
                 residuals: dict[int, dict] | None = None) -> dict[int, dict]:
    """Fit each spectrum against the template ``state``, starting from velocity ``rv`` (m/s); a spectrum that
    is part of the template (``in_template``: its co-adding factor) is fitted against the template without
    itself.  Line-shape columns come from the mask pass (``first``).  The template engine's binned fit
    residuals (:mod:`lineshift.measure.response`) go to ``residuals`` (by task index) when given."""
    tctx = Context(ctx.mask, ctx.settings, state)
    ttasks = [replace(t, delta0=float(np.log((1 + rv[t.index] / C_MS) / (1 + t.berv / C_MS))),
                      factor=in_template.get(t.index), fwhm=first[t.index].get("fwhm")) for t in tasks]
    new = {}
    for task, row in run_tasks(measure_task, ttasks, tctx, workers=workers, scheduler=scheduler):
        first_row = first[task.index]
        resid = row.pop("_response", None)
        if residuals is not None and resid:
            residuals[task.index] = resid
        for k in ("fwhm", "contrast", "fwhm_err", "contrast_err", "bisector_span", "bisector_span_err", "n_lines"):
            if not (k == "n_lines" and row.get(k) is not None):   # the lines engine counts its own lines
                row[k] = first_row.get(k)
        new[task.index] = row
    return new


def _run_template(tasks: list[Task], first: dict[int, dict], ctx: Context, *, workers: int | None, scheduler,
                  max_iter: int = 3):
    """The template engine's passes: co-add with the current velocities, fit every spectrum against
    the template without itself, repeat until the velocities move by less than a tenth of their errors.

    Returns the rows, the last template and the co-adding factor of each spectrum in it."""
    from lineshift.measure.coadd import TemplateAccumulator, log_grid, on_common_continuum
    from lineshift.measure.response import detector_response
    from lineshift.measure.template_engine import KEEP_BYTES, TemplateState, template_smoothing

    rows = dict(first)
    bands = np.zeros((0, 2)) if ctx.settings.telluric_bands is False else read_telluric_bands(
        ctx.settings.telluric_bands or None)
    ranges: dict[int, tuple[float, float, float]] = {}   # per file, once: they do not change between passes
    for t in tasks:
        if rows[t.index].get("status") == "ok":
            span = rows[t.index].get("_span")
            ranges[t.index] = tuple(span) if span is not None else _span(
                load_spectrum(t.path, medium=ctx.settings.medium, flux_time_key=ctx.settings.flux_time_key))
    continua = None   # every spectrum of an order is normalised by one spectrum's continuum (coadd.py)
    state = None
    for it in range(max_iter):
        use = [t for t in tasks if rows[t.index].get("status") == "ok" and t.index in ranges]
        if len(use) < 2:
            raise MeasurementError("the template engine needs at least two spectra with a first-pass velocity")
        if continua is None:
            continua = {o.index: o.continuum for o in _load_prepared(use[0].path, ctx.settings)[1]}
        factor = {t.index: (1 + t.berv / C_MS) / (1 + rows[t.index]["rv"] / C_MS) for t in use}
        lo = min(ranges[t.index][0] * factor[t.index] for t in use)
        hi = max(ranges[t.index][1] * factor[t.index] for t in use)
        steps = [ranges[t.index][2] for t in use]
        grid = log_grid(lo * (1 - 1e-4), hi * (1 + 1e-4), np.median(steps) / 2)
        fwhm = np.array([first[t.index].get("fwhm") or np.nan for t in use], float)   # mask-pass CCF widths
        fwhm = fwhm[np.isfinite(fwhm)]
        smooth = template_smoothing(float(np.median(fwhm)) if fwhm.size else 0.0)

        def coadd(screen, unscreened=None, use=use, grid=grid, continua=continua, factor=factor, smooth=smooth):
            """The co-add of ``use``, each screened against ``screen`` (if any); each spectrum's
            screening and contribution kept in the template for its fit (TemplateState.keep).
            ``unscreened``: a co-add of the same inputs without screening that kept theirs: an
            order that screening leaves as it was has the same contribution."""
            acc = TemplateAccumulator(grid, bands=bands, per_order=True, levelled=True)
            pending, size = [], 0
            for t in use:
                f, bf = factor[t.index], _band_factor(t)
                orders = on_common_continuum(_load_prepared(t.path, ctx.settings)[1], continua)
                goods = [None] * len(orders)
                own = None if unscreened is None else unscreened.kept(t.path, f, bf)
                own = None if own is None else list(own[1])
                if screen is not None:
                    screened = screen.screened(orders, f)
                    goods = [b.good if b is not a else None for a, b in zip(orders, screened, strict=True)]
                    if own is not None:
                        for k, g in enumerate(goods):
                            if g is not None:
                                own[k] = acc.contribution_list([screened[k]], f, bf)[0]
                    orders = screened
                if own is None:
                    own = acc.contribution_list(orders, f, bf)
                acc.add(orders, f, bf, contributions=own)
                nbytes = sum(a.nbytes for c in own if c is not None for a in c[2:])
                if size + nbytes <= KEEP_BYTES:
                    pending.append((t.path, f, bf, goods, own))
                    size += nbytes
            out = TemplateState.from_accumulator(acc, smooth, continua)
            for entry in pending:
                out.keep(*entry)
            return out

        # No spectrum's cosmic ray may enter the co-added template: every input is screened against
        # a template (the previous pass's, else a first co-add of the unscreened inputs) and its
        # pixels far above it are left out of the co-add and of its own fit (TemplateState.screened)
        prev = state if state is not None else coadd(None)
        screen = replace(prev, ref_flux=prev.flux(), ref_segments=prev.segments)
        state = coadd(screen, prev if it == 0 else None)
        prev.forget()
        state.ref_flux, state.ref_segments = screen.ref_flux, screen.ref_segments
        residuals: dict[int, dict] = {}
        # the fits use what the co-add kept of each input (within KEEP_BYTES), in this process only;
        # workers read, prepare, screen and co-add each input again.  36-order files, 2 cores: 40
        # files (~25 kept) 8.7-10.4 s here against 11.9-14.7 s on 2 workers; 200 files (the same ~25
        # kept) 42.0 and 40.4 s.  So by default (workers=None) the fits run here while at least half
        # of the inputs are kept; a number of workers the user gives is honoured
        here = workers is None and scheduler is None and 2 * state.n_kept >= len(use)
        fit_workers = 1 if here else workers
        new = _fit_against(use, first, {t.index: rows[t.index]["rv"] for t in use}, ctx, state, factor,
                           workers=fit_workers, scheduler=scheduler, residuals=residuals)
        state.forget()   # what it kept of its inputs served their fits
        moved = [abs(new[i]["rv"] - rows[i]["rv"]) / new[i]["rv_err"] for i in new
                 if new[i]["status"] == "ok" and rows[i].get("method") in CO_ADDED]
        rows.update(new)
        if (moved and max(moved) < 0.1) or it == max_iter - 1:
            break
        if residuals:   # the response the common continuum left in every spectrum, divided out next pass
            response = detector_response([(float(np.log(factor[i])), residuals[i]) for i in residuals
                                          if new[i]["status"] == "ok"], {k: c.size for k, c in continua.items()})
            continua = {k: c * np.exp(response[k]) if k in response else c for k, c in continua.items()}
    return rows, state, factor


def _two_component_row(task: Task, obs: Observation, orders, ctx: Context) -> dict:
    from lineshift.measure.sb2 import measure_two

    s = ctx.settings
    res = measure_two(orders, ctx.mask, s.search, berv=task.berv, path=task.path)
    row = _empty_row(task.path, obs, "ok", "; ".join(tuple(obs.notes) + task.notes), s)
    scale = 1 + task.berv / C_MS
    (rv1, topo1), (rv2, topo2) = frame_velocities(task, res.rv[0]), frame_velocities(task, res.rv[1])
    row.update(
        bjd_tdb=task.bjd_tdb, berv=task.observed_berv, rv=rv1,
        rv_err=res.rv_err[0] * scale, rv_topo=topo1, fwhm=res.fwhm[0], contrast=res.contrast[0],
        fwhm_err=res.fwhm_err[0], contrast_err=res.contrast_err[0], snr=res.snr, n_lines=res.n_lines,
        n_orders=res.n_orders, rv2=rv2, rv2_err=res.rv_err[1] * scale,
        rv2_topo=topo2, fwhm2=res.fwhm[1], fwhm2_err=res.fwhm_err[1], contrast2=res.contrast[1],
        contrast2_err=res.contrast_err[1], flux_ratio=res.flux_ratio)
    row["_v_file"] = float(res.rv[0])
    if s.keep_ccf:
        row["_ccf"] = (res.velocity, res.ccf, res.model, None)
    return row


# --------------------------------------------------------------------------- driver

def _template_rows(tasks: list[Task], todo: list[Task], ctx: Context, store, stored, report, *, workers: int,
                   scheduler) -> dict[int, dict]:
    """Rows of the template engine for ``todo``: against the stored template where there is one, else
    from a new co-add of all ``tasks`` (then kept in the store).  Each row's notes name its template."""
    from lineshift.measure.template_engine import TemplateState

    first = {t.index: row for t, row in run_tasks(measure_task, todo, ctx, workers=workers, scheduler=scheduler)}
    if not todo:
        return {}
    try:
        if stored is not None:
            template_id, inputs, arrays = stored
            state = TemplateState.from_arrays(arrays)
            use = [t for t in todo if first[t.index].get("status") == "ok"]
            in_template = {t.index: inputs[t.input_hash] for t in use if t.input_hash in inputs}
            final = dict(first)
            final.update(_fit_against(use, first, {t.index: first[t.index]["rv"] for t in use}, ctx, state,
                                      in_template, workers=workers, scheduler=scheduler))
            note = f"template {template_id} from the store ({state.n_spectra} spectra)"
        else:
            final, state, factor = _run_template(tasks, first, ctx, workers=workers, scheduler=scheduler)
            if store is not None:
                by_index = {t.index: t.input_hash for t in tasks}
                template_id = store.put_template(report.settings_hash,
                                                 {by_index[i]: f for i, f in factor.items()}, state.to_arrays())
                note = f"template {template_id} co-added in this run ({state.n_spectra} spectra), kept in the store"
            else:
                note = f"template co-added in this run ({state.n_spectra} spectra)"
    except MeasurementError as exc:   # e.g. fewer than two usable spectra: no template at all
        final = {}
        for i, row in first.items():
            if row.get("status") == "ok":
                failed = _empty_row(row["file"], None, "no template", f"{row['file']}: {exc.reason}", ctx.settings)
                failed.update(bjd_tdb=row["bjd_tdb"], berv=row["berv"], _error=f"{row['file']}: {exc.reason}")
                final[i] = failed
            else:
                final[i] = row
        return final
    for row in final.values():
        if row.get("method") in CO_ADDED and row.get("status") == "ok":
            row["notes"] = "; ".join(n for n in (row.get("notes"), note) if n)
    return final


@dataclass
class BatchReport:
    """What a batch did besides the rows."""

    mask_note: str = ""
    n_lines_mask: int = 0
    skipped: int = 0            # rows taken from the results store
    settings_hash: str = ""
    swaps: int = 0              # two components exchanged to keep each star's identity


def measure_files(paths: list[str], mask: LineMask, settings: MeasureSettings, *, workers: int | None = None,
                  scheduler: str | None = None, store=None, rebuild_template: bool = False,
                  on_row: Callable[[dict], None] | None = None, report: BatchReport | None = None
                  ) -> list[dict]:
    """Measure many spectra; one row per path, in the order given.

    Parameters
    ----------
    paths : list of str
        Input files.
    mask : LineMask
        Rest-frame mask (vacuum).
    settings : MeasureSettings
    workers : int or None
        Local processes (1: in this process; None, the default: every core, one process per 16
        spectra at most, :func:`lineshift.run.executors.default_workers`).
    scheduler : str, optional
        Address of a Dask distributed scheduler to run the measurements on.
    store : ResultStore, optional
        Rows already in the store (same file content, same settings) are taken from it and not
        measured again.  With the template engine the co-added template is kept in the store too: new
        spectra are measured against it, unless ``rebuild_template`` (or no template is stored yet), when
        every input is co-added and measured again.  Otherwise rows are taken from it and not
        measured again; each new row is committed to it as it arrives (by this process only).
    on_row : callable, optional
        Called with each row as soon as it exists (failed surveys first, then measurements in
        completion order), e.g. to commit it to a store or draw its plot.
    report : BatchReport, optional
        Filled with the batch-level notes (telluric rejection).

    Returns
    -------
    list of dict
        The rows, columns :data:`COLUMNS` then :data:`EXTRA_COLUMNS` (and ``_error`` / ``_ccf``).
    """
    report = report if report is not None else BatchReport()
    rows: list[dict | None] = [None] * len(paths)

    def emit(i: int, row: dict) -> None:
        if scheduler and row.get("file") is not None:
            row["file"] = paths[i]  # as given, not the absolute path shipped to the cluster
        rows[i] = row = _clean(row)
        if on_row is not None:
            on_row(row)

    # a store needs each input's content hash: read beside the headers (on the workers for a large
    # batch) when the store may hold some of the inputs, else taken by each mask-engine measurement
    # from the bytes it reads (one read of each file instead of two; an empty store skips nothing)
    deferred = store is not None and settings.method not in CO_ADDED and len(store) == 0
    surveyed = survey(paths, settings, workers=1 if scheduler else workers,
                      hashes=store is not None and not deferred)
    if store is not None and not deferred:
        observations, hashes = [o for o, _ in surveyed], [h for _, h in surveyed]
    else:
        observations, hashes = surveyed, [""] * len(paths)
    ok_idx = [i for i, o in enumerate(observations) if isinstance(o, Observation)]
    bary = barycentric_batch([observations[i] for i in ok_idx], target=settings.target,
                             ephemeris=settings.ephemeris)
    tasks: list[Task] = []
    for i, o in enumerate(observations):
        if not isinstance(o, Observation):
            emit(i, {**_empty_row(paths[i], None, o.status, str(o), settings), "_error": str(o)})
    for i, b in zip(ok_idx, bary, strict=True):
        if not isinstance(observations[i], Observation):
            continue
        if isinstance(b, BarycentricResult):
            # a cluster's workers do not share our working directory: ship absolute paths
            shipped = os.path.abspath(paths[i]) if scheduler else paths[i]
            tasks.append(Task(i, shipped, b.berv, b.bjd_tdb, b.notes, hashes[i], berv_obs=b.observed_berv))
        else:
            obs = observations[i]
            emit(i, {**_empty_row(paths[i], obs, b.status, str(b), settings), "_error": str(b)})

    # telluric bands move with the observation's BERV, whatever frame the file's wavelengths are in
    bervs = np.array([t.observed_berv for t in tasks])

    def estimate_systemic() -> float | None:
        plain = Context(mask, replace(settings, keep_ccf=False))
        for t in tasks[:50]:  # the first that measures: bad files ahead of it fail fast and must not decide
            row = measure_task(t, plain)
            if row["status"] == "ok":
                return float(row["rv"])
        return None

    use_mask, note = effective_mask(mask, settings, bervs, estimate_systemic)
    report.mask_note, report.n_lines_mask = note, len(use_mask)
    ctx = Context(use_mask, settings, hash_inputs=deferred)
    todo = tasks
    stored_template = None
    if store is not None:
        from lineshift.run.store import settings_hash

        key = report.settings_hash = settings_hash(settings, use_mask)
        if settings.method in CO_ADDED and not rebuild_template:
            stored_template = store.get_template(key)
        if not deferred and (settings.method not in CO_ADDED or stored_template is not None):
            todo = []
            for t in tasks:
                row = store.get(t.input_hash, key)
                if row is None:
                    todo.append(t)
                    continue
                row.update(file=printable(t.path))  # the path as given this time (the content is the same)
                report.skipped += 1
                emit(t.index, row)
    # mask engine: each line's offset measured over the batch and taken out of the mask, so a line
    # lost in one spectrum (bad pixels in its box) does not move that spectrum's velocity
    recentre = settings.method == "mask" and settings.components == 1 and len(todo) >= MIN_RECENTRE
    if settings.method in CO_ADDED:
        with reuse.keeping():   # the passes read each file once (bounded; this process only)
            final = _template_rows(tasks, todo, ctx, store, stored_template, report, workers=workers,
                                   scheduler=scheduler)
        for t in todo:
            if store is not None and not (scheduler and cluster_failure(final[t.index])):
                store.put(t.input_hash, report.settings_hash, final[t.index])
            emit(t.index, final[t.index])
    else:
        done = run_tasks(measure_task, todo, replace(ctx, line_moments=recentre), workers=workers, scheduler=scheduler)
        if deferred:   # each task then carries its file's hash (a recentred pass does not read it again)
            done = ((replace(t, input_hash=row.pop("_input_hash", "")), row) for t, row in done)
        if recentre:   # (a file the first pass could not read is not hashed on a later one)
            done = _recentred_pass(done, replace(ctx, hash_inputs=False), workers=workers, scheduler=scheduler)
        for task, row in done:
            row.pop("_line_moments", None)
            if store is not None and task.input_hash and not (scheduler and cluster_failure(row)):
                store.put(task.input_hash, report.settings_hash, _clean(row))
            emit(task.index, row)
    out = [r for r in rows if r is not None]
    if settings.components == 2:
        from lineshift.measure.sb2 import assign_components

        for r in out:
            for c in SB2_COLUMNS:
                r.setdefault(c, None)
        report.swaps = assign_components(out)
    return out


#: Fewest spectra a batch measures line offsets on (measure/recentre.py).
MIN_RECENTRE = 4
#: Measurements against a recentred mask (each recentring on the residual offsets of the last).
RECENTRE_PASSES = 2


def _summed(pairs, n_lines: int) -> tuple[list, object]:
    """The (task, row) pairs, each row's line moments taken out of it and summed as it arrives (a
    batch keeps the sums, not every spectrum's moments)."""
    from lineshift.measure.recentre import MomentSums

    sums, out = MomentSums(n_lines), []
    for t, row in pairs:
        m = row.pop("_line_moments", None)
        if m is not None:
            sums.add(m)
        out.append((t, row))
    return out, sums


def _recentred_pass(done, ctx: Context, *, workers: int, scheduler) -> list:
    """Measure again against the mask recentred on the line offsets (measure/recentre.py); the offsets
    are first-order estimates, so the recentring is repeated on the residual offsets.

    Rows are taken as they arrive: a new row replaces the earlier one at once (which is then let go),
    and each row's line moments go into the next pass's sums, so the batch holds one row per spectrum."""
    from lineshift.measure.recentre import MomentSums, recentred_mask

    mask, notes = ctx.mask, []
    done, sums = _summed(done, len(mask))
    tasks = [t for t, _ in done]
    rows = {t.index: row for t, row in done}
    done = None
    # of the first pass only what the zero point needs
    first = {i: (row["status"], row.get("rv")) for i, row in rows.items()}
    replaced: set[int] = set()
    for it in range(RECENTRE_PASSES):
        # only where bad pixels made the line sets differ: clean batches are measured as before
        if len(sums) < MIN_RECENTRE or (it == 0 and not sums.cleared):
            break
        mask, note = recentred_mask(mask, sums)
        notes.append(note)
        last = it == RECENTRE_PASSES - 1
        sums = MomentSums(len(mask))
        for t, new in run_tasks(measure_task, tasks, replace(ctx, mask=mask, line_moments=not last),
                                workers=workers, scheduler=scheduler):
            m = new.pop("_line_moments", None)
            # a spectrum the recentred mask cannot measure keeps its earlier row
            if new["status"] == "ok" or rows[t.index]["status"] != "ok":
                rows[t.index] = new
                replaced.add(t.index)
                if m is not None:
                    sums.add(m)
    done = [(t, rows[t.index]) for t in tasks]
    if notes:
        for t, row in done:
            if t.index in replaced:
                row["notes"] = "; ".join(x for x in (row.get("notes") or "", notes[0]) if x)
        # recentring fixes the lines' positions up to one common shift: choose it so the batch-mean
        # velocity is the first pass's, i.e. the zero point stays that of the mask as given
        pairs = [(first[t.index][1], row["rv"]) for t, row in done
                 if row["status"] == "ok" and first[t.index][0] == "ok" and t.index in replaced]
        if pairs:
            v1, v2 = np.array(pairs).T
            factor = float(np.mean((1 + v2 / C_MS) / (1 + v1 / C_MS)))
            for t, row in done:
                if row["status"] == "ok" and t.index in replaced:
                    _rescale_row(row, factor)
    return done


def _rescale_row(row: dict, factor: float) -> None:
    """Velocities of a row as measured with every mask wavelength multiplied by ``factor``: each
    velocity v becomes c ((1 + v/c) / factor - 1), in any frame (velocities compose by multiplying
    Doppler factors)."""
    def f(v):
        return C_MS * ((1 + np.asarray(v, dtype=float) / C_MS) / factor - 1)

    for k in ("rv", "rv_topo"):
        if row.get(k) is not None:
            row[k] = float(f(row[k]))
    if row.get("_orders"):
        orders = [dict(o) for o in row["_orders"]]
        for o in orders:
            if o.get("rv") is not None:
                o["rv"] = float(f(o["rv"]))
        row["_orders"] = order_rows(orders)
    if row.get("_ccf") is not None:
        vel, ccf, model, bis = row["_ccf"]
        row["_ccf"] = (f(vel), ccf, model, None if bis is None else (bis[0], f(bis[1])))


def provenance(mask: LineMask, settings: MeasureSettings, report: BatchReport) -> dict[str, str]:
    """Metadata written with the table: conventions, software, mask and settings."""
    return {
        "SOFTWARE": f"lineshift {__version__}",
        "RV_CONVENTION": "IAU 2000 Resolution C1 barycentric radial-velocity measure cz_B, m/s",
        "BERV_COMPOSITION": "(1+rv/c) = (1+rv_topo/c)(1+berv/c), Wright & Eastman 2014",
        "TIME": "bjd_tdb: mid-exposure BJD in TDB, days (Eastman et al. 2010)",
        "AIRVAC_FORMULA": airvac.FORMULA,
        "MASK": f"{mask.source} ({len(mask)} lines; {report.n_lines_mask} after telluric rejection)",
        "TELLURIC": report.mask_note,
        "METHOD": settings.method,
        "EPHEMERIS": settings.ephemeris or "builtin (ERFA)",
    }
