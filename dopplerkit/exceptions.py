"""Warnings raised by dopplerkit.

Every warning dopplerkit emits is a subclass of :class:`DopplerkitWarning`, so a
user can silence, record or escalate the whole family with one filter.
"""

from __future__ import annotations

__all__ = [
    "DegenerateGeometryWarning",
    "DopplerkitWarning",
    "FitAtBoundWarning",
    "MediumWarning",
    "NearLightSpeedWarning",
    "UnresolvedLineWarning",
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
    """A fitted line component has S/N < 3: it may not be there (or is blended with another)."""
