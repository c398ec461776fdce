"""Transforms of whole spectra: boost_spectrum / deboost_spectrum.

Sources: Rybicki & Lightman 1979 (Radiative Processes in Astrophysics), sec. 4.9: I_nu/nu^3 is
invariant, hence F_nu,obs(nu) = delta^q F_nu,emit(nu/delta) with q = 3 (blob) or 2 (continuous
jet; Lind & Blandford 1985, ApJ 295, 358). The per-wavelength and photon exponents and the
integrated-flux powers delta^4 / delta^3 are derived in dopplerkit/spectra.py and checked here by
integrating a line numerically, not by restating the formula. Cosmological flux: Hogg 1999,
astro-ph/9905116, eq. 22, with astropy.cosmology (a reference library) for the distance.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import InverseVariance, StdDevUncertainty, VarianceUncertainty
from astropy.tests.helper import assert_quantity_allclose
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from specutils import Spectrum

import dopplerkit as dk
from dopplerkit.spectra import boost_arrays, boost_spectrum, deboost_spectrum, flux_scaling, is_observer_frame, resample


def _integral(spec):
    x = spec.spectral_axis.value
    order = np.argsort(x)
    return np.trapezoid(spec.flux.value[order] - np.median(spec.flux.value), x[order])


def _centroid(spec):
    x = spec.spectral_axis.value
    w = spec.flux.value - np.median(spec.flux.value)
    return np.sum(x * w) / np.sum(w)


@pytest.mark.parametrize("beta,theta", [(0.3, 20 * u.deg), (0.6, 0 * u.deg), (0.9, 120 * u.deg), (0.26, 79 * u.deg)])
def test_line_centre_lands_where_predicted(spectrum_angstrom, beta, theta):
    # lambda_obs = lambda_emit / delta (Rybicki & Lightman 1979, sec. 4.1), to 1e-6 relative
    obs = boost_spectrum(spectrum_angstrom, beta, theta)
    assert_allclose(_centroid(obs), 6000.0 / dk.doppler_factor(beta, theta), rtol=1e-6)


@pytest.mark.parametrize("beaming,q", [("blob", 3), ("jet", 2)])
@pytest.mark.parametrize("beta,theta", [(0.3, 20 * u.deg), (0.8, 100 * u.deg)])
def test_integrated_line_flux_powers(spectrum_angstrom, spectrum_ghz, beaming, q, beta, theta):
    # integrated line flux scales as delta^(q+1): delta^4 (blob), delta^3 (jet) -- for F_lambda and F_nu alike
    d = dk.doppler_factor(beta, theta)
    for spec in (spectrum_angstrom, spectrum_ghz):
        obs = boost_spectrum(spec, beta, theta, beaming=beaming)
        assert_allclose(_integral(obs) / _integral(spec), d ** (q + 1), rtol=1e-4)


def test_photon_flux_exponent():
    # photon counts: each photon carries delta times the energy, so the photon-rate integral scales as delta^q
    x = np.linspace(4.0, 9.0, 5001)
    flux = 1e-3 + 1e-2 * np.exp(-0.5 * ((x - 6.4) / 0.02) ** 2)
    s = Spectrum(flux=flux * u.Unit("ph / (s cm2 keV)"), spectral_axis=x * u.keV)
    obs = boost_spectrum(s, 0.2, 60 * u.deg, beaming="blob")
    d = dk.doppler_factor(0.2, 60 * u.deg)
    assert_allclose(_integral(obs) / _integral(s), d**3, rtol=1e-4)
    assert flux_scaling(u.Unit("ph / (s cm2 keV)")) == (1, True)


def test_round_trip_and_no_mutation(spectrum_angstrom):
    before_axis = spectrum_angstrom.spectral_axis.copy()
    before_flux = spectrum_angstrom.flux.copy()
    obs = boost_spectrum(spectrum_angstrom, 0.7, 30 * u.deg, beaming="blob", z_cosmo=0.5)
    back = deboost_spectrum(obs, 0.7, 30 * u.deg, beaming="blob", z_cosmo=0.5)
    assert_quantity_allclose(back.spectral_axis, before_axis, rtol=1e-14)
    assert_quantity_allclose(back.flux, before_flux, rtol=1e-13)
    assert_allclose(back.uncertainty.array, spectrum_angstrom.uncertainty.array, rtol=1e-13)
    assert_quantity_allclose(spectrum_angstrom.spectral_axis, before_axis, rtol=0)
    assert is_observer_frame(obs) is True and is_observer_frame(back) is False and is_observer_frame(spectrum_angstrom) is None
    assert obs.meta["dopplerkit_history"][-1]["beaming"] == "blob"


def test_air_axis_round_trip(spectrum_angstrom):
    air = Spectrum(flux=spectrum_angstrom.flux, spectral_axis=spectrum_angstrom.spectral_axis, meta={"medium": "air"})
    back = deboost_spectrum(boost_spectrum(air, 0.4, 1.0), 0.4, 1.0)
    assert_quantity_allclose(back.spectral_axis, air.spectral_axis, rtol=1e-12)


def test_axes_give_same_physics(spectrum_angstrom):
    # the same spectrum on wavelength, frequency and energy axes gives the same observed line (common practice)
    beta, theta = 0.5, 40 * u.deg
    wav = boost_spectrum(spectrum_angstrom, beta, theta)
    freq_axis = spectrum_angstrom.spectral_axis.to(u.THz, equivalencies=u.spectral())
    en_axis = spectrum_angstrom.spectral_axis.to(u.eV, equivalencies=u.spectral())
    for axis in (freq_axis, en_axis):
        s = Spectrum(flux=spectrum_angstrom.flux.value * u.Jy, spectral_axis=axis)
        o = boost_spectrum(s, beta, theta)
        assert_quantity_allclose(o.spectral_axis.to(u.AA, equivalencies=u.spectral()), wav.spectral_axis, rtol=1e-12)


def test_uncertainty_types_scale():
    x = np.linspace(1.0, 2.0, 5) * u.um
    f = np.ones(5) * u.Unit("W / (m2 um)")
    d = dk.doppler_factor(0.5, 0.0)
    k = d ** (3 + 2)  # per-wavelength blob: delta^(q + 2)
    for unc, expect in ((StdDevUncertainty(np.ones(5)), k), (VarianceUncertainty(np.ones(5)), k**2), (InverseVariance(np.ones(5)), k**-2)):
        s = Spectrum(flux=f, spectral_axis=x, uncertainty=unc, mask=np.array([0, 1, 0, 0, 0], bool), meta={"medium": "vacuum"})
        o = boost_spectrum(s, 0.5, 0.0, beaming="blob")
        assert type(o.uncertainty) is type(unc)
        assert_allclose(o.uncertainty.array, expect, rtol=1e-13)
        assert o.mask.tolist() == [False, True, False, False, False]


def test_cosmology_flux(spectrum_ghz):
    # F_nu(nu_o) = (1 + z) L_nu(nu_e)/(4 pi D_L^2) (Hogg 1999, astro-ph/9905116, eq. 22); astropy cosmology for D_L
    from astropy.cosmology import Planck18

    lum = Spectrum(flux=spectrum_ghz.flux.value * u.Unit("erg / (s Hz)"), spectral_axis=spectrum_ghz.spectral_axis)
    z = 0.8
    o = boost_spectrum(lum, 0.0, 0.0, z_cosmo=z, cosmology=Planck18)
    dl = Planck18.luminosity_distance(z).to_value(u.cm)
    assert_allclose(o.flux.value, (1 + z) * lum.flux.value / (4 * np.pi * dl**2), rtol=1e-12)
    assert_quantity_allclose(o.spectral_axis, lum.spectral_axis / (1 + z), rtol=1e-14)
    # a luminosity density in, a flux density out (per cm2), and back
    assert o.flux.unit == u.Unit("erg / (s Hz cm2)")
    back = deboost_spectrum(o, 0.0, 0.0, z_cosmo=z, cosmology=Planck18)
    assert back.flux.unit.is_equivalent(u.Unit("erg / (s Hz)"))
    assert_allclose(back.flux.to_value(u.Unit("erg / (s Hz)")), lum.flux.value, rtol=1e-12)
    # a flux density is not a luminosity density; z = 0 has no luminosity distance
    with pytest.raises(u.UnitsError, match=r"must be a luminosity density"):
        boost_spectrum(spectrum_ghz, 0.0, 0.0, z_cosmo=z, cosmology=Planck18)
    with pytest.raises(ValueError, match=r"needs z_cosmo > 0"):
        boost_spectrum(lum, 0.0, 0.0, z_cosmo=0.0, cosmology=Planck18)


def test_flux_per_unit_wavenumber_scales_as_per_unit_frequency():
    # F_sigma = F_nu |d nu/d sigma| with sigma = nu/c: a density per unit wavenumber transforms like F_nu
    # (Rybicki & Lightman 1979, sec. 4.9), so its line integral scales as delta^(q+1) (delta^4 for a blob).
    # erg/s/cm2/(1/cm) = erg/s/cm is also what a luminosity per unit wavelength looks like: the axis decides.
    x = np.linspace(15000.0, 17000.0, 4001)
    flux = 1.0 + 5.0 * np.exp(-0.5 * ((x - 16000.0) / 5.0) ** 2)
    s = Spectrum(flux=flux * (u.erg / u.s / u.cm**2 / (1 / u.cm)), spectral_axis=x / u.cm)
    assert flux_scaling(s.flux.unit, s.spectral_axis.unit) == (1, False)
    obs = boost_spectrum(s, 0.3, 20 * u.deg, beaming="blob")
    d = dk.doppler_factor(0.3, 20 * u.deg)
    assert_allclose(_integral(obs) / _integral(s), d**4, rtol=1e-4)


def test_bad_inputs(spectrum_angstrom):
    with pytest.raises(ValueError, match=r"beaming must be one of .*'blob'.*got 'sphere'"):
        boost_spectrum(spectrum_angstrom, 0.5, 0.0, beaming="sphere")
    norm = Spectrum(flux=np.ones(4) * u.one, spectral_axis=[1, 2, 3, 4] * u.AA)
    with pytest.raises(u.UnitsError, match=r"not a flux \(or luminosity\) density"):
        boost_spectrum(norm, 0.5, 0.0, beaming="jet")
    with pytest.raises(ValueError, match=r"beta must be a single value"):
        boost_spectrum(spectrum_angstrom, [0.1, 0.2], 0.0)
    with pytest.raises(ValueError, match=r"z_cosmo must be a finite redshift > -1, got -2.0"):
        boost_spectrum(spectrum_angstrom, 0.1, 0.0, z_cosmo=-2)
    # a velocity is not a redshift (3000 km/s is not z = 3000)
    with pytest.raises(u.UnitsError, match=r"z_cosmo must be dimensionless"):
        boost_spectrum(spectrum_angstrom, 0.1, 0.0, z_cosmo=3000 * u.km / u.s)


def test_arrays_path_matches_spectrum(spectrum_angstrom):
    o = boost_spectrum(spectrum_angstrom, 0.3, 0.2, beaming="jet")
    ax, fl = boost_arrays(
        spectrum_angstrom.spectral_axis.value, spectrum_angstrom.flux.value, "AA", "erg / (s cm2 Angstrom)", 0.3, 0.2, beaming="jet"
    )
    assert_allclose(ax, o.spectral_axis.value, rtol=1e-15)
    assert_allclose(fl, o.flux.value, rtol=1e-15)


def test_resample_conserves_flux(spectrum_angstrom):
    # specutils FluxConservingResampler conserves the integral (Carnall 2017, arXiv:1705.05165, from memory; specutils docs)
    grid = np.linspace(5100, 6900, 900) * u.AA
    r = resample(spectrum_angstrom, grid)
    sub = spectrum_angstrom[5100 * u.AA : 6900 * u.AA]
    assert_allclose(_integral(r), _integral(sub), rtol=2e-3)


@settings(max_examples=40, deadline=None)
@given(
    beta=st.floats(0.0, 0.99),
    angle=st.floats(0.0, 180.0),
    beaming=st.sampled_from([None, "blob", "jet"]),
    z_cosmo=st.floats(0.0, 5.0),
    unit=st.sampled_from(["Angstrom", "GHz", "keV"]),
)
def test_boost_deboost_round_trip_property(beta, angle, beaming, z_cosmo, unit):
    # deboost_spectrum is the exact inverse of boost_spectrum for any speed, angle, geometry and host z (common practice)
    axis = np.linspace(1.0, 2.0, 50) * u.Unit(unit)
    flux_unit = {"Angstrom": "erg / (s cm2 Angstrom)", "GHz": "Jy", "keV": "ph / (s cm2 keV)"}[unit]
    s = Spectrum(flux=np.linspace(1, 3, 50) * u.Unit(flux_unit), spectral_axis=axis, meta={"medium": "vacuum"})
    back = deboost_spectrum(
        boost_spectrum(s, beta, angle * u.deg, beaming=beaming, z_cosmo=z_cosmo), beta, angle * u.deg, beaming=beaming, z_cosmo=z_cosmo
    )
    assert_allclose(back.spectral_axis.value, axis.value, rtol=1e-12)
    assert_allclose(back.flux.value, s.flux.value, rtol=1e-10)


def test_arrays_broadcast_over_angles(spectrum_angstrom):
    # one observed spectrum per angle, each equal to the scalar call (common practice: broadcasting)
    th = np.array([0.1, 1.0, 2.5])
    x, f = spectrum_angstrom.spectral_axis.value, spectrum_angstrom.flux.value
    ax, fl = boost_arrays(x, f, "AA", "erg / (s cm2 Angstrom)", 0.4, th, beaming="blob")
    assert ax.shape == fl.shape == (3, x.size)
    for i, t in enumerate(th):
        a1, f1 = boost_arrays(x, f, "AA", "erg / (s cm2 Angstrom)", 0.4, t, beaming="blob")
        assert_allclose(ax[i], a1, rtol=1e-15)
        assert_allclose(fl[i], f1, rtol=1e-15)


def test_with_medium_marks_a_copy(spectrum_angstrom):
    from dopplerkit.spectra import spectral_medium, with_medium

    air = with_medium(spectrum_angstrom, "air")
    assert spectral_medium(air) == "air" and spectral_medium(spectrum_angstrom) == "vacuum"
    with pytest.raises(ValueError, match="medium must be 'air' or 'vacuum'"):
        with_medium(spectrum_angstrom, "water")


# ---------------------------------------------------------------------------
# The observer's motion: topocentric axes moved to the solar-system barycentre. Reference: astropy's
# SpectralCoord.with_observer_stationary_relative_to (an exact velocity transformation, a separate
# code path from the radial_velocity_correction used by dopplerkit); Earth's mean orbital speed
# 29.78 km/s (Cox 2000, Allen's Astrophysical Quantities, 4th ed., ch. 12; from memory).
# ---------------------------------------------------------------------------
_SITE = {"OBSGEO-X": 4843319.3, "OBSGEO-Y": 2499823.5, "OBSGEO-Z": -3304672.2}  # a point on the Earth's surface (invented)


def _topo_meta(**extra):
    return (
        {"SPECSYS": "TOPOCENT", "RA": "07:12:45.0", "DEC": "+18:20:00", "DATE-OBS": "2025-03-10T04:12:00", "EXPTIME": 1200.0}
        | _SITE
        | extra
    )


def _spectralcoord_barycentric(axis, meta, mid_time):
    import warnings

    from astropy.coordinates import EarthLocation, SkyCoord, SpectralCoord
    from astropy.time import Time

    loc = EarthLocation.from_geocentric(meta["OBSGEO-X"], meta["OBSGEO-Y"], meta["OBSGEO-Z"], unit=u.m)
    t = Time(mid_time, scale="utc")
    target = SkyCoord(
        f"{meta['RA']} {meta['DEC']}",
        unit=(u.hourangle, u.deg),
        frame="icrs",
        distance=1 * u.kpc,
        radial_velocity=0 * u.km / u.s,
        pm_ra_cosdec=0 * u.mas / u.yr,
        pm_dec=0 * u.mas / u.yr,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # astropy: no IERS download here, and the target's distance is nominal
        return SpectralCoord(axis, observer=loc.get_itrs(obstime=t), target=target).with_observer_stationary_relative_to("icrs")


@pytest.mark.parametrize("axis", [np.linspace(6000, 7000, 9) * u.AA, np.linspace(1.3, 1.5, 9) * u.GHz, np.linspace(6.0, 7.5, 9) * u.keV])
def test_to_barycentric_matches_astropy_spectralcoord(axis):
    meta = _topo_meta(medium="vacuum")
    s = Spectrum(flux=np.ones(axis.size) * u.Jy, spectral_axis=axis, uncertainty=StdDevUncertainty(np.full(axis.size, 0.1)), meta=meta)
    b = dk.spectra.to_barycentric(s)
    want = _spectralcoord_barycentric(axis, meta, "2025-03-10T04:22:00")  # mid-exposure: DATE-OBS + EXPTIME / 2
    # agreement to 0.01 km/s (astropy's radial_velocity_correction convention is good to the m/s level)
    assert_allclose((b.spectral_axis.value - want.to_value(axis.unit)) / axis.value * 299792.458, 0.0, atol=0.01)
    assert b.meta["SPECSYS"] == "BARYCENT" and dk.spectra.spectral_frame(s) == "TOPOCENT"
    assert_allclose(b.meta["barycentric_correction"], dk.spectra.barycentric_correction(s).to_value(u.km / u.s))
    assert s.meta["SPECSYS"] == "TOPOCENT"  # the input is not touched
    assert_allclose(b.flux.value, s.flux.value) and np.array_equal(b.uncertainty.array, s.uncertainty.array)


def test_to_barycentric_air_axis_moves_vacuum_wavelengths():
    # an air axis is converted to vacuum, moved and converted back (a Doppler shift scales vacuum wavelengths)
    air = np.linspace(6000, 7000, 9) * u.AA
    s = Spectrum(flux=np.ones(9) * u.Jy, spectral_axis=air, meta=_topo_meta(medium="air"))
    b = dk.spectra.to_barycentric(s, 20 * u.km / u.s)
    vac = dk.lines.air_to_vacuum(air) * (1 + 20 / 299792.458)
    assert_quantity_allclose(b.spectral_axis, dk.lines.vacuum_to_air(vac), rtol=1e-12)


def test_barycentric_correction_size_on_the_sky():
    # a target at the ecliptic pole sees none of Earth's orbital speed (only rotation, <= 0.47 km/s, and
    # the Earth-Moon motion); one on the ecliptic sees all of it over a year (29.78 km/s, Cox 2000; from memory)
    from astropy.coordinates import GeocentricTrueEcliptic, SkyCoord

    pole = SkyCoord(lon=0 * u.deg, lat=90 * u.deg, frame=GeocentricTrueEcliptic()).icrs
    plane = SkyCoord(lon=100 * u.deg, lat=0 * u.deg, frame=GeocentricTrueEcliptic()).icrs
    v_pole, v_plane = [], []
    for day in range(0, 365, 15):
        base = _SITE | {"SPECSYS": "TOPOCENT", "MJD-OBS": 60676.0 + day}
        v_pole.append(dk.spectra.barycentric_correction(base | {"RA": pole.ra.deg, "DEC": pole.dec.deg}).value)
        v_plane.append(dk.spectra.barycentric_correction(base | {"RA": plane.ra.deg, "DEC": plane.dec.deg}).value)
    assert np.max(np.abs(v_pole)) < 0.6
    assert 29.0 < np.max(np.abs(v_plane)) < dk.spectra.EARTH_MOTION_MAX_KMS
    assert np.max(v_plane) > 29.0 and np.min(v_plane) < -29.0  # towards and away from the target, half a year apart


def test_barycentric_correction_header_forms():
    bc = dk.spectra.barycentric_correction
    v = bc(_topo_meta()).value
    # degrees instead of sexagesimal; MJD instead of DATE-OBS (mid-exposure given directly)
    deg = _topo_meta(RA=108.1875, DEC=18.3333333)
    assert abs(bc(deg).value - v) < 1e-3
    mid = {k: val for k, val in _topo_meta().items() if k not in ("DATE-OBS", "EXPTIME")} | {"MJD-AVG": 60744.18194444}
    assert abs(bc(mid).value - v) < 1e-3
    # a geocentric axis needs no observatory: it differs from the topocentric one by Earth's rotation (<= 0.47 km/s)
    geo = {k: val for k, val in _topo_meta().items() if not k.startswith("OBSGEO")} | {"SPECSYS": "GEOCENTR"}
    assert 0 < abs(bc(geo).value - v) < 0.47
    # the observatory as longitude, latitude and height (OBSGEO-L/B/H) instead of X/Y/Z
    from astropy.coordinates import EarthLocation

    geo = EarthLocation.from_geocentric(_SITE["OBSGEO-X"], _SITE["OBSGEO-Y"], _SITE["OBSGEO-Z"], unit=u.m).to_geodetic()
    lbh = {k: val for k, val in _topo_meta().items() if not k.startswith("OBSGEO")}
    lbh |= {"OBSGEO-L": float(geo.lon.deg), "OBSGEO-B": float(geo.lat.deg), "OBSGEO-H": float(geo.height.to_value(u.m))}
    assert abs(bc(lbh).value - v) < 1e-6
    # date and time in two keywords (older headers)
    split = _topo_meta(**{"DATE-OBS": "2025-03-10", "TIME-OBS": "04:12:00"})
    assert abs(bc(split).value - v) < 1e-3
    with pytest.raises(ValueError, match=r"DATE-OBS = '2025-03-10' gives the date only"):
        bc(_topo_meta(**{"DATE-OBS": "2025-03-10"}))
    bare = {"SPECSYS": "TOPOCENT"}
    with pytest.raises(
        ValueError,
        match=r"lacks the target \(RA_OBJ/DEC_OBJ or RA/DEC\); the time .*; the observatory \(OBSGEO-X/Y/Z in metres or OBSGEO-L/B/H",
    ):
        bc(bare)
    with pytest.raises(ValueError, match=r"header RA = 'north' is neither degrees nor a sexagesimal angle"):
        bc(_topo_meta(RA="north"))
    with pytest.raises(ValueError, match=r"correction must be one finite speed within \+-1000 km/s"):
        dk.spectra.to_barycentric(Spectrum(flux=np.ones(3) * u.Jy, spectral_axis=[1, 2, 3] * u.keV), [1, 2] * u.km / u.s)
    with pytest.raises(u.UnitsError, match="correction must be a speed"):
        dk.spectra.to_barycentric(Spectrum(flux=np.ones(3) * u.Jy, spectral_axis=[1, 2, 3] * u.keV), 3 * u.AA)
