"""Line measurement: both engines, uncertainties, flags, bad input.

Synthetic spectra come from dopplerkit.models.synthesize_spectrum (invented data; they test
recovery of known inputs, the physics is checked elsewhere against published sources).
"""

from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.nddata import InverseVariance, StdDevUncertainty, VarianceUncertainty
from specutils import Spectrum

import dopplerkit as dk
from dopplerkit.exceptions import FitQualityWarning, UnresolvedLineWarning, WeakLineWarning
from dopplerkit.measure import measure_lines
from dopplerkit.models import LineComponent, synthesize_spectrum

GRID = np.arange(4800.0, 9000.0, 2.0) * u.AA


def jet_pair_spectrum(beta, angle_deg, fwhm=600.0, snr=30.0, seed=0, grid=GRID):
    za = dk.redshift(beta, angle_deg * u.deg)
    zr = dk.redshift(beta, (180 - angle_deg) * u.deg)
    comps = [
        LineComponent("H-alpha", z=za, fwhm=fwhm * u.km / u.s, strength=2.5),
        LineComponent("H-alpha", z=zr, fwhm=fwhm * u.km / u.s, strength=1.5),
    ]
    return synthesize_spectrum(grid, comps, continuum=1.0, resolution=3000, snr=snr, seed=seed), za, zr


@pytest.mark.parametrize("seed", range(6))
def test_fast_engine_agrees_with_lmfit(seed):
    # the fast path must give lmfit's centres to 0.01 sigma on the same data (issue contract)
    rng = np.random.default_rng(seed)
    s, _, _ = jet_pair_spectrum(
        rng.uniform(0.08, 0.25), rng.uniform(20, 80), fwhm=rng.uniform(300, 1500), snr=rng.uniform(15, 60), seed=seed
    )
    a = measure_lines(s, "H-alpha", components=2, method="lmfit")
    b = measure_lines(s, "H-alpha", components=2, method="fast")
    dev = np.abs((a["centre"] - b["centre"]) / a["centre_err"]).value
    assert np.all(dev < 0.01), dev


def test_start_search_solves_sets_one_by_one_when_the_stacked_solve_fails(monkeypatch):
    # the start search solves every candidate set in one stacked call; when that call meets a
    # singular set it solves them one at a time: same components, same fit (a code path, no source needed)
    import dopplerkit.measure as measure

    s, za, zr = jet_pair_spectrum(0.15, 50.0, seed=3)
    normal = measure_lines(s, "H-alpha", components=2, method="fast")
    solve = np.linalg.solve

    def stacked_fails(a, b):
        if np.ndim(a) == 3:
            raise np.linalg.LinAlgError("a singular set among the candidates")
        return solve(a, b)

    monkeypatch.setattr(measure.np.linalg, "solve", stacked_fails)
    fallback = measure_lines(s, "H-alpha", components=2, method="fast")
    assert list(fallback["status"]) == list(normal["status"])
    dev = np.abs((fallback["z"] - normal["z"]) / normal["z_err"]).value
    assert np.all(dev < 1e-3), dev
    assert np.all(np.abs((fallback["z"] - np.array([za, zr])) / fallback["z_err"]).value < 5)


def test_two_components_recovered_within_errors():
    hits = 0
    n = 40
    for seed in range(n):
        rng = np.random.default_rng(100 + seed)
        s, za, zr = jet_pair_spectrum(
            rng.uniform(0.05, 0.3), rng.uniform(15, 85), fwhm=rng.uniform(300, 1500), snr=rng.uniform(15, 60), seed=seed
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", WeakLineWarning)  # possible blends with the other jet's lines: advisory here
            t = measure_lines(s, "H-alpha", components=2, method="fast")
        pulls = (t["z"] - np.array([za, zr])) / t["z_err"]
        hits += int(np.all(np.abs(pulls) < 3))
    assert hits >= 0.95 * n


def test_tied_lines_share_z():
    z = dk.redshift(0.2, 50 * u.deg)
    comps = [
        LineComponent("H-alpha", z=z, fwhm=800 * u.km / u.s, strength=2.0),
        LineComponent("He I 5876", z=z, fwhm=800 * u.km / u.s, strength=0.7),
    ]
    s = synthesize_spectrum(GRID, comps, snr=40, seed=3, resolution=3000)
    t = measure_lines(s, ["H-alpha", "He I 5876"], tie=True)
    assert t["z"][0] == t["z"][1]
    assert abs(t["z"][0] - z) < 3 * t["z_err"][0]


def test_uncertainty_types_give_same_errors():
    s, _, _ = jet_pair_spectrum(0.15, 60, seed=4)
    sig = s.uncertainty.array
    out = []
    for unc in (StdDevUncertainty(sig), VarianceUncertainty(sig**2), InverseVariance(1 / sig**2)):
        s2 = Spectrum(flux=s.flux, spectral_axis=s.spectral_axis, uncertainty=unc, meta=s.meta)
        out.append(measure_lines(s2, "H-alpha", components=2, method="fast")["z_err"])
    np.testing.assert_allclose(out[0], out[1], rtol=1e-8)
    np.testing.assert_allclose(out[0], out[2], rtol=1e-8)


def test_masks_and_nans_are_ignored():
    s, za, _ = jet_pair_spectrum(0.15, 60, seed=5)
    flux = s.flux.value.copy()
    flux[100:140] = np.nan
    mask = np.zeros(flux.size, bool)
    mask[500:520] = True
    flux[500:520] = 1e6  # garbage under the mask
    s2 = Spectrum(flux=flux * s.flux.unit, spectral_axis=s.spectral_axis, uncertainty=s.uncertainty, mask=mask, meta=s.meta)
    t = measure_lines(s2, "H-alpha", components=2)
    assert abs(t["z"][0] - za) < 3 * t["z_err"][0]


def test_absorption_in_kev_with_cosmology():
    # an outflow at beta = 0.2 straight at us in a host at z = 0.5: compose (1+z) factors (common practice)
    z_tot = dk.compose_redshift(0.5, dk.redshift(0.2, 0.0))
    x = np.arange(3.0, 9.0, 0.003) * u.keV
    comps = [
        LineComponent("Fe XXV He-alpha w", z=z_tot, fwhm=3000 * u.km / u.s, strength=-0.3),
        LineComponent("Fe XXVI Ly-alpha", z=z_tot, fwhm=3000 * u.km / u.s, strength=-0.25),
    ]
    s = synthesize_spectrum(
        x,
        comps,
        continuum={"kind": "powerlaw", "amplitude": 1e-3, "index": -1.9, "pivot": 5 * u.keV},
        flux_unit="ph / (s cm2 keV)",
        snr=50,
        seed=2,
        resolution=1000,
    )
    t = measure_lines(s, ["Fe XXV He-alpha w", "Fe XXVI Ly-alpha"], tie=True, kind="absorption", continuum="powerlaw")
    assert abs(t["z"][0] - z_tot) < 3 * t["z_err"][0]
    assert np.all(t["flux"].value < 0)


def test_bad_sigma_and_unknown_medium():
    s, _, _ = jet_pair_spectrum(0.15, 60, seed=6)
    sig = s.uncertainty.array.copy()
    sig[10] = 0.0
    bad = Spectrum(flux=s.flux, spectral_axis=s.spectral_axis, uncertainty=StdDevUncertainty(sig), meta=s.meta)
    with pytest.raises(ValueError, match=r"uncertainty must be > 0 for every unmasked pixel, got sigma = 0.0 at pixel 10"):
        measure_lines(bad, "H-alpha")
    nomed = Spectrum(flux=s.flux, spectral_axis=s.spectral_axis, uncertainty=s.uncertainty)
    with pytest.raises(ValueError, match=r"medium of the wavelength axis is unknown"):
        measure_lines(nomed, "H-alpha")
    assert len(measure_lines(nomed, "H-alpha", medium="vacuum", components=2, method="fast")) == 2
    with pytest.raises(ValueError, match=r"profile must be one of"):
        measure_lines(s, "H-alpha", profile="box")


def test_unresolved_line_is_flagged():
    x = np.arange(6400.0, 6800.0, 4.0) * u.AA
    s = synthesize_spectrum(x, [LineComponent("H-alpha", z=0.01, fwhm=150 * u.km / u.s, strength=5.0)], snr=50, seed=1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = measure_lines(s, "H-alpha", method="fast")
    assert "unresolved" in t["flags"][0] and t["status"][0] == "suspect"
    assert any(issubclass(w.category, UnresolvedLineWarning) for w in caught)


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_line_outside_the_spectrum_is_not_detected(method):
    x = np.linspace(130, 100, 4000) * u.GHz  # CO 1-0 at z = 0.3 would sit at 88.7 GHz: not here
    s = synthesize_spectrum(x, [LineComponent("CO 1-0", z=0.3, fwhm=300 * u.km / u.s, strength=2)], flux_unit="Jy", snr=30, seed=2)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = measure_lines(s, "CO 1-0", method=method)
    assert "not_detected" in t["flags"][0] and t["status"][0] == "suspect"
    assert "not detected" in t["message"][0]
    assert any(issubclass(w.category, WeakLineWarning) and "not detected" in str(w.message) for w in caught)


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_a_lone_jet_line_is_not_given_a_jet_by_its_label(method):
    # A jet pair configured, one jet line in the data (blueshifted, z = -0.05): the second component
    # is not detected, and the label of the one found (by increasing z) is not the data's to decide
    # (common practice, no source).
    s = synthesize_spectrum(GRID, [LineComponent("H-alpha", z=-0.05, fwhm=700 * u.km / u.s, strength=2.5)], snr=30, seed=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method=method)
    found = int(np.argmin([abs(z + 0.05) for z in t["z"]]))
    assert "not_detected" in t["flags"][1 - found]
    assert "which jet it belongs to is not decided" in t["message"][found]
    # its z is right, but read by its label it could be the other jet's: not ok
    assert abs(t["z"][found] + 0.05) < 3 * t["z_err"][found]
    assert t["status"][found] == "suspect" and "unpaired" in t["flags"][found]


def test_profiles_lorentzian_voigt():
    x = np.arange(6300.0, 6900.0, 1.0) * u.AA
    s = synthesize_spectrum(
        x, [LineComponent("H-alpha", z=0.02, fwhm=600 * u.km / u.s, strength=3.0, profile="lorentzian")], snr=60, seed=9
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", profile="lorentzian")
    assert abs(t["z"][0] - 0.02) < 3 * t["z_err"][0]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = measure_lines(s, "H-alpha", profile="voigt")
    assert abs(t["z"][0] - 0.02) < 5 * t["z_err"][0]
    # lmfit's Voigt ties gamma to sigma: not the Lorentzian these data have, and the fit says so
    assert t["status"][0] == "suspect" and "poor_fit" in t["flags"][0]
    assert t["message"][0].startswith("poor fit")  # the fit as a whole first, before any other note
    assert any(issubclass(w.category, FitQualityWarning) for w in caught)


# ---------------------------------------------------------------------------
# Status that means something (invented spectra; the checks are statistical or structural,
# common practice, no source unless named)
# ---------------------------------------------------------------------------
@pytest.mark.slow
def test_faint_single_lines_ok_rows():
    # S/N 5 per pixel, lines from barely there to clear. Gaussian errors would hold the truth 68.3% of the time
    # within 1 sigma; curvature errors of lines at line S/N ~10 do worse (a known limit, stated in FLAGS["faint"]
    # and the README): measured 57-62% here. This guards against regressions and wild ok rows.
    rng = np.random.default_rng(42)
    grid = np.arange(6000.0, 7200.0, 2.0) * u.AA
    pulls = []
    for _ in range(400):
        z = rng.uniform(-0.02, 0.02)
        comp = LineComponent("H-alpha", z=z, fwhm=800 * u.km / u.s, strength=rng.uniform(0.3, 1.0))
        s = synthesize_spectrum(grid, [comp], snr=5, seed=rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, "H-alpha", method="fast")
        if t["status"][0] == "ok":
            pulls.append((t["z"][0] - z) / t["z_err"][0])
    pulls = np.abs(pulls)
    assert len(pulls) > 150
    assert np.mean(pulls > 5) < 0.01, np.sort(pulls)[-5:]
    assert 0.55 <= np.mean(pulls < 1) <= 0.73, np.mean(pulls < 1)


def test_wrong_line_configured_is_suspect_and_says_why():
    # the data hold H-alpha only; asked for H-beta, the fit finds the H-alpha features but the case-B
    # H-alpha/H-beta = 2.86 (Osterbrock & Ferland 2006, table 4.2; from memory) says H-alpha must then sit at
    # 6565 (1 + z) with more flux, and nothing is there
    grid = np.arange(3800.0, 11000.0, 2.0) * u.AA
    s = synthesize_spectrum(grid, [LineComponent("H-alpha", z=0.01, fwhm=800 * u.km / u.s, strength=2.0)], snr=20, seed=3)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = measure_lines(s, "H-beta", method="fast", z_range=(-0.5, 0.8))
    assert t["status"][0] == "suspect" and "id_contradicted" in t["flags"][0]
    assert "probably not H-beta" in t["message"][0]
    assert any(issubclass(w.category, WeakLineWarning) for w in caught)
    # the right line: ok
    t = measure_lines(s, "H-alpha", method="fast", z_range=(-0.5, 0.8))
    assert t["status"][0] == "ok", t["message"][0]


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_wrong_line_with_only_weaker_companions_is_suspect(method):
    # H-alpha jet pair only (no H-beta, as behind heavy reddening). Asked for [O III] 5007, the fit would
    # put [O III] 4959 at 0.9904 x each centre with 1/2.98 of the flux (Storey & Zeippen 2000, MNRAS
    # 312, 813; from memory): the ratio is atomic, so its absence refutes the identification. Asked
    # for He I 5876, H-alpha must appear 1.117 x redder and stronger (He/H ~ 0.1; common practice, no
    # source); asked for [N II] 6585, [N II] 6550 must appear at 1/2.94 (Storey & Zeippen 2000)
    grid = np.arange(3800.0, 11000.0, 2.0) * u.AA
    kms = u.km / u.s
    pair = [LineComponent("H-alpha", z=-0.05, fwhm=800 * kms, strength=2.0), LineComponent("H-alpha", z=0.12, fwhm=800 * kms, strength=1.2)]
    s = synthesize_spectrum(grid, pair, snr=20, seed=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for wrong in ("[O III] 5007", "He I 5876", "[N II] 6585"):
            t = measure_lines(s, wrong, components=2, method=method, z_range=(-0.42, 0.73))
            assert set(t["status"]) == {"suspect"}, (wrong, list(t["message"]))
            assert "id_contradicted" in ",".join(t["flags"]), (wrong, list(t["flags"]))
        t = measure_lines(s, "H-alpha", components=2, method=method, z_range=(-0.42, 0.73))
    assert list(t["status"]) == ["ok", "ok"], list(t["message"])


def test_another_catalogue_line_explains_the_features():
    # H-alpha and H-beta of one component at z = 0.1 (case-B ratio 2.86, Osterbrock & Ferland 2006,
    # table 4.2; from memory). Asked for He II 4686, the fit takes the H-beta feature (z = 0.1415):
    # nothing He II would bring is seen, while H-beta at z = 0.1 is confirmed by H-alpha at 7221 A
    grid = np.arange(3800.0, 9000.0, 2.0) * u.AA
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=0.1, fwhm=900 * kms, strength=2.86), LineComponent("H-beta", z=0.1, fwhm=900 * kms, strength=1.0)]
    s = synthesize_spectrum(grid, comps, snr=25, seed=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "He II 4686", method="fast", z_range=(0.0, 0.2))
    assert t["status"][0] == "suspect" and "id_alternative" in t["flags"][0], t["message"][0]
    assert "fits H-beta at z = 0.09" in t["message"][0] and "H-alpha at 72" in t["message"][0]
    # the right identification is confirmed by its companion: ok
    t = measure_lines(s, "H-beta", method="fast", z_range=(0.0, 0.2))
    assert t["status"][0] == "ok", t["message"][0]


def test_a_lone_doublet_line_is_refused():
    # C IV 1548 without C IV 1551 (between 2:1 and 1:1; common practice, no source) is not C IV
    grid = np.arange(4500.0, 4800.0, 0.25) * u.AA
    s = synthesize_spectrum(grid, [LineComponent("C IV 1548", z=2.0, fwhm=300 * u.km / u.s, strength=2.0)], snr=60, seed=4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "C IV 1548", method="fast", z_range=(1.5, 2.5))
    assert "id_contradicted" in t["flags"][0] and "C IV 1551" in t["message"][0]


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_host_lines_are_fitted_under_the_jet_lines(method):
    # a slow pair near 80 deg on top of the host's narrow H-alpha and [N II] 6550/6585 at rest
    # ([N II] vacuum wavelengths 6549.86 and 6585.27, NIST ASD; from memory): without the host lines
    # the fit is poor (suspect); with them (the default) the pair comes out ok and right
    kms = u.km / u.s
    grid = np.arange(3800.0, 11200.0, 2.0) * u.AA
    pulls, st = [], []
    for seed in range(6):
        rng = np.random.default_rng(seed)
        beta, ang = rng.uniform(0.01, 0.04), rng.uniform(60, 88)  # both jets within the host lines' window
        za, zr = float(dk.redshift(beta, ang)), float(dk.redshift(beta, 180 - ang))
        comps = [
            LineComponent(n, z=z, fwhm=900 * kms, strength=q)
            for n, q0 in (("H-alpha", 2.0), ("H-beta", 0.8))
            for z, q in ((za, q0), (zr, 0.75 * q0))
        ]
        comps += [
            LineComponent(w, z=0.0, fwhm=150 * kms, strength=q) for w, q in (("H-alpha", 1.5), (6585.27 * u.AA, 1.2), (6549.86 * u.AA, 0.4))
        ]
        cont = {"kind": "powerlaw", "amplitude": 1.0, "index": -1.0, "pivot": 6500 * u.AA}
        s = synthesize_spectrum(grid, comps, continuum=cont, snr=25, seed=rng, resolution=4000)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, "H-alpha", components=2, method=method, z_range=(-0.42, 0.73))
            off = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.42, 0.73), host=None)
        st.append((set(off["status"]) == {"ok"}, set(t["status"]) == {"ok"}))
        assert "[N II] 6585 (S/N" in t.meta["host"], t.meta["host"]
        if set(t["status"]) == {"ok"}:
            pulls += [(t["z"][0] - za) / t["z_err"][0], (t["z"][1] - zr) / t["z_err"][1]]
    assert sum(a for a, _ in st) <= 1  # host lines left out: poor fits, flagged
    assert sum(b for _, b in st) >= 4  # fitted: good fits (a pair closer than its FWHM stays suspect)
    assert np.max(np.abs(pulls)) < 4, np.round(pulls, 1)


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_other_lines_of_the_same_gas_in_the_window_are_fitted(method):
    # beta 0.24 at 53 deg: the receding H-beta (z = +0.178) lands ~60 A from the approaching H-alpha
    # (z = -0.118); left out it spoils the fit, fitted as a line of the same component it does not
    kms = u.km / u.s
    za, zr = float(dk.redshift(0.24, 53)), float(dk.redshift(0.24, 127))
    comps = [
        LineComponent(n, z=z, fwhm=800 * kms, strength=q)
        for n, q0 in (("H-alpha", 2.0), ("H-beta", 0.8))
        for z, q in ((za, q0), (zr, 0.7 * q0))
    ]
    s = synthesize_spectrum(np.arange(3800.0, 9000.0, 2.0) * u.AA, comps, snr=30, seed=8, resolution=4000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method=method, z_range=(-0.42, 0.73))
    assert list(t["status"]) == ["ok", "ok"], list(t["message"])
    assert "H-beta (receding)" in t.meta["also_fitted"]
    assert abs(t["z"][0] - za) < 4 * t["z_err"][0] and abs(t["z"][1] - zr) < 4 * t["z_err"][1]


def test_host_argument_is_checked():
    s = jet_pair_spectrum(0.2, 60)[0]
    with pytest.raises(ValueError, match="host must be"):
        measure_lines(s, "H-alpha", host=3, medium="vacuum")
    with pytest.raises(ValueError, match="host_z"):
        measure_lines(s, "H-alpha", host_z=float("nan"), medium="vacuum")
    with pytest.raises(KeyError, match="no line named"):
        measure_lines(s, "H-alpha", host=["[N II] 9999"], medium="vacuum")


def test_line_at_the_edge_is_suspect():
    grid = np.arange(6000.0, 7200.0, 2.0) * u.AA
    z = 6010.0 / 6564.614 - 1  # centre 10 Angstrom from the blue end, FWHM ~ 17 Angstrom
    s = synthesize_spectrum(grid, [LineComponent("H-alpha", z=z, fwhm=800 * u.km / u.s, strength=2.0)], snr=30, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", method="fast")
    assert "edge" in t["flags"][0] and t["status"][0] == "suspect"


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_steep_power_law_continuum_is_chosen_and_reported(method):
    # F_lambda ~ lambda**-3 over 3800-11200 Angstrom: a straight line is the wrong continuum, BIC says so
    grid = np.arange(3800.0, 11200.0, 2.0) * u.AA
    cont = {"kind": "powerlaw", "amplitude": 1.0, "index": -3.0, "pivot": 6500 * u.AA}
    za, zr = dk.redshift(0.2, 40), dk.redshift(0.2, 140)
    comps = [
        LineComponent("H-alpha", z=za, fwhm=900 * u.km / u.s, strength=1.5),
        LineComponent("H-alpha", z=zr, fwhm=900 * u.km / u.s, strength=0.8),
    ]
    s = synthesize_spectrum(grid, comps, continuum=cont, snr=25, seed=5, resolution=4000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", WeakLineWarning)  # the other jet's lines may be flagged as possible blends
        t = measure_lines(s, "H-alpha", components=2, method=method)
    assert t.meta["continuum"] != "polynomial 0"
    pulls = (t["z"] - np.array([za, zr])) / t["z_err"]
    assert np.all(np.abs(pulls) < 4), pulls
    # fixed by the caller: kept
    t = measure_lines(s, "H-alpha", components=2, method=method, continuum_degree=2)
    assert t.meta["continuum"] == "polynomial 2"


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_ultraviolet_line_on_an_air_axis(method):
    # C IV 1548 (vacuum; below 2000 Angstrom lines are vacuum by convention, Morton 2000, ApJS 130, 403) at z = 2
    # lands at 4644.6 Angstrom in vacuum, 4643.3 in air (Morton 2000 via specutils, the reference library):
    # on an air axis the fit must find z = 2, not z off by the refractive index (~84 km/s)
    from dopplerkit.lines import vacuum_to_air

    z = 2.0
    vac = 1548.202 * (1 + z)
    air = vacuum_to_air(vac * u.AA).to_value(u.AA)
    grid = np.arange(4500.0, 4800.0, 0.25) * u.AA
    # the doublet at the optically thin 2:1 ratio (common practice, no source): a lone C IV 1548 is
    # rightly refused as misidentified (its partner must be there)
    doublet = [LineComponent(n, z=z, fwhm=300 * u.km / u.s, strength=q) for n, q in (("C IV 1548", 2.0), ("C IV 1551", 1.0))]
    s = synthesize_spectrum(grid, doublet, snr=80, seed=4, medium="air")
    assert abs(grid.value[np.argmax(s.flux.value)] - air) < 0.3
    t = measure_lines(s, ["C IV 1548", "C IV 1551"], tie=True, method=method, z_range=(1.5, 2.5))
    assert list(t["status"]) == ["ok", "ok"]
    assert abs(t["z"][0] - z) < 3 * t["z_err"][0]
    assert abs(t["centre"][0].to_value(u.AA) - air) < 3 * t["centre_err"][0].to_value(u.AA)
    # the same line read as if the axis were vacuum would be off by about (n - 1) c ~ 84 km/s
    assert (vac - air) / vac * 299792.458 > 80


def test_needlessly_fine_sampling_is_averaged_without_changing_the_answer():
    # the same pair sampled at 0.005 A (0.23 km/s: averaged in blocks to ~1 km/s before the fit) and at
    # 0.5 A, with the same S/N per unit wavelength: centres agree within their errors, errors agree
    # (a Gaussian of FWHM >= 30 km/s changes by < 0.1% over 1 km/s; common practice, no source)
    kms = u.km / u.s
    comps = [
        LineComponent("H-alpha", z=-0.02, fwhm=600 * kms, strength=2.0),
        LineComponent("H-alpha", z=0.03, fwhm=600 * kms, strength=1.5),
    ]
    out = []
    for step, snr in ((0.5, 30.0), (0.005, 3.0)):
        s = synthesize_spectrum(np.arange(6200.0, 7000.0, step) * u.AA, comps, snr=snr, seed=4)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out.append(measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.1, 0.1)))
    coarse, fine = out
    for k in range(2):
        assert abs(fine["z"][k] - coarse["z"][k]) < 3 * np.hypot(fine["z_err"][k], coarse["z_err"][k])
        assert 0.7 < fine["z_err"][k] / coarse["z_err"][k] < 1.4


def test_fast_solver_with_held_parameters_reaches_the_minimum():
    # The detection test refits with the weakest component held at zero area; its chi-square must be
    # the true minimum of the reduced model, or the rise in chi-square (the detection statistic) is
    # overstated. Reference: scipy.optimize.least_squares (trf) on the free parameters alone.
    from scipy.optimize import least_squares

    from dopplerkit.measure import LineFitter

    fitter = LineFitter.for_lines(["H-alpha"], u.AA, medium="vacuum", components=2)
    rng = np.random.default_rng(3)
    x = np.linspace(6350.0, 6800.0, 450)
    sw = np.full_like(x, 0.05)
    B = np.column_stack([np.ones_like(x), (x - x.mean()) / np.ptp(x)])
    truth = np.array([-0.012, 800.0, 12.0, 0.018, 900.0, 1.6, 1.0, 0.05])  # z, FWHM, area of each component; continuum
    y = fitter._model(truth, x, B)[0] + rng.normal(0.0, 0.05, x.size)
    lo, hi = fitter._bounds(B.shape[1])
    p_full, _, chi2_full, _ = fitter._solve(x, y, sw, B, truth * 1.01, lo, hi)
    held = p_full.copy()
    held[5] = 0.0  # the weaker component removed: its area held at zero, its z and width held too
    lo2, hi2 = lo.copy(), hi.copy()
    lo2[3:6] = hi2[3:6] = held[3:6]
    p_less, _, chi2_less, _ = fitter._solve(x, y, sw, B, held, lo2, hi2)
    free = lo2 < hi2

    def resid(v):
        q = held.copy()
        q[free] = v
        return (fitter._model(q, x, B)[0] - y) / sw

    ref = least_squares(resid, held[free], bounds=(lo2[free], hi2[free]), method="trf", x_scale="jac", xtol=1e-14, ftol=1e-14, gtol=1e-14)
    chi2_ref = float(ref.fun @ ref.fun)
    assert chi2_full < chi2_less  # the component is real
    assert chi2_less == pytest.approx(chi2_ref, rel=1e-7, abs=1e-5)
    assert np.all(p_less[~free] == held[~free])  # held parameters stay exactly where they were put


# ---------------------------------------------------------------------------
# Noise shared by neighbouring pixels (a resampled spectrum)
# ---------------------------------------------------------------------------
def _resampled_pair(rng, kernel, method="fast"):
    """A jet pair whose noise is white noise smoothed by ``kernel`` (as resampling does), with the
    per-pixel errors a pipeline propagates when it drops the covariance: sigma sqrt(sum k^2)."""
    grid = np.arange(5200.0, 8000.0, 1.5) * u.AA
    b, a = rng.uniform(0.05, 0.15), rng.uniform(30, 70)
    comps = [
        LineComponent("H-alpha", z=float(dk.redshift(b, a)), fwhm=800 * u.km / u.s, strength=3.0),
        LineComponent("H-alpha", z=float(dk.redshift(b, 180 - a)), fwhm=800 * u.km / u.s, strength=2.0),
    ]
    clean = synthesize_spectrum(grid, comps, resolution=4000)
    k = np.asarray(kernel, float)
    noise = np.convolve(rng.normal(0.0, 0.05, grid.size + 20), k, mode="same")[10:-10]
    sig = np.full(grid.size, 0.05 * np.sqrt(np.sum(k**2)))
    s = Spectrum(
        spectral_axis=grid, flux=clean.flux + noise * clean.flux.unit, uncertainty=StdDevUncertainty(sig), meta={"medium": "vacuum"}
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method=method, z_range=(-0.3, 0.3))
    return t, sorted(c.z for c in comps)


def test_errors_of_a_resampled_spectrum_are_scaled_for_its_correlated_noise():
    # Noise smoothed by (1/4, 1/2, 1/4) with errors propagated pixel by pixel: the variance of a
    # long sum of such noise is (sum k)^2 / sum k^2 = 2.67 times what the per-pixel errors say, so
    # unscaled errors would be up to 1.63 times too small (the variance of a sum of correlated
    # variables, here a moving average of white noise; common practice, no source).
    # A line centre weights pixels over a finite width, so its own factor is a little smaller.
    # Measured: errors scaled by 1.45-1.68, z pulls with standard deviation ~0.97.
    rng = np.random.default_rng(5)
    pulls, scales = [], []
    for _ in range(60):
        t, truth = _resampled_pair(rng, [0.25, 0.5, 0.25])
        scales.append(t.meta["error_scale"])
        pulls += [float((t["z"][j] - truth[j]) / t["z_err"][j]) for j in range(2)]
        assert "line errors scaled up by" in t["message"][0]
    pulls = np.array(pulls)
    assert 1.35 < np.median(scales) <= 1.64
    assert 0.85 < np.std(pulls) < 1.15, np.std(pulls)
    assert 0.6 < np.mean(np.abs(pulls) <= 1) < 0.78


def test_white_noise_keeps_its_errors():
    # The correlation test is one-sided at 3 standard errors (1/sqrt(N)): a false alarm in ~0.1% of
    # spectra with white noise (normal tail, common practice, no source), and then a small factor.
    rng = np.random.default_rng(6)
    scales = [_resampled_pair(rng, [1.0])[0].meta["error_scale"] for _ in range(100)]
    assert np.mean(np.array(scales) == 1.0) >= 0.97
    assert max(scales) < 1.25


def test_both_engines_scale_errors_alike():
    # the two engines fit the same model to the same pixels (a code path, no source needed)
    ta, _ = _resampled_pair(np.random.default_rng(7), [0.3, 0.7], method="lmfit")
    tb, _ = _resampled_pair(np.random.default_rng(7), [0.3, 0.7], method="fast")
    assert ta.meta["error_scale"] > 1.1
    np.testing.assert_allclose(ta.meta["error_scale"], tb.meta["error_scale"], rtol=1e-3)
    np.testing.assert_allclose(ta["z_err"], tb["z_err"], rtol=1e-2)


# ---------------------------------------------------------------------------
# Errors computed from each pixel's own counts (Poisson data, sqrt(N) errors)
# ---------------------------------------------------------------------------
def _ufo_counts(rng, scale=100.0):
    """An invented X-ray outflow: Fe XXVI Ly-alpha and Fe XXV He-alpha w absorption (one z, one
    width) on a power law, Poisson counts in 10 eV bins, errors sqrt(max(N, 1)) from the counts."""
    e = np.arange(5.0, 10.0, 0.01)
    beta, ang = rng.uniform(0.05, 0.3), rng.uniform(0.0, 30.0)
    z = float(dk.redshift(beta, ang * u.deg))
    fw = rng.uniform(2000.0, 6000.0)
    depth = rng.uniform(0.3, 0.8)
    model = scale / e
    for rest, d in ((6.966, depth), (6.700, 0.7 * depth)):  # keV, catalogue values (from memory)
        mu = rest / (1 + z)
        model = model * (1 - d * np.exp(-0.5 * ((e - mu) / (mu * fw / 299792.458 / 2.3548)) ** 2))
    n = rng.poisson(model).astype(float)
    s = Spectrum(spectral_axis=e * u.keV, flux=n * u.ct, uncertainty=StdDevUncertainty(np.sqrt(np.maximum(n, 1.0))))
    return s, z, model


def test_counts_errors_from_the_data_do_not_bias_low_count_lines():
    # A chi-square fit with errors sqrt(N) from the observed counts weights low fluctuations up
    # and is biased (Neyman's chi-square; Mighell 1999, ApJ 518, 380, from memory); at 10-20
    # counts per bin it put 6 of ~150 ok rows > 5 sigma off with 54% 1-sigma coverage. With the
    # errors replaced by their local expectation, as with the true model variance: coverage 63-65%.
    # At these counts the two Fe lines can also be read the other way round (Fe XXV where Fe XXVI
    # is, z off by 0.03) almost as well: such rows are id_ambiguous, never ok (4 of 160 were ok
    # and ~50 sigma off before that check).
    rng = np.random.default_rng(8)
    pulls, ambiguous = [], 0
    for _ in range(160):
        s, z, _ = _ufo_counts(rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, ["Fe XXVI Ly-alpha", "Fe XXV He-alpha w"], tie=True, kind="absorption", z_range=(-0.6, 0.5), method="fast")
        assert "replaced by their expectation" in t.meta["errors"]
        ambiguous += "id_ambiguous" in t["flags"][0]
        if t["status"][0] == "ok":
            pulls.append(float((t["z"][0] - z) / t["z_err"][0]))
    pulls = np.abs(pulls)
    assert ambiguous >= 4
    assert len(pulls) > 50
    assert np.sum(pulls > 5) <= 1, np.sort(pulls)[-5:]
    assert 0.56 <= np.mean(pulls <= 1) <= 0.80


def test_expected_errors_replace_only_what_followed_the_counts():
    # Poisson counts: variance = expected counts (common practice, no source)
    from dopplerkit.measure import _expected_errors

    rng = np.random.default_rng(9)
    s, _, model = _ufo_counts(rng, scale=100.0)
    y, sig = s.flux.value, s.uncertainty.array
    new, note = _expected_errors(y, sig)
    assert note and "counts per pixel" in note
    # the new variance no longer follows the pixel's own fluctuation (it did exactly: sigma^2 = N)
    resid = y - model
    inner = slice(3, -3)
    assert np.corrcoef(sig[inner] ** 2 - model[inner], resid[inner])[0, 1] > 0.9
    assert abs(np.corrcoef(new[inner] ** 2 - model[inner], resid[inner])[0, 1]) < 0.15
    # errors given apart from the data (constant, or from a smooth model) are kept as they are
    flat = np.full(y.size, 3.0)
    assert _expected_errors(y, flat)[0] is flat
    smooth = np.sqrt(model)
    assert _expected_errors(y, smooth)[0] is smooth
    # and many counts per pixel (bias negligible): kept
    s2, _, _ = _ufo_counts(rng, scale=20000.0)
    assert _expected_errors(s2.flux.value, s2.uncertainty.array)[1] is None


def test_tied_lines_clearly_read_are_not_ambiguous():
    # the same outflows with 30 times the counts: the swapped reading is far worse (no flag;
    # common practice, no source)
    rng = np.random.default_rng(10)
    for _ in range(8):
        s, z, _ = _ufo_counts(rng, scale=3000.0)
        t = measure_lines(s, ["Fe XXVI Ly-alpha", "Fe XXV He-alpha w"], tie=True, kind="absorption", z_range=(-0.6, 0.5), method="fast")
        assert "id_ambiguous" not in ",".join(t["flags"]), t["message"][0]
        assert abs(t["z"][0] - z) < 5 * t["z_err"][0]


def test_one_feature_of_two_tied_lines_is_ambiguous():
    # Only one absorption line in the band (the other beyond its end): Fe XXVI at z or Fe XXV at
    # another z explain it equally; the row must say so rather than pick one (common practice, no source).
    rng = np.random.default_rng(11)
    e = np.arange(5.0, 8.2, 0.01)
    z = -0.12  # Fe XXV He-alpha w at 7.61 keV, Fe XXVI Ly-alpha at 7.92 keV: cut the band at 7.75
    e = e[e < 7.75]
    mu = 6.700 / (1 + z)
    model = 3000.0 / e * (1 - 0.5 * np.exp(-0.5 * ((e - mu) / (mu * 3000 / 299792.458 / 2.3548)) ** 2))
    n = rng.poisson(model).astype(float)
    s = Spectrum(spectral_axis=e * u.keV, flux=n * u.ct, uncertainty=StdDevUncertainty(np.sqrt(np.maximum(n, 1.0))))
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        t = measure_lines(s, ["Fe XXVI Ly-alpha", "Fe XXV He-alpha w"], tie=True, kind="absorption", z_range=(-0.6, 0.5), method="fast")
    assert any(issubclass(w.category, WeakLineWarning) and "which line is which" in str(w.message) for w in got)
    assert set(t["status"]) == {"suspect"}
    assert "id_ambiguous" in t["flags"][0]
    assert "which line is which is not decided" in t["message"][0]


def test_expected_errors_keep_the_variance_of_a_narrow_line_peak():
    # A line one pixel wide stands far above its neighbours: that is structure, not the pixel's
    # noise; its variance (Poisson: the expected counts; common practice, no source) must stay
    # near the counts there.
    from dopplerkit.measure import _expected_errors

    rng = np.random.default_rng(12)
    x = np.arange(2000.0)
    model = 50.0 + 5000.0 * np.exp(-0.5 * ((x - 1000.0) / 1.0) ** 2)
    n = rng.poisson(model).astype(float)
    new, note = _expected_errors(n, np.sqrt(np.maximum(n, 1.0)))
    assert note is not None
    assert new[1000] ** 2 > 0.9 * model[1000]


def test_a_component_that_depends_on_an_undecided_reading_is_not_ok():
    # Tied H-alpha + He I jet pair (invented, H-alpha 4x He I), noise smoothed by (1/4, 1/2, 1/4):
    # in one of these spectra the receding pair was read with He I where H-alpha is, and the
    # approaching H-alpha, which the receding He I overlaps, came out ok and 6.5 sigma off. A
    # component whose z moves by more than its error between the two readings is id_ambiguous too.
    # (Found on spectra the check was not tuned for; common practice, no source.)
    rng = np.random.default_rng(31)
    k = np.array([0.25, 0.5, 0.25])
    grid = np.arange(4500.0, 9000.0, 1.5) * u.AA
    pulls = []
    for _ in range(40):
        b, a = rng.uniform(0.08, 0.25), rng.uniform(30, 75)
        za, zr = float(dk.redshift(b, a)), float(dk.redshift(b, 180 - a))
        comps = [
            LineComponent(n, z=z, fwhm=900 * u.km / u.s, strength=q * r)
            for z, r in ((za, 1.0), (zr, 0.7))
            for n, q in (("H-alpha", 2.0), ("He I 5876", 0.5))
        ]
        clean = synthesize_spectrum(grid, comps, resolution=4000)
        noise = np.convolve(rng.normal(0, 0.06, grid.size), k, mode="same")
        sig = np.full(grid.size, 0.06 * np.sqrt(np.sum(k**2)))
        s = Spectrum(
            spectral_axis=grid, flux=clean.flux + noise * clean.flux.unit, uncertainty=StdDevUncertainty(sig), meta={"medium": "vacuum"}
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, ["H-alpha", "He I 5876"], components=2, tie=True, method="fast", z_range=(-0.4, 0.4))
        pulls += [float((t["z"][j] - zt) / t["z_err"][j]) for j, zt in ((0, za), (2, zr)) if t["status"][j] == "ok"]
    pulls = np.abs(pulls)
    assert len(pulls) > 60
    assert np.all(pulls < 5), np.sort(pulls)[-3:]


def _pair_beside_a_stationary_line(rng, stationary=True):
    # invented: a jet pair in H-alpha and H-beta (case B 1/2.86, Osterbrock & Ferland 2006,
    # table 4.2) with, if asked, a broad line at rest (a disk or wind: FWHM 2000 km/s) as strong as
    # the approaching jet
    b, a = rng.uniform(0.08, 0.25), rng.uniform(25, 75)
    za, zr = float(dk.redshift(b, a)), float(dk.redshift(b, 180 - a))
    kms = u.km / u.s
    comps = [
        LineComponent(n, z=z, fwhm=800 * kms, strength=q * r)
        for z, r in ((za, 2.0), (zr, 1.2))
        for n, q in (("H-alpha", 1.0), ("H-beta", 1 / 2.86))
    ]
    if stationary:
        comps += [
            LineComponent("H-alpha", z=0.0, fwhm=2000 * kms, strength=2.0),
            LineComponent("H-beta", z=0.0, fwhm=2000 * kms, strength=0.6),
        ]
    grid = np.arange(4000.0, 9500.0, 2.0) * u.AA
    return synthesize_spectrum(grid, comps, continuum=1.0, resolution=4000, snr=30, seed=rng), za, zr


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_a_stationary_line_beside_a_jet_pair_is_a_rival(method):
    # Three H-alpha features in range and two components asked for: the fit took the stationary
    # line for the approaching jet (z ~ 0) and came out ok and thousands of sigma off (22 of 26 ok
    # rows, found on spectra nobody tuned for). Which two features are the pair is not decided by
    # one spectrum: no row may be ok, and the message must say why (common practice, no source).
    rng = np.random.default_rng(40)
    for _ in range(4 if method == "lmfit" else 10):
        s, _, _ = _pair_beside_a_stationary_line(rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, "H-alpha", components=2, method=method, z_range=(-0.4, 0.4))
        assert set(t["status"]) == {"suspect"}, list(t["message"])
        assert all("rival" in f for f in t["flags"])
        assert "is not decided by the data" in " ".join(t["message"])


def test_a_jet_pair_with_its_own_balmer_lines_has_no_rival():
    # The same pairs without the stationary line: H-beta of each jet is a line of the same gas at
    # a fitted z, not a rival (code path; case B as above)
    rng = np.random.default_rng(41)
    for _ in range(10):
        s, za, zr = _pair_beside_a_stationary_line(rng, stationary=False)
        t = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.4, 0.4))
        assert "rival" not in ",".join(t["flags"]), list(t["message"])
        assert set(t["status"]) == {"ok"}, list(t["message"])
        assert abs(t["z"][0] - za) < 5 * t["z_err"][0] and abs(t["z"][1] - zr) < 5 * t["z_err"][1]


def test_weaker_helium_lines_of_a_jet_are_not_rivals():
    # He I 7065 of the approaching jet (0.04 of its H-alpha; common practice, no source) is as
    # strong as a third of a counter-jet at 1/9: it read as a rival receding H-alpha until the
    # weaker lines of the same gas could explain a feature (found on spectra nobody tuned for)
    rng = np.random.default_rng(42)
    kms = u.km / u.s
    for _ in range(6):
        b, a = rng.uniform(0.15, 0.3), rng.uniform(25, 60)
        za, zr = float(dk.redshift(b, a)), float(dk.redshift(b, 180 - a))
        lines = (("H-alpha", 1.0), ("H-beta", 0.3), ("He I 5876", 0.1), ("He I 7065", 0.04), ("He I 4471", 0.03))
        comps = [LineComponent(n, z=z, fwhm=800 * kms, strength=2.5 * q * r) for z, r in ((za, 1.0), (zr, 0.11)) for n, q in lines]
        s = synthesize_spectrum(np.arange(3800.0, 9500.0, 2.0) * u.AA, comps, continuum=1.0, resolution=4000, snr=40, seed=rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.4, 0.4))
        assert "rival" not in ",".join(t["flags"]), list(t["message"])


def test_excluded_ranges_convert_between_axes():
    # a wavelength range on a frequency axis: nu = c / lambda (astropy's spectral equivalency as
    # the reference); either end first; an unconvertible unit names the parameter
    from dopplerkit.measure import excluded_pixels

    nu = np.linspace(4.0e14, 5.0e14, 1001)  # Hz
    m = excluded_pixels(nu, u.Hz, [(7000 * u.AA, 6500 * u.AA)])
    lo, hi = (7000 * u.AA).to_value(u.Hz, u.spectral()), (6500 * u.AA).to_value(u.Hz, u.spectral())
    assert np.array_equal(m, (nu >= lo) & (nu <= hi)) and m.any()
    assert not excluded_pixels(nu, u.Hz, None).any()
    with pytest.raises(ValueError, match="exclude: each range"):
        excluded_pixels(nu, u.Hz, [(1 * u.kg, 2 * u.kg)])
    with pytest.raises(ValueError, match="exclude must be a sequence"):
        excluded_pixels(nu, u.Hz, 5)
    with pytest.raises(ValueError, match="exclude: range ends must be finite"):
        excluded_pixels(nu, u.Hz, [(np.nan * u.AA, 6500 * u.AA)])
    # measure_lines leaves those pixels out: a stationary line there is no rival
    rng = np.random.default_rng(43)
    s, za, zr = _pair_beside_a_stationary_line(rng)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.4, 0.4), exclude=[(6470 * u.AA, 6660 * u.AA)])
    assert "rival" not in ",".join(t["flags"]), list(t["message"])
    assert abs(t["z"][0] - za) < 5 * t["z_err"][0] and abs(t["z"][1] - zr) < 5 * t["z_err"][1]


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_cosmic_rays_are_left_out_and_said(method):
    # Single-pixel spikes of 30 sigma beside each jet line (cosmic rays; invented): every such
    # spectrum came out poor_fit. Isolated spikes at most two pixels wide, over 8 sigma from the
    # model, are left out and the fit repeated; the message lists them (common practice: cosmic
    # rays are rejected as single-pixel outliers; no source)
    rng = np.random.default_rng(44)
    n_ok = 0
    for seed in range(6 if method == "fast" else 3):
        s, za, zr = jet_pair_spectrum(rng.uniform(0.1, 0.25), rng.uniform(30, 70), fwhm=700.0, snr=30.0, seed=seed)
        y, e, x = s.flux.value.copy(), s.uncertainty.array, s.spectral_axis.value
        hits = []
        for z in (za, zr):
            i = int(np.searchsorted(x, 6564.61 * (1 + float(z)) + rng.uniform(-12, -4)))
            y[i] += 30 * e[i]
            hits.append(x[i])
        spiked = Spectrum(spectral_axis=s.spectral_axis, flux=y * s.flux.unit, uncertainty=s.uncertainty, meta=dict(s.meta))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(spiked, "H-alpha", components=2, method=method)
        msg = " ".join(t["message"])
        assert "cosmic rays or bad pixels" in msg, msg
        assert all(f"{h:.6g}" in msg for h in hits), (hits, msg)
        assert t.meta["spikes"] == sorted(hits)
        for k, z in ((0, za), (1, zr)):
            assert abs(t["z"][k] - z) < 5 * t["z_err"][k]
        n_ok += set(t["status"]) == {"ok"}
    assert n_ok >= (5 if method == "fast" else 2)


def test_an_unmodelled_narrow_line_is_not_taken_for_a_spike():
    # A narrow line sampled by two pixels per FWHM (host H-alpha at rest, host lines not fitted):
    # the fit is poor, and it must stay so; its peak is no cosmic ray, though its two central
    # pixels look like one when the line falls between them (code path; no source)
    rng = np.random.default_rng(45)
    kms = u.km / u.s
    grid = 10 ** np.arange(np.log10(5500.0), np.log10(8000.0), 1e-4) * u.AA  # 69 km/s pixels
    for _ in range(4):
        za, zr = float(dk.redshift(0.05, 60)), float(dk.redshift(0.05, 120))  # the host line inside the windows
        comps = [LineComponent("H-alpha", z=z, fwhm=800 * kms, strength=q) for z, q in ((za, 2.0), (zr, 1.4))]
        comps.append(LineComponent("H-alpha", z=0.0, fwhm=140 * kms, strength=rng.uniform(0.8, 1.5)))
        s = synthesize_spectrum(grid, comps, continuum=1.0, snr=40, seed=rng)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, "H-alpha", components=2, method="fast", host=None, window_kms=12000.0)
        assert "cosmic rays" not in " ".join(t["message"]), list(t["message"])
        assert "poor_fit" in t["flags"][0]
        assert t.meta["spikes"] == []


def test_a_misfit_is_not_taken_for_spikes():
    # Residuals of a poor fit of a blended pair at R = 1000 (recorded from a spectrum nobody tuned
    # for): single pixels reach 8 sigma from their running median inside a structured misfit.
    # Left out as "cosmic rays", the refit found another decomposition, ok and 6 sigma off. A spike
    # must stand far above the local scatter; a cosmic ray on a good fit does (code path, no source)
    from dopplerkit.measure import _spikes

    rng = np.random.default_rng(46)
    xw = np.arange(6500.0, 6650.0, 3.0)
    r = rng.normal(0, 1, xw.size)
    k = int(np.searchsorted(xw, 6560.0))
    r[k : k + 10] = [2.0, 1.3, -2.0, -7.1, -3.2, 1.2, 6.8, -1.5, -3.6, 1.9]
    assert _spikes({"_resid": (xw, r), "p_value": 1e-22}) is None
    # a 25-sigma spike whose neighbours the least-squares model was pulled under
    r = rng.normal(0, 1, xw.size)
    r[k - 2 : k + 3] += [-5.0, -7.0, 25.0, -8.0, -6.0]
    pos, sign = _spikes({"_resid": (xw, r), "p_value": 1e-30})
    assert list(pos) == [xw[k]] and list(sign) == [1.0]
    # a good fit is never searched
    assert _spikes({"_resid": (xw, r), "p_value": 0.5}) is None


def test_an_absorber_at_rest_beside_an_outflow_is_a_rival():
    # Invented X-ray spectrum: an outflow in Fe XXVI + Fe XXV absorption (tied, z = -0.12) and a
    # Fe XXV absorber at rest (Poisson counts). The rival search skipped absorption (it required a
    # positive flux); one component asked for and two absorbers in range: not decided by the data
    # (common practice, no source). Rest energies: NIST ASD (from memory), as in the catalogue
    rng = np.random.default_rng(48)
    e = np.arange(5.0, 9.0, 0.01)
    for _ in range(3):
        model = 3000.0 / e
        for rest, depth, z, fw in ((6.966, 0.5, -0.12, 4000.0), (6.700, 0.35, -0.12, 4000.0), (6.700, 0.3, 0.0, 2000.0)):
            mu = rest / (1 + z)
            model = model * (1 - depth * np.exp(-0.5 * ((e - mu) / (mu * fw / 299792.458 / 2.3548)) ** 2))
        n = rng.poisson(model).astype(float)
        s = Spectrum(spectral_axis=e * u.keV, flux=n * u.ct, uncertainty=StdDevUncertainty(np.sqrt(np.maximum(n, 1.0))))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = measure_lines(s, ["Fe XXVI Ly-alpha", "Fe XXV He-alpha w"], tie=True, kind="absorption", z_range=(-0.3, 0.1), method="fast")
        assert set(t["status"]) == {"suspect"} and "rival" in t["flags"][0], list(t["message"])
        # an outflow is blueshifted: a z range that says so leaves the absorber at rest out
        t = measure_lines(s, ["Fe XXVI Ly-alpha", "Fe XXV He-alpha w"], tie=True, kind="absorption", z_range=(-0.3, -0.02), method="fast")
        assert "rival" not in ",".join(t["flags"]), list(t["message"])


def test_overlapping_pair_z_errors_are_correlated_in_both_engines():
    # A pair 6 deg from transverse with lines 900 km/s wide overlaps: the two z errors are strongly
    # correlated (the fit's covariance), and both engines say so alike (code path, no source)
    s, _, _ = jet_pair_spectrum(0.03, 87.0, fwhm=900.0, snr=40.0, seed=2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = measure_lines(s, "H-alpha", components=2, method="fast").meta["z_corr"][0]
        b = measure_lines(s, "H-alpha", components=2, method="lmfit").meta["z_corr"][0]
    assert a[0][0] == pytest.approx(1.0) and a[0][1] == pytest.approx(a[1][0])
    assert a[0][1] > 0.5
    assert a[0][1] == pytest.approx(b[0][1], abs=1e-3)
    # well apart, hardly correlated
    s, _, _ = jet_pair_spectrum(0.2, 40.0, seed=3)
    assert abs(measure_lines(s, "H-alpha", components=2, method="fast").meta["z_corr"][0][0][1]) < 0.2


def test_topocentric_axis_is_flagged_until_moved_to_the_barycentre():
    # a narrow jet pair measured to ~1e-6 in z on an axis the header says is topocentric (FITS SPECSYS,
    # Greisen et al. 2006, A&A 446, 747; from memory): Earth's motion (up to ~30 km/s, 1e-4 in z) is in
    # every z, so the components are suspect ('topocentric') until the axis is moved; then the invented
    # barycentric truth comes back within the errors
    from dopplerkit.exceptions import ReferenceFrameWarning
    from dopplerkit.spectra import barycentric_correction, to_barycentric

    meta = {"SPECSYS": "TOPOCENT", "RA": 250.0, "DEC": -12.5, "MJD-OBS": 60810.3, "OBSGEO-X": 4843319.3, "OBSGEO-Y": 2499823.5}
    meta |= {"OBSGEO-Z": -3304672.2, "medium": "vacuum"}
    s, za, zr = jet_pair_spectrum(0.2, 50.0, fwhm=300.0, snr=80.0, seed=3, grid=np.arange(5500.0, 8500.0, 0.5) * u.AA)
    v = barycentric_correction(meta).to_value(u.km / u.s)
    assert abs(v) > 5  # this date and target: a shift of many z errors
    topo = Spectrum(flux=s.flux, spectral_axis=s.spectral_axis / (1 + v / 299792.458), uncertainty=s.uncertainty, meta=meta)
    with pytest.warns(ReferenceFrameWarning, match="H-alpha approaching, H-alpha receding: correct the axis first"):
        t = measure_lines(topo, "H-alpha", components=2, method="fast")
    assert list(t["status"]) == ["suspect", "suspect"] and all("topocentric" in f for f in t["flags"])
    assert t.meta["frame"] == "TOPOCENT" and "Earth's motion" in t["message"][0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        b = measure_lines(to_barycentric(topo), "H-alpha", components=2, method="fast")
    assert list(b["status"]) == ["ok", "ok"] and b.meta["frame"] == "BARYCENT"
    pulls = (np.asarray(b["z"]) - [za, zr]) / np.asarray(b["z_err"])
    assert np.all(np.abs(pulls) < 4), pulls
    # a z error larger than what Earth's motion can shift (30.8 km/s x (1 + z)): a note, no flag
    from dopplerkit.measure import _check_frame

    rows = [
        {"line": "H-alpha", "component": c, "z": 0.1, "z_err": e, "flags": [], "notes": [], "status": "ok"}
        for c, e in (("a", 2e-4), ("b", 5e-5))
    ]
    _check_frame(rows, "GEOCENTR", {})
    assert [r["flags"] for r in rows] == [[], ["topocentric"]] and [r["status"] for r in rows] == ["ok", "suspect"]
    assert "more than the z errors of H-alpha b:" in rows[0]["notes"][0]


def test_a_component_that_may_be_another_jets_line_alone_is_not_ok():
    # An invented pair (beta 0.296, 22.9 deg) whose approaching H-alpha (4998 A) lies just off the
    # spectrum, while the receding jet's H-beta (6478 A, at the case-B ratio 1/2.86 of its H-alpha,
    # Osterbrock & Ferland 2006, table 4.2) sits where an approaching H-alpha could be: the fit takes
    # it for the approaching H-alpha. It cannot pull the centre (the two positions coincide), but the
    # feature can be that H-beta alone: the component must be 'blend' and say so (found on spectra
    # nobody tuned for: ok, 3000 sigma off; common practice, no source).
    za, zr = float(dk.redshift(0.296, 22.9)), float(dk.redshift(0.296, 180 - 22.9))
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=z, fwhm=800 * kms, strength=q) for z, q in ((za, 2.0), (zr, 1.6))]
    comps += [LineComponent("H-beta", z=z, fwhm=800 * kms, strength=q / 2.86) for z, q in ((za, 2.0), (zr, 1.6))]
    s = synthesize_spectrum(np.arange(5000.0, 9000.0, 1.5) * u.AA, comps, snr=25, seed=4, resolution=4000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method="fast", z_range=(-0.5, 0.5))
    i = int(np.argmin(np.abs(np.asarray(t["centre"].to_value(u.AA)) - 4861.35 * (1 + zr))))
    assert t["component"][i] == "approaching" and t["status"][i] == "suspect" and "blend" in t["flags"][i]
    assert "in good part or alone, H-beta of the receding component" in t["message"][i]


def _jet_pair_with_other_lines(beta, angle_deg, lo, hi, fwhm, q, seed, helium=True):
    # both jets carry H-alpha, H-beta at the case-B ratio 1/2.86 (Osterbrock & Ferland 2006, table
    # 4.2; from memory) and, if asked, He I 5876 and 6678 at 0.1 and 0.03 of H-alpha (invented, within the range
    # of jets; common practice, no source); the receding jet is q times the approaching one
    kms = u.km / u.s
    za, zr = float(dk.redshift(beta, angle_deg * u.deg)), float(dk.redshift(beta, (180 - angle_deg) * u.deg))
    comps = []
    for z, f in ((za, 2.0), (zr, 2.0 * q)):
        lines = [("H-alpha", f), ("H-beta", f / 2.86)]
        if helium:
            lines += [("He I 5876", 0.1 * f), ("He I 6678", 0.03 * f)]
        comps += [LineComponent(name, z=z, fwhm=fwhm * kms, strength=s) for name, s in lines]
    grid = np.arange(lo, hi, 1.5) * u.AA
    return synthesize_spectrum(grid, comps, snr=25, seed=seed, resolution=4000), za, zr


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_h_beta_and_helium_of_one_jet_are_not_taken_for_a_pair(method):
    # An invented pair (beta 0.22, 25 deg) on 5800-7800 A: both H-alpha lines lie off the spectrum;
    # the approaching jet's H-beta (3990 A) too, the receding jet's H-beta (5977 A) and He I 5876
    # (7225 A) do not. Read as an H-alpha pair, they give two z that no pair of equal jets gives
    # (found on spectra nobody tuned for: ok, thousands of sigma off). H-beta and He I 5876 of one
    # gas at the same z explain both features: 'id_alternative', and the message says so.
    s, _, _ = _jet_pair_with_other_lines(0.22, 25.0, 5800.0, 7800.0, 900.0, 0.65, seed=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method=method, medium="vacuum", z_range=(-0.5, 0.5))
    assert list(t["status"]) == ["suspect", "suspect"]
    assert all("id_alternative" in f for f in t["flags"])
    assert "fits H-beta at z = 0.229" in t["message"][0] and "fits He I 5876 at z = 0.229" in t["message"][1]


@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_a_pair_no_two_equal_jets_give_is_unphysical(method):
    # An invented pair (beta 0.23, 24 deg) on 4000-7000 A: the approaching H-alpha (5326 A) is on
    # the spectrum, the receding one (8161 A) is not, and the receding jet's H-beta (6045 A) sits
    # where a slower receding H-alpha could be. The two z then give (1 + z_a)(1 + z_r) = 0.75, where
    # two equal-speed jets give Gamma**2 (1 - beta**2 cos**2 theta) >= 1 at any angle (1 + z =
    # Gamma (1 -+ beta cos theta) for each jet; Margon 1984, ARA&A 22, 507; from memory): both
    # components 'unphysical_pair', the approaching z still right.
    s, za, _ = _jet_pair_with_other_lines(0.23, 24.0, 4000.0, 7000.0, 800.0, 0.8, seed=1, helium=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "H-alpha", components=2, method=method, medium="vacuum", z_range=(-0.5, 0.5))
    assert list(t["status"]) == ["suspect", "suspect"]
    assert all("unphysical_pair" in f for f in t["flags"])
    assert abs(t["z"][0] - za) < 5 * t["z_err"][0]
    assert "no two equal-speed jets" in t["message"][0]


def _tied_pair(beta, angle_deg, lo, hi, fwhm, q, helium, seed, snr):
    # both jets: H-alpha, H-beta at the case-B ratio 1/2.86 (Osterbrock & Ferland 2006, table 4.2;
    # from memory), He I 5876 at `helium` times H-alpha and He I 6678 at 0.28 of He I 5876 (case B,
    # Benjamin, Skillman & Smits 1999, ApJ 514, 307; from memory); the receding jet q times the
    # approaching one
    kms = u.km / u.s
    za, zr = float(dk.redshift(beta, angle_deg * u.deg)), float(dk.redshift(beta, (180 - angle_deg) * u.deg))
    comps = []
    for z, f in ((za, 2.0), (zr, 2.0 * q)):
        for name, s in (("H-alpha", f), ("H-beta", f / 2.86), ("He I 5876", helium * f), ("He I 6678", 0.28 * helium * f)):
            comps.append(LineComponent(name, z=z, fwhm=fwhm * kms, strength=s))
    s = synthesize_spectrum(np.arange(lo, hi, 1.5) * u.AA, comps, snr=snr, seed=seed, resolution=4000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, ["H-alpha", "He I 5876"], components=2, tie=True, method="fast", medium="vacuum", z_range=(-0.5, 0.5))
    return t, za, zr


def _confidently_wrong(t, za, zr):
    # ok rows whose z is more than 5 sigma from the truth of their label
    truth = np.where(np.asarray(t["component"]) == "approaching", za, zr)
    pull = np.abs((np.asarray(t["z"]) - truth) / np.asarray(t["z_err"]))
    return [(str(c), float(p)) for c, p, s in zip(t["component"], pull, t["status"], strict=True) if s == "ok" and p > 5]


def test_a_lone_jet_beside_a_component_that_may_be_its_own_line_is_unpaired():
    # Invented: beta 0.20, 30.7 deg on 6000-9500 A, so the approaching jet's H-alpha and He I lie off
    # the spectrum. The receding jet is fitted as the 'approaching' component and a faint second
    # component is put on its own He I 6678 (read as a receding He I 5876). That partner may be
    # another line alone, so the survivor's label is not decided: 'unpaired', never ok by its label
    # (found on spectra nobody tuned for: ok, 16000 sigma off; common practice, no source).
    t, za, zr = _tied_pair(0.2013, 30.70, 6000.0, 9500.0, 515.0, 0.908, 0.324, seed=3, snr=30)
    assert not _confidently_wrong(t, za, zr), t["component", "z", "z_err", "flags"]
    lone = [i for i in range(len(t)) if abs(t["z"][i] - zr) < 1e-3]
    assert lone and all(t["status"][i] == "suspect" for i in lone)


def test_a_label_that_changes_with_a_tied_reading_is_ambiguous():
    # Invented: beta 0.106, 69.5 deg on 5800-7800 A: the approaching He I 5876 lies off the
    # spectrum, and the fit reads the approaching H-alpha as He I 5876 of a component redder than
    # the receding jet. Read the other way, that component becomes the approaching one: the
    # receding jet's label changes with the reading, so it is 'id_ambiguous' too (found on spectra
    # nobody tuned for: labelled approaching, ok, 1269 sigma off; common practice, no source).
    t, za, zr = _tied_pair(0.10585, 69.517, 5800.0, 7800.0, 843.0, 0.507, 0.180, seed=3, snr=20)
    assert not _confidently_wrong(t, za, zr), t["component", "z", "z_err", "flags"]


def test_two_blueshifted_absorption_troughs_are_not_an_unphysical_pair():
    # Two troughs of one invented outflow (Fe XXVI Ly-alpha at z = -0.12 and -0.06, both
    # approaching) give (1 + z_a)(1 + z_r) = 0.83 < 1: impossible for an equal-speed jet pair, but
    # absorption is more often such an outflow than a jet pair, so the pair test is not applied to
    # it (common practice, no source)
    kms = u.km / u.s
    comps = [LineComponent("Fe XXVI Ly-alpha", z=z, fwhm=3000 * kms, strength=-s) for z, s in ((-0.12, 0.05), (-0.06, 0.04))]
    s = synthesize_spectrum(np.arange(6.0, 9.0, 0.004) * u.keV, comps, snr=60, seed=2, resolution=2000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(s, "Fe XXVI Ly-alpha", components=2, kind="absorption", method="fast")
    assert not any("unphysical_pair" in f for f in t["flags"])
    assert abs(t["z"][0] + 0.12) < 5 * t["z_err"][0]
