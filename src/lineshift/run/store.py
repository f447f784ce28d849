"""Results store: an SQLite database of measured rows, keyed by input content and settings.

Key: ``(input_hash, settings_hash)`` — the SHA-256 of the input file's bytes, and the SHA-256 of
everything else that determines the result (software version, engine settings, overrides,
astrometry, ephemeris, and the exact mask lines used after telluric rejection).  A renamed or moved
file is still found; a changed file or setting is measured again.

For the template engine the store also keeps each co-added template (table ``templates``, keyed by the
settings hash) with the hashes of the inputs it was made of: a later run measures only new spectra,
against that template, until ``rebuild_template`` asks for a new co-add of everything.

Each row is committed in its own transaction as soon as it arrives (WAL journal), so a run killed at
any moment loses nothing already committed.  Rows are stored as JSON text; nothing read from the
store is unpickled or evaluated.  Only the driver process writes.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import sqlite3
import time

import numpy as np

from lineshift._version import __version__
from lineshift.errors import ConfigError
from lineshift.model import LineMask, OrderRows

__all__ = ["ResultStore", "content_hash", "settings_hash"]

_SCHEMA_VERSION = 1


def content_hash(path: str, *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes (hex); OSError if it cannot be read."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def _plain(value):
    if dataclasses.is_dataclass(value):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, tuple | list):
        return [_plain(v) for v in value]
    if isinstance(value, float | np.floating):
        return repr(float(value))
    return value


def settings_hash(settings, mask: LineMask) -> str:
    """SHA-256 of the settings (minus output-only options) and the mask lines actually used."""
    plain = _plain(settings)
    plain.pop("keep_ccf", None)
    eph = settings.ephemeris
    if eph and eph != "builtin" and os.path.isfile(eph):
        plain["ephemeris_sha256"] = content_hash(eph)
    h = hashlib.sha256()
    h.update(json.dumps({"version": __version__, "settings": plain}, sort_keys=True).encode())
    h.update(np.ascontiguousarray(mask.wavelength, dtype="<f8").tobytes())
    h.update(np.ascontiguousarray(mask.weight, dtype="<f8").tobytes())
    return h.hexdigest()


def _jsonable(row: dict) -> dict:
    out = {}
    for k, v in row.items():
        if k == "_ccf":
            continue
        if isinstance(v, np.generic):
            v = v.item()
        if isinstance(v, OrderRows):
            v = list(v)
        if isinstance(v, float) and not math.isfinite(v):
            v = None
        out[k] = v
    return out


_RESULT_COLUMNS = ["input_hash", "settings_hash", "file", "status", "row", "created"]


def _recognise(path: str) -> None:
    """Refuse, untouched, an existing file that is not a lineshift store (read-only look first)."""
    import pathlib

    try:
        if not os.path.exists(path) or os.path.getsize(path) == 0:
            return
        with open(path, "rb") as fh:
            magic = fh.read(16)
    except OSError as exc:
        raise ConfigError(f"store {path!r} cannot be read ({exc.strerror or exc})") from None
    if magic != b"SQLite format 3\x00":  # the SQLite file header (sqlite.org "Database File Format")
        raise ConfigError(f"store {path!r} is not a lineshift results store (not an SQLite database): "
                          "refusing to touch it")
    uri = pathlib.Path(os.path.abspath(path)).as_uri() + "?mode=ro"
    try:
        db = sqlite3.connect(uri, uri=True, timeout=30.0)
        try:
            tables = {r[0] for r in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            cols = [r[1] for r in db.execute("PRAGMA table_info(results)")] if "results" in tables else []
            schema = (db.execute("SELECT value FROM meta WHERE key = 'schema'").fetchone()
                      if "meta" in tables else None)
        finally:
            db.close()
    except sqlite3.DatabaseError as exc:
        raise ConfigError(f"store {path!r} cannot be opened read-only ({exc}): refusing to touch it") from None
    # "templates" (kept co-added templates) is created on first open: stores written before it lack it
    if tables - {"templates"} != {"results", "meta"} or cols != _RESULT_COLUMNS or schema is None:
        raise ConfigError(f"store {path!r} is an SQLite database but not a lineshift results store "
                          f"(tables: {', '.join(sorted(tables)) or 'none'}): refusing to touch it")


class ResultStore:
    """SQLite store of result rows.

    Parameters
    ----------
    path : str
        Database file; created if absent.  An existing file that is not a lineshift store is a
        :class:`ConfigError`, found by a read-only look before anything is written.
    durable : bool
        ``True`` (default): ``synchronous=FULL``, every commit survives power loss.  ``False``:
        ``synchronous=NORMAL``, faster on slow disks; a power cut may lose the last rows.
    """

    def __init__(self, path: str, *, durable: bool = True):
        self.path = path
        _recognise(path)
        try:
            self._db = sqlite3.connect(path, timeout=30.0, isolation_level=None)
            self._db.execute("PRAGMA journal_mode=WAL")
            # FULL: a commit survives power loss, not only a crash of this process (SQLite docs,
            # "PRAGMA synchronous"); NORMAL in WAL mode may lose the last commits on power loss.
            self._db.execute(f"PRAGMA synchronous={'FULL' if durable else 'NORMAL'}")
            self._db.execute(
                "CREATE TABLE IF NOT EXISTS results (input_hash TEXT NOT NULL, settings_hash TEXT NOT NULL, "
                "file TEXT NOT NULL, status TEXT NOT NULL, row TEXT NOT NULL, created REAL NOT NULL, "
                "PRIMARY KEY (input_hash, settings_hash))")
            self._db.execute("CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
            self._db.execute(
                "CREATE TABLE IF NOT EXISTS templates (settings_hash TEXT PRIMARY KEY, template_id TEXT NOT NULL, "
                "inputs TEXT NOT NULL, state BLOB NOT NULL, created REAL NOT NULL)")
            self._db.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (str(_SCHEMA_VERSION),))
            (schema,) = self._db.execute("SELECT value FROM meta WHERE key = 'schema'").fetchone()
        except sqlite3.DatabaseError as exc:
            raise ConfigError(f"store {path!r} is not a lineshift results store ({exc})") from None
        if schema != str(_SCHEMA_VERSION):
            raise ConfigError(f"store {path!r} has schema {schema}, this lineshift writes {_SCHEMA_VERSION}")

    def get(self, input_hash: str, settings_key: str) -> dict | None:
        """The stored row for this input and settings, or None."""
        cur = self._db.execute("SELECT row FROM results WHERE input_hash = ? AND settings_hash = ?",
                               (input_hash, settings_key))
        found = cur.fetchone()
        if found is None:
            return None
        row = json.loads(found[0])
        return {k: (math.nan if v is None and k in _FLOAT_KEYS else v) for k, v in row.items()}

    def put(self, input_hash: str, settings_key: str, row: dict) -> None:
        """Commit one row (its own transaction)."""
        data = _jsonable(row)
        self._db.execute("BEGIN IMMEDIATE")
        try:
            self._db.execute("INSERT OR REPLACE INTO results VALUES (?, ?, ?, ?, ?, ?)",
                             (input_hash, settings_key, str(data.get("file", "")), str(data.get("status", "")),
                              json.dumps(data, sort_keys=True), time.time()))
            self._db.execute("COMMIT")
        except BaseException:
            self._db.execute("ROLLBACK")
            raise

    def get_template(self, settings_key: str) -> tuple[str, dict[str, float], dict[str, np.ndarray]] | None:
        """The stored template for these settings: (template id, {input hash: co-adding factor}, arrays)."""
        found = self._db.execute("SELECT template_id, inputs, state FROM templates WHERE settings_hash = ?",
                                 (settings_key,)).fetchone()
        if found is None:
            return None
        import io

        with np.load(io.BytesIO(found[2]), allow_pickle=False) as data:   # plain arrays only, never pickles
            arrays = {k: data[k] for k in data.files}
        return found[0], json.loads(found[1]), arrays

    def put_template(self, settings_key: str, inputs: dict[str, float], arrays: dict[str, np.ndarray]) -> str:
        """Keep a template (replacing any for these settings); returns its id (hash of settings and inputs)."""
        import io

        buf = io.BytesIO()
        np.savez(buf, **arrays)
        template_id = hashlib.sha256((settings_key + json.dumps(sorted(inputs))).encode()).hexdigest()[:12]
        self._db.execute("BEGIN IMMEDIATE")
        try:
            self._db.execute("INSERT OR REPLACE INTO templates VALUES (?, ?, ?, ?, ?)",
                             (settings_key, template_id, json.dumps(inputs, sort_keys=True), buf.getvalue(),
                              time.time()))
            self._db.execute("COMMIT")
        except BaseException:
            self._db.execute("ROLLBACK")
            raise
        return template_id

    def __len__(self) -> int:
        return int(self._db.execute("SELECT COUNT(*) FROM results").fetchone()[0])

    def close(self) -> None:
        self._db.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


_FLOAT_KEYS = {"bjd_tdb", "rv", "rv_err", "berv", "rv_topo", "fwhm", "contrast", "snr", "fwhm_err",
               "contrast_err", "mjd_mid"}
