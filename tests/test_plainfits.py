"""The plain-FITS fast path (io/plainfits.py) against astropy.io.fits, and the loaders' one-pass checks
against their order-by-order form: the same keyword values, arrays, notes and errors on every layout.

Outside reference: astropy.io.fits reads every file here (``loaders.PLAIN_FITS = False``); the fast
path must give exactly what it gives, or leave the file to it.
"""

import gzip
import os
import shutil

import numpy as np
import pytest
from astropy.io import fits

import hostile_inputs
from lineshift import sim
from lineshift.errors import LineshiftError
from lineshift.io import loaders, plainfits
from lineshift.model import Observation, Spectrum

# --------------------------------------------------------------------------- helpers

def _card(text: str) -> bytes:
    assert len(text) <= 80, text
    return f"{text:<80}".encode("ascii")


def _file(primary_cards: list[str], *, data: np.ndarray | None = None) -> bytes:
    """A FITS file from raw primary cards (after the mandatory ones), with an optional 1-D float32 image."""
    head = ["SIMPLE  =                    T", "BITPIX  =                  -32"]
    if data is None:
        head += ["NAXIS   =                    0"]
    else:
        head += ["NAXIS   =                    1", f"NAXIS1  = {data.size:>20d}"]
    cards = b"".join(_card(c) for c in head + primary_cards) + _card("END")
    cards += b" " * (-len(cards) % 2880)
    body = b"" if data is None else data.astype(">f4").tobytes()
    return cards + body + b"\0" * (-len(body) % 2880)


def _astropy_values(raw: bytes, tmp_path) -> list[dict]:
    path = tmp_path / "astropy.fits"
    path.write_bytes(raw)
    with fits.open(path) as hdul:
        return [{k: h.header[k] for k in h.header if k not in ("", "COMMENT", "HISTORY")} for h in hdul]


def _outcome(fn, path):
    try:
        return fn(path)
    except LineshiftError as exc:
        return type(exc).__name__, str(exc), exc.status


def _same(a, b) -> None:
    """Two loader outcomes are identical: the same error, or the same record and arrays exactly."""
    assert type(a) is type(b), (a, b)
    if isinstance(a, tuple):
        assert a == b
        return
    if isinstance(a, Observation):
        assert a == b
        return
    assert isinstance(a, Spectrum)
    assert a.obs == b.obs
    assert len(a.orders) == len(b.orders)
    for x, y in zip(a.orders, b.orders, strict=True):
        assert x.index == y.index
        for name in ("wave", "flux", "var", "blaze"):
            u, v = getattr(x, name), getattr(y, name)
            assert (u is None) == (v is None), name
            if u is not None:
                assert u.dtype == v.dtype and u.shape == v.shape, name
                np.testing.assert_array_equal(u, v, err_msg=name)


def _both_ways(monkeypatch, path) -> None:
    """load_spectrum and read_observation of ``path`` with the fast path and with astropy alone."""
    for fn in (loaders.load_spectrum, loaders.read_observation):
        monkeypatch.setattr(loaders, "PLAIN_FITS", True)
        fast = _outcome(fn, path)
        monkeypatch.setattr(loaders, "PLAIN_FITS", False)
        slow = _outcome(fn, path)
        _same(fast, slow)


# --------------------------------------------------------------------------- keyword values

VALUE_CARDS = [
    "OBJECT  = 'Vessa-9 '           / invented demo star",
    "EMPTY   = ''",
    "BLANKS  = '        '",
    "LEAD    = '  lead and trail  '",
    "SLASH   = 'a/b / c'            / a slash inside",
    "DATE-OBS= '2025-12-01T19:12:00.000' / exposure start",
    "RA      = '08:45:37.50'",
    "EXPTIME =                900.0 / [s]",
    "INTEGER =                  -12",
    "PLUS    =                  +07 / leading zero and sign",
    "BIGINT  =  4611686018427387904",
    "REAL    =    131.4062500000001",
    "EXP     =             1.5E-300",
    "EXPPLUS =            -2.5E+300",
    "NOFRAC  =                   1.",
    "LEADDOT =                  .25",
    "ZERO    =                  0.0",
    "TRUE    =                    T",
    "FALSE   =                    F / logical",
    "FREE    = 3.5 / free-format real",
    "NOSPACE =                  5/comment right after",
    "COMMENT   anything at all, even = signs 'and quotes",
    "HISTORY written by a test",
    "          a blank-keyword card",
]


def test_keyword_values_and_types_are_astropys(tmp_path):
    raw = _file(VALUE_CARDS)
    hdus = plainfits.scan_bytes(raw)
    assert hdus is not None and len(hdus) == 1
    ours, theirs = hdus[0].header, _astropy_values(raw, tmp_path)[0]
    assert ours == theirs
    for key, value in theirs.items():
        assert type(ours[key]) is type(value), key
    assert hdus[0].name == "PRIMARY" and hdus[0].data is None


NOT_PLAIN = [
    "lower   = 1", "MIXed   = 'x'", "HIERARCH ESO DET DIT = 1.0", "CONTINUE  'more'",
    "DEXP    =               1.5D+3", "LOWEXP  =               1.5e+3", "CPLX    =           (1.0, 2.0)",
    "UNDEF   =", "UNDEFCOM=                      / only a comment", "QUOTE   = 'it''s'",
    "RVKC    = 'AXIS.1: 2'", "NOEQUALS  'value without an equals sign'", "GARBAGE = 12 apples",
    "BSCALE  =                  2.0", "BZERO   =              32768.0", "BLANK   =                  -99",
    "OBJECT  = 'first'", "UNCLOSED= 'no end quote",
]


@pytest.mark.parametrize("card", NOT_PLAIN)
def test_unusual_cards_leave_the_file_to_astropy(card):
    extra = ["OBJECT  = 'Vessa-9'", card]
    assert plainfits.scan_bytes(_file(["OBJECT  = 'Vessa-9'"])) is not None
    assert plainfits.scan_bytes(_file(extra)) is None


def test_unusual_structure_leaves_the_file_to_astropy():
    good = _file(["OBJECT  = 'x'"], data=np.arange(10.0))
    assert plainfits.scan_bytes(good) is not None
    np.testing.assert_array_equal(plainfits.scan_bytes(good)[0].data, np.arange(10.0))
    assert plainfits.scan_bytes(good[:-2880]) is None                 # truncated data unit
    assert plainfits.scan_bytes(good + b"\0" * 2880) is None          # bytes after the last HDU
    assert plainfits.scan_bytes(good[:-1]) is None                    # not whole blocks
    bad_byte = good.replace(b"OBJECT  = 'x'", b"OBJECT  = '\xe9'")
    assert plainfits.scan_bytes(bad_byte) is None                     # not printable ASCII
    no_end = good.replace(_card("END"), _card(""))
    assert plainfits.scan_bytes(no_end) is None
    padded = good.replace(_card("END") + b" " * 80, _card("END") + b"\0" * 80)
    assert plainfits.scan_bytes(padded) is None                       # header padded with NULs
    swapped = good.replace(b"BITPIX  =", b"XXXXXX  =", 1)
    assert plainfits.scan_bytes(swapped) is None                      # mandatory keyword missing


def _scan_headers(fd: int):
    return plainfits.scan(lambda offset, n: os.pread(fd, n, offset), os.fstat(fd).st_size)


def _multi_order(tmp_path, name="m.fits", **kw) -> str:
    """A 4-order file of the simulator (FLUX float32, WAVE float64, ERR, BLAZE), then edited."""
    from conftest import SMALL

    rng = np.random.default_rng(7)
    exp = sim.observe(sim.DEMO_STAR, SMALL["multi-order"], sim.DEMO_SITE, 61000.8, rng)
    path = str(tmp_path / name)
    sim.write_observation(exp, path, style=kw.pop("style", 0))
    return path


def test_table_and_scaled_extensions_are_not_plain(tmp_path):
    path = _multi_order(tmp_path)
    with open(path, "rb") as fh:
        assert plainfits.scan_bytes(fh.read()) is not None
    with fits.open(path) as hdul:
        cols = [fits.Column("X", "E", array=np.ones(3))]
        fits.HDUList([*hdul, fits.BinTableHDU.from_columns(cols)]).writeto(tmp_path / "t.fits")
        scaled = fits.ImageHDU((hdul["ERR"].data * 100).astype(np.int16), name="ERR2")
        scaled.header["BSCALE"], scaled.header["BZERO"] = 0.01, 0.0
        fits.HDUList([*hdul, scaled]).writeto(tmp_path / "s.fits")
    for other in ("t.fits", "s.fits"):
        with open(tmp_path / other, "rb") as fh:
            assert plainfits.scan_bytes(fh.read()) is None


def test_every_header_of_a_multi_order_file_matches_astropy(tmp_path):
    for style in (0, 1):
        path = _multi_order(tmp_path, f"m{style}.fits", style=style)
        with open(path, "rb") as fh:
            raw = fh.read()
        hdus = plainfits.scan_bytes(raw)
        assert [h.header for h in hdus] == _astropy_values(raw, tmp_path)
        with fits.open(path) as hdul:
            assert [h.name for h in hdus] == [h.name for h in hdul]
            for ours, theirs in zip(hdus[1:], hdul[1:], strict=True):
                assert ours.data.dtype == theirs.data.dtype
                np.testing.assert_array_equal(ours.data, theirs.data)
        # the header blocks alone give the same keywords
        with open(path, "rb") as fh:
            heads = _scan_headers(fh.fileno())
        assert [h.header for h in heads] == [h.header for h in hdus]
        with pytest.raises(ValueError, match="headers only"):
            heads[1].data  # noqa: B018


# --------------------------------------------------------------------------- whole loads

def _edit(src: str, dst: str, fn) -> str:
    with fits.open(src) as hdul:
        hdus = [h.copy() for h in hdul]
    fn(hdus)
    fits.HDUList(hdus).writeto(dst, overwrite=True)
    return dst


def _variants(tmp_path) -> dict[str, str]:
    base = _multi_order(tmp_path, "base.fits")
    sexa = _multi_order(tmp_path, "sexagesimal.fits", style=1)
    out = {"base": base, "sexagesimal": sexa}
    d = str(tmp_path)

    def put(name, fn):
        out[name] = _edit(base, os.path.join(d, f"{name}.fits"), fn)

    def rename(hdus, old, new, transform):
        for h in hdus:
            if h.name == old:
                h.name = new
                h.data = transform(h.data.astype(np.float64)).astype(np.float32)

    put("var", lambda h: rename(h, "ERR", "VAR", np.square))
    put("ivar", lambda h: rename(h, "ERR", "IVAR", lambda e: 1 / e**2))
    put("no_err", lambda h: h.pop(3))
    put("no_blaze", lambda h: h.pop(4))

    def saturate(h):
        h[0].header["SATURATE"] = float(np.nanpercentile(h[1].data, 99))
    put("saturate", saturate)

    def holes(h):
        h[1].data[0, 10:20] = np.nan
        h[3].data[1, 5] = 0.0
        h[3].data[2, 7] = -1.0
        h[1].data[3, 3] = np.inf
    put("holes", holes)

    def nm(h):
        h[2].data = h[2].data / 10.0
        h[2].header["BUNIT"] = "nm"
    put("nanometres", nm)

    def air(h):
        h[1].header["CTYPE1"] = "AWAV"
    put("air", air)

    def one_flipped(h):
        h[2].data[1] = h[2].data[1][::-1].copy()
    put("one_order_flipped", one_flipped)    # non-monotonic as a whole order: refused

    def all_flipped(h):
        for k in (1, 2, 3, 4):
            h[k].data = h[k].data[:, ::-1].copy()
    put("all_flipped", all_flipped)

    def zero_step(h):
        h[2].data[2, 100] = h[2].data[2, 99]
    put("zero_step", zero_step)

    def nan_wave(h):
        h[2].data[0, 0] = np.nan
    put("nan_wave", nan_wave)

    def negative_wave(h):
        h[2].data[0] = h[2].data[0] - h[2].data[0, 10]
    put("negative_wave", negative_wave)

    def far_wave(h):
        h[2].data[3] = h[2].data[3] * 1e5
    put("far_wave", far_wave)

    def short(h):
        for k in (1, 2, 3, 4):
            h[k].data = h[k].data[:, :6].copy()
    put("six_pixels", short)

    def one_order(h):
        for k in (1, 2, 3, 4):
            h[k].data = h[k].data[0].copy()
    put("one_dimensional", one_order)

    def int_flux(h):
        h[1].data = np.round(h[1].data).astype(np.int32)
    put("int32_flux", int_flux)

    def bad_ra(h):
        h[0].header["RA"] = "ninety"
    put("bad_ra", bad_ra)

    def barycentric(h):
        h[0].header["SPECSYS"] = "BARYCENT"
        h[0].header["VELOSYS"] = 12345.0
    put("barycentric", barycentric)

    def flux_time(h):
        h[0].header["MJD-FLUX"] = 61000.81
    put("flux_time", flux_time)

    def wave_name(h):
        h[2].name = "WAVELENGTH"
    put("wavelength_extname", wave_name)

    def lower_extnames(h):
        for k in (1, 2, 3, 4):
            h[k].header["EXTNAME"] = h[k].header["EXTNAME"].lower()
    put("lower_extnames", lower_extnames)

    with open(base, "rb") as fh:      # astropy writes EXTEND itself: blank the card in the bytes
        raw = fh.read()
    card = next(raw[i:i + 80] for i in range(0, 2880, 80) if raw[i:i + 8] == b"EXTEND  ")
    out["no_extend"] = os.path.join(d, "no_extend.fits")
    with open(out["no_extend"], "wb") as fh:
        fh.write(raw.replace(card, b" " * 80, 1))

    def extra_hdus(h):
        h.insert(1, fits.ImageHDU(name="EMPTY"))
        h.append(fits.ImageHDU(np.zeros((2, 3), dtype=np.int16), name="QUALITY"))
        h.append(fits.ImageHDU(h[2].data * 2, name="FLUX"))   # a second FLUX: the first one counts
        h[0].data = np.ones(5, dtype=np.float32)
    put("extra_hdus", extra_hdus)

    def keys_in_flux_header(h):
        h[1].header["SATURATE"] = 1e9
        h[1].header["MJD-AVG"] = 61000.9      # the primary's time rules come first
        h[0].header["COMMENT"] = "a comment with 'quotes' and = signs"
        h[0].header["HISTORY"] = "made by a test"
    put("keys_in_flux_header", keys_in_flux_header)

    def hierarch(h):
        h[0].header["HIERARCH ESO OBS NAME"] = "x"
    put("hierarch", hierarch)

    def long_string(h):
        h[0].header["OBJECT"] = "Vessa-9 " * 12
    put("continue_card", long_string)

    gz = os.path.join(d, "base.fits.gz")
    with open(base, "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    out["gzip"] = gz
    trunc = os.path.join(d, "truncated.fits")
    with open(base, "rb") as fh:
        raw = fh.read()
    with open(trunc, "wb") as fh:
        fh.write(raw[:-2880])
    out["truncated"] = trunc
    return out


def test_every_variant_loads_as_astropy_reads_it(tmp_path, monkeypatch):
    variants = _variants(tmp_path)
    statuses = {}
    for name, path in variants.items():
        _both_ways(monkeypatch, path)
        monkeypatch.setattr(loaders, "PLAIN_FITS", True)
        result = _outcome(loaders.load_spectrum, path)
        statuses[name] = "ok" if isinstance(result, Spectrum) else result[2]
    plain = set()
    for name, path in variants.items():
        with open(path, "rb") as fh:
            raw = fh.read()
        if plainfits.scan_bytes(raw) is not None:
            plain.add(name)
    # the comparison did run the fast path: every variant is plain but those made not to be
    assert set(variants) - plain == {"hierarch", "continue_card", "gzip", "truncated"}
    # the variants do reach the refusals they were made for (both ways, as compared above)
    assert statuses["base"] == statuses["gzip"] == statuses["air"] == statuses["all_flipped"] == "ok"
    assert statuses["zero_step"] == statuses["nan_wave"] == statuses["far_wave"] == "bad wavelengths"
    assert statuses["truncated"] != "ok"
    assert statuses["bad_ra"] != "ok"


def test_flux_time_key_and_medium_override_both_ways(tmp_path, monkeypatch):
    path = _variants(tmp_path)["flux_time"]
    for kwargs in ({"flux_time_key": "mjd-flux"}, {"flux_time_key": "MJD-FLUX"}, {"medium": "air"}):
        results = []
        for flag in (True, False):
            monkeypatch.setattr(loaders, "PLAIN_FITS", flag)
            results.append([_outcome(lambda p, fn=fn, kw=kwargs: fn(p, **kw), path)
                            for fn in (loaders.load_spectrum, loaders.read_observation)])
        for a, b in zip(*results, strict=True):
            _same(a, b)
    monkeypatch.setattr(loaders, "PLAIN_FITS", True)
    assert "flux-weighted" in loaders.read_observation(path, flux_time_key="mjd-flux").time_source


def test_every_layout_and_hostile_kind_loads_as_astropy_reads_it(sample_set, tmp_path, monkeypatch):
    directory, _mask, rows = sample_set
    for r in rows:
        _both_ways(monkeypatch, os.path.join(directory, r["file"]))
    good = next(os.path.join(directory, r["file"]) for r in rows if r["layout"] == "wcs-1d")
    monkeypatch.setenv("LINESHIFT_MAX_INPUT_BYTES", str(hostile_inputs.BOMB_LIMIT))
    monkeypatch.setattr(loaders, "MAX_INPUT_BYTES", hostile_inputs.BOMB_LIMIT)
    for kind in hostile_inputs.KINDS:
        sub = tmp_path / kind
        sub.mkdir()
        _both_ways(monkeypatch, hostile_inputs.build(kind, str(sub), good))


def test_pixel_limit_holds_on_the_fast_path(tmp_path, monkeypatch):
    path = _multi_order(tmp_path)
    monkeypatch.setattr(loaders, "MAX_PIXELS", 100)
    monkeypatch.setattr(loaders, "PLAIN_FITS", True)
    fast = _outcome(loaders.load_spectrum, path)
    assert fast[2] == "too large"
    _both_ways(monkeypatch, path)


def test_batch_rows_are_identical_with_either_reader(sample_set, monkeypatch):
    from lineshift.io.linelists import read_mask
    from lineshift.run.pipeline import MeasureSettings, measure_files

    directory, mask_path, rows = sample_set
    files = [os.path.join(directory, r["file"]) for r in rows]
    mask = read_mask(mask_path)
    out = []
    for flag in (True, False):
        monkeypatch.setattr(loaders, "PLAIN_FITS", flag)
        out.append(measure_files(files, mask, MeasureSettings(), workers=1))
    for a, b in zip(*out, strict=True):
        assert a.keys() == b.keys()
        for k in a:
            if not k.startswith("_"):
                assert a[k] == b[k] or (a[k] != a[k] and b[k] != b[k]), (k, a[k], b[k])  # NaN is NaN
    assert sum(r["status"] == "ok" for r in out[0]) >= 6


# --------------------------------------------------------------------------- one-pass checks

def _reference_variance(arr, kind):
    """The obvious form: np.where on the float64 values."""
    a = np.asarray(arr, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return {"std": np.where(a > 0, a * a, np.nan), "var": np.where(a > 0, a, np.nan),
                "ivar": np.where(a > 0, 1.0 / a, np.nan)}[kind]


@pytest.mark.parametrize("kind", ["std", "var", "ivar"])
def test_variance_in_one_array_equals_np_where(kind):
    rng = np.random.default_rng(5)
    base = rng.normal(3.0, 2.0, (4, 300))
    base[0, :5] = [np.nan, 0.0, -0.0, np.inf, -np.inf]
    base[1, 1] = 1e-30
    for arr in (base, base.astype(">f4"), base.astype(np.float32), base.astype(">f8"),
                np.round(np.nan_to_num(base, posinf=99.0, neginf=-99.0) * 10).astype(">i4"), base[0]):
        before = np.array(arr, copy=True)
        got = loaders._to_variance(arr, kind)
        want = _reference_variance(arr, kind)
        assert got.dtype == want.dtype == np.float64
        np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(arr, before)       # the input is left as it was
        assert not np.shares_memory(got, arr)


def _orders_arrays(rng, rows=5, n=64):
    wave = 5000.0 + np.arange(rows)[:, None] * 80.0 + 0.05 * np.arange(n)[None, :]
    flux = rng.normal(100.0, 5.0, (rows, n))
    var = np.full((rows, n), 25.0)
    blaze = rng.uniform(0.5, 1.0, (rows, n))
    return wave, flux, var, blaze


DEFECTS = {
    "none": lambda w, f, v: None,
    "one_row_decreasing": lambda w, f, v: w.__setitem__(1, w[1][::-1].copy()),
    "all_rows_decreasing": lambda w, f, v: w.__setitem__(slice(None), w[:, ::-1].copy()),
    "repeated": lambda w, f, v: w.__setitem__((2, 10), w[2, 9]),
    "shuffled": lambda w, f, v: w.__setitem__((3, 10), w[3, 20]),
    "nan": lambda w, f, v: w.__setitem__((0, 5), np.nan),
    "inf": lambda w, f, v: w.__setitem__((4, 63), np.inf),
    "negative": lambda w, f, v: w.__setitem__(0, w[0] - 5003.0),
    "zero_start": lambda w, f, v: w.__setitem__(0, w[0] - 5000.0),
    "too_far": lambda w, f, v: w.__setitem__(4, w[4] * 1e4),
    "no_flux": lambda w, f, v: f.__setitem__(slice(None), np.nan),
    "inf_flux": lambda w, f, v: f.__setitem__(slice(None), np.inf),
    "no_var": lambda w, f, v: v.__setitem__(slice(None), 0.0),
}


@pytest.mark.parametrize("defect", list(DEFECTS))
@pytest.mark.parametrize("medium", ["vacuum", "air"])
@pytest.mark.parametrize("with_blaze", [True, False])
def test_orders_checked_at_once_equal_the_order_by_order_form(defect, medium, with_blaze):
    rng = np.random.default_rng(9)
    wave, flux, var, blaze = _orders_arrays(rng)
    DEFECTS[defect](wave, flux, var)
    blaze = blaze if with_blaze else None

    def run(fn, *args):
        notes = []
        try:
            return fn(*args, medium, "f.fits", notes), notes
        except LineshiftError as exc:
            return (type(exc).__name__, str(exc), exc.status), notes

    fast, fast_notes = run(loaders._build_orders_2d, wave, flux, var, blaze)
    parts = [(wave[i], flux[i], var[i], None if blaze is None else blaze[i]) for i in range(wave.shape[0])]
    plain, plain_notes = run(loaders._build_orders, parts)
    assert fast_notes == plain_notes
    assert type(fast) is type(plain)
    if isinstance(plain, tuple):
        assert fast == plain
        return
    for a, b in zip(fast, plain, strict=True):
        assert a.index == b.index
        for name in ("wave", "flux", "var", "blaze"):
            u, v = getattr(a, name), getattr(b, name)
            assert (u is None) == (v is None)
            if u is not None:
                np.testing.assert_array_equal(u, v)
