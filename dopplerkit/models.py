"""Forward kinematic models: precessing jets, the line profile of a cone, synthetic spectra.

Conventions of :mod:`dopplerkit.kinematics`: beta in [0, 1) (or ``gamma=``), angles in
the observer frame, bare numbers are degrees (radians only as u.rad), z < 0 is a blueshift.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import astropy.units as u
import numpy as np

from .kinematics import GEOMETRIES, SPEED_OF_LIGHT_KMS, _angle, _out, _speed

__all__ = [
    "LineComponent",
    "cone_directions",
    "cone_line_profile",
    "precessing_jet_redshifts",
    "synthesize_spectrum",
]


def _time(x, name):
    if isinstance(x, u.Quantity):
        try:
            return np.asarray(x.to_value(u.d), dtype=float)
        except u.UnitConversionError as exc:
            raise u.UnitsError(f"{name} must be a time, got unit {x.unit!r}") from exc
    return np.asarray(x, dtype=float)


def precessing_jet_redshifts(t, beta=None, inclination=0.0, cone_angle=0.0, period=1.0, t0=0.0, *, gamma=None, emission_delay=None):
    """Redshifts of two opposite jets precessing on a cone (the kinematic model of a precessing binary).

    Parameters
    ----------
    t : float, array or Quantity (time)
        Observation times. Plain numbers are in the same unit as ``period`` and ``t0``
        (Quantities are converted to days).
    beta : float or Quantity
        Jet speed v/c in [0, 1). Alternatively ``gamma=``.
    inclination : float or Quantity (angle)
        Angle between the precession axis and the line of sight (0 = axis towards us).
    cone_angle : float or Quantity (angle)
        Half-opening angle of the precession cone.
    period : float or Quantity (time)
        Precession period P (> 0).
    t0 : float or Quantity (time)
        Epoch at which jet 1 is nearest the line of sight (phase psi = 0).
    gamma : float, optional
        Lorentz factor instead of ``beta``.
    emission_delay : float or Quantity (time), optional
        Observer-frame time between a blob's ejection and its line emission. Given, each
        jet's redshift is that of the direction at the ejection time t_ej, found from
        t = t_ej + tau (1 -/+ beta cos(angle_1(t_ej))): the emitting blob has moved
        beta c tau towards (or away from) us, so its light arrives earlier (later).
        None (default): no light-travel-time correction (emission at ejection).

    Returns
    -------
    z_1, z_2 : float or ndarray
        Redshifts of jet 1 (nearer the line of sight at t0; blueshifted when the cone
        points at us) and jet 2.

    Notes
    -----
    psi = 2 pi (t - t0)/P; cos(angle_1) = sin(i) sin(cone) cos(psi) + cos(i) cos(cone);
    1 + z_1 = Gamma (1 - beta cos(angle_1)), 1 + z_2 = Gamma (1 + beta cos(angle_1))
    (Abell & Margon 1979, Nature 279, 701; Margon 1984, ARA&A 22, 507). Without an emission
    delay, (z_1 + z_2)/2 = Gamma - 1 at every phase, the transverse Doppler shift; with one,
    the two jets are seen at different ejection times and the mean wanders about Gamma - 1.
    """
    b, g, _ = _speed(beta, gamma)
    i = _angle(inclination, "inclination")
    c = _angle(cone_angle, "cone_angle")
    tt = _time(t, "t")
    p = _time(period, "period")
    if np.any(p <= 0):
        raise ValueError(f"period must be > 0, got {period!r}")
    tz = _time(t0, "t0")
    gm1 = (g * b) ** 2 / (g + 1.0)  # Gamma - 1 without cancellation
    gb = g * b

    def cos1(times):
        psi = 2.0 * np.pi * (times - tz) / p
        return np.sin(i) * np.sin(c) * np.cos(psi) + np.cos(i) * np.cos(c)

    if emission_delay is None:
        c1 = cos1(tt)
        c2 = c1
    else:
        tau = _time(emission_delay, "emission_delay")
        if np.any(tau < 0):
            raise ValueError(f"emission_delay must be >= 0, got {emission_delay!r}")
        # t(t_ej) = t_ej + tau (1 -/+ beta cos angle_1(t_ej)) is one-to-one only while its slope stays
        # positive: kappa = tau beta (2 pi / P) sin(i) sin(cone) < 1; beyond, one observed time sees blobs
        # ejected at several times, and no single redshift per jet exists
        kappa = np.max(tau * b * (2.0 * np.pi / p) * np.abs(np.sin(i) * np.sin(c)))
        if kappa >= 1:
            raise ValueError(
                f"emission_delay is too long for this precession: tau beta (2 pi/P) sin(i) sin(cone) = {kappa:.3g} >= 1, so blobs "
                "ejected at different times arrive together and no single redshift per jet exists; allowed: a delay below "
                "P/(2 pi beta sin(i) sin(cone))"
            )
        c1 = _delayed_cos(cos1, tt, tau, b, +1)
        c2 = _delayed_cos(cos1, tt, tau, b, -1)
    return _out(gm1 - gb * c1), _out(gm1 + gb * c2)


def _delayed_cos(cos1, t, tau, b, sign):
    """cos(angle_1) at the ejection time solving t = t_ej + tau (1 - sign beta cos1(t_ej))."""
    t_ej = t - tau
    for _ in range(10000):  # a contraction with rate kappa < 1 (checked by the caller)
        new = t - tau * (1.0 - sign * b * cos1(t_ej))
        if np.allclose(new, t_ej, rtol=0, atol=1e-12 * (1 + np.max(np.abs(t)))):
            return cos1(new)
        t_ej = new
    raise RuntimeError("the light-travel-time equation did not converge (kappa too close to 1); shorten emission_delay")


def cone_directions(theta, opening_angle, *, n_polar: int = 24, n_azimuth: int = 48):
    """Quadrature over directions filling a cone: cosines to the line of sight and weights.

    Parameters
    ----------
    theta : float or Quantity
        Viewing angle of the cone axis (observer frame; 0 = axis straight at us).
    opening_angle : float or Quantity
        Half-opening angle phi of the cone (0 = a single direction).
    n_polar, n_azimuth : int
        Gauss-Legendre nodes in cos(omega) over [cos phi, 1] (uniform over solid angle) and
        equally spaced azimuth nodes (exact for trigonometric polynomials).

    Returns
    -------
    cos_psi : ndarray, shape (n_polar * n_azimuth,)
        Cosine of the angle between each direction and the line of sight.
    weights : ndarray
        Quadrature weights summing to 1.
    """
    th = float(_angle(theta, "theta"))
    phi = float(_angle(opening_angle, "opening_angle"))
    if not 0 <= phi <= np.pi:
        raise ValueError(f"opening_angle must be in [0, 180] deg, got {np.degrees(phi)!r} deg")
    if phi == 0:
        return np.array([np.cos(th)]), np.array([1.0])
    x, w = np.polynomial.legendre.leggauss(int(n_polar))
    mu_lo = np.cos(phi)
    mu = 0.5 * (1 - mu_lo) * x + 0.5 * (1 + mu_lo)
    chi = (np.arange(int(n_azimuth)) + 0.5) * 2 * np.pi / int(n_azimuth)
    sin_om = np.sqrt(np.clip(1 - mu * mu, 0, None))
    cos_psi = np.cos(th) * mu[:, None] + np.sin(th) * sin_om[:, None] * np.cos(chi)[None, :]
    weights = (w / w.sum())[:, None] * np.full(int(n_azimuth), 1.0 / int(n_azimuth))[None, :]
    return cos_psi.ravel(), weights.ravel()


def cone_line_profile(
    spectral_axis: u.Quantity,
    rest: u.Quantity,
    beta=None,
    theta=0.0,
    opening_angle=0.0,
    *,
    gamma=None,
    intrinsic_fwhm: u.Quantity = 300 * u.km / u.s,
    beaming: str | None = None,
    max_nodes: int = 20000,
):
    """Line profile of a conical outflow of half-opening angle phi, by deterministic quadrature.

    Parameters
    ----------
    spectral_axis : Quantity
        Where to evaluate (wavelength, frequency or energy).
    rest : Quantity
        Rest position of the line, convertible to the axis unit (vacuum wavelength if a length).
    beta : float
        Speed of the flow, v/c in [0, 1). Alternatively ``gamma=``.
    theta : float or Quantity
        Observer-frame viewing angle of the cone axis (0 = straight at us).
    opening_angle : float or Quantity
        Half-opening angle phi of a filled cone; directions are uniform over its solid angle.
    intrinsic_fwhm : Quantity (speed)
        Gaussian FWHM of the line in the comoving frame, as a velocity (> 0).
    beaming : {None, "blob", "jet"}
        None: every direction contributes equally (profile of unit area). "blob"/"jet": each
        direction is weighted by its integrated line-flux boost delta**4 / delta**3, and the
        area is the mean boost over the cone.
    max_nodes : int
        Cap on the number of quadrature nodes.

    Returns
    -------
    Quantity
        Profile per unit of the spectral axis (1/axis unit).

    Notes
    -----
    The Doppler factor depends only on the angle psi between a direction and the line of
    sight, delta = 1/(Gamma (1 - beta cos psi)). The fraction of the cone at angle psi is
    sin(psi) L(psi)/(2 pi (1 - cos phi)) d psi, with L(psi) = 2 arccos((cos phi - cos theta
    cos psi)/(sin theta sin psi)) the azimuthal length of the circle of radius psi around the
    line of sight inside the cone (clipped to [0, 2 pi]). The profile is the integral over psi
    of Gaussians at rest/delta (wavelength) or rest*delta (frequency, energy): on each psi
    segment the centre moves between its values at the segment's edges and the segment's weight
    is spread evenly between them, convolved exactly with the Gaussian (a difference of error
    functions), so no node spacing leaves ripples. Tests compare it with Monte Carlo sampling of
    directions.
    """
    b, g, omb = _speed(beta, gamma)
    b, g, omb = float(b), float(g), float(omb)
    th = float(_angle(theta, "theta"))
    phi = float(_angle(opening_angle, "opening_angle"))
    if not 0 <= phi <= np.pi:
        raise ValueError(f"opening_angle must be in [0, 180] deg, got {np.degrees(phi)!r} deg")
    fwhm_v = u.Quantity(intrinsic_fwhm, u.km / u.s).to_value(u.km / u.s)
    if not fwhm_v > 0:
        raise ValueError(f"intrinsic_fwhm must be > 0 km/s, got {intrinsic_fwhm!r}")
    unit = spectral_axis.unit
    x = np.asarray(spectral_axis.value, dtype=float)
    r = rest.to_value(unit, equivalencies=u.spectral())
    wavelike = unit.is_equivalent(u.m)

    def delta_of(psi):
        s = np.sin(0.5 * psi)
        return 1.0 / (g * (omb + 2.0 * b * s * s))

    if beaming is not None and beaming not in GEOMETRIES:
        raise ValueError(f"beaming must be None, 'blob' or 'jet', got {beaming!r}")
    to_sigma = (fwhm_v / SPEED_OF_LIGHT_KMS) / (2 * np.sqrt(2 * np.log(2)))
    lo, hi = max(th - phi, 0.0), min(th + phi, np.pi)
    if phi == 0 or hi <= lo:
        delta = delta_of(np.array([th]))
        w = np.ones(1) if beaming is None else delta ** (GEOMETRIES[beaming][0] + 1.0)
        c = r / delta if wavelike else r * delta
        sg = np.abs(c) * to_sigma
        return (w[0] * np.exp(-0.5 * ((x - c[0]) / sg[0]) ** 2) / (sg[0] * np.sqrt(2 * np.pi))) / unit
    from scipy.special import ndtr

    d_lo, d_hi = delta_of(lo), delta_of(hi)
    spread = abs(r / d_lo - r / d_hi) if wavelike else abs(r * d_lo - r * d_hi)
    sigma_min = min(abs(r / d_lo), abs(r / d_hi), abs(r * d_lo), abs(r * d_hi)) * to_sigma
    # nodes closer than a fifth of the line width where the cap allows; beyond it the exact segment integral
    # below still leaves no ripple
    n = int(np.clip(np.ceil(5.0 * spread / sigma_min), 400, max_nodes))
    edges = lo + np.arange(n + 1) * (hi - lo) / n
    psi = 0.5 * (edges[1:] + edges[:-1])
    sp = np.sin(psi)
    with np.errstate(invalid="ignore", divide="ignore"):
        arg = (np.cos(phi) - np.cos(th) * np.cos(psi)) / (np.sin(th) * sp)
    arg = np.where(np.isfinite(arg), arg, -1.0)
    w = sp * 2.0 * np.arccos(np.clip(arg, -1.0, 1.0))
    w = w / w.sum()
    if beaming is not None:
        w = w * delta_of(psi) ** (GEOMETRIES[beaming][0] + 1.0)
    d_edges = delta_of(edges)
    c_edges = r / d_edges if wavelike else r * d_edges
    ca, cb = c_edges[:-1], c_edges[1:]
    sg = 0.5 * np.abs(ca + cb) * to_sigma
    # Each segment puts its weight uniformly between the centres at its two edges (the centre moves smoothly with
    # psi), convolved with the line's Gaussian: w (Phi((x - c_a)/s) - Phi((x - c_b)/s))/(c_b - c_a), exact for any
    # node spacing, so the profile has no ripple from the quadrature (a narrow segment falls back to the Gaussian)
    prof = np.zeros_like(x)
    for start in range(0, ca.size, 256):
        sl = slice(start, start + 256)
        a, bb, s0, wi = ca[sl, None], cb[sl, None], sg[sl, None], w[sl, None]
        width = bb - a
        narrow = np.abs(width) < 1e-3 * s0
        safe = np.where(narrow, 1.0, width)
        box = (ndtr((x[None, :] - a) / s0) - ndtr((x[None, :] - bb) / s0)) / safe
        gauss = np.exp(-0.5 * ((x[None, :] - 0.5 * (a + bb)) / s0) ** 2) / (s0 * np.sqrt(2 * np.pi))
        prof += np.sum(wi * np.where(narrow, gauss, box), axis=0)
    return prof / unit


@dataclass
class LineComponent:
    """One line component of a synthetic spectrum.

    Attributes
    ----------
    line : str, Line or Quantity
        Catalogue name, :class:`dopplerkit.lines.Line`, or rest value (vacuum if a wavelength).
    z : float
        Total redshift of this component (compose kinematic and cosmological yourself, or with
        :func:`dopplerkit.compose_redshift`); negative = blueshift.
    fwhm : Quantity (speed)
        Intrinsic full width at half maximum as a velocity.
    strength : float
        > 0 emission: peak height relative to the continuum at the line centre, the line ADDED
        to the continuum; < 0 absorption: depth as a fraction of the background (-0.3 = 30 % deep),
        the background MULTIPLIED by (1 + strength x profile).
    profile : {"gaussian", "lorentzian"}
    label : str
        Free label, e.g. "approaching".
    """

    line: object
    z: float = 0.0
    fwhm: u.Quantity = 500 * u.km / u.s
    strength: float = 1.0
    profile: str = "gaussian"
    label: str = ""


def _continuum(x, unit, continuum):
    if isinstance(continuum, (int, float)):
        return np.full_like(x, float(continuum))
    if isinstance(continuum, dict):
        kind = continuum.get("kind")
        pivot = continuum.get("pivot")
        xp = np.median(x) if pivot is None else u.Quantity(pivot).to_value(unit, equivalencies=u.spectral())
        if kind == "powerlaw":
            return float(continuum.get("amplitude", 1.0)) * (x / xp) ** float(continuum.get("index", 0.0))
        if kind == "polynomial":
            coeffs = continuum.get("coefficients", [1.0])
            return np.polynomial.polynomial.polyval(x / xp - 1.0, coeffs)
        raise ValueError(f"continuum kind must be 'powerlaw' or 'polynomial', got {kind!r}")
    raise TypeError(f"continuum must be a number or a dict with kind 'powerlaw'/'polynomial', got {type(continuum).__name__}")


def synthesize_spectrum(
    spectral_axis: u.Quantity,
    components: Sequence[LineComponent] = (),
    *,
    continuum=1.0,
    flux_unit="erg / (s cm2 Angstrom)",
    resolution: float | None = None,
    snr: float | None = None,
    seed=None,
    medium: str = "vacuum",
    meta: dict | None = None,
):
    """A synthetic spectrum: continuum plus shifted emission/absorption lines, resolution and noise.

    Parameters
    ----------
    spectral_axis : Quantity
        Pixel centres (wavelength, frequency or energy), ascending or descending.
    components : sequence of LineComponent
        Lines with their redshifts, widths and strengths.
    continuum : float or dict
        A constant, ``{"kind": "powerlaw", "amplitude": A, "index": k, "pivot": Quantity}``
        (A (x/pivot)**k in axis units) or ``{"kind": "polynomial", "coefficients": [...]}``
        (in x/pivot - 1).
    flux_unit : unit or str
        Unit of the flux values.
    resolution : float, optional
        Resolving power R = x/FWHM_instrument; a Gaussian instrumental profile, added to
        Gaussian lines in quadrature and to Lorentzian lines as a Voigt profile.
    snr : float, optional
        Signal-to-noise per pixel at the continuum level; Gaussian noise with constant sigma =
        median(continuum)/snr. None: no noise (sigma still reported from 1e-3 of continuum).
    seed : int or numpy Generator, optional
        Seed of the noise.
    medium : {"vacuum", "air"}
        Medium of a wavelength axis. Lines are shifted in vacuum (z scales vacuum wavelengths,
        also for ultraviolet lines seen redshifted into the optical) and placed at their air
        wavelength on an air axis.
    meta : dict, optional
        Extra metadata; ``meta["medium"]`` and ``meta["dopplerkit_truth"]`` (the components)
        are added.

    Returns
    -------
    specutils.Spectrum
        With StdDevUncertainty.

    Notes
    -----
    Profiles are evaluated at the pixel centres, not integrated over the pixels: a line much
    narrower than a pixel can fall between samples. Keep lines wider than ~2 pixels.
    """
    from astropy.nddata import StdDevUncertainty
    from scipy.special import voigt_profile
    from specutils import Spectrum

    from .lines import rest_value

    unit = spectral_axis.unit
    x = np.asarray(spectral_axis.value, dtype=float)
    wavelike = unit.is_equivalent(u.m)
    cont = _continuum(x, unit, continuum)
    emis = np.zeros_like(x)
    absf = np.ones_like(x)
    fwhm_to_sigma = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))
    truth = []
    for comp in components:
        # a Doppler shift scales vacuum wavelengths: shift the vacuum rest value, then express it in the axis's medium
        if isinstance(comp.line, u.Quantity):
            r = rest_value(comp.line, unit, medium="vacuum", line_medium="vacuum").value
        else:
            r = rest_value(comp.line, unit, medium="vacuum").value
        centre = r * (1.0 + comp.z) if wavelike else r / (1.0 + comp.z)
        if wavelike and medium == "air":
            from .lines import vacuum_to_air

            centre = float(vacuum_to_air(centre * unit).to_value(unit))
        width_v = u.Quantity(comp.fwhm, u.km / u.s).to_value(u.km / u.s)
        fw = abs(centre) * width_v / SPEED_OF_LIGHT_KMS
        inst = 0.0 if resolution is None else abs(centre) / float(resolution)
        if comp.profile == "gaussian":
            s = np.hypot(fw, inst) * fwhm_to_sigma
            shape = np.exp(-0.5 * ((x - centre) / s) ** 2)
        elif comp.profile == "lorentzian":
            gam = 0.5 * fw
            s = inst * fwhm_to_sigma
            v = voigt_profile(x - centre, s, gam)
            shape = v / voigt_profile(0.0, s, gam)
        else:
            raise ValueError(f"profile must be 'gaussian' or 'lorentzian', got {comp.profile!r}")
        if comp.strength >= 0:
            # emission adds to the continuum (its flux does not depend on the continuum's shape);
            # the strength sets the peak height relative to the continuum at the line centre
            emis += comp.strength * float(np.interp(centre, x[np.argsort(x)], cont[np.argsort(x)])) * shape
        else:
            absf *= 1.0 + comp.strength * shape
        truth.append(
            {
                "line": str(getattr(comp.line, "name", comp.line)),
                "label": comp.label,
                "z": float(comp.z),
                "centre": float(centre),
                "fwhm_kms": width_v,
                "strength": float(comp.strength),
            }
        )
    flux = (cont + emis) * absf
    level = float(np.median(np.abs(cont)))
    if snr is not None:
        sigma = np.full_like(x, level / float(snr))
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        flux = flux + rng.normal(0.0, 1.0, x.shape) * sigma
    else:
        sigma = np.full_like(x, 1e-3 * level if level > 0 else 1e-3)
    m = dict(meta or {})
    if wavelike:
        m["medium"] = medium
    m["dopplerkit_truth"] = truth
    fu = u.Unit(flux_unit)
    return Spectrum(flux=flux * fu, spectral_axis=spectral_axis, uncertainty=StdDevUncertainty(sigma), meta=m)
