"""In-process widget tests: set a control, check the read-outs and plotted positions against the kinematics core.

Reference values come from dopplerkit.kinematics, itself checked against Rybicki & Lightman 1979
sec. 4.1 in tests/test_kinematics.py.
"""

from __future__ import annotations

import re

import astropy.units as u
import numpy as np
import pytest
from numpy.testing import assert_allclose

import dopplerkit as dk
from dopplerkit.widgets import ConstraintPlane, ExplorerState, PlaneState, PrecessionExplorer, PrecessionState, SpectrumExplorer


def _delta_text(e):
    return float(re.search(r"class='dk-delta'>([0-9.]+)<", e.readout.value).group(1))


def test_speed_slider_updates_readout_and_lines():
    e = SpectrumExplorer()
    png0 = e.image.value
    e.speed.value = 0.6
    e.angle.value = 0.0
    assert_allclose(_delta_text(e), dk.doppler_factor(0.6, 0.0), rtol=1e-5)  # delta = 2 exactly at beta 0.6 head-on
    rest = e.state.lines["H-alpha"]
    assert_allclose(e.markers["H-alpha"].get_xdata()[0], rest / 2.0, rtol=1e-12)
    x, _ = e.l_app.get_data()
    assert_allclose(x, e.state.axis / 2.0, rtol=1e-12)
    assert e.image.value != png0 and e.image.value[:4] == b"\x89PNG"


def test_gamma_mode_and_exact_text():
    e = SpectrumExplorer()
    e.speed_mode.value = "gamma"
    assert e.speed.description == "Lorentz factor"
    e.speed_text.value = 5.0
    e.angle.value = 30.0
    assert_allclose(e.state.gamma, 5.0, rtol=1e-12)
    assert_allclose(_delta_text(e), dk.doppler_factor(gamma=5.0, theta=30 * u.deg), rtol=1e-5)
    e.speed_mode.value = "beta"
    assert_allclose(e.speed_text.value, np.sqrt(24) / 5, rtol=1e-9)


def test_beaming_host_and_cone():
    e = SpectrumExplorer()
    e.speed.value = 0.5
    e.angle.value = 20.0
    e.beaming.value = "blob"
    r = e.state.readouts()
    assert_allclose(r["boost"], dk.beaming_factor(0.5, 20 * u.deg, 0.7, "blob"), rtol=1e-12)
    e.z_cosmo.value = 1.0
    assert_allclose(e.state.readouts()["z_total"], dk.compose_redshift(1.0, dk.redshift(0.5, 20 * u.deg)), rtol=1e-12)
    e.opening.value = 10.0
    _x, f = e.l_app.get_data()
    assert np.isfinite(f).sum() > 0.5 * f.size


def test_fit_button_moves_controls(tmp_path):
    from dopplerkit.models import LineComponent, synthesize_spectrum

    za, zr = dk.redshift(0.2, 50 * u.deg), dk.redshift(0.2, 130 * u.deg)
    grid = np.arange(5000.0, 9000.0, 2.0) * u.AA
    obs = synthesize_spectrum(
        grid,
        [
            LineComponent("H-alpha", z=za, fwhm=600 * u.km / u.s, strength=2),
            LineComponent("H-alpha", z=zr, fwhm=600 * u.km / u.s, strength=2),
        ],
        snr=40,
        seed=1,
    )
    e = SpectrumExplorer(lines=("H-alpha",), observed=obs)
    f = e._on_fit()
    assert abs(e.speed.value - 0.2) < 3 * f.beta_err + 1e-3
    assert abs(e.angle.value - 50.0) < 3 * f.error("viewing_angle") + 0.5
    assert "best fit" in e.fit_result.value


def test_state_without_widgets():
    s = ExplorerState.synthetic(beta=0.3, angle_deg=90.0)
    assert_allclose(s.readouts()["z"], dk.redshift(0.3, 90 * u.deg), rtol=1e-12)  # transverse: Gamma - 1


def test_constraint_plane_add_remove_solve():
    p = ConstraintPlane()
    za, zr = dk.redshift(0.4, 60 * u.deg), dk.redshift(0.4, 120 * u.deg)
    p.kind.value = "z pair"
    p.values.value = f"{za} {zr} 0.002"
    p._on_add()
    p.kind.value = "flux ratio"
    p.values.value = "3 0.5"  # wrong count: a message, no crash
    p._on_add()
    assert "needs 3 numbers" in p.message.value
    p.values.value = f"{dk.jet_counterjet_ratio(0.4, 60 * u.deg, 0.7, 'jet')} 0.3 0.7"
    p._on_add()
    assert len(p.listing.options) == 2
    p._on_solve()
    assert abs(p.state.solution.beta - 0.4) < 0.01
    p.listing.index = 1
    p._on_remove()
    assert len(p.state.measurements) == 1 and p.state.solution is None
    with pytest.raises(ValueError, match="kind must be one of"):
        PlaneState().add("colour", [1])


def test_precession_explorer_sliders_and_fit():
    t = np.linspace(0, 300, 80)
    z1, z2 = dk.models.precessing_jet_redshifts(t, 0.25, 70 * u.deg, 20 * u.deg, 110.0, 15.0)
    st = PrecessionState(t, z1, z2, np.full(t.size, 1e-3), beta=0.2, inclination=60, cone_angle=25, period=100, t0=0)
    pe = PrecessionExplorer(st)
    pe.sliders["beta"].value = 0.3
    m1, _ = st.model(pe.tt)
    assert_allclose(pe.c1.get_ydata(), m1, rtol=1e-12)
    f = pe._on_fit()
    assert abs(pe.sliders["period"].value - 110.0) < 0.1
    assert abs(f.beta - 0.25) < 1e-3


def test_precession_fit_is_drawn_exactly_not_snapped_to_the_slider_steps():
    # the browser echoes each slider value rounded to its step; the model must keep the fitted values
    t = 60000.0 + np.linspace(0, 300, 80)
    z1, z2 = dk.models.precessing_jet_redshifts(t, 0.24, 68 * u.deg, 23 * u.deg, 121.7037, 60012.2871)
    err = np.full(t.size, 1e-5)
    rng = np.random.default_rng(2)
    st = PrecessionState(t, z1 + rng.normal(0, 1e-5, t.size), z2 + rng.normal(0, 1e-5, t.size), err, period=120, t0=60000)
    pe = PrecessionExplorer(st)
    f = pe._on_fit()
    for k, w in pe.sliders.items():
        pe._on_slider(k, round(w.value / w.step) * w.step)
    assert st.period == f.value("period") and st.t0 == f.value("t0")
    r1, r2 = st.residuals()
    assert np.max(np.abs(np.concatenate([r1, r2]))) < 5e-5  # 5 sigma; snapped values gave ~6e-4
    assert "time (MJD)" == pe.axr.get_xlabel()
    # a real move of a slider (more than half a step) does change the model
    pe._on_slider("period", f.value("period") + 1.0)
    assert st.period == f.value("period") + 1.0


def test_observed_panel_follows_the_lines_and_labels_do_not_overlap():
    ex = SpectrumExplorer()
    ex.speed_mode.value = "gamma"
    ex.speed.value = 5.0  # every line far from its rest place
    ex.update()
    x0, x1 = ex.ax_obs.get_xlim()
    for which in ("approaching", "receding"):
        x, _ = ex.state.observed(which)
        assert x0 <= np.nanmin(x) and np.nanmax(x) <= x1  # nothing left the frame
    # labels closer than 9% of the axis are on different heights
    pos = [(t.get_position()[0], t.get_position()[1]) for t in ex.marker_labels.values()]
    for i in range(len(pos)):
        for j in range(i + 1, len(pos)):
            if abs(pos[i][0] - pos[j][0]) < 0.09 * (x1 - x0):
                assert pos[i][1] != pos[j][1]
    assert "flux density" in ex.ax_obs.get_ylabel()


def test_copy_parameters_reproduces_the_readouts_and_reset_restores():
    ex = SpectrumExplorer()
    ex.speed.value, ex.angle.value, ex.beaming.value, ex.z_cosmo.value = 0.6, 30.0, "blob", 0.5
    ex._on_copy()
    ns: dict = {}
    exec(ex.snippet.value, ns)  # the pasted lines give what the explorer shows
    r = ex.state.readouts()
    assert_allclose(ns["delta"], r["delta"], rtol=1e-12)
    assert_allclose(ns["z_total"], r["z_total"], rtol=1e-12)
    assert_allclose(ns["boost"], r["boost"], rtol=1e-12)
    ex._on_reset()
    assert (ex.state.beta, ex.state.angle_deg, ex.state.beaming, ex.state.z_cosmo) == (0.24, 57.0, None, 0.0)


def test_exact_entry_says_its_limit_instead_of_clamping():
    ex = SpectrumExplorer()
    ex.speed_text.value = 0.999  # beyond the slider: used exactly, and said so
    assert ex.state.beta == 0.999 and ex.speed.value == ex.speed.max
    assert "beyond the slider" in ex.speed_note.value
    assert_allclose(_delta_text(ex), dk.doppler_factor(0.999, 57 * u.deg), atol=6e-6)  # read-out to 5 decimals
    ex.speed_text.value = 1.2  # not a speed: refused with the rule, the value in use kept
    assert ex.state.beta == 0.999 and ex.speed_text.value == 0.999
    assert "beta must be in [0, 1)" in ex.speed_note.value and "1.2 not used" in ex.speed_note.value
    ex.speed_mode.value = "gamma"
    ex.speed_text.value = 0.5
    assert "Lorentz factor must be >= 1" in ex.speed_note.value
    ex.speed_text.value = 40.0  # far beyond the slider's 10: exact
    assert_allclose(ex.state.gamma, 40.0, rtol=1e-12)


def test_hold_range_keeps_the_limits_and_names_the_lines_that_left():
    ex = SpectrumExplorer()
    limits = ex.ax_obs.get_xlim()
    ex.hold.value = True
    ex.speed_mode.value = "gamma"
    ex.speed.value = 6.0
    assert ex.ax_obs.get_xlim() == limits
    note = ex.range_note.value
    assert "outside the shown range" in note and "H-alpha at" in note
    ex.hold.value = False  # follows again, no message
    assert ex.ax_obs.get_xlim() != limits and ex.range_note.value == ""


def test_log_flux_scale_shows_a_faint_receding_jet():
    ex = SpectrumExplorer()
    ex.beaming.value = "continuous jet"
    ex.speed.value, ex.angle.value = 0.9, 10.0  # the receding jet ~1e-5 of the approaching one
    ex.flux_scale.value = "log"
    assert ex.ax_obs.get_yscale() == "log"
    _x, fr = ex.l_rec.get_data()
    lo, hi = ex.ax_obs.get_ylim()
    assert lo <= np.nanmin(fr[fr > 0]) and np.nanmax(fr) <= hi  # the faint jet is inside the frame


def test_fit_button_is_absent_without_an_observed_spectrum():
    assert SpectrumExplorer().fit_button.layout.display == "none"


def test_outflow_reading_against_astropy():
    # astropy's relativistic Doppler equivalency is the reference (u.doppler_relativistic; its
    # convention is the radial speed v/c = (w^2 - 1)/(w^2 + 1), w = 1 + z: Rybicki & Lightman 1979
    # eq. 4.11 at theta = 0); host redshift composed multiplicatively (Davis & Lineweaver 2004,
    # PASA 21, 97, eq. for peculiar velocities, from memory)
    from dopplerkit.lines import rest_value
    from dopplerkit.widgets import OutflowState

    s = OutflowState(line="Fe XXVI Ly-alpha", observed=4.3, observed_err=0.01, z_host=0.871)
    r = s.reading()
    rest = rest_value("Fe XXVI Ly-alpha", "keV")
    e_host = rest / 1.871  # where the host's rest frame would put the line
    v = (4.3 * u.keV).to(u.km / u.s, equivalencies=u.doppler_relativistic(e_host))
    assert_allclose(r["beta"], -(v / (299792.458 * u.km / u.s)).to_value(""), rtol=1e-10)
    assert_allclose(r["linear"], -r["z"], rtol=0)
    # the error: numerical derivative of the speed with the observed energy
    h = 1e-6
    up = OutflowState(line="Fe XXVI Ly-alpha", observed=4.3 + h, observed_err=0.0, z_host=0.871).reading()["beta"]
    dn = OutflowState(line="Fe XXVI Ly-alpha", observed=4.3 - h, observed_err=0.0, z_host=0.871).reading()["beta"]
    assert_allclose(r["beta_err"], abs(up - dn) / (2 * h) * 0.01, rtol=1e-5)
    assert "lower" in s.sentence() and "towards us" in s.sentence()
    with pytest.raises(ValueError, match="observed must be finite and > 0"):
        OutflowState(observed=-1.0).reading()


def test_outflow_explorer_controls_and_bad_entry():
    from dopplerkit.widgets import OutflowExplorer, OutflowState

    ex = OutflowExplorer(OutflowState(observed=5.1, observed_err=0.02, z_host=0.871))
    png = ex.image.value
    assert "line-of-sight speed" in ex.readout.value
    ex.z_host.value = 0.5
    assert ex.image.value != png and "0.5" not in ex.readout.value.split("host")[0]
    ex.observed_err.value = -0.1  # refused by name, nothing clamped, no crash
    assert "observed_err must be finite and >= 0" in ex.readout.value
    assert ex.ax.get_xlabel().startswith("viewing angle (deg") and "beta" in ex.ax.get_ylabel()


def test_population_filters_and_the_chosen_row(tmp_path):
    from astropy.table import Table

    from dopplerkit.batch import measure_file, run_batch
    from dopplerkit.demo import default_data_dir
    from dopplerkit.widgets import PopulationExplorer, PopulationState

    t = Table(
        {
            "file": ["a.fits", "b.fits", "c.fits"],
            "status": ["ok", "suspect", "error"],
            "flags": ["", "blend,weak", ""],
            "message": ["", "blended", "cannot read"],
            "beta": [0.2, 0.3, np.nan],
            "beta_err": [0.01, 0.02, np.nan],
            "viewing_angle": [40.0, 60.0, np.nan],
            "viewing_angle_err": [1.0, 2.0, np.nan],
        }
    )
    s = PopulationState(t)
    assert s.flags() == ["blend", "weak"]
    s.status = "suspect"
    assert s.rows().tolist() == [1]
    s.status, s.flag = "all", "none"
    assert s.rows().tolist() == [0, 2]
    s.flag = "weak"
    assert s.rows().tolist() == [1]
    ex = PopulationExplorer(t)
    ex.status.value = "error"
    assert "cannot read" in ex.detail.value and ex.spec_image.layout.display == "none"
    # with the configuration, the chosen row's spectrum is measured again exactly as the batch did
    survey = default_data_dir() / "survey"
    src = tmp_path / "spectra"
    src.mkdir()
    for name in ("dkj_001.fits", "dkj_002.fits"):
        (src / name).write_bytes((survey / "spectra" / name).read_bytes())
    _code, res = run_batch(src, survey / "config.toml", tmp_path / "r.ecsv", workers=1, quiet=True)
    assert res["file"][0] == "dkj_001.fits" and res.meta["spectra_dir"] == str(src)  # paths relative to SPECTRA_DIR
    _spec, m = measure_file(src / res["file"][0], survey / "config.toml")
    assert_allclose(m["z"][0], res["h_alpha_approaching_z"][0], rtol=1e-9)
    assert_allclose(m["z"][1], res["h_alpha_receding_z"][0], rtol=1e-9)
    ex = PopulationExplorer(res, config=survey / "config.toml")
    assert ex.spec_image.value[:4] == b"\x89PNG" and "beta = " in ex.detail.value


def test_constraint_plane_takes_active_galaxy_measurements():
    # an apparent speed and a Doppler factor of an invented jet (Gamma 8 at 6 deg) fix both (Hovatta et al.
    # 2009, A&A 494, 527, eqs. 4-5; from memory); a counter-jet limit is drawn as the allowed region, and
    # the plane switches to a Lorentz-factor axis
    p = ConstraintPlane()
    p.state.add("apparent speed", [dk.apparent_speed(gamma=8.0, theta=6.0), 0.4])
    p.state.add("Doppler factor", [dk.doppler_factor(gamma=8.0, theta=6.0), 1.0])
    p.state.add("counter-jet limit", [100, 0.2, 0.7])
    s = p.state.solve()
    assert_allclose(s.value("gamma"), 8.0, rtol=1e-6)
    assert_allclose(s.value("viewing_angle"), 6.0, rtol=1e-6)
    p.redraw()
    assert p.ax.get_yscale() == "log" and "Lorentz factor" in p.ax.get_ylabel() and p.ax.get_xlim()[1] == 45.0
