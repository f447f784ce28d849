"""Shared fixtures: no network, and small simulated data sets made by the project's own simulator."""

from __future__ import annotations

import os
import socket
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))  # for the injection helper

from lineshift import sim

_LOCAL = ("127.0.0.1", "localhost", "::1")


@pytest.fixture(scope="session", autouse=True)
def _astropy_offline():
    """The tests' own astropy calls run offline too (lineshift no longer changes this on import)."""
    from lineshift._offline import offline

    with offline():
        yield


@pytest.fixture(autouse=True)
def _no_network(monkeypatch):
    """Any connection to a non-loopback address fails the test (astropy must run offline)."""
    real = socket.socket.connect

    def guard(self, address):
        host = address[0] if isinstance(address, tuple) else address
        if self.family == socket.AF_UNIX or host in _LOCAL:
            return real(self, address)
        raise AssertionError(f"network access attempted: {address!r}")

    monkeypatch.setattr(socket.socket, "connect", guard)


SMALL = {
    "multi-order": sim.Instrument("t-echelle", "multi-order", 110_000, 4, 1024, 5000.0, snr=120),
    "wcs-1d": sim.Instrument("t-1d", "wcs-1d", 65_000, 1, 4000, 5200.0, sampling=3.0, snr=150,
                             medium="air", blaze=False),
    "table": sim.Instrument("t-table", "table", 75_000, 1, 4000, 5200.0, sampling=3.0, snr=150, blaze=False),
    "text": sim.Instrument("t-text", "text", 65_000, 1, 3000, 5500.0, sampling=3.0, snr=150, blaze=False,
                           dispersion="linear"),
}


@pytest.fixture(scope="session")
def sample_set(tmp_path_factory):
    """Two spectra in each layout, plus the star's mask; returns (directory, mask path, truth rows)."""
    out = tmp_path_factory.mktemp("sample")
    plan = [(SMALL[k], 2) for k in ("multi-order", "wcs-1d", "table", "text")]
    rows = sim.simulate_set(str(out), plan, seed=11)
    mask = str(out / "truth" / "mask.csv")
    sim.write_mask(sim.DEMO_STAR, mask)
    return str(out), mask, rows


@pytest.fixture
def drawn(monkeypatch):
    """Every matplotlib figure saved during the test, as (figure, path), for checks of what it shows."""
    from matplotlib.figure import Figure

    saved = []
    original = Figure.savefig

    def record(self, fname, *args, **kwargs):
        out = original(self, fname, *args, **kwargs)
        path = str(fname)
        base = os.path.basename(path)
        if base.startswith(".") and base.endswith(".tmp"):  # an atomic write: ".NAME.XXXX.tmp" becomes NAME
            path = os.path.join(os.path.dirname(path), base[1:].rsplit(".", 2)[0])
        saved.append((self, path))
        return out

    monkeypatch.setattr(Figure, "savefig", record)
    return saved
