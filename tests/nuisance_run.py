"""Measure independent-generator data with and without nuisances (tests/independent/nuisances.py).

Shared by tests/test_nuisances.py and benchmarks/nuisance_report.py.  Each exposure is written twice,
from the same noise draw: clean, and with the switched-on nuisances.  Both sets are measured by
lineshift and scored against the efficient estimator of the clean draw (a least-squares fit of the
generator's own noise-free model, :func:`forward.efficient_estimate`): its variance is the photon
bound (Bouchy, Pepe & Queloz 2001), and an efficient estimator's error is uncorrelated with
(estimator - efficient estimator) (Cramer-Rao; Hausman 1978), so scatter / attainable =
sqrt(1 + var(rv - rv_eff) / bound^2) is estimated with little noise.  The ratio of the damaged set to
the clean set is the cost of the nuisances.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from independent import forward as fwd
from independent import nuisances as nzm
from lineshift.model import LineMask
from lineshift.run.pipeline import MeasureSettings, measure_files

RV = 12_000.0
LINES = fwd.make_lines(11, 4300.0, 7200.0)


def true_mask() -> tuple[np.ndarray, np.ndarray]:
    d = fwd.line_depths(LINES)
    keep = d > 0.1
    return LINES.wave[keep], d[keep]


@dataclass
class Result:
    rv: np.ndarray
    err: np.ndarray
    rejected: np.ndarray
    eff: np.ndarray
    bound: float

    @property
    def n(self) -> int:
        return int(self.rv.size)

    def ratio(self) -> float:
        d = self.rv - self.eff
        return float(np.sqrt(1 + np.var(d, ddof=1) / self.bound**2))

    def pull(self) -> float:
        return float(np.std((self.rv - self.rv.mean()) / self.err, ddof=1))

    def paired_pull(self) -> float:
        """Pull std with the efficient estimator as control variate: the true scatter of rv is
        sqrt(bound^2 + var(rv - rv_eff)) (the two terms are uncorrelated: Hausman 1978, see the module
        docstring), so only the small var(rv - rv_eff) is estimated from the draws; divided by the rms
        quoted error.  The plain pull std of N draws is uncertain by 1/sqrt(2 (N - 1)) (0.11 for 40
        draws): this one only by (ratio^2 - 1) / 2 of that."""
        d = self.rv - self.eff
        return float(np.sqrt(self.bound**2 + np.var(d, ddof=1)) / np.sqrt(np.mean(self.err**2)))

    def zero_point(self) -> float:
        return float(np.mean(self.rv - RV))

    def zero_point_err(self) -> float:
        return float(np.std(self.rv, ddof=1) / np.sqrt(self.n))


@dataclass
class Batch:
    """Exposures over a year of BERV: set-up, noise deviates, references and efficient estimates."""

    setup: fwd.Setup
    dates: list
    bervs: list
    refs: list
    z: list
    eff: np.ndarray
    bound: float
    trans: list
    hot: list
    level: float
    seed: int


def make_batch(*, n: int = 16, seed: int = 1, n_orders: int = 12, lo: float = 5950.0) -> Batch:
    setup = fwd.echelle_setup(seed, n_orders=n_orders, lo=lo, blaze=True)
    hi = setup.edges[-1][-1]
    dates = nzm.year_dates(n, seed)
    trans = nzm.transmission(setup, nzm.telluric_lines(seed, lo - 10.0, hi + 10.0))
    hot = nzm.hot_pixel_map(setup, seed)
    rng = np.random.default_rng(seed + 77)
    bervs, refs, zs, eff, bounds = [], [], [], [], []
    for date in dates:
        berv = fwd.berv_astropy(date)   # astropy radial_velocity_correction for this date, site, target
        rvt = fwd.topocentric(RV, berv)
        ref = fwd.reference(setup, LINES, rvt)
        z = [rng.standard_normal(m.shape) for m in ref.model]
        clean = [m + np.sqrt(m + setup.read_noise**2) * zk for m, zk in zip(ref.model, z, strict=True)]
        e = fwd.efficient_estimate(ref, clean)[0]
        # efficient topocentric estimate -> barycentric, exact composition (IAU 2000 Resolution C1 cz_B)
        eff.append(fwd.C * ((1 + (rvt + e) / fwd.C) * (1 + berv / fwd.C) - 1))
        bounds.append(fwd.photon_bound(ref))
        bervs.append(berv)
        refs.append(ref)
        zs.append(z)
    level = nzm.saturation_level(refs[0].model)
    return Batch(setup, dates, bervs, refs, zs, np.array(eff), float(np.sqrt(np.mean(np.square(bounds)))),
                 trans, hot, level, seed)


def write_batch(batch: Batch, tmp: Path, nz: nzm.Nuisances) -> list[str]:
    """Write the batch's exposures with the nuisances ``nz`` (none: the clean set); their paths."""
    tmp = Path(tmp)
    paths = []
    for i, (date, ref, z) in enumerate(zip(batch.dates, batch.refs, batch.z, strict=True)):
        rng = np.random.default_rng([batch.seed, 99, i])   # the nuisances' own draws
        ex = nzm.expose(ref.model, batch.trans, z, rng, batch.setup.read_noise, nz, batch.hot, batch.level)
        p = str(tmp / f"s{i:03d}.fits")
        nzm.write_exposure(p, batch.setup, ex.damaged, date, ex.saturate)
        paths.append(p)
    return paths


def measure_batch(batch: Batch, tmp: Path, nz: nzm.Nuisances, methods=("mask", "template"), *,
                  settings: dict | None = None) -> dict:
    """Write the batch's exposures with the nuisances ``nz`` (none: the clean set) and measure them.

    Returns {method: Result}.
    """
    paths = write_batch(batch, tmp, nz)
    w, d = true_mask()
    if nz.mask:
        mm = nzm.mismatch_mask(w, d, batch.seed)
        mask = LineMask(mm.wave, mm.weight, (), "mismatched line list")
    else:
        mask = LineMask(w, d, (), "forward-model line list")
    out = {}
    for m in methods:
        rows = measure_files(paths, mask, MeasureSettings(method=m, **(settings or {})))
        bad = [r for r in rows if r["status"] != "ok"]
        if bad:
            raise AssertionError(f"{m}: {bad[0]['status']}: {bad[0].get('notes')}")
        out[m] = Result(np.array([r["rv"] for r in rows]), np.array([r["rv_err"] for r in rows]),
                        np.array([r.get("n_rejected_pixels") or 0 for r in rows]), batch.eff, batch.bound)
    return out


def ratio_tolerance(r: float, n: int) -> float:
    """Two standard errors of a scatter ratio r from n draws (error of a variance: common practice)."""
    return 2 * (r**2 - 1) / (2 * r) * np.sqrt(2 / (n - 1))


def paired_pull_tolerance(r: float, n: int) -> float:
    """Issue band 0.05 plus 2.5 standard errors of the paired pull: the relative error
    1/sqrt(2 (n - 1)) of var(rv - rv_eff) moves it by (r^2 - 1) / 2 of that (common practice)."""
    return 0.05 + 2.5 * (r**2 - 1) / 2 * np.sqrt(2 / (n - 1))


def pull_tolerance(n: int) -> float:
    """2.5 standard errors of a standard deviation from n draws, 1/sqrt(2 (n - 1)) (common practice)."""
    return 2.5 / np.sqrt(2 * (n - 1))
