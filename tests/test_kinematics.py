"""Tests of dopplerkit.kinematics against published formulas, astropy and high-precision arithmetic.

Sources named beside each check:
- RL79: Rybicki & Lightman 1979, Radiative Processes in Astrophysics, Wiley, sec. 4.1
  (Doppler effect eq. 4.11, aberration eq. 4.8) and sec. 4.9.
- UP95: Urry & Padovani 1995, PASP 107, 803, appendix A (Doppler factor, apparent speed).
- LB85: Lind & Blandford 1985, ApJ 295, 358 (beaming exponents 3 + alpha / 2 + alpha).
- MR94: Mirabel & Rodriguez 1994, Nature 371, 46 (two-sided proper motions).
- M84: Margon 1984, ARA&A 22, 507 (jet pair: mean redshift = Gamma - 1).
- Rees66: Rees 1966, Nature 211, 468 (apparent superluminal motion).
- astropy: astropy.units.doppler_relativistic, a reference library.
"""

from __future__ import annotations

import subprocess
import sys

import astropy.units as u
import mpmath
import numpy as np
import pytest
from astropy.constants import c as SPEED_OF_LIGHT
from astropy.tests.helper import assert_quantity_allclose
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

import dopplerkit as dk
from dopplerkit.exceptions import DegenerateGeometryWarning, NearLightSpeedWarning

mpmath.mp.dps = 50

betas = st.floats(min_value=1e-4, max_value=0.999, allow_nan=False)
angles_deg = st.floats(min_value=0.5, max_value=179.5, allow_nan=False)


# ---------------------------------------------------------------------------
# High-precision references (mpmath, 50 digits): the textbook formulas, no tricks
# ---------------------------------------------------------------------------
def mp_delta_from_gamma(gamma, theta):
    g = mpmath.mpf(gamma)
    b = mpmath.sqrt(1 - 1 / g**2)
    return 1 / (g * (1 - b * mpmath.cos(mpmath.mpf(theta))))


def mp_delta_from_beta(beta, theta):
    b = mpmath.mpf(beta)  # the float's exact binary value
    g = 1 / mpmath.sqrt(1 - b**2)
    return 1 / (g * (1 - b * mpmath.cos(mpmath.mpf(theta))))


# ---------------------------------------------------------------------------
# Forward formulas against their sources
# ---------------------------------------------------------------------------
def test_longitudinal_doppler_handbook_value():
    # RL79 eq. 4.11 at theta = 0: delta = sqrt((1 + beta)/(1 - beta)); beta = 0.6 gives exactly 2.
    assert_allclose(dk.doppler_factor(0.6, 0.0), 2.0, rtol=1e-15)
    assert_allclose(dk.redshift(0.6, 0.0), -0.5, rtol=1e-15)
    assert_allclose(dk.redshift(0.6, 180.0), 1.0, rtol=1e-15)
    assert_allclose(dk.lorentz_factor(0.6), 1.25, rtol=1e-15)


@pytest.mark.parametrize("beta", [0.01, 0.26, 0.6, 0.9, 0.99])
def test_transverse_doppler_observer_frame(beta):
    # RL79 sec. 4.1: at theta = 90 deg in the observer frame, 1 + z = Gamma (a redshift).
    # Gamma - 1 written as (Gamma beta)^2/(Gamma + 1) so the reference itself keeps its digits.
    g = dk.lorentz_factor(beta)
    assert_allclose(dk.redshift(beta, 90 * u.deg), (g * beta) ** 2 / (g + 1), rtol=1e-13)


@pytest.mark.parametrize("beta", [0.01, 0.26, 0.6, 0.9, 0.99])
def test_transverse_doppler_source_frame(beta):
    # RL79 sec. 4.1: a photon emitted at theta' = 90 deg in the source frame is blueshifted, 1 + z = 1/Gamma.
    theta_obs = dk.aberrate(90 * u.deg, beta)
    assert_allclose(1 + dk.redshift(beta, theta_obs), 1 / dk.lorentz_factor(beta), rtol=1e-13)
    # delta = Gamma (1 + beta cos theta') (RL79 eq. 4.11 written in the source frame)
    for tp in (10, 60, 120, 170):
        th = dk.aberrate(tp * u.deg, beta)
        assert_allclose(dk.doppler_factor(beta, th), dk.lorentz_factor(beta) * (1 + beta * np.cos(np.radians(tp))), rtol=1e-13)


@given(beta=betas, th=angles_deg)
def test_aberration_cosine_form(beta, th):
    # RL79 eq. 4.8: cos theta = (cos theta' + beta)/(1 + beta cos theta').
    obs = dk.aberrate(th * u.deg, beta).to_value(u.rad)
    ct = np.cos(np.radians(th))
    assert_allclose(np.cos(obs), (ct + beta) / (1 + beta * ct), atol=1e-12)


@given(beta=betas, th=angles_deg)
def test_aberration_round_trip(beta, th):
    # aberrate and deaberrate are inverse maps (RL79 eq. 4.8 with beta -> -beta); common practice.
    back = dk.deaberrate(dk.aberrate(th * u.deg, beta), beta)
    assert_quantity_allclose(back, th * u.deg, atol=1e-9 * u.deg)


@given(beta=betas, th=angles_deg)
def test_redshift_is_inverse_doppler(beta, th):
    # 1 + z = 1/delta (RL79 sec. 4.1).
    assert_allclose(1 + dk.redshift(beta, th * u.deg), 1 / dk.doppler_factor(beta, th * u.deg), rtol=1e-13)


def test_apparent_speed_maximum():
    # Rees66; UP95 app. A: beta_app = beta sin theta/(1 - beta cos theta), maximal (= Gamma beta) at cos theta = beta.
    for beta in (0.5, 0.9, 0.99, 0.999):
        th = np.arccos(beta) * u.rad
        g = dk.lorentz_factor(beta)
        assert_allclose(dk.apparent_speed(beta, th), g * beta, rtol=1e-12)
        grid = np.linspace(0.001, np.pi - 0.001, 20001) * u.rad
        assert dk.apparent_speed(beta, grid).max() <= g * beta * (1 + 1e-12)


def test_superluminal_handbook_value():
    # UP95 app. A / common textbook example: beta = 0.99 at theta = 8.1 deg (cos theta = beta) gives
    # beta_app = Gamma beta = 7.018 (Gamma = 7.089; from memory, checked by the formula above).
    assert_allclose(dk.apparent_speed(0.99, np.arccos(0.99) * u.rad), 0.99 / np.sqrt(1 - 0.99**2), rtol=1e-12)
    assert_allclose(dk.lorentz_factor(0.99), 7.0888120500833, rtol=1e-12)


@pytest.mark.parametrize("geometry,offset", [("blob", 3.0), ("jet", 2.0)])
@pytest.mark.parametrize("alpha", [-0.5, 0.0, 0.7, 1.2])
def test_beaming_exponents(geometry, offset, alpha):
    # LB85; UP95 eq. A9: S_obs = delta**(3 + alpha) S_emit (blob), delta**(2 + alpha) (continuous jet).
    beta, th = 0.8, 20 * u.deg
    d = dk.doppler_factor(beta, th)
    assert_allclose(dk.beaming_factor(beta, th, alpha, geometry), d ** (offset + alpha), rtol=1e-13)
    assert_allclose(dk.boost_exponent(alpha, geometry), offset + alpha)


@given(beta=betas, th=angles_deg, alpha=st.floats(-1, 2))
def test_jet_counterjet_ratio(beta, th, alpha):
    # LB85; Miller-Jones, Blundell & Duffy 2004, ApJ 603, L21: R = ((1 + beta cos theta)/(1 - beta cos theta))**p,
    # which is also the ratio of the two boosts at theta and 180 deg - theta.
    c = np.cos(np.radians(th))
    p = 2.0 + alpha
    expected = ((1 + beta * c) / (1 - beta * c)) ** p
    assert_allclose(dk.jet_counterjet_ratio(beta, th * u.deg, alpha, "jet"), expected, rtol=1e-9)
    ratio_of_boosts = dk.beaming_factor(beta, th * u.deg, alpha, "jet") / dk.beaming_factor(beta, (180 - th) * u.deg, alpha, "jet")
    assert_allclose(dk.jet_counterjet_ratio(beta, th * u.deg, alpha, "jet"), ratio_of_boosts, rtol=1e-9)
    # and its inverse, beta cos theta = (R**(1/p) - 1)/(R**(1/p) + 1) (same sources)
    assert_allclose(dk.beta_cos_theta_from_ratio(expected, alpha, "jet"), beta * c, atol=1e-10)


# ---------------------------------------------------------------------------
# Against astropy (a reference library) at theta = 0 and 180 deg
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("beta", [1e-6, 0.001, 0.1, 0.5, 0.9, 0.99])
def test_against_astropy_relativistic_doppler(beta):
    # astropy.units.doppler_relativistic: frequency of a source receding at v (positive v = receding).
    rest = 1000.0 * u.GHz
    for theta, sign in ((180 * u.deg, +1), (0 * u.deg, -1)):
        v = sign * beta * SPEED_OF_LIGHT
        nu_obs = v.to(u.GHz, equivalencies=u.doppler_relativistic(rest))
        assert_allclose(dk.doppler_factor(beta, theta), (nu_obs / rest).decompose().value, rtol=1e-12)
        # beta_from_redshift gives back astropy's radial velocity from the same shift
        z = dk.redshift(beta, theta)
        assert_allclose(dk.beta_from_redshift(z) * SPEED_OF_LIGHT.to_value(u.km / u.s), v.to_value(u.km / u.s), rtol=1e-9, atol=1e-12)


def test_velocity_readings_against_astropy():
    # astropy doppler_optical / doppler_radio / doppler_relativistic conventions (reference library).
    z = np.array([-0.3, -0.01, 0.001, 0.1, 0.5, 2.0])
    t = dk.velocity_readings(z)
    rest = 5000.0 * u.AA
    lam = rest * (1 + z)
    assert_quantity_allclose(t["cz"], lam.to(u.km / u.s, equivalencies=u.doppler_optical(rest)), rtol=1e-12)
    assert_quantity_allclose(t["v_radio"], lam.to(u.km / u.s, equivalencies=u.doppler_radio(rest)), rtol=1e-10)
    assert_quantity_allclose(t["v_relativistic"], lam.to(u.km / u.s, equivalencies=u.doppler_relativistic(rest)), rtol=1e-10)
    # the transverse reading is the beta whose Gamma - 1 is z (RL79 sec. 4.1); it exceeds the radial speed,
    # the smallest that gives z (a redshift seen at theta = 180 deg; same source)
    ok = z > 0
    assert_allclose(dk.lorentz_factor(t["beta_if_transverse"][ok]) - 1, z[ok], rtol=1e-10)
    assert np.all(t["beta_if_transverse"][ok & (z > 0)] > t["beta_radial"][ok & (z > 0)])
    assert np.all(np.isnan(t["beta_if_transverse"][~ok]))
    # the linear reading overestimates a large redshift's speed (common practice, no source)
    assert t["cz_error"][-1] > 1.0


# ---------------------------------------------------------------------------
# Numerics near c: against 50-digit arithmetic, not against ourselves
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("gamma", [1.0 + 1e-9, 1.5, 10.0, 1e3, 1e6, 1e8])
@pytest.mark.parametrize("theta", [0.0, 1e-9, 1e-7, 1e-4, 0.1, 1.0, np.pi / 2, 3.0, np.pi])
def test_doppler_factor_high_precision_gamma(gamma, theta):
    # Exact to a few ulp for any speed given as gamma (textbook 1 - beta cos theta loses digits here).
    expected = float(mp_delta_from_gamma(gamma, theta))
    assert_allclose(dk.doppler_factor(gamma=gamma, theta=theta * u.rad), expected, rtol=4e-15)
    z_expected = float(1 / mp_delta_from_gamma(gamma, theta) - 1)
    assert_allclose(dk.redshift(gamma=gamma, theta=theta * u.rad), z_expected, rtol=1e-14, atol=0)


@pytest.mark.parametrize("theta", [0.0, 1e-7, 1e-6, 1e-3])
def test_doppler_factor_high_precision_beta_near_one(theta):
    # beta = 1 - 1e-12 as a float: exact for that float's binary value; a warning says pass gamma=.
    beta = 1 - 1e-12
    with pytest.warns(NearLightSpeedWarning, match="gamma="):
        got = dk.doppler_factor(beta, theta * u.rad)
    assert_allclose(got, float(mp_delta_from_beta(beta, theta)), rtol=4e-15)


def test_textbook_form_loses_digits_where_we_do_not():
    # Demonstrates the cancellation in 1 - beta cos theta near beta -> 1, theta -> 0 (common practice, no source).
    gamma, theta = 1e6, 1e-7
    beta = np.sqrt(1 - 1 / gamma**2)
    textbook = 1 / (gamma * (1 - beta * np.cos(theta)))
    exact = float(mp_delta_from_gamma(gamma, theta))
    assert abs(textbook / exact - 1) > 1e-8
    assert abs(dk.doppler_factor(gamma=gamma, theta=theta * u.rad) / exact - 1) < 4e-15


@pytest.mark.parametrize("beta", [1e-12, 1e-8, 1e-4, 0.01])
def test_small_redshift_keeps_relative_precision(beta):
    # z -> -beta cos theta + O(beta^2) as beta -> 0; compare with 50 digits (z itself loses digits as beta -> 0: common practice, no source).
    for theta in (0.0, 0.7, np.pi / 2, 2.5):
        exact = 1 / mp_delta_from_beta(beta, theta) - 1
        assert_allclose(dk.redshift(beta, theta * u.rad), float(exact), rtol=1e-13)


def test_speed_as_velocity_quantity():
    # beta may come as a velocity; c from the SI definition (common practice).
    assert_allclose(dk.lorentz_factor(0.6 * 299792.458 * u.km / u.s), 1.25, rtol=1e-14)


# ---------------------------------------------------------------------------
# Inverse problems
# ---------------------------------------------------------------------------
@settings(max_examples=200)
@given(beta=st.floats(0.01, 0.99), th=st.floats(2.0, 178.0))
def test_jet_pair_round_trip_and_symmetry(beta, th):
    # M84: 1 + z_a = Gamma (1 - beta cos i), 1 + z_r = Gamma (1 + beta cos i), so (1+z_a) + (1+z_r) = 2 Gamma.
    za = dk.redshift(beta, th * u.deg)
    zr = dk.redshift(beta, (180 - th) * u.deg)
    assert_allclose((1 + za) + (1 + zr), 2 * dk.lorentz_factor(beta), rtol=1e-13)
    b, theta = dk.solve_jet_pair(za, zr)
    assert_allclose(b, beta, rtol=1e-9)
    assert_quantity_allclose(theta, th * u.deg, atol=1e-5 * u.deg)


def test_jet_pair_transverse_offset_published():
    # M84: for beta = 0.26 the mean redshift of the two jets is Gamma - 1 = 0.036 (value from memory).
    za = dk.redshift(0.26, 79 * u.deg)
    zr = dk.redshift(0.26, 101 * u.deg)
    assert_allclose(0.5 * (za + zr), 0.036, atol=5e-4)


def test_jet_pair_unphysical_and_degenerate():
    with pytest.raises(ValueError, match=r"unphysical jet pair.*\(1 \+ z_approaching\)\(1 \+ z_receding\) >= 1"):
        dk.solve_jet_pair(-0.2, 0.1)
    b, th = dk.solve_jet_pair([-0.2, -0.05], [0.1, 0.12], on_unphysical="nan")
    assert np.isnan(b[0]) and np.isfinite(b[1])
    with pytest.warns(DegenerateGeometryWarning, match="undetermined"):
        b, th = dk.solve_jet_pair(0.0, 0.0)
    assert b == 0 and np.isnan(th)


def test_proper_motions_published_case():
    # MR94: mu_a = 17.6 mas/d, mu_r = 9.0 mas/d at D = 12.5 kpc give beta = 0.92 and theta = 70 deg,
    # D_max = 13.7 kpc (values from memory; they follow from the formulas to the quoted digits).
    beta, theta = dk.solve_proper_motions(17.6 * u.mas / u.d, 9.0 * u.mas / u.d, 12.5 * u.kpc)
    assert_allclose(beta, 0.92, atol=0.005)
    assert_quantity_allclose(theta, 70 * u.deg, atol=1 * u.deg)
    with pytest.raises(ValueError, match=r"D_max = c/sqrt\(mu_a mu_r\) = 13.7"):
        dk.solve_proper_motions(17.6 * u.mas / u.d, 9.0 * u.mas / u.d, 14 * u.kpc)


def test_forward_proper_motions_published_case():
    # Mirabel & Rodriguez 1994 (values from memory): beta = 0.92, theta = 70 deg at 12.5 kpc give about
    # 17.6 and 9.0 mas/d; and proper_motions inverts solve_proper_motions exactly.
    mu_a, mu_r = dk.proper_motions(0.92, 70 * u.deg, 12.5 * u.kpc)
    assert_quantity_allclose(mu_a, 17.6 * u.mas / u.d, rtol=0.03)
    assert_quantity_allclose(mu_r, 9.0 * u.mas / u.d, rtol=0.03)
    b, th = dk.solve_proper_motions(mu_a, mu_r, 12.5 * u.kpc)
    assert_allclose(b, 0.92, rtol=1e-12)
    assert_quantity_allclose(th, 70 * u.deg, rtol=1e-12)
    with pytest.raises(TypeError, match="distance must be an astropy Quantity"):
        dk.proper_motions(0.5, 1.0, 12.5)


@given(beta=st.floats(0.05, 0.95), th=st.floats(5.0, 85.0))
def test_proper_motions_round_trip(beta, th):
    # MR94: mu_{a,r} = beta sin theta c/(D (1 -/+ beta cos theta)).
    d = 8.0 * u.kpc
    rate = (beta * np.sin(np.radians(th)) * SPEED_OF_LIGHT / d).to(u.mas / u.yr, equivalencies=u.dimensionless_angles())
    mu_a = rate / (1 - beta * np.cos(np.radians(th)))
    mu_r = rate / (1 + beta * np.cos(np.radians(th)))
    b, theta = dk.solve_proper_motions(mu_a, mu_r, d)
    assert_allclose(b, beta, rtol=1e-9)
    assert_quantity_allclose(theta, th * u.deg, atol=1e-7 * u.deg)


@given(z=st.floats(-0.6, 1.5).filter(lambda v: abs(v) > 1e-6))
def test_redshift_locus_reproduces_z(z):
    # every (beta, theta) on the locus gives back z (definition; RL79 sec. 4.1). Above beta = 0.999
    # z is ill-conditioned in beta (dz/dbeta ~ Gamma^3), so the check stops there.
    theta, beta = dk.redshift_locus(z, num=181)
    for branch in beta:
        ok = np.isfinite(branch) & (branch < 0.999)
        if ok.any():
            assert_allclose(dk.redshift(branch[ok], theta[ok]), z, rtol=1e-8, atol=1e-12)
    if z > 0:
        assert np.all(np.isnan(beta[1]) | np.isnan(beta[0]))  # one branch only for a redshift


def test_compose_redshift():
    # (1 + z_obs) = (1 + z_cosmo)(1 + z_kin), never a sum (Davis & Lineweaver 2004, PASA 21, 97; from memory).
    assert_allclose(dk.compose_redshift(1.0, -0.1), 0.8, rtol=1e-15)
    assert_allclose(dk.compose_redshift(1e-12, 2e-12), 3e-12, rtol=1e-9)
    assert_allclose(dk.compose_redshift([0.5, 1.0], 0.1), [0.65, 1.2], rtol=1e-15)


# ---------------------------------------------------------------------------
# Broadcasting, NaN, Quantities in and out
# ---------------------------------------------------------------------------
def test_broadcasting_and_types():
    beta = np.array([0.1, 0.5, 0.9])[:, None]
    theta = np.linspace(0, 180, 5) * u.deg
    d = dk.doppler_factor(beta, theta)
    assert d.shape == (3, 5) and isinstance(d, np.ndarray)
    assert isinstance(dk.doppler_factor(0.5, 10.0), float)
    a = dk.aberrate(theta, beta)
    assert a.unit == u.deg and a.shape == (3, 5)
    assert isinstance(dk.aberrate(30.0, 0.2), u.Quantity) and dk.aberrate(30.0, 0.2).isscalar
    # bare numbers are degrees (the one angle rule, as on the command line); any angle unit works
    assert_allclose(dk.doppler_factor(0.5, 60), dk.doppler_factor(0.5, 60 * u.deg))
    assert_allclose(dk.doppler_factor(0.5, np.pi / 3 * u.rad), dk.doppler_factor(0.5, 60 * u.deg))
    assert_allclose(dk.doppler_factor(0.5, 3600 * u.arcmin), dk.doppler_factor(0.5, 60 * u.deg))


def test_nan_propagates():
    # documented: NaN in, NaN out, no exception
    assert np.isnan(dk.doppler_factor(np.nan, 0.3))
    assert np.isnan(dk.redshift(0.3, np.nan))
    out = dk.doppler_factor(np.array([0.2, np.nan]), 0.0)
    assert np.isfinite(out[0]) and np.isnan(out[1])


# ---------------------------------------------------------------------------
# Bad input: the message names the parameter, the value and what is allowed
# ---------------------------------------------------------------------------
def test_bad_speeds():
    with pytest.raises(ValueError, match=r"beta must satisfy 0 <= beta < 1, got 1.2"):
        dk.doppler_factor(1.2, 0.0)
    with pytest.raises(ValueError, match=r"beta must satisfy 0 <= beta < 1, got -0.1 at index 1"):
        dk.lorentz_factor([0.1, -0.1])
    with pytest.raises(ValueError, match=r"beta must satisfy .* got 1.0"):
        dk.redshift(1.0, 0.0)
    with pytest.raises(ValueError, match=r"gamma must satisfy 1 <= gamma < inf, got 0.5"):
        dk.doppler_factor(gamma=0.5)
    with pytest.raises(TypeError, match=r"exactly one of beta= or gamma="):
        dk.doppler_factor(0.5, 0.0, gamma=2.0)
    with pytest.raises(TypeError, match=r"beta must be a number .* got str 'fast'"):
        dk.doppler_factor("fast", 0.0)
    with pytest.raises(u.UnitsError, match=r"beta must be dimensionless \(v/c\) or a speed, got unit Unit\(\"m\"\)"):
        dk.doppler_factor(3 * u.m, 0.0)


def test_bad_angles_and_options():
    with pytest.raises(u.UnitsError, match=r"theta must be an angle .* got unit Unit\(\"m\"\)"):
        dk.doppler_factor(0.5, 1 * u.m)
    with pytest.raises(ValueError, match=r"geometry must be one of 'blob' .* 'jet' .* got 'cone'"):
        dk.beaming_factor(0.5, 0.1, 0.7, "cone")
    with pytest.raises(ValueError, match=r"z must be > -1, got -1.5"):
        dk.beta_from_redshift(-1.5)
    with pytest.raises(TypeError, match=r"mu_approaching must be an astropy Quantity"):
        dk.solve_proper_motions(17.6, 9.0 * u.mas / u.d, 12 * u.kpc)
    with pytest.raises(u.UnitsError, match=r"distance must be a length"):
        dk.solve_proper_motions(17.6 * u.mas / u.d, 9.0 * u.mas / u.d, 12 * u.s)
    with pytest.raises(ValueError, match=r"ratio must be > 0, got -2.0"):
        dk.beta_cos_theta_from_ratio(-2.0)


def test_import_is_light():
    # `import dopplerkit` must not load the heavy optional stacks (DEVELOPERS.md, layering).
    code = (
        "import sys, dopplerkit, dopplerkit.kinematics;"
        "heavy = [m for m in ('specutils', 'lmfit', 'matplotlib', 'ipywidgets', 'dask', 'scipy', 'emcee') if m in sys.modules];"
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == ""


# ---------------------------------------------------------------------------
# One angle rule for the whole public API: a bare number is degrees, radians only as u.rad,
# viewing angles outside [0, 180] deg are refused (common practice of the project, no source).
# ---------------------------------------------------------------------------
def _angle_calls():
    from dopplerkit.models import cone_directions, cone_line_profile, precessing_jet_redshifts
    from dopplerkit.spectra import boost_arrays

    x = np.linspace(5000.0, 8000.0, 50)
    return {
        "doppler_factor": lambda th: dk.doppler_factor(0.3, th),
        "redshift": lambda th: dk.redshift(0.3, th),
        "apparent_speed": lambda th: dk.apparent_speed(0.3, th),
        "aberrate": lambda th: dk.aberrate(th, 0.3).to_value(u.deg),
        "deaberrate": lambda th: dk.deaberrate(th, 0.3).to_value(u.deg),
        "beaming_factor": lambda th: dk.beaming_factor(0.3, th, 0.7),
        "jet_counterjet_ratio": lambda th: dk.jet_counterjet_ratio(0.3, th, 0.7),
        "proper_motions": lambda th: dk.proper_motions(0.3, th, 5 * u.kpc)[0].value,
        "redshift_locus": lambda th: dk.redshift_locus(0.05, th)[1],
        "precessing_jet_redshifts": lambda th: precessing_jet_redshifts(3.0, 0.25, th, 20.0, 100.0, 0.0)[0],
        "cone_directions": lambda th: cone_directions(th, 5.0)[0],
        "cone_line_profile": lambda th: cone_line_profile(x * u.AA, 6564.61 * u.AA, 0.3, th, 5.0).value,
        "boost_arrays": lambda th: boost_arrays(x, None, "Angstrom", None, 0.3, th)[0],
    }


@pytest.mark.parametrize("name", sorted(_angle_calls()))
def test_bare_number_angles_are_degrees_everywhere(name):
    call = _angle_calls()[name]
    assert_allclose(call(37.0), call(37.0 * u.deg), rtol=1e-14)
    assert_allclose(call(np.radians(37.0) * u.rad), call(37.0 * u.deg), rtol=1e-12)
    for bad in (-30.0, 400.0, 200 * u.deg, -0.1 * u.rad):
        with pytest.raises(ValueError, match=r"must be an angle in \[0, 180\] deg"):
            call(bad)
    with pytest.raises(u.UnitsError, match="must be an angle"):
        call(3.0 * u.m)


def test_exact_head_on_pair_survives_rounding():
    # head-on (theta = 0): (1 + z_a)(1 + z_r) = Gamma^2 (1 - beta^2) = 1 exactly (Rybicki & Lightman 1979, sec. 4.1);
    # the rounded redshifts must still solve to beta and 0 deg, not "unphysical"
    for beta in (0.1, 0.5, 0.9, 0.99):
        za, zr = dk.redshift(beta, 0.0), dk.redshift(beta, 180.0)
        b, th = dk.solve_jet_pair(za, zr)
        assert_allclose(b, beta, rtol=1e-9)
        assert th.to_value(u.deg) < 1e-3


def test_negative_distance_is_refused():
    with pytest.raises(ValueError, match=r"distance must be > 0, got -5.0 km"):
        dk.proper_motions(0.3, 40.0, -5 * u.km)


# ---------------------------------------------------------------------------
# Jets of active galaxies
# ---------------------------------------------------------------------------
def test_apparent_speed_from_proper_motion_against_astropy_distances():
    # beta_app = mu D_A (1 + z)/c (Vermeulen & Cohen 1994, ApJ 430, 467, eq. 1; from memory),
    # with D_A from astropy's Planck18 as the reference library; and mu D/c for a nearby source
    from astropy.cosmology import Planck18

    mu = 0.5 * u.mas / u.yr
    for z in (0.05, 0.5, 2.0):
        ref = (mu.to(u.rad / u.s).value * Planck18.angular_diameter_distance(z).to_value(u.m) * (1 + z)) / 299792458.0
        assert_allclose(dk.apparent_speed_from_proper_motion(mu, z), ref, rtol=1e-10)
    near = 1e-4
    d = Planck18.comoving_distance(near).to_value(u.m)
    assert_allclose(dk.apparent_speed_from_proper_motion(mu, near), mu.to(u.rad / u.s).value * d / 299792458.0, rtol=3e-4)


@given(st.floats(0.05, 50.0))
def test_apparent_speed_limits_are_met_exactly(beta_app):
    # Rees 1966, Nature 211, 468: beta_app = beta sin theta/(1 - beta cos theta), largest (Gamma beta) at
    # cos theta = beta; the minimum speed gives beta_app exactly at theta_critical, and no speed
    # below c gives it beyond theta_max = 2 arctan(1/beta_app) (the beta -> 1 limit cot(theta/2))
    lim = dk.apparent_speed_limits(beta_app)
    assert_allclose(dk.apparent_speed(lim["beta_min"], lim["theta_critical"]), beta_app, rtol=1e-9)
    assert_allclose(lim["gamma_min"] * lim["beta_min"], beta_app, rtol=1e-12)  # Gamma beta = beta_app at the minimum
    th_max = lim["theta_max"].to_value(u.rad)
    assert_allclose(1 / np.tan(th_max / 2), beta_app, rtol=1e-12)
    assert dk.apparent_speed(gamma=1e4, theta=lim["theta_max"] * 1.001) < beta_app


@given(st.floats(1.001, 30.0), st.floats(0.5, 60.0))
def test_apparent_speed_and_doppler_factor_round_trip(gamma, theta):
    # closed forms of Hovatta et al. 2009, A&A 494, 527, eqs. 4-5 (from memory): (beta_app, delta) ->
    # (Gamma, theta) inverts apparent_speed and doppler_factor
    b_app = dk.apparent_speed(gamma=gamma, theta=theta)
    delta = dk.doppler_factor(gamma=gamma, theta=theta)
    g, th = dk.solve_apparent_and_doppler(b_app, delta)
    assert_allclose(g, gamma, rtol=1e-9)
    assert_allclose(th.to_value(u.deg), theta, rtol=1e-7, atol=1e-9)


def test_variability_brightness_temperature_constant_and_doppler_factor():
    # Hovatta et al. 2009, A&A 494, 527, eq. 1 (from memory): T_var = 1.548e-32 dS[Jy] d_L[m]^2 /
    # (nu[GHz]^2 tau[d]^2 (1 + z)) K; delta_var = (T_var/T_eq)^(1/3) with T_eq = 5e10 K
    # (Readhead 1994, ApJ 426, 51; Lahteenmaki & Valtaoja 1999, ApJ 521, 493)
    from astropy.cosmology import Planck18

    z, ds, nu, tau = 0.7, 2.0, 37.0, 60.0
    t = dk.variability_brightness_temperature(ds * u.Jy, nu * u.GHz, tau * u.d, z)
    dl = Planck18.luminosity_distance(z).to_value(u.m)
    published = 1.548e-32 * ds * dl**2 / (nu**2 * tau**2 * (1 + z))
    assert_allclose(t.to_value(u.K), published, rtol=5e-3)  # 1/(2 pi k) in these units is 1.544e-32
    assert_allclose(dk.variability_doppler_factor(t), (t.to_value(u.K) / 5e10) ** (1 / 3), rtol=1e-12)
    assert_allclose(dk.variability_doppler_factor(t, 1e12 * u.K), (t.to_value(u.K) / 1e12) ** (1 / 3), rtol=1e-12)
    # scalings: T_var ~ dS, 1/nu^2, 1/tau^2
    t2 = dk.variability_brightness_temperature(2 * ds * u.Jy, 2 * nu * u.GHz, 2 * tau * u.d, z)
    assert_allclose(t2 / t, 2 / 16, rtol=1e-12)


def test_counterjet_limit_and_opening_angle():
    # a counter-jet below 1/200 of the jet: beta cos theta >= tanh(ln 200/(2 p)) (Lind & Blandford 1985,
    # ApJ 295, 358); intrinsic opening angle: tan(phi_app/2) = tan(phi_int/2)/sin theta (Pushkarev et al.
    # 2009, A&A 507, L33; from memory), phi_int ~ phi_app sin theta for narrow jets
    p = 2.0 + 0.7
    assert_allclose(dk.counterjet_limit(100 * u.mJy, 0.5 * u.mJy), np.tanh(np.log(200.0) / (2 * p)), rtol=1e-12)
    assert_allclose(dk.counterjet_limit(100.0, 0.5, 0.7, "jet"), dk.beta_cos_theta_from_ratio(200.0, 0.7, "jet"), rtol=1e-12)
    assert_allclose(dk.intrinsic_opening_angle(0.2, 5.0).to_value(u.deg), 0.2 * np.sin(np.radians(5.0)), rtol=1e-4)
    assert_allclose(dk.intrinsic_opening_angle(40.0, 90.0).to_value(u.deg), 40.0, rtol=1e-12)  # side-on: as seen


@given(st.floats(-0.8, 3.0), st.floats(1e-6, 1e-3))
def test_beta_from_redshift_error_is_the_derivative(z, e):
    # first-order propagation (Bevington & Robinson 2003, ch. 3; from memory), checked against a central difference
    h = 1e-6
    slope = (dk.beta_from_redshift(z + h) - dk.beta_from_redshift(z - h)) / (2 * h)
    assert_allclose(dk.kinematics.beta_from_redshift_error(z, e), abs(slope) * e, rtol=1e-5)
