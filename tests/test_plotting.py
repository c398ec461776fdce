"""Figures of results: every axis has a quantity (and a unit where there is one); invented data."""

from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest

import dopplerkit as dk
from dopplerkit.measure import measure_lines
from dopplerkit.models import LineComponent, synthesize_spectrum
from dopplerkit.plotting import plot_line_fit, plot_precession_fit


def _pair_measured():
    """An invented jet pair (beta 0.2 at 60 deg) in H-alpha, and its measure_lines table."""
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=dk.redshift(0.2, 60), fwhm=800 * kms, strength=2.0)]
    comps.append(LineComponent("H-alpha", z=dk.redshift(0.2, 120), fwhm=800 * kms, strength=1.4))
    s = synthesize_spectrum(np.arange(5200.0, 8600.0, 2.0) * u.AA, comps, snr=40, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return s, measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.42, 0.73))


def test_line_fit_figure(tmp_path):
    s, t = _pair_measured()
    fig = plot_line_fit(s, t, path=tmp_path / "lines.png")
    ax, axr = fig.axes
    assert "Angstrom" in axr.get_xlabel() and "flux density" in ax.get_ylabel() and "erg" in ax.get_ylabel()
    assert "residual" in axr.get_ylabel()
    assert (tmp_path / "lines.png").stat().st_size > 10000


def test_precession_fit_figure(tmp_path):
    t = 60000.0 + np.linspace(0.0, 300.0, 60)
    z1, z2 = dk.models.precessing_jet_redshifts(t, 0.24, 68, 23, 121.7, 60012.3)
    rng = np.random.default_rng(3)
    f = dk.fitting.fit_precessing_jet(t, z1 + rng.normal(0, 1e-5, t.size), z2 + rng.normal(0, 1e-5, t.size), 1e-5)
    fig = plot_precession_fit(f, path=tmp_path / "p.png")
    ax, axr = fig.axes
    assert ax.get_ylabel() == "redshift z" and axr.get_xlabel() == "time (MJD)"
    assert [t.get_text() for t in ax.get_legend().get_texts()][:2] == ["jet 1 (model)", "jet 2 (model)"]
    with pytest.raises(ValueError, match="fit_precessing_jet"):
        plot_precession_fit(dk.fitting.fit_jet_pair(-0.1, 0.16, 1e-4, 1e-4))


def test_constraint_plane_shows_the_solution_and_its_tension():
    import warnings as w

    from dopplerkit.widgets import PlaneState

    st = PlaneState()
    st.add("z pair", [-0.1045, 0.1648, 0.0005])
    st.add("flux ratio", [3.0, 0.5, 0.6])
    with w.catch_warnings():
        w.simplefilter("ignore")
        st.solve()
    from dopplerkit.plotting import plot_constraint_plane

    fig = plot_constraint_plane([{"label": st.label(m), "chi2": st.chi2(m)} for m in st.measurements], solution=st.solution)
    texts = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("joint: beta" in t and "chi2" in t and "dof" in t for t in texts)
    # the exactly determined pair is drawn (its best grid point marked), above the solution's marker
    markers = [ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "D"]
    assert markers and markers[0].get_zorder() > 2


def test_line_table_draws_itself(tmp_path):
    import pickle

    s, t = _pair_measured()
    fig = t.plot(path=tmp_path / "t.png")  # the spectrum it was measured on, kept with the table
    assert len(fig.axes) == 2 and (tmp_path / "t.png").stat().st_size > 10000
    with pytest.raises(ValueError, match="needs the measured spectrum"):
        t[:1].plot()
    assert len(t[:1].plot(s).axes) == 2
    assert type(pickle.loads(pickle.dumps(t))).__name__ == "LineTable"  # and a table stays a picklable QTable
    t.write(tmp_path / "t.ecsv")  # the spectrum is not written with it
    assert "specutils" not in (tmp_path / "t.ecsv").read_text() and "_spectrum" not in (tmp_path / "t.ecsv").read_text()


@pytest.mark.parametrize("kind", ["jet-pair", "constraints"])
def test_kinematic_fit_draws_itself(kind, tmp_path):
    from dopplerkit.fitting import fit_constraints, fit_jet_pair

    za, zr = dk.redshift(0.3, 50), dk.redshift(0.3, 130)
    if kind == "jet-pair":
        f = fit_jet_pair(za, zr, 2e-4, 3e-4)
        labels = ["z approaching jet", "z receding jet"]
    else:
        R = dk.jet_counterjet_ratio(0.3, 50, 0.7, "jet")
        f = fit_constraints(z_pairs=[(za, zr, 3e-3, 3e-3)], flux_ratios=[(R, 0.3, 0.7, "jet")], priors={"beta": (0.3, 0.1)})
        labels = ["z pair 1: approaching", "z pair 1: receding", "flux ratio 1", "prior on beta"]
    fig = f.plot(path=tmp_path / "k.png")
    whole, close, resid = fig.axes[:3]
    assert whole.get_xlabel().startswith("viewing angle (deg") and "beta" in whole.get_ylabel()
    assert close.get_xlim()[0] < f.value("viewing_angle") < close.get_xlim()[1]
    assert close.get_ylim()[0] < f.beta < close.get_ylim()[1]
    assert [t.get_text() for t in resid.get_yticklabels()] == labels  # first measurement at the top
    assert "residual" in resid.get_xlabel()
    assert "beta" in fig._suptitle.get_text() and (tmp_path / "k.png").stat().st_size > 10000


def test_precessing_fit_plot_is_the_time_series_figure():
    t = 60000.0 + np.linspace(0.0, 300.0, 40)
    z1, z2 = dk.models.precessing_jet_redshifts(t, 0.24, 68, 23, 121.7, 60012.3)
    rng = np.random.default_rng(4)
    f = dk.fitting.fit_precessing_jet(t, z1 + rng.normal(0, 1e-5, t.size), z2 + rng.normal(0, 1e-5, t.size), 1e-5)
    assert f.plot().axes[1].get_xlabel() == "time (MJD)"
