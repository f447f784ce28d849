"""Keplerian radial-velocity curves.

``v(t) = gamma + K [cos(nu + omega) + e cos(omega)]`` with the true anomaly ``nu`` from Kepler's
equation ``M = E - e sin E`` (e.g. Perryman 2011, *The Exoplanet Handbook*, sect. 2.2); omega is the
argument of periastron of the star's orbit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Orbit", "eccentric_anomaly", "radial_velocity", "true_anomaly"]


@dataclass(frozen=True)
class Orbit:
    """A Keplerian orbit of the star (velocities in m/s, times in days).

    Attributes
    ----------
    period : float, days
    semi_amplitude : float, m/s
    eccentricity : float
    omega : float, radians (argument of periastron of the star)
    time_periastron : float, days (same time system as the epochs, e.g. BJD_TDB)
    """

    period: float
    semi_amplitude: float
    eccentricity: float
    omega: float
    time_periastron: float


def eccentric_anomaly(mean_anomaly, e: float, *, tol: float = 1e-13) -> np.ndarray:
    """Solve Kepler's equation ``M = E - e sin E`` by Newton iteration (vectorised)."""
    M = np.mod(np.asarray(mean_anomaly, dtype=float), 2 * np.pi)
    E = np.where(e < 0.8, M, np.pi)
    for _ in range(50):
        dE = (E - e * np.sin(E) - M) / (1 - e * np.cos(E))
        E = E - dE
        if np.all(np.abs(dE) < tol):
            break
    return E


def true_anomaly(t, orbit: Orbit) -> np.ndarray:
    """True anomaly at times ``t`` (days)."""
    M = 2 * np.pi * (np.asarray(t, dtype=float) - orbit.time_periastron) / orbit.period
    E = eccentric_anomaly(M, orbit.eccentricity)
    e = orbit.eccentricity
    return 2 * np.arctan2(np.sqrt(1 + e) * np.sin(E / 2), np.sqrt(1 - e) * np.cos(E / 2))


def radial_velocity(t, orbit: Orbit, gamma: float = 0.0) -> np.ndarray:
    """Star's radial velocity (m/s) at times ``t`` (days)."""
    nu = true_anomaly(t, orbit)
    e, w = orbit.eccentricity, orbit.omega
    return gamma + orbit.semi_amplitude * (np.cos(nu + w) + e * np.cos(w))
