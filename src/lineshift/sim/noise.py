"""Photon and read noise, and the photon-noise bound of a noise-free model (Bouchy, Pepe & Queloz 2001,
eq. 6-8; Connes 1985): ``sigma_RV = 1 / sqrt(sum_i (dA_i/dv)^2 / (A_i + sigma_D^2))``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["photon_noise_bound"]


def _peak_counts(snr: float, read_noise: float) -> float:
    s2 = snr * snr
    return 0.5 * (s2 + np.sqrt(s2 * s2 + 4 * s2 * read_noise**2))


def photon_noise_bound(counts: np.ndarray, dcounts_dv: np.ndarray, read_noise: float = 0.0) -> float:
    """Photon-noise limit on the velocity (m/s) from a noise-free model (Bouchy, Pepe & Queloz 2001).

    ``sigma_RV = 1 / sqrt(sum_i (dA_i/dv)^2 / (A_i + sigma_D^2))`` with ``A`` in electrons per pixel
    and ``dA/dv`` per m/s.  Since ``lambda dA/dlambda = c dA/dv`` for a Doppler shift this is their
    ``c / sqrt(sum W_i)`` with ``W_i = lambda_i^2 (dA/dlambda)_i^2 / (A_i + sigma_D^2)`` (eq. 6-8).
    """
    A = np.asarray(counts, dtype=float)
    dA = np.asarray(dcounts_dv, dtype=float)
    return float(1.0 / np.sqrt(np.sum(dA * dA / (A + read_noise**2))))
