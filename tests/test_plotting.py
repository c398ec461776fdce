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


def test_line_fit_figure(tmp_path):
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=dk.redshift(0.2, 60), fwhm=800 * kms, strength=2.0)]
    comps.append(LineComponent("H-alpha", z=dk.redshift(0.2, 120), fwhm=800 * kms, strength=1.4))
    s = synthesize_spectrum(np.arange(5200.0, 8600.0, 2.0) * u.AA, comps, snr=40, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.42, 0.73))
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
