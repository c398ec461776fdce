"""Kinematic fits: recovery, calibration of the uncertainties, published cases, model comparison.

Published cases (source beside each): Mirabel & Rodriguez 1994 (Nature 371, 46), Margon 1984
(ARA&A 22, 507), Nardini et al. 2015 (Science 347, 860). Recovery and calibration use invented
synthetic data made with dopplerkit.models, with fixed seeds.
"""

from __future__ import annotations

import re
import warnings

import astropy.units as u
import numpy as np
import pytest
from numpy.testing import assert_allclose

import dopplerkit as dk
from dopplerkit.exceptions import FitAtBoundWarning, FitQualityWarning, WeakLineWarning
from dopplerkit.fitting import compare_models, fit_constraints, fit_jet_pair, fit_precessing_jet, fits_table
from dopplerkit.measure import measure_lines
from dopplerkit.models import LineComponent, precessing_jet_redshifts, synthesize_spectrum


def test_jet_pair_exact_and_errors():
    # exactly determined: recovers beta, theta of Rybicki & Lightman 1979 sec. 4.1 redshifts; errors from the Jacobian
    za, zr = dk.redshift(0.6, 60 * u.deg), dk.redshift(0.6, 120 * u.deg)
    f = fit_jet_pair(za, zr, 1e-3, 1e-3)
    assert_allclose(f.beta, 0.6, rtol=1e-8)
    assert_allclose(f.params["viewing_angle"].value, 60.0, rtol=1e-8)
    assert f.params["beta"].stderr > 0 and f.params["viewing_angle"].stderr > 0
    assert "beta" in f.report() and "<table>" in f._repr_html_()


def test_jet_pair_recovery_grid():
    # beta 0.05-0.95, viewing angle 5-85 deg: truth within 3 sigma in >= 95 % of cases
    rng = np.random.default_rng(11)
    hits = total = 0
    for beta in np.linspace(0.05, 0.95, 7):
        for ang in np.linspace(5, 85, 7):
            err = 2e-3
            za = dk.redshift(beta, ang * u.deg) + rng.normal(0, err)
            zr = dk.redshift(beta, (180 - ang) * u.deg) + rng.normal(0, err)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FitAtBoundWarning)
                f = fit_jet_pair(za, zr, err, err)
            ok_b = abs(f.beta - beta) < 3 * f.beta_err
            ok_t = abs(f.params["viewing_angle"].value - ang) < 3 * f.error("viewing_angle")
            hits += ok_b and ok_t
            total += 1
    assert hits >= 0.95 * total


def test_calibration_from_spectra():
    # 200 simulated spectra -> measured z pairs -> fitted (beta, theta): 1-sigma intervals hold the truth 68 +/- 5 %
    grid = np.arange(4800.0, 9000.0, 2.0) * u.AA
    rng = np.random.default_rng(2026)
    n = 200
    cover_b = cover_t = 0
    for _k in range(n):
        beta, ang = rng.uniform(0.1, 0.3), rng.uniform(30, 80)
        za, zr = dk.redshift(beta, ang * u.deg), dk.redshift(beta, (180 - ang) * u.deg)
        comps = [
            LineComponent("H-alpha", z=za, fwhm=700 * u.km / u.s, strength=2.0),
            LineComponent("H-alpha", z=zr, fwhm=700 * u.km / u.s, strength=2.0),
        ]
        s = synthesize_spectrum(grid, comps, snr=25, seed=rng, resolution=3000)
        with warnings.catch_warnings():
            # flags are advisory here (this test checks coverage of every fit): a right model still has chi-square
            # probability < 1e-3 once in a thousand, and the other jet's He I may be flagged as a possible blend
            warnings.simplefilter("ignore", FitQualityWarning)
            warnings.simplefilter("ignore", WeakLineWarning)
            t = measure_lines(s, "H-alpha", components=2, method="fast")
        f = fit_jet_pair(t["z"][0], t["z"][1], t["z_err"][0], t["z_err"][1])
        cover_b += abs(f.beta - beta) < f.beta_err
        cover_t += abs(f.params["viewing_angle"].value - ang) < f.error("viewing_angle")
    assert 0.63 <= cover_b / n <= 0.73, cover_b / n
    assert 0.63 <= cover_t / n <= 0.73, cover_t / n


def test_precessing_jet_recovery_from_spectra():
    # >= 100 epochs of synthetic spectra, lines measured, model fitted: within 3 sigma (invented system)
    truth = {"beta": 0.22, "inclination": 65.0, "cone_angle": 18.0, "period": 90.0, "t0": 12.0}
    rng = np.random.default_rng(5)
    t = np.sort(rng.uniform(0, 400, 110))
    z1, z2 = precessing_jet_redshifts(
        t, truth["beta"], truth["inclination"] * u.deg, truth["cone_angle"] * u.deg, truth["period"], truth["t0"]
    )
    grid = np.arange(5400.0, 8200.0, 2.0) * u.AA
    m1, m2, e1, e2 = [], [], [], []
    for k in range(t.size):
        comps = [
            LineComponent("H-alpha", z=z1[k], fwhm=900 * u.km / u.s, strength=2.0),
            LineComponent("H-alpha", z=z2[k], fwhm=900 * u.km / u.s, strength=2.0),
        ]
        s = synthesize_spectrum(grid, comps, snr=30, seed=rng, resolution=3000)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", WeakLineWarning)  # possible blends with the other jet's lines: advisory here
            warnings.simplefilter("ignore", FitQualityWarning)
            tab = measure_lines(s, "H-alpha", components=2, method="fast")
        m1.append(tab["z"][0])
        m2.append(tab["z"][1])
        e1.append(tab["z_err"][0])
        e2.append(tab["z_err"][1])
    # measured lines are labelled by wavelength (bluer first): the fit must sort out the jets itself
    f = fit_precessing_jet(t, np.array(m1), np.array(m2), np.array(e1), z_2_err=np.array(e2))
    for name, val in truth.items():
        p = f.params[name]
        assert abs(p.value - val) < 3 * p.stderr + (1e-9 if name != "t0" else 0), (name, p.value, p.stderr)
    assert any("exchanged" in n for n in f.notes)


def test_precessing_published_mean_redshift():
    # Margon 1984: the published kinematic parameters (beta 0.26, i 79 deg, cone 20 deg, P 162.5 d; from memory)
    # reproduce the published mean redshift Gamma - 1 = 0.036 (from memory); fitting noiseless model data returns them.
    t = np.linspace(0, 500, 120)
    z1, z2 = precessing_jet_redshifts(t, 0.26, 79 * u.deg, 20 * u.deg, 162.5, 0.0)
    f = fit_precessing_jet(t, z1, z2, 1e-3)
    assert_allclose(f.value("gamma") - 1, 0.036, atol=5e-4)
    assert_allclose(f.beta, 0.26, rtol=1e-4)
    assert_allclose(sorted([f.value("inclination"), f.value("cone_angle")]), [20.0, 79.0], atol=0.01)
    assert_allclose(f.value("period"), 162.5, rtol=1e-4)


def test_proper_motions_published_case():
    # Mirabel & Rodriguez 1994: mu_a = 17.6 +/- 0.4 mas/d, mu_r = 9.0 +/- 0.1 mas/d, D = 12.5 +/- 1.5 kpc
    # give beta = 0.92 +/- 0.08 and theta = 70 +/- 2 deg (values from memory).
    f = fit_constraints(
        proper_motions=[(17.6 * u.mas / u.d, 0.4 * u.mas / u.d, 9.0 * u.mas / u.d, 0.1 * u.mas / u.d)], distance=(12.5 * u.kpc, 1.5 * u.kpc)
    )
    assert_allclose(f.beta, 0.92, atol=0.01)
    assert_allclose(f.value("viewing_angle"), 70.0, atol=1.0)
    assert 0.04 < f.beta_err < 0.15  # the distance uncertainty dominates, as the paper stresses


def test_ultra_fast_outflow_published_velocity():
    # Nardini et al. 2015 (Science 347, 860; from memory): Fe XXVI Ly-alpha (6.97 keV) absorption at ~9.0 keV in the
    # rest frame of the quasar (z = 0.184) means an outflow of ~0.25 c along the line of sight.
    e_obs = 9.0 / 1.184  # keV, as observed
    z_total = 6.97 / e_obs - 1
    z_kin = (1 + z_total) / 1.184 - 1
    assert_allclose(-dk.beta_from_redshift(z_kin), 0.25, atol=0.01)
    with pytest.warns(FitAtBoundWarning, match="viewing_angle"):  # along the line of sight: the angle sits at 0
        f = fit_constraints(single_z=[(z_kin, 1e-3, "approaching")], priors={"viewing_angle": (0.0, 1.0)})
    assert_allclose(f.beta, 0.25, atol=0.01)


def test_joint_constraints_combine():
    beta, ang = 0.5, 50.0
    za, zr = dk.redshift(beta, ang * u.deg), dk.redshift(beta, (180 - ang) * u.deg)
    R = dk.jet_counterjet_ratio(beta, ang * u.deg, 0.7, "jet")
    f = fit_constraints(z_pairs=[(za, zr, 2e-3, 2e-3)], flux_ratios=[(R, 0.1 * R, 0.7, "jet")])
    assert_allclose(f.beta, beta, rtol=1e-5)
    only = fit_constraints(z_pairs=[(za, zr, 2e-3, 2e-3)])
    assert f.beta_err <= only.beta_err * (1 + 1e-9)
    with pytest.raises(ValueError, match="give at least one measurement"):
        fit_constraints()
    with pytest.raises(ValueError, match="jet must be 'approaching' or 'receding'"):
        fit_constraints(single_z=[(0.1, 0.01, "left")])


def test_relativistic_vs_galilean():
    # the transverse-Doppler offset of a jet pair ((z_a + z_r)/2 = Gamma - 1, Margon 1984) cannot be fitted
    # by the Galilean reading z = -/+ beta cos theta
    za, zr = dk.redshift(0.26, 79 * u.deg), dk.redshift(0.26, 101 * u.deg)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the Galilean fit's poor chi-square is the comparison's point: reported, not warned
        c = compare_models("jet-pair", za, zr, 1e-3, 1e-3)
    assert c.relativistic.chi2 < 1e-6
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        two = compare_models("constraints", z_pairs=[(za, zr, 1e-3, 1e-3), (za, zr, 1e-3, 1e-3)])  # dof 2: a probability
    assert "note (Galilean): poor fit: chi-square" in two.report()
    assert c.delta_chi2 > 100
    assert "demand special relativity" in c.report()
    t = c.table()
    assert list(t["model"]) == ["jet-pair", "jet-pair (Galilean)"] and {"aic", "bic"} <= set(t.colnames)


def test_fit_at_bound_is_reported():
    # a head-on pair pushed slightly beyond what any angle allows puts theta at its bound 0
    za, zr = dk.redshift(0.5, 0.0), dk.redshift(0.5, 180.0)
    with pytest.warns(FitAtBoundWarning, match="viewing_angle"):
        f = fit_jet_pair(za - 0.01, zr, 1e-3, 1e-3)
    assert any("bound" in n for n in f.notes)


def test_many_pairs_and_table():
    b = np.array([0.2, 0.4])
    th = np.array([30.0, 70.0]) * u.deg
    fits = fit_jet_pair(dk.redshift(b, th), dk.redshift(b, 180 * u.deg - th), [1e-3, 1e-3], [1e-3, 1e-3])
    t = fits_table(fits)
    assert_allclose(t["beta"], b, rtol=1e-7)
    assert t["viewing_angle"].unit == u.deg


def test_emcee_posterior():
    za, zr = dk.redshift(0.3, 40 * u.deg), dk.redshift(0.3, 140 * u.deg)
    f = fit_jet_pair(za, zr, 2e-3, 2e-3).sample(steps=600, walkers=20, burn=100, seed=1)
    lo, _med, hi = f.posterior["summary"]["beta"]
    assert lo < 0.3 < hi
    assert abs(0.5 * (hi - lo) - f.beta_err) < 0.3 * f.beta_err
    assert "posterior" in f.report()


def test_bad_errors():
    with pytest.raises(ValueError, match=r"z_approaching_err must be finite and > 0 \(1-sigma uncertainties\), got 0.0"):
        fit_jet_pair(0.1, 0.2, 0.0, 0.1)


# ---------------------------------------------------------------------------
# A fit says when it is poor, and what it could not separate (invented data; model of
# Abell & Margon 1979, Nature 279, 701; Margon 1984, ARA&A 22, 507)
# ---------------------------------------------------------------------------
def _precessing_data(n=400, *, nod_deg=0.0, v_sys_kms=0.0, seed=4, err=2e-4):
    rng = np.random.default_rng(seed)
    t = np.sort(rng.uniform(0, 600, n))
    cone = (21.0 + nod_deg * np.sin(2 * np.pi * t / 6.06)) * u.deg  # nodding: the cone angle wobbles at 6.06 d
    z1, z2 = precessing_jet_redshifts(t, 0.25, 70 * u.deg, cone, 150.0, 10.0)
    zs = v_sys_kms / 299792.458
    z1, z2 = (
        z1 + zs * (1 + z1),
        z2 + zs * (1 + z2),
    )  # (1 + z) factors compose by product (Davis & Lineweaver 2004, PASA 21, 97; from memory)
    return t, z1 + rng.normal(0, err, n), z2 + rng.normal(0, err, n), err


def test_nodding_gives_a_poor_fit_note_and_names_the_period():
    t, z1, z2, e = _precessing_data(nod_deg=3.0)
    with pytest.warns(FitQualityWarning, match="poor fit"):
        f = fit_precessing_jet(t, z1, z2, e)
    assert f.p_value < 1e-3
    text = " ".join(f.notes)
    assert "poor fit" in text
    # the nodding at 6.06 d, or its sidebands with the 150 d precession (1/P = 1/6.06 -/+ 1/150: 6.31 or 5.83 d)
    found = [float(x) for x in re.findall(r"keep a period of ([0-9.]+) d", text)]
    assert any(abs(p - q) < 0.05 for p in found for q in (6.06, 6.31, 5.83)), found
    assert "chi-square probability" in f.report()
    # opt-in: errors scaled by sqrt(reduced chi-square)
    with pytest.warns(FitQualityWarning):
        g = fit_precessing_jet(t, z1, z2, e, scale_errors=True)
    assert_allclose(g.beta_err / f.beta_err, np.sqrt(f.result.redchi), rtol=1e-6)


def test_systemic_velocity_known_or_stated():
    # 70 km/s of systemic velocity: given, beta comes back; not given, the note gives the shift per 100 km/s,
    # d beta = (100 km/s / c)/(Gamma^3 beta) from Gamma (1 + z_sys) = const (derivative of the model above)
    t, z1, z2, e = _precessing_data(v_sys_kms=70.0, err=2e-5)
    f = fit_precessing_jet(t, z1, z2, e, z_systemic=70.0 / 299792.458)
    assert abs(f.beta - 0.25) < 3 * f.beta_err
    g = fit_precessing_jet(t, z1, z2, e)
    note = next(n for n in g.notes if "systemic velocity" in n)
    per100 = (100 / 299792.458) / (dk.lorentz_factor(0.25) ** 3 * 0.25)
    assert f"{per100:.2g}" in note
    assert_allclose(g.beta - 0.25, 0.7 * per100, rtol=0.1)
    h = fit_precessing_jet(t, z1, z2, e, z_systemic=(70.0 / 299792.458, 1e-5))
    assert abs(h.value("z_systemic") * 299792.458 - 70.0) < 10


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"z_pairs": [(np.nan, 0.1, 1e-3, 1e-3)]}, r"z_pairs\[0\] z_a must be a finite number, got nan"),
        ({"z_pairs": [(-0.1, 0.1, 0.0, 1e-3)]}, r"z_pairs\[0\] z_a_err must be > 0"),
        ({"z_pairs": [(-1.5, 0.1, 1e-3, 1e-3)]}, r"z_pairs\[0\] z_a must be a redshift > -1"),
        ({"single_z": [(0.1, 1e-3, "up")]}, r"single_z\[0\] jet must be"),
        ({"z_pairs": [(-0.1, 0.1, 1e-3, 1e-3)], "priors": {"beta": (0.2, 0.0)}}, r"priors\['beta'\] sd must be > 0"),
        ({"flux_ratios": [(-3.0, 0.5, 0.7, "jet")]}, r"flux_ratios\[0\] R must be > 0"),
        (
            {
                "proper_motions": [(10 * u.mas / u.d, 1 * u.mas / u.d, 5 * u.mas / u.d, 1 * u.mas / u.d)],
                "distance": (-3 * u.kpc, 1 * u.kpc),
            },
            r"distance must be > 0",
        ),
    ],
)
def test_fit_constraints_refuses_bad_measurements(kwargs, match):
    with pytest.raises(ValueError, match=match):
        fit_constraints(**kwargs)


def test_fit_jet_pair_refuses_impossible_redshift():
    with pytest.raises(ValueError, match=r"z_approaching must be a finite redshift > -1, got -1.5"):
        fit_jet_pair(-1.5, 0.1, 1e-3, 1e-3)


def test_fit_report_gives_the_speed_angle_correlation():
    # exactly determined pair: the covariance of (beta, theta) is J^-1 S J^-T with J the Jacobian
    # of the two redshifts (Bevington & Robinson 2003, Data Reduction and Error Analysis, 3rd ed.,
    # ch. 3, propagation of errors; from memory); the correlation is the same for eta = atanh(beta)
    import astropy.units as u

    import dopplerkit as dk
    from dopplerkit.fitting import fit_jet_pair

    b, th, ea, er = 0.24, 57.0, 1e-4, 2e-4
    za, zr = dk.redshift(b, th), dk.redshift(b, 180 - th)
    f = fit_jet_pair(za, zr, ea, er)
    h = 1e-7
    J = np.empty((2, 2))
    for j, (db, dt) in enumerate(((h, 0.0), (0.0, h))):
        up = [dk.redshift(b + db, th + dt), dk.redshift(b + db, 180 - th - dt)]
        dn = [dk.redshift(b - db, th - dt), dk.redshift(b - db, 180 - th + dt)]
        J[:, j] = (np.array(up) - np.array(dn)) / (2 * h)
    Ji = np.linalg.inv(J)
    cov = Ji @ np.diag([ea**2, er**2]) @ Ji.T
    r = cov[0, 1] / np.sqrt(cov[0, 0] * cov[1, 1])
    got = f.correlations()[("beta", "viewing_angle")]
    assert_allclose(got, r, atol=2e-3)
    text = f.fit_report()
    assert "correlations" in text and f"beta - viewing_angle: {got:+.3f}" in text
    assert len(repr(f)) < 200 and repr(f).startswith("<KinematicFit jet-pair: beta=")
    assert f.table()["viewing_angle"].unit == u.deg and f.table()["chi2"][0] == f.chi2


def test_array_pairs_give_a_collection_with_the_same_accessors():
    import dopplerkit as dk
    from dopplerkit.fitting import KinematicFits, fit_jet_pair

    b = np.array([[0.1, 0.2], [0.3, 0.4]])
    th = np.full_like(b, 60.0)
    fits = fit_jet_pair(dk.redshift(b, th), dk.redshift(b, 180 - th), 1e-4, 1e-4)
    assert isinstance(fits, KinematicFits) and len(fits) == 4
    assert fits.beta.shape == (2, 2)
    assert_allclose(fits.beta, b, rtol=1e-6)
    assert fits.viewing_angle.shape == (2, 2)
    t = fits.table()
    assert len(t) == 4 and {"beta", "viewing_angle", "chi2", "dof", "p_value"} <= set(t.colnames)
    assert "4 fits" in repr(fits)


def test_precessing_fit_has_inclination_and_cone_angle_not_a_viewing_angle():
    import dopplerkit as dk
    from dopplerkit.fitting import fit_precessing_jet

    t = 60000.0 + np.linspace(0.0, 300.0, 40)
    z1, z2 = dk.models.precessing_jet_redshifts(t, 0.24, 68, 23, 121.7, 60012.3)
    f = fit_precessing_jet(t, z1, z2, 1e-5)
    assert abs(f.inclination.to_value("deg") - 68) < 0.1 or abs(f.cone_angle.to_value("deg") - 68) < 0.1
    with pytest.raises(AttributeError, match="no single viewing angle"):
        _ = f.viewing_angle
    assert "inclination" in f.table().colnames and "viewing_angle" not in f.table().colnames
    assert "inclination=" in repr(f)


@pytest.mark.slow
def test_apparent_speed_and_doppler_factor_joint_inference_is_calibrated():
    # 200 invented active-galaxy jets (Gamma 5-25, viewing angles 1-12 deg, isotropic): a measured
    # apparent speed (5%) and variability Doppler factor (8%) -> Gamma and theta. Calibration: 68% of
    # truths within 1 sigma, >= 95% within 3 sigma (common practice, no source)
    rng = np.random.default_rng(5)
    pg, pt = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _ in range(200):
            g = rng.uniform(5, 25)
            th = np.degrees(np.arccos(rng.uniform(np.cos(np.radians(12)), np.cos(np.radians(1)))))
            ba, d = dk.apparent_speed(gamma=g, theta=th), dk.doppler_factor(gamma=g, theta=th)
            eb, ed = 0.05 * ba, 0.08 * d
            f = fit_constraints(apparent_speeds=[(ba + rng.normal(0, eb), eb)], doppler_factors=[(d + rng.normal(0, ed), ed)])
            pg.append((f.value("gamma") - g) / f.error("gamma"))
            pt.append((f.value("viewing_angle") - th) / f.error("viewing_angle"))
    pg, pt = np.abs(pg), np.abs(pt)
    assert 0.63 <= np.mean(pg < 1) <= 0.73 and 0.63 <= np.mean(pt < 1) <= 0.73
    assert np.mean((pg < 3) & (pt < 3)) >= 0.95


def test_limits_are_one_sided_and_not_data():
    # a counter-jet below 1/1000 of the jet (Lind & Blandford 1985): beta cos theta >= 0.78 for a
    # continuous jet with alpha 0.7; a pair of redshifts that allows a slower jet is pushed to the wall
    za, zr = dk.redshift(0.5, 50), dk.redshift(0.5, 130)
    free = fit_constraints(z_pairs=[(za, zr, 3e-2, 3e-2)])
    bound = float(dk.counterjet_limit(1000.0, 1.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        walled = fit_constraints(z_pairs=[(za, zr, 3e-2, 3e-2)], limits=[{"quantity": "beta_cos_theta", "lower": bound, "scale": 1e-3}])
    bc = walled.beta * np.cos(np.radians(walled.value("viewing_angle")))
    free_bc = free.beta * np.cos(np.radians(free.value("viewing_angle")))
    assert free_bc < bound - 0.1
    assert bc > free_bc + 0.3  # pulled to the wall (a soft wall: the data pull back a little)
    if bc < bound - 1e-3:
        assert any("is not met by the best fit" in n for n in walled.notes)
    assert walled.dof == free.dof  # the limit is not a datum
    met = fit_constraints(z_pairs=[(za, zr, 3e-2, 3e-2)], limits=[{"quantity": "beta", "upper": 0.9}])
    assert_allclose(met.beta, free.beta, rtol=1e-6)  # a limit that is met changes nothing
    with pytest.raises(ValueError, match=r"limits\[0\] quantity must be one of"):
        fit_constraints(z_pairs=[(za, zr, 3e-2, 3e-2)], limits=[{"quantity": "speed", "lower": 0.5}])
    with pytest.raises(ValueError, match=r"limits\[0\] needs exactly one of 'lower' or 'upper'"):
        fit_constraints(z_pairs=[(za, zr, 3e-2, 3e-2)], limits=[{"quantity": "beta", "lower": 0.5, "upper": 0.6}])


@pytest.mark.slow
def test_isotropic_angle_prior_gives_the_sin_theta_distribution():
    # a likelihood flat in the angle (redshifts with enormous errors, the speed held by a prior):
    # the posterior is the prior. Isotropic: P(theta < t) = (1 - cos t)/2, so the 15.87th percentile
    # is arccos(1 - 2 x 0.1587) = 46.9 deg and the median 90 deg; uniform in theta: 28.6 deg
    # (common practice, no source)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        f = fit_constraints(z_pairs=[(-0.05, 0.1, 1e3, 1e3)], priors={"beta": (0.3, 0.05)})
        iso = f.sample(steps=3000, walkers=40, burn=500, seed=3, angle_prior="isotropic")
        lo, med, _hi = iso.posterior["summary"]["viewing_angle"]
        assert abs(lo - 46.9) < 4 and abs(med - 90.0) < 5
        assert iso.posterior["angle_prior"] == "isotropic" and any("isotropic prior" in n for n in iso.notes)
        g = fit_constraints(z_pairs=[(-0.05, 0.1, 1e3, 1e3)], priors={"beta": (0.3, 0.05)})
        lo_u = g.sample(steps=3000, walkers=40, burn=500, seed=3).posterior["summary"]["viewing_angle"][0]
        assert abs(lo_u - 28.6) < 4
    with pytest.raises(ValueError, match="angle_prior must be"):
        f.sample(steps=10, angle_prior="flat")


def _fisher_errors(t, truth, e1, e2, rho):
    """1-sigma errors from the Fisher matrix J^T C^-1 J of the pair model, each epoch's two redshifts with
    covariance [[e1^2, rho e1 e2], [rho e1 e2, e2^2]] (Press et al. 2007, Numerical Recipes 3rd ed., Sec. 15.5,
    curvature matrix of a nonlinear least-squares fit; from memory). J by central differences of the public model."""
    names = list(truth)

    def model(v):
        z1, z2 = precessing_jet_redshifts(t, v[0], v[1] * u.deg, v[2] * u.deg, v[3], v[4])
        return np.asarray(z1), np.asarray(z2)

    v0 = np.array([truth[n] for n in names], float)
    steps = np.array([1e-6, 1e-4, 1e-4, 1e-4, 1e-4])
    J1, J2 = [], []
    for k in range(len(names)):
        up, dn = v0.copy(), v0.copy()
        up[k] += steps[k]
        dn[k] -= steps[k]
        (a1, a2), (b1, b2) = model(up), model(dn)
        J1.append((a1 - b1) / (2 * steps[k]))
        J2.append((a2 - b2) / (2 * steps[k]))
    J1, J2 = np.array(J1).T, np.array(J2).T  # (epochs, params)
    det = (e1 * e2) ** 2 * (1 - rho**2)
    i11, i22, i12 = e2**2 / det, e1**2 / det, -rho * e1 * e2 / det  # the inverse 2 x 2 covariance per epoch
    F = J1.T @ (i11[:, None] * J1) + J2.T @ (i22[:, None] * J2) + J1.T @ (i12[:, None] * J2) + J2.T @ (i12[:, None] * J1)
    return dict(zip(names, np.sqrt(np.diag(np.linalg.inv(F))), strict=True))


@pytest.mark.parametrize("rho", [0.0, 0.8, -0.8])
def test_precessing_jet_correlated_pair_errors(rho):
    # each epoch's two redshifts with correlated errors (both lines fitted in one spectrum): the fit's errors
    # are those of the Fisher matrix with the full 2 x 2 covariance per epoch (see _fisher_errors), and
    # differ from the errors of independent pairs. Noiseless data, so the fit sits at the truth.
    t = np.linspace(0, 600, 300)
    truth = {"beta": 0.25, "inclination": 70.0, "cone_angle": 21.0, "period": 150.0, "t0": 10.0}
    z1, z2 = precessing_jet_redshifts(t, 0.25, 70 * u.deg, 21 * u.deg, 150.0, 10.0)
    e1, e2 = np.full(t.size, 2e-4), np.full(t.size, 3e-4)
    f = fit_precessing_jet(t, z1, z2, e1, z_2_err=e2, z_corr=rho, allow_label_swap=False)
    want = _fisher_errors(t, truth, e1, e2, np.full(t.size, rho))
    for name in ("beta", "inclination", "cone_angle", "period"):
        assert_allclose(f.params[name].stderr, want[name], rtol=0.02, err_msg=name)
    assert_allclose(f.data["z_corr"], rho)
    if rho:
        g = fit_precessing_jet(t, z1, z2, e1, z_2_err=e2, allow_label_swap=False)
        assert abs(g.beta_err / f.beta_err - 1) > 0.1  # the correlation matters: independent errors would mislead


def test_precessing_jet_correlation_and_label_swaps():
    # with label swaps allowed, each epoch takes the assignment of smaller chi-square under its covariance;
    # data on the model fit exactly whichever the correlation, and swapped labels are found
    t = np.linspace(0, 600, 120)
    z1, z2 = precessing_jet_redshifts(t, 0.25, 70 * u.deg, 21 * u.deg, 150.0, 10.0)
    lo, hi = np.minimum(z1, z2), np.maximum(z1, z2)  # labelled by wavelength, as measured
    f = fit_precessing_jet(t, lo, hi, 1e-4, z_corr=-0.6)
    assert_allclose(f.beta, 0.25, rtol=1e-6)
    assert f.data["swapped"] > 0
    assert f.result.chisqr < 1e-6
    with pytest.raises(ValueError, match=r"z_corr must be a correlation coefficient in \(-1, 1\), got 1.0"):
        fit_precessing_jet(t, lo, hi, 1e-4, z_corr=1.0)
    with pytest.raises(ValueError, match=r"z_corr must be a number or one per epoch \(120\)"):
        fit_precessing_jet(t, lo, hi, 1e-4, z_corr=[0.1, 0.2])
