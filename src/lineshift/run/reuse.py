"""Prepared spectra kept for the length of one batch, so the template engine's passes (first pass,
co-add, fits against the template, repeated) read and prepare each file once instead of up to
seven times.

Only :func:`keeping` turns it on (the pipeline does, for a template run in this process); outside it
nothing is kept.  The store is bounded by :data:`BUDGET_BYTES`: once full, further spectra are
read as before (the passes go through the files in the same order, so the kept ones are hit every
time).  Worker processes keep nothing, so peak memory stays flat in the number of spectra.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager

import numpy as np

__all__ = ["BUDGET_BYTES", "keeping", "prepared"]

#: Upper bound of the memory held (raw and prepared arrays), bytes.
BUDGET_BYTES = 512 * 2**20

_KEPT: dict | None = None
_USED = 0


@contextmanager
def keeping() -> Iterator[None]:
    """Keep prepared spectra while the block runs; everything is dropped at its end."""
    from lineshift.measure.coadd import remembering

    global _KEPT, _USED
    outer = _KEPT is not None
    if not outer:
        _KEPT, _USED = {}, 0
    try:
        with remembering():   # and what the passes derive from them (coadd.py)
            yield
    finally:
        if not outer:
            _KEPT, _USED = None, 0


def _nbytes(value) -> int:
    total = 0
    stack = [value]
    while stack:
        v = stack.pop()
        if isinstance(v, np.ndarray):
            total += v.nbytes
        elif isinstance(v, list | tuple):
            stack.extend(v)
        elif hasattr(v, "__dataclass_fields__"):
            stack.extend(getattr(v, f) for f in v.__dataclass_fields__)
    return total


def prepared(key: tuple, make: Callable[[], tuple]):
    """``make()`` (e.g. load and prepare a file), or what it gave for ``key`` earlier in the block."""
    global _USED
    if _KEPT is None:
        return make()
    if key in _KEPT:
        return _KEPT[key]
    value = make()
    size = _nbytes(value)
    if _USED + size <= BUDGET_BYTES:
        _KEPT[key] = value
        _USED += size
    return value
