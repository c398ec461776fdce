"""Exact special-relativistic kinematics of moving emitters.

Pure formulas on floats and arrays. Quantities are accepted at the edge and
stripped once; the arithmetic inside runs on plain numpy arrays.

Conventions (used by every function here and in the rest of dopplerkit)
-----------------------------------------------------------------------
* ``beta = v/c`` is a speed in [0, 1). Direction is carried by an angle, never by
  the sign of ``beta``. Every function taking ``beta`` also takes ``gamma=``
  (the Lorentz factor) instead, which stays exact for speeds extremely close to c.
* ``theta`` is the viewing angle in the OBSERVER frame: the angle between the
  source velocity and the direction from the source to the observer.
  ``theta = 0``: moving straight at us (blueshift); 90 deg: transverse; 180 deg:
  straight away. ``theta_source`` is the same angle in the comoving frame.
* ``z = lambda_obs/lambda_emit - 1``; ``z < 0`` is a blueshift.
  ``delta = nu_obs/nu_emit = 1/(1 + z)``.
* Radial velocities are positive when receding.
* Spectral index ``alpha`` with ``S_nu`` proportional to ``nu**-alpha``.
* Angles accept astropy Quantities in any angle unit; a bare number means DEGREES
  (as on the command line and in every output); radians only as ``u.rad``. Viewing
  angles outside [0, 180] deg are refused. Returned angles are Quantities in degrees;
  speeds and redshifts are plain floats or arrays.
* NaN inputs propagate to NaN outputs without an error (so masked array elements
  stay masked); every other invalid value (booleans, text, infinities, values out of
  range, wrong units) raises TypeError, ValueError or UnitsError naming the parameter.

The product ``1 - beta cos theta`` is evaluated as
``(1 - beta) + 2 beta sin**2(theta/2)`` with ``1 - beta = 1/(Gamma**2 (1 + beta))``
when the speed comes as ``gamma``, which keeps full precision as beta -> 1 and
theta -> 0.
"""

from __future__ import annotations

import warnings
from typing import Literal

import astropy.units as u
import numpy as np
from numpy.typing import ArrayLike

from .exceptions import DegenerateGeometryWarning, NearLightSpeedWarning

__all__ = [
    "GEOMETRIES",
    "SPEED_OF_LIGHT_KMS",
    "T_EQUIPARTITION",
    "T_INVERSE_COMPTON",
    "aberrate",
    "apparent_speed",
    "apparent_speed_from_proper_motion",
    "apparent_speed_limits",
    "beaming_factor",
    "beta_cos_theta_from_ratio",
    "beta_from_redshift",
    "beta_from_redshift_error",
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

#: Speed of light in km/s (exact, SI definition).
SPEED_OF_LIGHT_KMS = 299792.458

#: Beaming geometries: name -> (exponent offset added to alpha, description).
GEOMETRIES = {
    "blob": (3.0, "discrete blob, S_obs = delta**(3 + alpha) S_emit"),
    "jet": (2.0, "continuous jet, S_obs = delta**(2 + alpha) S_emit"),
}

Geometry = Literal["blob", "jet"]


# ---------------------------------------------------------------------------
# Input handling (private, shared by the other modules of the package)
# ---------------------------------------------------------------------------
def _out(x):
    """Return a Python float for 0-d results, an ndarray otherwise."""
    x = np.asarray(x)
    return float(x) if x.ndim == 0 else x


def _deg(x) -> u.Quantity:
    """Radians (array) -> Quantity in degrees, 0-d kept as scalar Quantity."""
    return u.Quantity(np.degrees(x), u.deg)


def _describe(value) -> str:
    arr = np.asarray(getattr(value, "value", value))
    if arr.ndim == 0:
        return repr(arr.item())
    return f"array of shape {arr.shape}"


def _first_bad(arr: np.ndarray, bad: np.ndarray) -> str:
    if arr.ndim == 0:
        return repr(float(arr))
    idx = np.unravel_index(np.flatnonzero(bad)[0], arr.shape)
    idx = idx[0] if len(idx) == 1 else idx
    return f"{float(arr[idx])!r} at index {idx}"


def _to_float_array(value, name: str) -> np.ndarray:
    """Float array from a number or array; booleans, text and infinities are refused (NaN passes)."""
    if isinstance(value, (str, bytes, bool, np.bool_)) or value is None:
        raise TypeError(f"{name} must be a number or array of numbers, got {type(value).__name__} {value!r}")
    raw = np.asarray(getattr(value, "value", value))
    if raw.dtype.kind == "b":
        raise TypeError(f"{name} must be a number or array of numbers, got booleans ({_describe(value)})")
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"{name} must be a number or array of numbers, got {type(value).__name__}") from exc
    inf = np.isinf(arr)
    if inf.any():
        raise ValueError(f"{name} must be finite (NaN passes through as a missing value), got {_first_bad(arr, inf)}")
    return arr


def _angle(value, name: str = "theta", *, lo: float = 0.0, hi: float = 180.0) -> np.ndarray:
    """Angle in radians as a float array, checked against [lo, hi] degrees.

    Quantities of any angle unit are converted; a bare number (float, int, array) means
    DEGREES, as on the command line and in every output. Radians only as ``u.rad``.
    NaN passes through (documented per function); any other value outside [lo, hi] deg
    raises ValueError naming the parameter.
    """
    if isinstance(value, u.Quantity):
        try:
            deg = np.asarray(value.to_value(u.deg), dtype=float)
        except u.UnitConversionError as exc:
            raise u.UnitsError(f"{name} must be an angle (e.g. deg or rad), got unit {value.unit!r} ({_describe(value)})") from exc
    else:
        deg = _to_float_array(value, name)
    # a rounding hair outside the range (e.g. pi rad -> 180.00000000000003 deg) is clipped, not refused
    tol = 1e-9
    bad = (deg < lo - tol) | (deg > hi + tol) | np.isinf(deg)
    if bad.any():
        raise ValueError(
            f"{name} must be an angle in [{lo:g}, {hi:g}] deg (bare numbers are degrees; radians as u.rad), got {_first_bad(deg, bad)} deg"
        )
    with np.errstate(invalid="ignore"):
        deg = np.clip(deg, lo, hi)
    return np.radians(deg)


def _dimensionless(value, name: str) -> np.ndarray:
    if isinstance(value, u.Quantity):
        try:
            return _to_float_array(value.to_value(u.dimensionless_unscaled), name)
        except u.UnitConversionError as exc:
            raise u.UnitsError(f"{name} must be dimensionless, got unit {value.unit!r} ({_describe(value)})") from exc
    return _to_float_array(value, name)


def _speed(beta=None, gamma=None, *, name: str = "beta"):
    """Return (beta, gamma, one_minus_beta) float arrays from exactly one of beta / gamma.

    ``beta`` may be a float, an array, a dimensionless Quantity or a velocity Quantity
    (divided by c). Values outside [0, 1) raise ValueError; ``gamma`` < 1 raises.
    NaN passes through.
    """
    if (beta is None) == (gamma is None):
        raise TypeError(f"give the speed as exactly one of {name}= or gamma=, got {name}={beta!r}, gamma={gamma!r}")
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        if gamma is None:
            if isinstance(beta, u.Quantity) and beta.unit.physical_type == "speed":
                b = np.asarray(beta.to_value(u.km / u.s), dtype=float) / SPEED_OF_LIGHT_KMS
            elif isinstance(beta, u.Quantity) and beta.unit.physical_type != "dimensionless":
                raise u.UnitsError(f"{name} must be dimensionless (v/c) or a speed, got unit {beta.unit!r} ({_describe(beta)})")
            else:
                b = _dimensionless(beta, name)
            bad = (b < 0) | (b >= 1)
            if bad.any():
                raise ValueError(
                    f"{name} must satisfy 0 <= {name} < 1, got {_first_bad(b, bad)}; for speeds very close to c pass gamma= instead"
                )
            omb = 1.0 - b
            opb = 1.0 + b
            if (omb < 1e-10).any():
                warnings.warn(
                    f"{name} is within 1e-10 of 1: a float {name} carries only ~{-np.log10(np.min(omb) / 2.2e-16):.0f} "
                    "significant digits of 1 - beta; pass the speed as gamma= for exact results",
                    NearLightSpeedWarning,
                    stacklevel=3,
                )
            g = 1.0 / np.sqrt(omb * opb)
        else:
            g = _dimensionless(gamma, "gamma")
            bad = (g < 1) | np.isinf(g)
            if bad.any():
                raise ValueError(f"gamma must satisfy 1 <= gamma < inf, got {_first_bad(g, bad)}")
            gb = np.sqrt((g - 1.0) * (g + 1.0))  # Gamma * beta, exact near 1 and for large Gamma
            b = gb / g
            omb = 1.0 / (g * g * (1.0 + b))
    return b, g, omb


def _one_minus_beta_cos(b, omb, th):
    """1 - beta cos(theta), cancellation-free: (1 - beta) + 2 beta sin^2(theta/2)."""
    s = np.sin(0.5 * th)
    return omb + 2.0 * b * s * s


def _geometry_exponent(alpha, geometry, name: str = "geometry") -> np.ndarray:
    if geometry not in GEOMETRIES:
        allowed = ", ".join(f"{k!r} ({v[1]})" for k, v in GEOMETRIES.items())
        raise ValueError(f"{name} must be one of {allowed}; got {geometry!r}")
    return GEOMETRIES[geometry][0] + _dimensionless(alpha, "alpha")


# ---------------------------------------------------------------------------
# Forward kinematics
# ---------------------------------------------------------------------------
def lorentz_factor(beta: ArrayLike | u.Quantity | None = None, *, gamma: ArrayLike | None = None):
    """Lorentz factor Gamma of a speed.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1) (dimensionless), or a velocity Quantity (divided by c).
    gamma : float or array, optional
        The Lorentz factor itself, instead of ``beta`` (returned unchanged after checks).

    Returns
    -------
    float or ndarray
        Gamma = 1/sqrt((1 - beta)(1 + beta)), dimensionless, >= 1.

    Notes
    -----
    The product form avoids the cancellation in ``1 - beta**2`` (Rybicki & Lightman 1979, sec. 4.1).

    Examples
    --------
    >>> round(lorentz_factor(0.6), 12)
    1.25
    """
    return _out(_speed(beta, gamma)[1])


def doppler_factor(beta=None, theta=0.0, *, gamma=None):
    """Doppler factor delta = nu_obs/nu_emit of a moving emitter.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1), or a velocity Quantity. Alternatively give ``gamma=``.
    theta : float, array or Quantity
        Viewing angle in the observer frame between the velocity and the direction from
        the source to the observer; 0 = moving straight at us, 180 deg = straight away.
        Bare numbers are degrees.
    gamma : float or array, optional
        Lorentz factor instead of ``beta`` (exact for speeds extremely close to c).

    Returns
    -------
    float or ndarray
        delta = 1/(Gamma (1 - beta cos theta)), dimensionless. delta > 1 boosts.

    Notes
    -----
    Evaluated as ``1/(Gamma ((1 - beta) + 2 beta sin**2(theta/2)))``, which has no
    cancellation for beta -> 1, theta -> 0 (Rybicki & Lightman 1979, sec. 4.1;
    Urry & Padovani 1995, PASP 107, 803, app. A). NaN propagates.

    Examples
    --------
    >>> round(doppler_factor(0.6, 0.0), 12)
    2.0
    """
    b, g, omb = _speed(beta, gamma)
    th = _angle(theta, "theta")
    with np.errstate(invalid="ignore"):
        return _out(1.0 / (g * _one_minus_beta_cos(b, omb, th)))


def redshift(beta=None, theta=0.0, *, gamma=None):
    """Kinematic redshift z = lambda_obs/lambda_emit - 1 of a moving emitter.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.
    theta : float, array or Quantity
        Observer-frame viewing angle; 0 = straight at us (blueshift), 90 deg = transverse
        (redshift Gamma - 1), 180 deg = straight away. Bare numbers are degrees.
    gamma : float or array, optional
        Lorentz factor instead of ``beta``.

    Returns
    -------
    float or ndarray
        z = Gamma (1 - beta cos theta) - 1 (negative = blueshift), dimensionless.

    Notes
    -----
    Evaluated as ``z = Gamma beta B`` with the bracket B chosen to avoid cancellation:
    ``B = Gamma beta/(Gamma + 1) - cos theta`` for cos theta <= 1/2, and
    ``B = 2 sin^2(theta/2) - (1 + 1/(Gamma (1 + beta)))/(Gamma + 1)`` for cos theta > 1/2
    (both equal Gamma (1 - beta cos theta) - 1 divided by Gamma beta). Small z keeps its
    relative precision and large Gamma near theta = 0 loses nothing; only the inherent
    loss near the zero crossing remains.
    """
    b, g, _ = _speed(beta, gamma)
    th = _angle(theta, "theta")
    with np.errstate(invalid="ignore", divide="ignore"):
        gb = g * b
        c = np.cos(th)
        s = np.sin(0.5 * th)
        near = 2.0 * s * s - (1.0 + 1.0 / (g + gb)) / (g + 1.0)
        far = gb / (g + 1.0) - c
        z = gb * np.where(c > 0.5, near, far)
    return _out(z)


def beta_from_redshift(z: ArrayLike):
    """Relativistic radial (line-of-sight) speed for a redshift, positive receding.

    Parameters
    ----------
    z : float or array
        Redshift (> -1), dimensionless.

    Returns
    -------
    float or ndarray
        beta_r = ((1+z)**2 - 1)/((1+z)**2 + 1) in (-1, 1); positive = receding.

    Notes
    -----
    This is astropy's relativistic Doppler convention (``u.doppler_relativistic``,
    ``doppler_redshift``): the speed of a source moving purely along the line of sight
    (theta = 0 or 180 deg). Written as z (2 + z)/((1 + z)**2 + 1) to keep small z exact.
    """
    zz = _dimensionless(z, "z")
    bad = zz <= -1
    if bad.any():
        raise ValueError(f"z must be > -1, got {_first_bad(zz, bad)}")
    with np.errstate(invalid="ignore"):
        w = 1.0 + zz
        return _out(zz * (2.0 + zz) / (w * w + 1.0))


def beta_from_redshift_error(z: ArrayLike, z_err: ArrayLike):
    """1-sigma error of :func:`beta_from_redshift` for a redshift error (first-order propagation).

    Parameters
    ----------
    z : float or array
        Redshift (> -1).
    z_err : float or array
        Its 1-sigma error (>= 0), dimensionless.

    Returns
    -------
    float or ndarray
        abs(d beta/dz) z_err = 4 (1 + z)/((1 + z)**2 + 1)**2 z_err.
    """
    zz = _dimensionless(z, "z")
    e = _dimensionless(z_err, "z_err")
    if (zz <= -1).any():
        raise ValueError(f"z must be > -1, got {_first_bad(zz, zz <= -1)}")
    if (e < 0).any():
        raise ValueError(f"z_err must be >= 0, got {_first_bad(e, e < 0)}")
    w = 1.0 + zz
    return _out(4.0 * w / (w * w + 1.0) ** 2 * e)


def aberrate(theta_source, beta=None, *, gamma=None) -> u.Quantity:
    """Observer-frame angle of a direction given in the source (comoving) frame.

    Parameters
    ----------
    theta_source : float, array or Quantity
        Angle in the comoving frame between the velocity and the photon direction
        towards the observer; 0 = forward. Bare numbers are degrees.
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.

    Returns
    -------
    Quantity (deg)
        Observer-frame angle theta, from tan(theta/2) = sqrt((1-beta)/(1+beta)) tan(theta'/2)
        (Rybicki & Lightman 1979, sec. 4.1). Forward-concentrated for beta > 0.
    """
    b, g, _ = _speed(beta, gamma)
    th = _angle(theta_source, "theta_source")
    k = 1.0 / (g * (1.0 + b))  # sqrt((1 - beta)/(1 + beta)), exact near c
    with np.errstate(invalid="ignore"):
        out = 2.0 * np.arctan2(k * np.sin(0.5 * th), np.cos(0.5 * th))
    return _deg(out)


def deaberrate(theta_observer, beta=None, *, gamma=None) -> u.Quantity:
    """Source-frame angle of a direction given in the observer frame (inverse of :func:`aberrate`).

    Parameters
    ----------
    theta_observer : float, array or Quantity
        Observer-frame viewing angle (0 = straight at us). Bare numbers are degrees.
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.

    Returns
    -------
    Quantity (deg)
        theta' from tan(theta'/2) = sqrt((1+beta)/(1-beta)) tan(theta/2).
    """
    b, g, _ = _speed(beta, gamma)
    th = _angle(theta_observer, "theta_observer")
    k = g * (1.0 + b)  # sqrt((1 + beta)/(1 - beta))
    with np.errstate(invalid="ignore"):
        out = 2.0 * np.arctan2(k * np.sin(0.5 * th), np.cos(0.5 * th))
    return _deg(out)


def apparent_speed(beta=None, theta=0.0, *, gamma=None):
    """Apparent transverse speed on the sky, in units of c.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.
    theta : float, array or Quantity
        Observer-frame viewing angle (0 = straight at us). Bare numbers are degrees.

    Returns
    -------
    float or ndarray
        beta_app = beta sin theta/(1 - beta cos theta), dimensionless; its maximum over
        theta is Gamma beta at cos theta = beta (Rees 1966, Nature 211, 468).
    """
    b, _, omb = _speed(beta, gamma)
    th = _angle(theta, "theta")
    with np.errstate(invalid="ignore", divide="ignore"):
        return _out(b * np.sin(th) / _one_minus_beta_cos(b, omb, th))


def compose_redshift(*z: ArrayLike):
    """Compose redshifts multiplicatively: (1 + z_total) = prod (1 + z_i).

    Parameters
    ----------
    *z : float or array
        Redshifts to compose (e.g. the host's cosmological z and a kinematic z), each > -1.

    Returns
    -------
    float or ndarray
        z_total, evaluated as expm1(sum log1p(z_i)) to keep small totals exact.

    Notes
    -----
    Redshifts never add; a velocity measured against a host must be composed this way
    (common practice, no source; see e.g. Davis & Lineweaver 2004 for the cosmological factor).
    """
    if not z:
        raise TypeError("compose_redshift needs at least one redshift")
    total = 0.0
    for i, zi in enumerate(z):
        arr = _dimensionless(zi, f"z[{i}]")
        bad = arr <= -1
        if bad.any():
            raise ValueError(f"z[{i}] must be > -1, got {_first_bad(arr, bad)}")
        total = total + np.log1p(arr)
    return _out(np.expm1(total))


def boost_exponent(alpha: ArrayLike = 0.0, geometry: Geometry = "blob"):
    """Exponent p of delta in the flux boost: 3 + alpha (blob) or 2 + alpha (jet).

    Parameters
    ----------
    alpha : float or array
        Spectral index, S_nu proportional to nu**-alpha.
    geometry : {"blob", "jet"}
        Discrete blob or continuous (steady) jet (Lind & Blandford 1985, ApJ 295, 358).
    """
    return _out(_geometry_exponent(alpha, geometry))


def beaming_factor(beta=None, theta=0.0, alpha: ArrayLike = 0.0, geometry: Geometry = "blob", *, gamma=None):
    """Flux boost S_obs(nu)/S_emit(nu) = delta**p at fixed observed frequency.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.
    theta : float, array or Quantity
        Observer-frame viewing angle (0 = straight at us). Bare numbers are degrees.
    alpha : float or array
        Spectral index, S_nu proportional to nu**-alpha.
    geometry : {"blob", "jet"}
        "blob": p = 3 + alpha (discrete component); "jet": p = 2 + alpha (continuous jet).

    Returns
    -------
    float or ndarray
        delta**p, dimensionless (Lind & Blandford 1985; Urry & Padovani 1995, app. A).
    """
    p = _geometry_exponent(alpha, geometry)
    d = doppler_factor(beta, theta, gamma=gamma)
    return _out(np.power(d, p))


def jet_counterjet_ratio(beta=None, theta=0.0, alpha: ArrayLike = 0.0, geometry: Geometry = "blob", *, gamma=None):
    """Flux ratio of the approaching to the receding jet, R = ((1 + beta cos theta)/(1 - beta cos theta))**p.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c of both jets in [0, 1). Alternatively ``gamma=``.
    theta : float, array or Quantity
        Observer-frame viewing angle of the approaching jet (0 = straight at us).
    alpha : float or array
        Spectral index, S_nu proportional to nu**-alpha.
    geometry : {"blob", "jet"}
        p = 3 + alpha (blob) or 2 + alpha (continuous jet).

    Returns
    -------
    float or ndarray
        R >= 1 for theta < 90 deg (Lind & Blandford 1985; Miller-Jones, Blundell & Duffy 2004,
        ApJ 603, L21). Compare knots at equal separation, not equal time, when measuring R.
    """
    p = _geometry_exponent(alpha, geometry)
    b, _, omb = _speed(beta, gamma)
    th = _angle(theta, "theta")
    return _out(_counterjet_ratio(b, omb, th, p))


def _counterjet_ratio(b, omb, th, p):
    """Plain-array R = ((1 + beta cos)/(1 - beta cos))**p, cancellation-free (shared with the fits)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.power(_one_minus_beta_cos(b, omb, np.pi - th) / _one_minus_beta_cos(b, omb, th), p)


def _proper_motion_rates(b, omb, th, d_over_c):
    """Plain-array angular rates (rad/s) of the approaching and receding components; d_over_c in s."""
    with np.errstate(invalid="ignore", divide="ignore"):
        bsin = b * np.sin(th) / d_over_c
        return bsin / _one_minus_beta_cos(b, omb, th), bsin / _one_minus_beta_cos(b, omb, np.pi - th)


def proper_motions(beta=None, theta=0.0, distance: u.Quantity | None = None, *, gamma=None):
    """Proper motions of two oppositely ejected components of equal speed.

    Parameters
    ----------
    beta : float, array or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=``.
    theta : float, array or Quantity
        Observer-frame viewing angle of the approaching component (0 = straight at us).
    distance : Quantity (length)
        Distance to the source.

    Returns
    -------
    mu_approaching, mu_receding : Quantity (mas/d)
        mu = beta sin(theta) c/(D (1 -/+ beta cos theta)) (Mirabel & Rodriguez 1994, Nature 371, 46);
        the inverse is :func:`solve_proper_motions`.
    """
    if not isinstance(distance, u.Quantity):
        raise TypeError(f"distance must be an astropy Quantity with a unit of length, got {type(distance).__name__} {distance!r}")
    try:
        d = np.asarray(distance.to_value(u.km), dtype=float)
    except u.UnitConversionError as exc:
        raise u.UnitsError(f"distance must be a length (e.g. kpc), got unit {distance.unit!r}") from exc
    bad = ~(d > 0) & ~np.isnan(d)
    if bad.any():
        raise ValueError(f"distance must be > 0, got {_first_bad(d, bad)} km")
    b, _, omb = _speed(beta, gamma)
    th = _angle(theta, "theta")
    ma, mr = _proper_motion_rates(b, omb, th, d / SPEED_OF_LIGHT_KMS)
    rate = u.rad / u.s
    return (ma * rate).to(u.mas / u.d), (mr * rate).to(u.mas / u.d)


# ---------------------------------------------------------------------------
# Inverse problems
# ---------------------------------------------------------------------------
def solve_jet_pair(z_approaching, z_receding, *, on_unphysical: Literal["raise", "nan"] = "raise"):
    """Speed and viewing angle of two opposite jets of equal speed from their redshifts.

    Parameters
    ----------
    z_approaching, z_receding : float or array
        Redshifts of the approaching and the receding jet (dimensionless, > -1).
    on_unphysical : {"raise", "nan"}
        What to do with pairs that no equal-speed opposite jets can produce,
        (1 + z_a)(1 + z_r) < 1: raise ValueError (default) or return NaN for them.

    Returns
    -------
    beta : float or ndarray
        Speed v/c. Gamma = (2 + z_a + z_r)/2.
    theta : Quantity (deg)
        Observer-frame viewing angle of the approaching jet, 0 = straight at us; the
        receding jet is at 180 deg - theta. theta > 90 deg if z_a > z_r.

    Notes
    -----
    1 + z_a = Gamma (1 - beta cos theta), 1 + z_r = Gamma (1 + beta cos theta), so
    Gamma = (2 + z_a + z_r)/2 and beta cos theta = (z_r - z_a)/(2 + z_a + z_r)
    (follows from Rybicki & Lightman 1979, sec. 4.1; used by Margon 1984, ARA&A 22, 507).
    The mean redshift (z_a + z_r)/2 = Gamma - 1 is the transverse Doppler shift.
    When beta is 0 the angle is undetermined (NaN, with a DegenerateGeometryWarning).
    """
    if on_unphysical not in ("raise", "nan"):
        raise ValueError(f"on_unphysical must be 'raise' or 'nan', got {on_unphysical!r}")
    za = _dimensionless(z_approaching, "z_approaching")
    zr = _dimensionless(z_receding, "z_receding")
    za, zr = np.broadcast_arrays(za, zr)
    with np.errstate(invalid="ignore", divide="ignore"):
        prod = (1.0 + za) * (1.0 + zr)
        # (1+z_a)(1+z_r) - 1 computed without cancellation
        prod_m1 = za + zr + za * zr
        bad = (prod_m1 < 0) | (za <= -1) | (zr <= -1)
        # an exactly head-on pair has (1+z_a)(1+z_r) = 1; rounding of the inputs can push it a few ulp below
        tiny = (prod_m1 < 0) & (prod_m1 > -8 * np.finfo(float).eps * (1.0 + np.abs(za) + np.abs(zr)))
        bad = bad & ~tiny
        if bad.any() and on_unphysical == "raise":
            i = np.flatnonzero(bad.ravel())[0]
            where = "" if za.ndim == 0 else f" at index {np.unravel_index(i, za.shape)}"
            raise ValueError(
                "unphysical jet pair: equal-speed opposite jets need (1 + z_approaching)(1 + z_receding) >= 1, "
                f"got z_approaching={float(za.ravel()[i])!r}, z_receding={float(zr.ravel()[i])!r}, product {float(prod.ravel()[i]):.6g}{where}"
            )
        s = 2.0 + za + zr
        g = 0.5 * s
        gm1 = 0.5 * (za + zr)
        gb = np.sqrt(gm1 * (g + 1.0))  # Gamma*beta
        b = gb / g
        bcos = (zr - za) / s
        cos_t = np.clip(bcos / b, -1.0, 1.0)
        theta = np.arccos(cos_t)
        b = np.where(bad, np.nan, b)
        theta = np.where(bad | (b == 0), np.nan, theta)
    if np.any(b == 0):
        warnings.warn(
            "beta = 0 for a jet pair with z_a = z_r = 0: the viewing angle is undetermined (NaN)", DegenerateGeometryWarning, stacklevel=2
        )
    return _out(b), _deg(theta)


def solve_proper_motions(mu_approaching: u.Quantity, mu_receding: u.Quantity, distance: u.Quantity):
    """Speed and viewing angle from the proper motions of a two-sided ejection.

    Parameters
    ----------
    mu_approaching, mu_receding : Quantity (angle/time)
        Proper motions of the approaching and the receding component, any angular-rate
        unit (e.g. mas/d, mas/yr).
    distance : Quantity (length)
        Distance to the source, any length unit.

    Returns
    -------
    beta : float or ndarray
        Speed v/c of both components.
    theta : Quantity (deg)
        Observer-frame viewing angle of the approaching component (0 = straight at us).

    Raises
    ------
    ValueError
        If mu_receding > mu_approaching or the distance exceeds D_max = c/sqrt(mu_a mu_r),
        beyond which the components would move faster than light.

    Notes
    -----
    mu_{a,r} = beta sin(theta) c/(D (1 -/+ beta cos theta)); hence
    beta cos theta = (mu_a - mu_r)/(mu_a + mu_r) and tan theta = (2D/c) mu_a mu_r/(mu_a - mu_r)
    (Mirabel & Rodriguez 1994, Nature 371, 46; 1999, ARA&A 37, 409).
    """
    for name, q, ptype in (
        ("mu_approaching", mu_approaching, "angular speed"),
        ("mu_receding", mu_receding, "angular speed"),
        ("distance", distance, "length"),
    ):
        if not isinstance(q, u.Quantity):
            raise TypeError(f"{name} must be an astropy Quantity with a unit of {ptype}, got {type(q).__name__} {q!r}")
    try:
        ma = np.asarray(mu_approaching.to_value(u.rad / u.s), dtype=float)
        mr = np.asarray(mu_receding.to_value(u.rad / u.s), dtype=float)
    except u.UnitConversionError as exc:
        raise u.UnitsError(
            f"mu_approaching and mu_receding must be angular rates (e.g. mas/d), got {mu_approaching.unit!r} and {mu_receding.unit!r}"
        ) from exc
    try:
        d = np.asarray(distance.to_value(u.km), dtype=float)
    except u.UnitConversionError as exc:
        raise u.UnitsError(f"distance must be a length (e.g. kpc), got unit {distance.unit!r}") from exc
    ma, mr, d = np.broadcast_arrays(ma, mr, d)
    bad = (ma <= 0) | (mr <= 0) | (d <= 0)
    if bad.any():
        raise ValueError("mu_approaching, mu_receding and distance must be > 0")
    bad = mr > ma
    if bad.any():
        raise ValueError(f"mu_receding must not exceed mu_approaching, got mu_receding {_first_bad(mr, bad)} rad/s > mu_approaching")
    x = d / SPEED_OF_LIGHT_KMS  # D/c in s
    with np.errstate(invalid="ignore", divide="ignore"):
        bcos = (ma - mr) / (ma + mr)
        bsin = ma * x * (1.0 - bcos)
        b = np.hypot(bcos, bsin)
        theta = np.arctan2(2.0 * x * ma * mr, ma - mr)
    bad = b >= 1
    if bad.any():
        dmax = (SPEED_OF_LIGHT_KMS / np.sqrt(ma * mr)) * u.km
        i = np.flatnonzero(bad.ravel())[0]
        raise ValueError(
            f"distance {distance.ravel()[i] if distance.ndim else distance:.4g} exceeds the maximum distance "
            f"D_max = c/sqrt(mu_a mu_r) = {dmax.ravel()[i].to(u.kpc):.4g} for these proper motions (beta would be >= 1)"
        )
    return _out(b), _deg(theta)


def beta_cos_theta_from_ratio(ratio: ArrayLike, alpha: ArrayLike = 0.0, geometry: Geometry = "blob"):
    """beta cos(theta) from a jet/counter-jet flux ratio.

    Parameters
    ----------
    ratio : float or array
        Flux ratio R of the approaching to the receding jet (> 0), measured at equal
        distances from the core.
    alpha : float or array
        Spectral index, S_nu proportional to nu**-alpha.
    geometry : {"blob", "jet"}
        p = 3 + alpha (blob) or 2 + alpha (continuous jet).

    Returns
    -------
    float or ndarray
        beta cos theta = (R**(1/p) - 1)/(R**(1/p) + 1) = tanh(ln R/(2p)), in (-1, 1)
        (Lind & Blandford 1985; Miller-Jones, Blundell & Duffy 2004, ApJ 603, L21).
        Since beta < 1, the value is a lower limit on beta and a LOWER limit on cos theta
        (an upper limit on the viewing angle): theta <= arccos(beta cos theta).
    """
    p = _geometry_exponent(alpha, geometry)
    r = _dimensionless(ratio, "ratio")
    bad = r <= 0
    if bad.any():
        raise ValueError(f"ratio must be > 0, got {_first_bad(r, bad)}")
    return _out(np.tanh(np.log(r) / (2.0 * p)))


def redshift_locus(z: ArrayLike, theta=None, *, num: int = 721):
    """The (beta, theta) pairs that produce a measured redshift: a curve in the constraint plane.

    Parameters
    ----------
    z : float or array
        Measured kinematic redshift (> -1).
    theta : Quantity or array, optional
        Observer-frame viewing angles at which to evaluate (0 = straight at us; bare
        numbers are degrees). Default: ``num`` points from 0 to 180 deg.
    num : int
        Number of grid points when ``theta`` is not given.

    Returns
    -------
    theta : Quantity (deg)
        The angle grid, broadcast against ``z``.
    beta : ndarray, shape (2, ...)
        Speeds on the two branches (slower root first, faster root second) that give ``z``
        at each angle; NaN where a branch does not exist. A redshift (z > 0) has one branch
        (the second is NaN); a blueshift has two for sin(theta) <= 1 + z and none beyond.

    Notes
    -----
    Solves Gamma (1 - beta cos theta) = w = 1 + z:
    beta = (cos theta -/+ w sqrt(cos^2 theta + w^2 - 1))/(cos^2 theta + w^2), keeping roots in [0, 1).
    """
    zz = _dimensionless(z, "z")
    if np.any(zz <= -1):
        raise ValueError("z must be > -1")
    if theta is None:
        th = np.linspace(0.0, np.pi, int(num))
        if zz.ndim:
            zz = zz[..., None]
    else:
        th = _angle(theta, "theta")
    zz, th = np.broadcast_arrays(zz, th)
    w = 1.0 + zz
    c = np.cos(th)
    with np.errstate(invalid="ignore"):
        den = c * c + w * w
        disc = np.sqrt(c * c + zz * (2.0 + zz))  # c^2 + w^2 - 1 without cancellation
        lo = (c - w * disc) / den
        hi = (c + w * disc) / den
    lo = np.where((lo >= 0) & (lo < 1), lo, np.nan)
    hi = np.where((hi >= 0) & (hi < 1), hi, np.nan)
    # a repeated root counts once
    lo = np.where(lo == hi, np.nan, lo)
    return _deg(th), np.stack([lo, hi])


def velocity_readings(z: ArrayLike):
    """Compare the common readings of a redshift as a velocity, side by side.

    Parameters
    ----------
    z : float or array
        Measured redshift (> -1), dimensionless, already corrected for the host's
        cosmological redshift if a peculiar/kinematic velocity is wanted.

    Returns
    -------
    astropy.table.QTable
        One row per z with columns

        ``z``; ``cz`` (km/s, the optical convention v = c z);
        ``v_radio`` (km/s, the radio convention v = c z/(1 + z));
        ``v_relativistic`` (km/s, radial speed from beta = ((1+z)^2-1)/((1+z)^2+1));
        ``beta_radial`` (relativistic radial v/c);
        ``beta_if_transverse`` (the speed that gives z by the transverse Doppler effect
        alone, i.e. for motion at theta = 90 deg: Gamma = 1 + z, beta = sqrt(1 - 1/(1+z)^2);
        NaN for blueshifts, which a transverse motion cannot give). It is NOT a lower limit:
        the smallest speed that gives z is the radial one, ``beta_radial``; every angle
        between 90 and 180 deg needs a speed between the two);
        ``cz_error`` and ``radio_error`` (fractional offsets of the linear readings from the
        relativistic one, (v - v_rel)/abs(v_rel)).

    Notes
    -----
    The conventions are those of astropy's ``doppler_optical``, ``doppler_radio`` and
    ``doppler_relativistic`` equivalencies (common practice).
    """
    from astropy.table import QTable

    zz = np.atleast_1d(_dimensionless(z, "z"))
    bad = zz <= -1
    if bad.any():
        raise ValueError(f"z must be > -1, got {_first_bad(zz, bad)}")
    c = SPEED_OF_LIGHT_KMS
    br = np.atleast_1d(beta_from_redshift(zz))
    w = 1.0 + zz
    with np.errstate(invalid="ignore", divide="ignore"):
        b_transverse = np.where(zz >= 0, np.sqrt(zz * (2.0 + zz)) / w, np.nan)
        cz = c * zz
        vr = c * zz / w
        vrel = c * br
        err_cz = np.where(vrel != 0, (cz - vrel) / np.abs(vrel), 0.0)
        err_radio = np.where(vrel != 0, (vr - vrel) / np.abs(vrel), 0.0)
    kms = u.km / u.s
    return QTable(
        {
            "z": zz,
            "cz": cz * kms,
            "v_radio": vr * kms,
            "v_relativistic": vrel * kms,
            "beta_radial": br,
            "beta_if_transverse": b_transverse,
            "cz_error": err_cz,
            "radio_error": err_radio,
        }
    )


# ---------------------------------------------------------------------------
# Jets of active galaxies: apparent motion at cosmological distance, variability Doppler factors,
# limits from a counter-jet that is not seen, opening angles
# ---------------------------------------------------------------------------
#: Intrinsic brightness-temperature limits (K): equipartition of particle and field energy
#: (Readhead 1994, ApJ 426, 51) and the inverse-Compton catastrophe (Kellermann & Pauliny-Toth
#: 1969, ApJ 155, L71). Values from memory.
T_EQUIPARTITION = 5e10
T_INVERSE_COMPTON = 1e12


def _positive_quantity(value, unit, name: str) -> np.ndarray:
    if not isinstance(value, u.Quantity):
        raise TypeError(f"{name} must be a Quantity in units like {unit}, got {_describe(value)}")
    try:
        x = _to_float_array(value.to_value(unit), name)
    except u.UnitConversionError as exc:
        raise u.UnitsError(f"{name} must be convertible to {unit}, got unit {value.unit!r}") from exc
    bad = x <= 0
    if bad.any():
        raise ValueError(f"{name} must be > 0, got {_first_bad(x, bad)} {unit}")
    return x


def _host_z(z, name: str = "z") -> np.ndarray:
    zz = _dimensionless(z, name)
    bad = zz <= 0
    if bad.any():
        raise ValueError(f"{name} must be a cosmological redshift > 0, got {_first_bad(zz, bad)}")
    return zz


def _luminosity_distance_m(z, cosmology):
    if cosmology is None:
        from astropy.cosmology import Planck18 as cosmology
    return cosmology.luminosity_distance(z).to_value(u.m)


def apparent_speed_from_proper_motion(mu, z, *, cosmology=None):
    """Apparent transverse speed (units of c) of a feature moving ``mu`` on the sky at host redshift ``z``.

    Parameters
    ----------
    mu : Quantity
        Proper motion, an angular rate (e.g. mas/yr) in the observer's time.
    z : float or array
        Cosmological redshift of the host (> 0).
    cosmology : astropy.cosmology.Cosmology, optional
        Default Planck18.

    Returns
    -------
    float or ndarray
        beta_app = mu D_L/(c (1 + z)) = mu D_A (1 + z)/c, dimensionless; D_L the luminosity
        distance, (1 + z) the time dilation of the observed motion.

    Notes
    -----
    Pearson & Zensus 1987, in Superluminal Radio Sources (CUP), p. 1; Vermeulen & Cohen 1994,
    ApJ 430, 467, eq. 1 (from memory). For a nearby source (z << 1) it tends to mu D/c.
    """
    m = _positive_quantity(mu, u.rad / u.s, "mu")
    zz = _host_z(z)
    d = _luminosity_distance_m(zz, cosmology)
    return _out(m * d / (299792458.0 * (1.0 + zz)))


def apparent_speed_limits(beta_app) -> dict:
    """What an apparent speed alone says about the speed and the viewing angle.

    Parameters
    ----------
    beta_app : float or array
        Apparent transverse speed in units of c (> 0).

    Returns
    -------
    dict
        ``beta_min`` = beta_app/sqrt(1 + beta_app**2) and ``gamma_min`` = sqrt(1 + beta_app**2):
        the smallest speed and Lorentz factor that can give beta_app; ``theta_critical`` (deg):
        the viewing angle at which that smallest speed gives it, cot theta = beta_app (where
        beta_app is largest for that speed, cos theta = beta); ``theta_max`` (deg): the largest
        viewing angle at which any speed below c gives beta_app, 2 arctan(1/beta_app).

    Notes
    -----
    From beta_app = beta sin theta/(1 - beta cos theta) (Rees 1966, Nature 211, 468); the limits
    as in Vermeulen & Cohen 1994, ApJ 430, 467 and Cohen et al. 2007, ApJ 658, 232 (from memory).
    """
    b = _dimensionless(beta_app, "beta_app")
    bad = b <= 0
    if bad.any():
        raise ValueError(f"beta_app must be > 0, got {_first_bad(b, bad)}")
    h = np.hypot(1.0, b)
    return {
        "beta_min": _out(b / h),
        "gamma_min": _out(h),
        "theta_critical": _deg(np.arctan2(1.0, b)),
        "theta_max": _deg(2.0 * np.arctan2(1.0, b)),
    }


def solve_apparent_and_doppler(beta_app, delta):
    """Lorentz factor and viewing angle from an apparent speed and a Doppler factor.

    Parameters
    ----------
    beta_app : float or array
        Apparent transverse speed in units of c (>= 0).
    delta : float or array
        Doppler factor (> 0), e.g. from variability.

    Returns
    -------
    gamma : float or ndarray
        Gamma = (beta_app**2 + delta**2 + 1)/(2 delta).
    theta : Quantity (deg)
        Viewing angle (0 = straight at us): tan theta = 2 beta_app/(beta_app**2 + delta**2 - 1).

    Notes
    -----
    The closed forms of Ghisellini et al. 1993, ApJ 407, 65 and Hovatta et al. 2009, A&A 494,
    527, eqs. 4-5 (from memory); the round trip through :func:`apparent_speed` and
    :func:`doppler_factor` is tested. Every pair with delta > 0 has a solution; beta_app = 0
    gives theta = 0 (delta > 1) or 180 deg (delta < 1).
    """
    b = _dimensionless(beta_app, "beta_app")
    d = _dimensionless(delta, "delta")
    if (b < 0).any():
        raise ValueError(f"beta_app must be >= 0, got {_first_bad(b, b < 0)}")
    if (d <= 0).any():
        raise ValueError(f"delta must be > 0, got {_first_bad(d, d <= 0)}")
    g = (b * b + d * d + 1.0) / (2.0 * d)
    th = np.arctan2(2.0 * b, b * b + d * d - 1.0)
    return _out(g), _deg(th)


def variability_brightness_temperature(delta_flux, frequency, timescale, z, *, cosmology=None):
    """Variability brightness temperature of a flare (the size from its time scale, no beaming).

    Parameters
    ----------
    delta_flux : Quantity
        Amplitude of the flare, a flux density (e.g. Jy).
    frequency : Quantity
        Observed frequency.
    timescale : Quantity
        Observed variability time scale (e.g. days).
    z : float
        Host redshift (> 0).
    cosmology : astropy.cosmology.Cosmology, optional
        Default Planck18.

    Returns
    -------
    Quantity (K)
        T_var = Delta S D_L**2/(2 pi k nu**2 tau**2 (1 + z)): the Rayleigh-Jeans brightness
        temperature of a disc of radius c tau/(1 + z) at the angular-diameter distance, times
        (1 + z) for the cosmological shift of the temperature, so that the Doppler factor is
        delta = (T_var/T_int)**(1/3) (:func:`variability_doppler_factor`).

    Notes
    -----
    Lahteenmaki & Valtaoja 1999, ApJ 521, 493; Hovatta et al. 2009, A&A 494, 527, eq. 1:
    T_var = 1.548e-32 Delta S[Jy] d_L[m]**2/(nu[GHz]**2 tau[d]**2 (1 + z)) K (from memory;
    this function's constant 1/(2 pi k) in those units is 1.544e-32, 0.3% lower).
    """
    s = _positive_quantity(delta_flux, u.W / u.m**2 / u.Hz, "delta_flux")
    nu = _positive_quantity(frequency, u.Hz, "frequency")
    tau = _positive_quantity(timescale, u.s, "timescale")
    zz = _host_z(z)
    d = _luminosity_distance_m(zz, cosmology)
    k_b = 1.380649e-23  # J/K, exact (SI 2019)
    return u.Quantity(s * d * d / (2.0 * np.pi * k_b * nu * nu * tau * tau * (1.0 + zz)), u.K)


def variability_doppler_factor(t_var, t_int=T_EQUIPARTITION * u.K):
    """Doppler factor from a variability brightness temperature and an intrinsic limit.

    Parameters
    ----------
    t_var : Quantity (K)
        From :func:`variability_brightness_temperature` (which carries the (1 + z) factor).
    t_int : Quantity (K)
        Intrinsic brightness temperature: :data:`T_EQUIPARTITION` (5e10 K, Readhead 1994; the
        default, as Lahteenmaki & Valtaoja 1999) or :data:`T_INVERSE_COMPTON` (1e12 K).

    Returns
    -------
    float or ndarray
        delta = (T_var/T_int)**(1/3): the exponent 1/3 because the size limit brings delta**2 and
        the temperature itself one more power (Lahteenmaki & Valtaoja 1999, from memory). A
        value below 1 is a lower limit only when the flare is unresolved in time.
    """
    tv = _positive_quantity(t_var, u.K, "t_var")
    ti = _positive_quantity(t_int, u.K, "t_int")
    return _out(np.cbrt(tv / ti))


def counterjet_limit(jet_flux, counterjet_upper_limit, alpha: ArrayLike = 0.7, geometry: Geometry = "jet"):
    """Lower limit on beta cos theta from a counter-jet that is not detected.

    Parameters
    ----------
    jet_flux : Quantity or float
        Flux density of the jet at some distance from the core.
    counterjet_upper_limit : Quantity or float
        Upper limit on the counter-jet at the same distance on the other side (same unit).
    alpha : float
        Spectral index (S_nu proportional to nu**-alpha).
    geometry : {"blob", "jet"}
        p = 3 + alpha (blob) or 2 + alpha (continuous jet, the usual choice for a jet's body).

    Returns
    -------
    float or ndarray
        beta cos theta >= tanh(ln R_min/(2 p)), R_min = jet/counter-jet limit: the jet is at
        least this fast and at most arccos of it from the line of sight.

    Notes
    -----
    Jet/counter-jet ratio of Lind & Blandford 1985, ApJ 295, 358 with R as a lower limit.
    """
    if isinstance(jet_flux, u.Quantity) or isinstance(counterjet_upper_limit, u.Quantity):
        if not (isinstance(jet_flux, u.Quantity) and isinstance(counterjet_upper_limit, u.Quantity)):
            raise TypeError("jet_flux and counterjet_upper_limit must both be Quantities, or both plain numbers")
        unit = jet_flux.unit
        j = _positive_quantity(jet_flux, unit, "jet_flux")
        c = _positive_quantity(counterjet_upper_limit, unit, "counterjet_upper_limit")
    else:
        j, c = _dimensionless(jet_flux, "jet_flux"), _dimensionless(counterjet_upper_limit, "counterjet_upper_limit")
        for arr, name in ((j, "jet_flux"), (c, "counterjet_upper_limit")):
            if (arr <= 0).any():
                raise ValueError(f"{name} must be > 0, got {_first_bad(arr, arr <= 0)}")
    return beta_cos_theta_from_ratio(j / c, alpha, geometry)


def intrinsic_opening_angle(apparent, theta):
    """Intrinsic full opening angle of a jet from its apparent (projected) one and the viewing angle.

    Parameters
    ----------
    apparent : float, array or Quantity
        Apparent full opening angle on the sky (bare numbers are degrees).
    theta : float, array or Quantity
        Viewing angle (0 = straight at us; bare numbers are degrees).

    Returns
    -------
    Quantity (deg)
        From tan(phi_app/2) = tan(phi_int/2)/sin theta (Pushkarev et al. 2009, A&A 507, L33;
        from memory): a jet seen close to its axis looks much wider than it is.
    """
    a = _angle(apparent, "apparent")
    th = _angle(theta, "theta")
    return _deg(2.0 * np.arctan(np.tan(a / 2.0) * np.sin(th)))
