"""Every error and warning lineshift raises, in one place.

Errors subclass the matching builtin so callers can catch them generically; each carries the file
(when there is one) and a one-line, human-readable reason.  The command line prints
``str(error)`` and never a traceback (unless ``--debug``).
"""

from __future__ import annotations

from astropy.utils.exceptions import AstropyUserWarning

__all__ = [
    "ConfigError",
    "DegradedAccuracyWarning",
    "IERSPredictionWarning",
    "LineshiftError",
    "LineshiftWarning",
    "MaskError",
    "MeasurementError",
    "MetadataError",
    "SpectrumFormatError",
]


class LineshiftError(Exception):
    """Base class: an input could not be used.

    Parameters
    ----------
    reason : str
        One line saying what is wrong and, where possible, how to fix it.
    path : str, optional
        The input the reason refers to.
    status : str, optional
        Short machine-readable reason for the output table's ``status`` column.
    """

    default_status = "error"

    def __init__(self, reason: str, *, path: str | None = None, status: str | None = None):
        super().__init__(reason)
        self.reason = reason
        self.path = path
        self.status = status or self.default_status

    def __str__(self) -> str:
        return f"{self.path}: {self.reason}" if self.path else self.reason


class SpectrumFormatError(LineshiftError, ValueError):
    """The file is not a spectrum we can read (not FITS, truncated, bad WCS, bad arrays)."""

    default_status = "unreadable"


class MetadataError(LineshiftError, ValueError):
    """Observation metadata needed for the barycentric step is missing or malformed."""

    default_status = "missing metadata"


class MeasurementError(LineshiftError, RuntimeError):
    """The spectrum was read but no velocity could be measured from it."""

    default_status = "no velocity"


class MaskError(LineshiftError, ValueError):
    """A line mask or line list could not be read (a usage error: exit code 2)."""

    default_status = "bad mask"


class ConfigError(LineshiftError, ValueError):
    """A configuration file or command-line value is invalid (a usage error: exit code 2)."""

    default_status = "bad config"


class LineshiftWarning(AstropyUserWarning):
    """Base class for lineshift warnings.

    Silence them with ``warnings.filterwarnings("ignore", category=LineshiftWarning)``.
    """


class DegradedAccuracyWarning(LineshiftWarning):
    """A result was computed but with reduced accuracy (e.g. IERS table extrapolated)."""


class IERSPredictionWarning(LineshiftWarning):
    """Earth orientation came from IERS predictions rather than measurements (negligible effect)."""
