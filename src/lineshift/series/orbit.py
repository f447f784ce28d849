"""Keplerian radial-velocity curves.

``v(t) = gamma + K [cos(nu + omega) + e cos(omega)]`` with the true anomaly ``nu`` from Kepler's
equation ``M = E - e sin E`` (e.g. Perryman 2011, *The Exoplanet Handbook*, sect. 2.2); omega is the
argument of periastron of the star's orbit.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Orbit", "eccentric_anomaly", "jupiter_masses", "mass_function", "minimum_mass", "radial_velocity",
           "semi_amplitude", "semi_major_axis", "true_anomaly"]


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


# --------------------------------------------------------------------------- two-body relations

def _constants():
    from astropy import constants as const

    return (const.G.si.value, const.M_sun.si.value, const.M_jup.si.value, const.au.si.value)


def semi_amplitude(period_days: float, m_companion: float, m_star: float, e: float = 0.0,
                   sin_i: float = 1.0) -> float:
    """Stellar semi-amplitude K (m/s) from the two-body problem (masses in solar masses).

    ``K = (2 pi G / P)^(1/3) m sin i / (M + m)^(2/3) / sqrt(1 - e^2)`` (e.g. Perryman 2011, eq. 2.27).
    """
    G, msun, _, _ = _constants()
    P = period_days * 86400.0
    m, M = m_companion * msun, m_star * msun
    return float((2 * np.pi * G / P) ** (1 / 3) * m * sin_i / (M + m) ** (2 / 3) / np.sqrt(1 - e * e))


def mass_function(period_days: float, K: float, e: float) -> float:
    """Mass function ``f(m) = (m sin i)^3 / (M + m)^2 = P K^3 (1 - e^2)^(3/2) / (2 pi G)``, solar masses."""
    G, msun, _, _ = _constants()
    return float(period_days * 86400.0 * K**3 * (1 - e * e) ** 1.5 / (2 * np.pi * G) / msun)


def minimum_mass(period_days: float, K: float, e: float, m_star: float) -> float:
    """m sin i (solar masses) solving ``x^3 / (M + x)^2 = f(m)`` exactly (no ``m << M`` assumption).

    The left side increases monotonically with x, so the root is unique.  (sin i = 1 inside the
    total mass: this is the usual *minimum* mass; the true mass is larger for inclined orbits.)
    """
    from scipy.optimize import brentq

    f = mass_function(period_days, K, e)
    if f <= 0:
        return 0.0
    hi = max(1.0, 10 * m_star)
    while hi**3 / (m_star + hi) ** 2 < f:
        hi *= 10
    return float(brentq(lambda x: x**3 / (m_star + x) ** 2 - f, 0.0, hi, xtol=1e-15, rtol=1e-13))


def semi_major_axis(period_days: float, m_total: float) -> float:
    """Relative semi-major axis (au) from Kepler's third law, ``a^3 = G (M + m) P^2 / (4 pi^2)``."""
    G, msun, _, au = _constants()
    P = period_days * 86400.0
    return float((G * m_total * msun * P * P / (4 * np.pi**2)) ** (1 / 3) / au)


def jupiter_masses(m_solar: float) -> float:
    """Solar masses to Jupiter masses (astropy constants)."""
    _, msun, mjup, _ = _constants()
    return float(m_solar * msun / mjup)
