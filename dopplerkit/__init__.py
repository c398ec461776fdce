"""dopplerkit: relativistic kinematics of jets and outflows from their spectra.

The kinematics core is imported eagerly (it needs only numpy and astropy.units);
the other modules load on first use, so ``import dopplerkit`` stays cheap::

    import dopplerkit as dk
    dk.doppler_factor(0.24, 57)          # bare numbers are degrees; 57 * u.deg is the same
    dk.spectra.boost_spectrum(...)      # loads specutils on first access
"""

from __future__ import annotations

import importlib

from ._version import __version__
from .exceptions import (
    DegenerateGeometryWarning,
    DopplerkitWarning,
    FitAtBoundWarning,
    FitQualityWarning,
    MediumWarning,
    NearLightSpeedWarning,
    ReferenceFrameWarning,
    UnresolvedLineWarning,
    WeakLineWarning,
)
from .kinematics import (
    aberrate,
    apparent_speed,
    apparent_speed_from_proper_motion,
    apparent_speed_limits,
    beaming_factor,
    beta_cos_theta_from_ratio,
    beta_from_redshift,
    boost_exponent,
    compose_redshift,
    counterjet_limit,
    deaberrate,
    doppler_factor,
    intrinsic_opening_angle,
    jet_counterjet_ratio,
    lorentz_factor,
    proper_motions,
    redshift,
    redshift_locus,
    solve_apparent_and_doppler,
    solve_jet_pair,
    solve_proper_motions,
    variability_brightness_temperature,
    variability_doppler_factor,
    velocity_readings,
)

_SUBMODULES = {
    "kinematics",
    "lines",
    "spectra",
    "models",
    "measure",
    "fitting",
    "batch",
    "io",
    "plotting",
    "widgets",
    "cli",
    "demo",
}

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
    "__version__",
    "aberrate",
    "apparent_speed",
    "apparent_speed_from_proper_motion",
    "apparent_speed_limits",
    "beaming_factor",
    "beta_cos_theta_from_ratio",
    "beta_from_redshift",
    "boost_exponent",
    "compose_redshift",
    "counterjet_limit",
    "deaberrate",
    "doppler_factor",
    "intrinsic_opening_angle",
    "jet_counterjet_ratio",
    "lorentz_factor",
    "proper_motions",
    "redshift",
    "redshift_locus",
    "solve_apparent_and_doppler",
    "solve_jet_pair",
    "solve_proper_motions",
    "variability_brightness_temperature",
    "variability_doppler_factor",
    "velocity_readings",
]


def __getattr__(name: str):
    if name in _SUBMODULES:
        return importlib.import_module(f"{__name__}.{name}")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(__all__) | _SUBMODULES)
