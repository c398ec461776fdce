"""Forward models: precessing jets, cone line profiles, synthetic spectra.

Sources: Abell & Margon 1979, Nature 279, 701 and Margon 1984, ARA&A 22, 507 (kinematic model of
precessing jets); Rybicki & Lightman 1979 sec. 4.1 (Doppler factor).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

import dopplerkit as dk
from dopplerkit.models import LineComponent, cone_directions, cone_line_profile, precessing_jet_redshifts, synthesize_spectrum


@settings(max_examples=50)
@given(beta=st.floats(0.01, 0.95), i=st.floats(0, 180), c=st.floats(0, 90), p=st.floats(1, 500), t0=st.floats(-100, 100))
def test_precession_mean_is_transverse_doppler(beta, i, c, p, t0):
    # Margon 1984: (z_1 + z_2)/2 = Gamma - 1 at every phase.
    t = np.linspace(-300, 300, 37)
    z1, z2 = precessing_jet_redshifts(t, beta, i * u.deg, c * u.deg, p, t0)
    g = dk.lorentz_factor(beta)
    assert_allclose(0.5 * (z1 + z2), (g * beta) ** 2 / (g + 1), rtol=1e-12, atol=1e-15)


def test_precession_published_system():
    # Margon 1984 (values from memory): beta = 0.26, i = 79 deg, cone 20 deg, P = 162.5 d give a mean
    # redshift of 0.036 and moving-line redshifts swinging between about -0.09 and +0.17 (z_2 max ~0.17).
    t = np.linspace(0, 162.5, 2001)
    z1, z2 = precessing_jet_redshifts(t, 0.26, 79 * u.deg, 20 * u.deg, 162.5, 0.0)
    assert_allclose(np.mean(0.5 * (z1 + z2)), 0.036, atol=5e-4)
    assert_allclose(z1.min(), -0.09, atol=0.015)
    assert_allclose(z2.max(), 0.17, atol=0.01)
    # jet 1 is nearest the line of sight at t0: most blueshifted there
    assert np.argmin(z1) == 0


def test_precession_with_time_quantities():
    z1, _z2 = precessing_jet_redshifts(np.array([0.0, 10.0]) * u.d, 0.2, 60 * u.deg, 20 * u.deg, 100 * u.d, 0 * u.d)
    z1b, _z2b = precessing_jet_redshifts(
        np.array([0.0, 10.0]) / 24.0 * u.hour * 24 * 24, 0.2, 60 * u.deg, 20 * u.deg, 2400 * u.hour, 0 * u.d
    )
    assert_allclose(z1, z1b, rtol=1e-12)


def test_light_travel_time():
    t = np.linspace(0, 200, 11)
    a = precessing_jet_redshifts(t, 0.26, 79 * u.deg, 20 * u.deg, 162.5, 0.0)
    b = precessing_jet_redshifts(t, 0.26, 79 * u.deg, 20 * u.deg, 162.5, 0.0, emission_delay=0.0)
    assert_allclose(a, b, rtol=0, atol=1e-15)
    # with a delay tau, the light seen at t left a blob ejected at t_ej with t = t_ej + tau (1 - beta cos angle_1(t_ej))
    # (the blob moved beta c tau towards us: common practice, no source). Solved here independently by
    # bracketing root-finding (scipy brentq), then 1 + z = Gamma (1 - beta cos) (Rybicki & Lightman 1979, sec. 4.1).
    from scipy.optimize import brentq

    beta, tau, period = 0.26, 2.0, 162.5
    si, ci = np.sin(np.radians(79)), np.cos(np.radians(79))
    sc, cc = np.sin(np.radians(20)), np.cos(np.radians(20))

    def cos1(te):
        return si * sc * np.cos(2 * np.pi * te / period) + ci * cc

    z1, _ = precessing_jet_redshifts(t, beta, 79 * u.deg, 20 * u.deg, period, 0.0, emission_delay=tau)
    g = dk.lorentz_factor(beta)
    for tk, zk in zip(t, z1, strict=True):
        te = brentq(lambda x, tk=tk: x + tau * (1 - beta * cos1(x)) - tk, tk - 3 * tau, tk + tau)
        assert_allclose(zk, g * (1 - beta * cos1(te)) - 1, rtol=0, atol=1e-12)


def test_too_long_emission_delay_is_refused():
    # t(t_ej) stops being one-to-one when tau beta (2 pi/P) sin i sin(cone) >= 1 (derivative of the relation above)
    with pytest.raises(ValueError, match=r"emission_delay is too long"):
        precessing_jet_redshifts(np.linspace(0, 10, 5), 0.9, 90 * u.deg, 60 * u.deg, 5.0, 0.0, emission_delay=5.0)


def test_cone_quadrature_matches_monte_carlo():
    # Directions uniform over the cone's solid angle (common practice): cos(omega) uniform in [cos phi, 1].
    rng = np.random.default_rng(3)
    theta, phi, beta = 30.0 * u.deg, 15.0 * u.deg, 0.4
    n = 400_000
    mu = rng.uniform(np.cos(phi).value, 1.0, n)
    chi = rng.uniform(0, 2 * np.pi, n)
    cos_psi = np.cos(theta).value * mu + np.sin(theta).value * np.sqrt(1 - mu**2) * np.cos(chi)
    d_mc = dk.doppler_factor(beta, np.arccos(cos_psi) * u.rad)
    cq, w = cone_directions(theta, phi)
    d_q = dk.doppler_factor(beta, np.arccos(np.clip(cq, -1, 1)) * u.rad)
    for power in (1, 3, 4):
        mc = np.mean(d_mc**power)
        err = np.std(d_mc**power) / np.sqrt(n)
        assert abs(np.sum(w * d_q**power) - mc) < 4 * err
    # and the profile: quadrature vs Monte Carlo histogram
    x = np.linspace(4000, 6000, 801) * u.AA
    prof = cone_line_profile(x, 6564.61 * u.AA, beta, theta, phi, intrinsic_fwhm=100 * u.km / u.s)
    hist, edges = np.histogram(6564.61 / d_mc, bins=np.linspace(4000, 6000, 101), density=True)
    centres = 0.5 * (edges[1:] + edges[:-1])
    coarse = np.interp(centres, x.value, prof.value)
    assert np.max(np.abs(coarse - hist)) < 0.1 * hist.max()
    assert_allclose(np.trapezoid(prof.value, x.value), 1.0, rtol=1e-3)


def test_cone_zero_opening_is_single_direction():
    # a cone of zero opening is its axis alone (common practice, no source)
    cq, w = cone_directions(30.0, 0.0)  # bare numbers are degrees
    assert_allclose(cq, [np.cos(np.radians(30.0))])
    assert_allclose(w, [1.0])


def test_synthesize_places_lines():
    x = np.linspace(6000, 7500, 6001) * u.AA
    z = dk.redshift(0.2, 60 * u.deg)
    s = synthesize_spectrum(x, [LineComponent("H-alpha", z=z, fwhm=500 * u.km / u.s, strength=3.0)], continuum=2.0)
    peak = x[np.argmax(s.flux.value)].value
    assert abs(peak - 6564.614 * (1 + z)) < 0.25 + 1e-9
    assert s.meta["medium"] == "vacuum" and s.uncertainty is not None
    s_air = synthesize_spectrum(x, [LineComponent("H-alpha", z=0.0, fwhm=100 * u.km / u.s, strength=3.0)], medium="air")
    assert abs(x[np.argmax(s_air.flux.value)].value - 6562.80) < 0.3  # NIST air value (from memory)


def test_synthesize_noise_is_seeded():
    x = np.linspace(1, 10, 500) * u.keV
    a = synthesize_spectrum(x, [], snr=10, seed=5, flux_unit="ph / (s cm2 keV)")
    b = synthesize_spectrum(x, [], snr=10, seed=5, flux_unit="ph / (s cm2 keV)")
    assert_allclose(a.flux.value, b.flux.value, rtol=0)
    assert_allclose(np.std(a.flux.value - 1.0), 0.1, rtol=0.15)


def test_synthesize_bad_profile():
    with pytest.raises(ValueError, match="profile must be 'gaussian' or 'lorentzian'"):
        synthesize_spectrum(np.linspace(6000, 7000, 10) * u.AA, [LineComponent("H-alpha", profile="box")])


def test_emission_adds_to_a_sloped_continuum():
    # An emission line adds its flux to the continuum, whatever the continuum's slope (common practice, no
    # source): the residual is a symmetric Gaussian of peak strength x continuum at the centre.
    x = np.linspace(5500.0, 6000.0, 2001) * u.AA
    cont = {"kind": "powerlaw", "amplitude": 1.0, "index": -3.0, "pivot": 5750 * u.AA}
    s = synthesize_spectrum(x, [LineComponent(5750.0 * u.AA, z=0.0, fwhm=1000 * u.km / u.s, strength=2.0)], continuum=cont)
    bare = synthesize_spectrum(x, [], continuum=cont)
    line = s.flux.value - bare.flux.value
    xv = x.value
    assert_allclose(line.max(), 2.0, rtol=1e-4)
    centroid = np.sum(xv * line) / np.sum(line)
    assert abs(centroid - 5750.0) < 1e-3  # no pull towards the brighter blue side


def test_fast_wide_cone_profile_has_no_quadrature_ripple():
    # beta 0.99, a 40 deg cone seen at 30 deg, 50 km/s lines: the centres spread over far more line widths than
    # the node cap allows. The profile must still match a converged computation (6x the nodes) to 1% (common
    # practice, no source; the Monte Carlo test above checks the weights and the unit area)
    x = np.geomspace(1500.0, 40000.0, 2001) * u.AA
    kw = {"intrinsic_fwhm": 50 * u.km / u.s}
    prof = cone_line_profile(x, 6564.61 * u.AA, 0.99, 30, 40, **kw).value
    ref = cone_line_profile(x, 6564.61 * u.AA, 0.99, 30, 40, max_nodes=120_000, **kw).value
    body = ref > 0.05 * ref.max()
    assert np.max(np.abs(prof[body] / ref[body] - 1)) < 0.01
