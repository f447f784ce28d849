"""Property-based fuzzing: random bytes, headers, text and arrays into the loaders and the CCF.

Every outcome must be a result or a documented error (a ``LineshiftError`` subclass with a
one-line message naming the file); nothing else may escape.
"""

import functools
import io
import os
import tempfile
import warnings

import numpy as np
from astropy.io import fits
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from hostile_inputs import BOMB_LIMIT, KINDS, build
from lineshift.errors import LineshiftError, MeasurementError
from lineshift.io.loaders import load_spectrum, read_observation
from lineshift.measure.mask_engine import SearchSettings, measure_mask
from lineshift.measure.prepare import prepare_spectrum
from lineshift.model import LineMask, Observation, Order, Spectrum

FUZZ = settings(max_examples=int(os.environ.get("LINESHIFT_FUZZ_EXAMPLES", "120")), deadline=None,
                suppress_health_check=[HealthCheck.too_slow])
_DIR = tempfile.mkdtemp(prefix="lineshift-fuzz-")


def _check_outcome(path: str) -> None:
    for fn in (load_spectrum, read_observation):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                result = fn(path)
        except LineshiftError as exc:
            text = str(exc)
            assert text.startswith(os.fsdecode(path))
            assert "\n" not in text
            assert exc.status
        else:
            assert result is not None


def _write(name: str, data: bytes) -> str:
    path = os.path.join(_DIR, name)
    with open(path, "wb") as fh:
        fh.write(data)
    return path


@FUZZ
@given(st.binary(max_size=6000))
def test_random_bytes(data):
    _check_outcome(_write("bytes.bin", data))


@FUZZ
@given(st.binary(max_size=3000))
def test_fits_magic_then_garbage(data):
    _check_outcome(_write("magic.fits", b"SIMPLE  =                    T" + b" " * 50 + data))


_VALUES = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**6, 10**6),
                    st.text(alphabet=st.characters(min_codepoint=32, max_codepoint=126), max_size=30),
                    st.booleans())
_KEYS = ["CTYPE1", "CRVAL1", "CDELT1", "CD1_1", "CRPIX1", "CUNIT1", "DC-FLAG", "DATE-OBS", "DATE-AVG",
         "DATE-BEG", "DATE-END", "MJD-OBS", "MJD-AVG", "EXPTIME", "XPOSURE", "TIMESYS", "RA", "DEC",
         "RADESYS", "EQUINOX", "OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z", "OBSGEO-L", "OBSGEO-B", "OBSGEO-H",
         "OBJECT", "TIME-OBS"]


@FUZZ
@given(st.dictionaries(st.sampled_from(_KEYS), _VALUES, max_size=14),
       st.sampled_from(["image", "table", "multi"]), st.integers(0, 300))
def test_random_headers(cards, kind, n):
    rng = np.random.default_rng(n)
    hdr = fits.Header()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for k, v in cards.items():
            try:
                hdr[k] = v
            except (ValueError, TypeError):
                pass
        flux = rng.normal(100, 10, n).astype(np.float32)
        if kind == "image":
            hdus = [fits.PrimaryHDU(flux, header=hdr), fits.ImageHDU(np.abs(flux) ** 0.5, name="ERR")]
        elif kind == "table":
            cols = [fits.Column("WAVE", "D", array=np.sort(rng.uniform(4000, 6000, n))),
                    fits.Column("FLUX", "E", array=flux), fits.Column("ERR", "E", array=np.abs(flux) ** 0.5)]
            hdus = [fits.PrimaryHDU(header=hdr), fits.BinTableHDU.from_columns(cols)]
        else:
            shape = (2, max(n // 2, 1))
            hdus = [fits.PrimaryHDU(header=hdr),
                    fits.ImageHDU(rng.normal(100, 10, shape), name="FLUX"),
                    fits.ImageHDU(np.cumsum(rng.uniform(-0.01, 0.05, shape), axis=1) + 5000, name="WAVE"),
                    fits.ImageHDU(rng.uniform(-1, 10, shape), name="IVAR")]
        buf = io.BytesIO()
        try:
            fits.HDUList(hdus).writeto(buf, output_verify="silentfix")
        except Exception:  # astropy refuses to write some random cards: nothing to read then
            return
    _check_outcome(_write(f"hdr_{kind}.fits", buf.getvalue()))


_LINE = st.text(alphabet=st.sampled_from(list("0123456789.,-+eE #=:abcdefgorderwavelengthfluxerr\t ")),
                max_size=60)


@FUZZ
@given(st.lists(_LINE, max_size=40), st.booleans())
def test_random_text(lines, header):
    body = (["# DATE-AVG = 2026-01-01T00:00:00", "wavelength,flux,err"] if header else []) + lines
    _check_outcome(_write("text.csv", "\n".join(body).encode()))


_ARR = st.lists(st.floats(allow_nan=True, allow_infinity=True, width=32), min_size=8, max_size=300)


@FUZZ
@given(_ARR, st.floats(-1e5, 1e5), st.floats(0.001, 0.1), st.integers(0, 2**31))
def test_random_arrays_into_the_ccf(flux, rv_guess, step, seed):
    rng = np.random.default_rng(seed)
    n = len(flux)
    wave = 5000 + step * np.arange(n)
    flux = np.asarray(flux, dtype=float)
    var = np.abs(rng.normal(1, 1, n)) * np.where(rng.random(n) < 0.1, -1, 1)
    sp = Spectrum(Observation("<fuzz>", "text"), (Order(wave, flux, var),))
    lines = np.sort(rng.uniform(wave[0] - 1, wave[-1] + 1, 5))
    mask = LineMask(lines, rng.uniform(0.1, 1, 5))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        orders = prepare_spectrum(sp)
        try:
            res = measure_mask(orders, mask, SearchSettings(velocity_range=(rv_guess - 5e4, rv_guess + 5e4)))
        except MeasurementError:
            return
    assert np.isfinite(res.rv) and np.isfinite(res.rv_err) and res.rv_err >= 0


@functools.cache
def _good_1d() -> str:
    from lineshift import sim

    ins = sim.Instrument("t-1d", "wcs-1d", 65_000, 1, 2000, 5200.0, sampling=3.0, snr=150, blaze=False)
    out = os.path.join(_DIR, "good")
    rows = sim.simulate_set(out, [(ins, 1)], seed=5)
    return os.path.join(out, rows[0]["file"])


@FUZZ
@given(st.sampled_from(sorted(KINDS)), st.integers(0, 2**31), st.binary(max_size=64))
def test_hostile_kinds_corrupted_further(kind, where, junk):
    # every kind of the hostile catalogue (tests/hostile_inputs.py), then random bytes written over it
    from lineshift.io import loaders

    d = tempfile.mkdtemp(dir=_DIR)
    path = build(kind, d, _good_1d())
    if junk and os.path.isfile(path) and not os.path.islink(path) and os.path.getsize(path):
        with open(path, "r+b") as fh:
            fh.seek(where % os.path.getsize(path))
            fh.write(junk)
    limit = loaders.MAX_INPUT_BYTES
    loaders.MAX_INPUT_BYTES = BOMB_LIMIT
    try:
        _check_outcome(path)
    finally:
        loaders.MAX_INPUT_BYTES = limit


_DAYS = st.one_of(st.floats(-1e25, 1e25), st.floats(2.3e6, 2.6e6), st.floats(-1e3, 2e5))


@FUZZ
@given(_DAYS, st.one_of(st.floats(0, 1e35), st.just(900.0)), st.sampled_from(["MJD-OBS", "MJD-AVG", "MJD-BEG"]))
def test_random_dates_never_reach_erfa_unchecked(mjd, exptime, key):
    # ERFA refuses some dates (MJD 1e9, 1e20, -3e6): each must be a row's reason, never an exception
    from lineshift.calib.barycentric import barycentric_batch
    from lineshift.errors import MetadataError

    path = os.path.join(_DIR, "dates.fits")
    with fits.open(_good_1d()) as hdul:
        hdu = fits.PrimaryHDU(np.array(hdul[0].data), header=hdul[0].header.copy())
    for k in ("MJD-OBS", "DATE-OBS", "DATE-BEG", "DATE-END", "MJD-AVG", "DATE-AVG"):
        hdu.header.remove(k, ignore_missing=True, remove_all=True)
    hdu.header[key] = mjd
    hdu.header["EXPTIME"] = exptime
    if key == "MJD-BEG":
        hdu.header["MJD-END"] = mjd + exptime / 86400
    assume(np.isfinite(mjd + exptime / 86400))
    hdu.writeto(path, overwrite=True)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            obs = read_observation(path)
    except MetadataError as exc:
        assert str(exc).startswith(path) and "\n" not in str(exc)
        return
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        (result,) = barycentric_batch([obs])
    if isinstance(result, MetadataError):
        assert result.status in ("bad time", "missing time"), result.status
    else:
        assert np.isfinite(result.berv) and abs(result.berv) < 35_000  # m/s: Earth's orbit plus rotation
