"""Warnings raised by dopplerkit.

Every warning dopplerkit emits is a subclass of :class:`DopplerkitWarning`, so a
user can silence, record or escalate the whole family with one filter.
"""

from __future__ import annotations

__all__ = [
    "DegenerateGeometryWarning",
    "DopplerkitWarning",
    "FitAtBoundWarning",
    "FitQualityWarning",
    "MediumWarning",
    "NearLightSpeedWarning",
    "ReferenceFrameWarning",
    "UnresolvedLineWarning",
    "WeakLineWarning",
]


class DopplerkitWarning(UserWarning):
    """Base class of every dopplerkit warning."""


class NearLightSpeedWarning(DopplerkitWarning):
    """A speed given as a float beta is so close to 1 that it is not exact; pass gamma=."""


class DegenerateGeometryWarning(DopplerkitWarning):
    """The data do not determine a quantity (e.g. the viewing angle of a source at rest)."""


class UnresolvedLineWarning(DopplerkitWarning):
    """A fitted line is narrower than the instrumental resolution or the pixel size."""


class FitAtBoundWarning(DopplerkitWarning):
    """A fitted parameter sits at (or within rounding of) a bound of its allowed range."""


class MediumWarning(DopplerkitWarning):
    """An air/vacuum assumption was made because the data did not say."""


class WeakLineWarning(DopplerkitWarning):
    """A fitted component is not needed by the data, is blended with another, or its identification is contradicted."""


class ReferenceFrameWarning(DopplerkitWarning):
    """The spectral axis moves with the observer (topocentric, geocentric): Earth's motion is in the redshifts."""


class FitQualityWarning(DopplerkitWarning):
    """A fit's chi-square probability is too low, or its uncertainties are not finite: its errors are not trustworthy."""
