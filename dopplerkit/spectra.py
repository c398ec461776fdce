"""Relativistic transforms of whole spectra: shift, beaming boost, cosmological stretch.

A spectrum in the source (comoving) frame becomes the spectrum an observer sees with
:func:`boost_spectrum`; :func:`deboost_spectrum` is its exact inverse. Both return NEW
:class:`specutils.Spectrum` objects and never touch their input.

Physics (conventions of :mod:`dopplerkit.kinematics`)
-----------------------------------------------------
* Spectral axis: frequency-like coordinates (frequency, energy, wavenumber) are multiplied
  by ``D = delta/(1 + z_cosmo)``, wavelengths divided by it, so that
  ``(1 + z_total) = (1 + z_cosmo)/delta``.
* Beaming: ``F_nu,obs(nu) = delta**q F_nu,emit(nu/delta)`` with ``q = 3`` (discrete blob)
  or ``q = 2`` (continuous jet), from the invariance of ``I_nu/nu**3`` (Rybicki & Lightman
  1979, sec. 4.9). A flux density per unit ``x``, with ``x`` proportional to ``nu**k``,
  is ``F_x = F_nu |d nu/d x|``, so it picks up ``delta**(1 - k)`` more:
  per unit frequency, energy or wavenumber (k = 1) ``delta**q``; per unit wavelength
  (k = -1) ``delta**(q + 2)``. A photon flux density (``ph``, or counts per area per time
  per unit ``x``) carries one power of ``delta`` less (each photon's energy is ``delta``
  times larger). The integrated line flux then scales as ``delta**(q + 1)``: ``delta**4``
  (blob), ``delta**3`` (jet).
* ``z_cosmo`` stretches the axis by ``1 + z_cosmo`` and leaves the flux density values
  alone (a shape-only shift), unless ``cosmology=`` is given: then the input flux is read
  as a luminosity density per unit ``x`` (e.g. erg/s/Angstrom) and the output is the flux
  density at the luminosity distance ``D_L(z_cosmo)`` of that astropy cosmology,
  ``F_x,obs = (1 + z)**k L_x,emit/(4 pi D_L**2)`` (Hogg 1999, astro-ph/9905116, eq. 22 for
  ``F_nu``), one more power of ``1 + z`` for photon fluxes.

Air wavelength axes (``meta["medium"] == "air"`` or FITS CTYPE ``AWAV``) are converted to
vacuum, shifted, and converted back (Morton 2000), since a Doppler shift scales vacuum
wavelengths.
"""

from __future__ import annotations

import copy
import functools
from typing import Literal

import astropy.units as u
import numpy as np

from .kinematics import _speed, doppler_factor

__all__ = [
    "BEAMING",
    "boost_arrays",
    "boost_spectrum",
    "deboost_spectrum",
    "flux_scaling",
    "is_observer_frame",
    "resample",
    "spectral_medium",
    "with_medium",
]

#: Beaming options: name -> (q, description).
BEAMING = {
    None: (0.0, "no flux change, the spectral axis moves only"),
    "blob": (3.0, "discrete blob, F_nu,obs(nu) = delta**3 F_nu,emit(nu/delta)"),
    "jet": (2.0, "continuous jet, F_nu,obs(nu) = delta**2 F_nu,emit(nu/delta)"),
}

_W_M2 = u.W / u.m**2
_PHOT_M2 = (u.s * u.m**2) ** -1
_READINGS = [
    (1, u.Hz, _W_M2),
    (1, u.J, _W_M2),
    (-1, u.m, _W_M2),
    (1, u.Hz, u.W),
    (1, u.J, u.W),
    (-1, u.m, u.W),
    (1, u.m**-1, _W_M2),
]

Beaming = Literal["blob", "jet"] | None


def _axis_k(unit: u.UnitBase) -> int:
    """+1 for frequency-like axes (frequency, energy, wavenumber), -1 for wavelength."""
    if unit.is_equivalent(u.m):
        return -1
    if unit.is_equivalent(u.Hz) or unit.is_equivalent(u.J) or unit.is_equivalent(u.m**-1):
        return 1
    raise u.UnitsError(f"spectral axis must be wavelength, frequency, energy or wavenumber, got unit {unit!r}")


def _flux_reading(flux_unit, axis_unit=None):
    """(k, photon, luminosity) reading of a flux unit, or None; the axis decides dimensional ties."""
    unit = u.Unit(flux_unit)
    bases = getattr(unit, "bases", [])
    photon = False
    if u.ph in bases or u.ct in bases:
        photon = True
        unit = unit * u.Unit(f"1/{'ph' if u.ph in bases else 'ct'}")
    readings = list(_READINGS)
    if axis_unit is not None:
        # units can coincide dimensionally: erg/s/cm is a luminosity per unit wavelength or a flux per
        # unit wavenumber. A density is per unit of the spectral axis it comes with: try that reading first.
        ax = u.Unit(axis_unit)
        readings.sort(key=lambda r: not ax.is_equivalent(r[1]))
    for k, per, total in readings:
        target = total if not photon else (_PHOT_M2 if total is _W_M2 else None)
        if target is not None and (unit * per).is_equivalent(target):
            return k, photon, total is u.W
    if not photon:  # a photon flux density written without ph or ct, e.g. 1/(s cm2 keV)
        for k, per, total in readings:
            if total is _W_M2 and (unit * per).is_equivalent(_PHOT_M2):
                return k, True, False
    return None


def flux_scaling(flux_unit: u.UnitBase, axis_unit: u.UnitBase | None = None) -> tuple[int, bool] | None:
    """How a flux density unit depends on the spectral coordinate.

    Parameters
    ----------
    flux_unit : unit or str
        Unit of the flux (or luminosity) density.
    axis_unit : unit or str, optional
        Unit of the spectral axis it comes with. Where two readings coincide dimensionally
        (erg/s/cm: a luminosity per unit wavelength or a flux per unit wavenumber), the density
        per unit of this axis wins; without it the per-wavelength reading is taken.

    Returns
    -------
    (k, photon) or None
        ``k`` = +1 for a density per unit frequency/energy/wavenumber, -1 per unit
        wavelength; ``photon`` True for photon (count) flux densities. None when the unit
        is not a flux density (dimensionless, normalised, counts per pixel, ...).
    """
    r = _flux_reading(flux_unit, axis_unit)
    return None if r is None else r[:2]


def _check_beaming(beaming) -> float:
    if beaming not in BEAMING:
        allowed = "; ".join(f"{k!r}: {v[1]}" for k, v in BEAMING.items())
        raise ValueError(f"beaming must be one of {allowed}; got {beaming!r}")
    return BEAMING[beaming][0]


@functools.lru_cache(maxsize=64)
def beaming_exponent(flux_unit, beaming: Beaming = None, axis_unit=None) -> float:
    """Power of the Doppler factor that multiplies a flux density of this unit under ``beaming``.

    ``F_x,obs(x_obs) = delta**n F_x,emit(x_emit)`` with n = q + 1 - k (minus 1 for photon fluxes),
    q = 3 (blob) or 2 (continuous jet), k = +1 per unit frequency/energy/wavenumber, -1 per unit
    wavelength (module notes). 0 for ``beaming=None``. Raises UnitsError when the unit is not a
    flux (or luminosity) density and beaming is asked for.
    """
    q = _check_beaming(beaming)
    if beaming is None:
        return 0.0
    scaling = flux_scaling(u.Unit(flux_unit), axis_unit)
    if scaling is None:
        raise u.UnitsError(
            f"flux unit {u.Unit(flux_unit)!r} is not a flux (or luminosity) density, so beaming={beaming!r} cannot be applied; "
            "give the flux per unit frequency, wavelength or energy (e.g. erg/s/cm2/Angstrom, Jy, ph/s/cm2/keV) or use beaming=None"
        )
    k, photon = scaling
    return q + 1.0 - k - (1.0 if photon else 0.0)


def _scalar(x, name):
    a = np.asarray(getattr(x, "value", x))
    if a.size != 1:
        raise ValueError(
            f"{name} must be a single value for a spectrum transform, got an array of shape {a.shape}; loop over spectra or use boost_arrays"
        )
    return x


def _factors(beta, theta, gamma, beaming, z_cosmo, flux_unit, axis_unit, cosmology, inverse):
    """(axis multiplier for frequency-like axes, flux multiplier, delta, record)."""
    _check_beaming(beaming)
    _scalar(theta, "theta")
    if gamma is None:
        _scalar(beta, "beta")
    else:
        _scalar(gamma, "gamma")
    b, g, _ = _speed(beta, gamma)
    delta = float(doppler_factor(theta=theta, **({"gamma": g} if gamma is not None else {"beta": b})))
    zc = _z_cosmo(z_cosmo)
    _axis_k(axis_unit)
    flux_factor = delta ** beaming_exponent(flux_unit, beaming, axis_unit)
    out_unit = flux_unit
    if cosmology is not None:
        reading = _flux_reading(flux_unit, axis_unit)
        if reading is None or not (reading[2] if not inverse else True):
            raise u.UnitsError(
                f"with cosmology= the input flux must be a luminosity density (e.g. erg/s/Angstrom, W/Hz), got {u.Unit(flux_unit)!r}; "
                "for a flux density leave cosmology out (z_cosmo then only stretches the axis)"
            )
        k, photon, _ = reading
        if not zc > 0:
            raise ValueError(f"cosmology= needs z_cosmo > 0 (the luminosity distance is zero at z = 0), got {zc!r}")
        dl = cosmology.luminosity_distance(zc)
        area = (4 * np.pi * dl**2).to(u.cm**2)
        flux_factor *= (1.0 + zc) ** (k + (1 if photon else 0)) / area.value
        out_unit = u.Unit(flux_unit) / u.cm**2 if not inverse else u.Unit(flux_unit) * u.cm**2
        if inverse and not _flux_reading(out_unit, axis_unit)[2]:
            raise u.UnitsError(f"deboost with cosmology= needs a flux density in, got {u.Unit(flux_unit)!r}")
    axis_factor = delta / (1.0 + zc)
    if inverse:
        axis_factor, flux_factor = 1.0 / axis_factor, 1.0 / flux_factor
    from .kinematics import _angle

    theta_deg = float(np.degrees(_angle(theta, "theta")))
    record = {
        "operation": "deboost" if inverse else "boost",
        "beta": float(b),
        "gamma": float(g),
        "theta_deg": theta_deg,
        "beaming": beaming,
        "z_cosmo": zc,
        "cosmology": getattr(cosmology, "name", None) if cosmology is not None else None,
        "doppler_factor": delta,
        "flux_unit": str(out_unit),
    }
    return axis_factor, flux_factor, record


def _z_cosmo(z_cosmo) -> float:
    """The host redshift as a float; a velocity Quantity (km/s) is refused, it is not a redshift."""
    from .kinematics import _dimensionless

    if isinstance(z_cosmo, bool):
        raise TypeError(f"z_cosmo must be a redshift (a number), got {z_cosmo!r}")
    zc = np.asarray(_dimensionless(z_cosmo, "z_cosmo"), dtype=float)
    if zc.size != 1:
        raise ValueError(f"z_cosmo must be a single redshift, got an array of shape {zc.shape}")
    zc = float(zc)
    if not np.isfinite(zc) or zc <= -1:
        raise ValueError(f"z_cosmo must be a finite redshift > -1, got {zc!r}")
    return zc


def spectral_medium(spectrum, default: str | None = None) -> str | None:
    """Medium of a wavelength axis: ``meta["medium"]``, else FITS CTYPE (AWAV air, WAVE vacuum), else ``default``.

    Frequency and energy axes return "vacuum".

    Parameters
    ----------
    spectrum : specutils.Spectrum
    default : {"air", "vacuum", None}
        Returned when the spectrum does not say.

    Returns
    -------
    str or None
    """
    if not spectrum.spectral_axis.unit.is_equivalent(u.m):
        return "vacuum"
    meta = spectrum.meta or {}
    m = meta.get("medium")
    if m is None:
        header = meta.get("header")
        ctype = None
        if header is not None:
            ctype = header.get("CTYPE1")
        if ctype is None:
            try:
                ctype = spectrum.wcs.wcs.ctype[0]
            except AttributeError:
                ctype = None
        if isinstance(ctype, str):
            if ctype.upper().startswith("AWAV"):
                m = "air"
            elif ctype.upper().startswith("WAVE"):
                m = "vacuum"
    if m is None:
        m = default
    if m is not None and m not in ("air", "vacuum"):
        raise ValueError(f"medium must be 'air' or 'vacuum', got {m!r}")
    return m


def with_medium(spectrum, medium: str):
    """A copy of ``spectrum`` whose meta says its wavelengths are in ``medium`` ('air' or 'vacuum').

    Parameters
    ----------
    spectrum : specutils.Spectrum
    medium : {"air", "vacuum"}

    Returns
    -------
    specutils.Spectrum
    """
    if medium not in ("air", "vacuum"):
        raise ValueError(f"medium must be 'air' or 'vacuum', got {medium!r}")
    new = copy.copy(spectrum)
    new.meta = dict(spectrum.meta or {})
    new.meta["medium"] = medium
    return new


def is_observer_frame(spectrum) -> bool | None:
    """True if dopplerkit last boosted this spectrum to the observer frame, False if deboosted, None if never touched.

    Parameters
    ----------
    spectrum : specutils.Spectrum

    Returns
    -------
    bool or None
    """
    hist = (spectrum.meta or {}).get("dopplerkit_history")
    if not hist:
        return None
    return hist[-1]["operation"] == "boost"


def _uncertainty(unc, factor):
    if unc is None:
        return None
    from astropy.nddata import InverseVariance, StdDevUncertainty, VarianceUncertainty

    arr = np.asarray(unc.array)
    if isinstance(unc, StdDevUncertainty):
        return StdDevUncertainty(arr * abs(factor), copy=False)
    if isinstance(unc, VarianceUncertainty):
        return VarianceUncertainty(arr * factor**2, copy=False)
    if isinstance(unc, InverseVariance):
        return InverseVariance(arr / factor**2, copy=False)
    raise TypeError(f"uncertainty must be StdDevUncertainty, VarianceUncertainty or InverseVariance, got {type(unc).__name__}")


def _transform(spectrum, axis_factor, flux_factor, record, medium_method="Morton2000"):
    from specutils import Spectrum

    axis = spectrum.spectral_axis
    unit = axis.unit
    k = _axis_k(unit)
    medium = spectral_medium(spectrum) if k == -1 else None
    if medium == "air":
        from .lines import air_to_vacuum, vacuum_to_air

        vac = air_to_vacuum(np.asarray(axis.value) * unit, method=medium_method)
        new_axis = vacuum_to_air(vac / axis_factor, method=medium_method).to(unit)
    else:
        # arithmetic on the SpectralAxis itself: specutils then skips re-deriving the axis (~30 % faster)
        new_axis = axis * axis_factor if k == 1 else axis / axis_factor
    flux = spectrum.flux
    new_flux = (np.asarray(flux.value) * flux_factor) << u.Unit(record.get("flux_unit", flux.unit))
    meta = dict(spectrum.meta or {})
    meta["dopplerkit_history"] = [*list(meta.get("dopplerkit_history", [])), record]
    meta["dopplerkit_frame"] = "observer" if record["operation"] == "boost" else "source"
    if record["cosmology"] is not None:
        meta["dopplerkit_flux_note"] = (
            "flux from luminosity density at D_L(z_cosmo)" if record["operation"] == "boost" else "luminosity density"
        )
    mask = None if spectrum.mask is None else np.array(spectrum.mask, copy=True)
    return Spectrum(
        flux=new_flux,
        spectral_axis=new_axis,
        uncertainty=_uncertainty(spectrum.uncertainty, flux_factor),
        mask=mask,
        meta=meta,
        copy=False,  # every array here is new
    )


def boost_spectrum(spectrum, beta=None, theta=0.0, *, gamma=None, beaming: Beaming = None, z_cosmo=0.0, cosmology=None):
    """The spectrum an observer sees from a source-frame (comoving) spectrum.

    Parameters
    ----------
    spectrum : specutils.Spectrum
        Source-frame spectrum; spectral axis in wavelength, frequency, energy or wavenumber,
        ascending or descending. Not modified.
    beta : float or Quantity
        Speed v/c in [0, 1). Alternatively ``gamma=`` (exact near c).
    theta : float or Quantity
        Observer-frame viewing angle between the velocity and the direction to the observer;
        0 = straight at us (blueshift), 180 deg = away. Bare numbers are degrees.
    beaming : {None, "blob", "jet"}
        None moves the axis only; "blob" (q = 3) and "jet" (q = 2) also transform the flux
        density exactly (see the module notes for the exponent per flux unit).
    z_cosmo : float
        Host cosmological redshift (a number, never a velocity) composed after the kinematic
        shift: (1 + z_total) = (1 + z_cosmo)/delta. Flux values are not dimmed unless ``cosmology``.
    cosmology : astropy.cosmology.Cosmology, optional
        Read the input flux as a luminosity density (e.g. erg/s/Angstrom; a flux unit is
        refused) and return the flux density at the luminosity distance D_L(z_cosmo), in that
        unit per cm**2. Needs z_cosmo > 0.

    Returns
    -------
    specutils.Spectrum
        A new spectrum. Uncertainty (StdDev, Variance, InverseVariance) scales with the flux,
        the mask is copied, and ``meta["dopplerkit_history"]`` records beta, gamma, theta (deg),
        beaming, z_cosmo and delta; ``meta["dopplerkit_frame"]`` is "observer".

    Examples
    --------
    >>> import astropy.units as u, numpy as np
    >>> from specutils import Spectrum
    >>> s = Spectrum(flux=np.ones(3) * u.Jy, spectral_axis=[6000, 6500, 7000] * u.AA)
    >>> obs = boost_spectrum(s, 0.6, 0.0)       # delta = 2: wavelengths halve
    >>> obs.spectral_axis.value.tolist()
    [3000.0, 3250.0, 3500.0]
    """
    axis_factor, flux_factor, rec = _factors(
        beta, theta, gamma, beaming, z_cosmo, spectrum.flux.unit, spectrum.spectral_axis.unit, cosmology, False
    )
    return _transform(spectrum, axis_factor, flux_factor, rec)


def deboost_spectrum(spectrum, beta=None, theta=0.0, *, gamma=None, beaming: Beaming = None, z_cosmo=0.0, cosmology=None):
    """The source-frame spectrum from an observed one: the exact inverse of :func:`boost_spectrum`.

    Same parameters as :func:`boost_spectrum` (``theta`` is still the observer-frame viewing
    angle, 0 = straight at us). ``meta["dopplerkit_frame"]`` becomes "source".

    Parameters
    ----------
    spectrum : specutils.Spectrum
        The observed spectrum.
    beta, theta, gamma, beaming, z_cosmo, cosmology
        As in :func:`boost_spectrum`.

    Returns
    -------
    specutils.Spectrum
    """
    axis_factor, flux_factor, rec = _factors(
        beta, theta, gamma, beaming, z_cosmo, spectrum.flux.unit, spectrum.spectral_axis.unit, cosmology, True
    )
    return _transform(spectrum, axis_factor, flux_factor, rec)


def boost_arrays(
    axis, flux, axis_unit, flux_unit=None, beta=None, theta=0.0, *, gamma=None, beaming: Beaming = None, z_cosmo=0.0, inverse=False
):
    """:func:`boost_spectrum` on plain arrays, for hot loops (no Spectrum, no copies of metadata).

    Parameters
    ----------
    axis, flux : ndarray
        Spectral axis values in ``axis_unit`` and flux values in ``flux_unit`` (flux may be None).
    axis_unit, flux_unit : unit or str
        Units of the arrays (vacuum wavelengths if a length).
    beta, theta, gamma, beaming, z_cosmo
        As in :func:`boost_spectrum`. Speed and angle may be arrays: the outputs then have their
        broadcast shape followed by the shape of ``axis`` (one observed spectrum per direction).
    inverse : bool
        True gives :func:`deboost_spectrum`.

    Returns
    -------
    (axis, flux) : ndarray
        New arrays in the same units.
    """
    axis_unit = u.Unit(axis_unit)
    k = _axis_k(axis_unit)
    n = beaming_exponent(u.Unit(flux_unit) if flux_unit is not None else u.one, beaming, axis_unit)
    zc = _z_cosmo(z_cosmo)
    delta = np.asarray(doppler_factor(beta, theta, gamma=gamma))
    if delta.ndim:
        delta = delta[..., None]  # one spectrum per speed/angle, along the last axis
    axis_factor = delta / (1.0 + zc)
    flux_factor = delta**n
    if inverse:
        axis_factor, flux_factor = 1.0 / axis_factor, 1.0 / flux_factor
    new_axis = np.multiply(axis, axis_factor if k == 1 else 1.0 / axis_factor)
    if flux is None:
        return new_axis, None
    return new_axis, (np.multiply(flux, flux_factor) if n != 0 else np.broadcast_to(flux, new_axis.shape).copy())


RESAMPLERS = {
    "flux_conserving": "specutils FluxConservingResampler (conserves integrated flux)",
    "linear": "specutils LinearInterpolatedResampler",
    "spline": "specutils SplineInterpolatedResampler",
}


def resample(spectrum, new_axis: u.Quantity, method: str = "flux_conserving", extrapolation: str = "nan_fill"):
    """Resample a spectrum onto a new spectral grid with specutils' resamplers.

    Parameters
    ----------
    spectrum : specutils.Spectrum
    new_axis : Quantity
        New spectral axis (any unit convertible to the spectrum's).
    method : {"flux_conserving", "linear", "spline"}
    extrapolation : {"nan_fill", "zero_fill", "truncate"}
        Value outside the input range.

    Notes
    -----
    After resampling, the uncertainties of neighbouring pixels are correlated (each new
    pixel mixes several old ones); specutils propagates only the diagonal, so a chi-square
    on resampled data overstates the number of independent points. Fit on the native grid
    where you can.
    """
    from specutils.manipulation import FluxConservingResampler, LinearInterpolatedResampler, SplineInterpolatedResampler

    classes = {"flux_conserving": FluxConservingResampler, "linear": LinearInterpolatedResampler, "spline": SplineInterpolatedResampler}
    if method not in classes:
        raise ValueError(f"method must be one of {', '.join(repr(m) for m in RESAMPLERS)}; got {method!r}")
    out = classes[method](extrapolation_treatment=extrapolation)(
        spectrum, new_axis.to(spectrum.spectral_axis.unit, equivalencies=u.spectral())
    )
    out.meta = dict(spectrum.meta or {})
    return out
