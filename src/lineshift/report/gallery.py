"""Which CCFs the report shows, with bounded memory: every row's scalars, but arrays only for a few.

A run of 10 000 spectra cannot keep every CCF for the page.  :class:`CCFKeeper` sees each row once
(``add``), keeps scalar scores for all of them and the arrays only for the candidates: the ``k``
largest relative residuals, the ``k`` lowest contrasts, the first ``k`` rows with notes, and a
uniform random sample of ``k`` (reservoir sampling, Vitter 1985, "Algorithm R").
"""

from __future__ import annotations

import heapq
import random

import numpy as np

__all__ = ["CONTRAST_FACTOR", "RESIDUAL_FACTOR", "CCFKeeper"]

#: A CCF is an outlier when its residual rms exceeds this multiple of the batch median ...
RESIDUAL_FACTOR = 3.0
#: ... or its contrast is below this fraction of the batch median, or its row has notes.
CONTRAST_FACTOR = 0.5


class CCFKeeper:
    """Collects CCFs from ``measure`` rows (key ``_ccf``) for the report's gallery."""

    def __init__(self, k: int = 24, seed: int = 0):
        self.k = k
        self._rng = random.Random(seed)
        self.scores: dict[str, tuple[float, float, bool]] = {}   # file -> (residual rms, contrast, has notes)
        self._arrays: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._resid: list[tuple[float, str]] = []     # min-heap of the k largest residuals
        self._contrast: list[tuple[float, str]] = []  # min-heap of -contrast: the k lowest contrasts
        self._noted: list[str] = []
        self._sample: list[str] = []
        self._seen = 0

    def add(self, row: dict) -> None:
        ccf = row.get("_ccf")
        if ccf is None or row.get("status") != "ok":
            return
        v, y, model = (np.asarray(a, dtype=np.float32) for a in ccf[:3])
        name = str(row["file"])
        resid = float(np.sqrt(np.mean((y - model) ** 2)))
        contrast = float(row.get("contrast") or np.nan)
        noted = bool(str(row.get("notes") or "").strip())
        self.scores[name] = (resid, contrast, noted)
        self._arrays[name] = (v, y, model)
        self._push(self._resid, (resid, name))
        if np.isfinite(contrast):
            self._push(self._contrast, (-contrast, name))
        if noted and len(self._noted) < self.k:
            self._noted.append(name)
        self._seen += 1
        if len(self._sample) < self.k:
            self._sample.append(name)
        else:
            j = self._rng.randrange(self._seen)
            if j < self.k:
                self._sample[j] = name
        self._forget()

    def _push(self, heap, item) -> None:
        if len(heap) < self.k:
            heapq.heappush(heap, item)
        elif item > heap[0]:
            heapq.heapreplace(heap, item)

    def _forget(self) -> None:
        keep = {n for _, n in self._resid} | {n for _, n in self._contrast} | set(self._noted) | set(self._sample)
        for name in [n for n in self._arrays if n not in keep]:
            del self._arrays[name]

    def __len__(self) -> int:
        return self._seen

    def outliers(self) -> dict[str, list[str]]:
        """file -> reasons, for every row seen (scores only, arrays not needed)."""
        if not self.scores:
            return {}
        resid = np.array([s[0] for s in self.scores.values()])
        contrast = np.array([s[1] for s in self.scores.values()])
        r_med = float(np.median(resid))
        c_med = float(np.nanmedian(contrast)) if np.isfinite(contrast).any() else np.nan
        out: dict[str, list[str]] = {}
        for name, (r, c, noted) in self.scores.items():
            why = []
            if r_med > 0 and r > RESIDUAL_FACTOR * r_med:
                why.append(f"residual rms {r / r_med:.1f} x median")
            if np.isfinite(c) and np.isfinite(c_med) and c < CONTRAST_FACTOR * c_med:
                why.append(f"contrast {c / c_med:.2f} x median")
            if noted:
                why.append("notes")
            if why:
                out[name] = why
        return out

    def selection(self, limit: int = 60) -> tuple[list[tuple[str, list[str]]], str]:
        """The CCFs to draw (file, reasons; outliers first) and a sentence saying what was left out."""
        flagged = self.outliers()
        if self._seen <= limit:
            names = sorted(self._arrays, key=lambda n: (n not in flagged, n))
            return [(n, flagged.get(n, [])) for n in names], f"all {self._seen} CCFs shown"
        shown_flagged = [n for n in self._arrays if n in flagged][:limit]
        sample = [n for n in self._sample if n not in flagged and n in self._arrays]
        sample = sample[: max(0, limit - len(shown_flagged))]
        chosen = [(n, flagged[n]) for n in sorted(shown_flagged)] + [(n, []) for n in sorted(sample)]
        note = (f"{len(chosen)} of {self._seen} CCFs shown: {len(shown_flagged)} of the {len(flagged)} outliers "
                f"(largest residuals, lowest contrasts, first with notes) and a random sample of {len(sample)} others")
        return chosen, note

    def arrays(self, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        return self._arrays[name]
