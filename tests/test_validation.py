"""Every invalid input is refused with an error that names it (a table of >= 300 cases).

The public API: each function is called with valid arguments except one, replaced in turn by
values a user might pass by mistake (NaN where a measurement is required, zero or negative
errors, booleans, text, infinities, out-of-range speeds and angles, a velocity where a redshift
is expected, wrong units). Each must raise TypeError, ValueError or UnitsError naming the
parameter. The one documented exception: NaN in the vectorised kinematics propagates to NaN
(so masked array elements stay masked; dopplerkit.kinematics module docs), checked here too.
The batch configuration: each key with wrong types, ranges, unknown names; ConfigError naming
the key.
"""

from __future__ import annotations

import warnings

import astropy.units as u
import numpy as np
import pytest

import dopplerkit as dk
from dopplerkit import fitting as F
from dopplerkit.batch import ConfigError, parse_config

NAN = float("nan")
ERRORS = (TypeError, ValueError, u.UnitsError)

# values a user might pass by mistake, per kind of parameter (NaN is listed apart: see module docs)
BAD = {
    "beta": [np.inf, -0.1, 1.0, 1.5, True, "0.3", 3.1e5 * u.km / u.s, 0.3 * u.m, None],
    "gamma": [0.5, -2.0, np.inf, True, "2"],
    "theta": [-30.0, 400.0, np.inf, True, "a", 1 * u.m, -0.1 * u.rad, 7 * u.rad, np.array([10.0, 200.0])],
    "alpha": [np.inf, True, "x", 1 * u.s],
    "geometry": ["tube", 3, None],
    "z": [-1.0, -2.0, True, 3000 * u.km / u.s, "0.1", np.inf],
    "distance": [-1 * u.kpc, 0 * u.kpc, 5.0, 1 * u.s],
    "ratio": [-1.0, 0.0, True, "big"],
    "mu": [-1 * u.mas / u.yr, 1.0, 1 * u.s],
    "host_z": [0.0, -0.5, True, 3000 * u.km / u.s, "0.1", np.inf],
    "flux_density": [-1 * u.Jy, 0 * u.Jy, 1.0, 1 * u.s],
    "frequency": [-1 * u.GHz, 37.0, 1 * u.s],
    "timescale": [-1 * u.d, 0 * u.d, 100.0, 1 * u.m],
    "temperature": [-1 * u.K, 0 * u.K, 5e10, 1 * u.m],
}


def _api_cases():
    cases = []

    def add(fn, args, kw, where, kind, label=None, nan=True):
        label = label or (where if isinstance(where, str) else kind)
        for b in BAD[kind] + ([NAN] if nan else []):
            a2, k2 = list(args), dict(kw)
            if isinstance(where, int):
                a2[where] = b
            else:
                k2[where] = b
            cases.append(pytest.param(fn, a2, k2, label, b is NAN, id=f"{fn.__name__}-{label}-{b!r:.25}"))

    pair = [0.24, 57.0]
    for fn in (dk.doppler_factor, dk.redshift, dk.apparent_speed):
        add(fn, pair, {}, 0, "beta")
        add(fn, pair, {}, 1, "theta")
        add(fn, [None, 57.0], {"gamma": 2.0}, "gamma", "gamma")
    for fn in (dk.beaming_factor, dk.jet_counterjet_ratio):
        add(fn, [0.24, 57.0, 0.6], {}, 0, "beta")
        add(fn, [0.24, 57.0, 0.6], {}, 1, "theta")
        add(fn, [0.24, 57.0, 0.6], {}, 2, "alpha")
        add(fn, [0.24, 57.0, 0.6], {}, "geometry", "geometry", nan=False)
    add(dk.lorentz_factor, [0.3], {}, 0, "beta")
    add(dk.lorentz_factor, [None], {"gamma": 2.0}, "gamma", "gamma")
    for fn in (dk.aberrate, dk.deaberrate):
        add(fn, [30.0, 0.3], {}, 0, "theta", label="theta")
        add(fn, [30.0, 0.3], {}, 1, "beta")
    add(dk.beta_cos_theta_from_ratio, [5.0, 0.6], {}, 0, "ratio")
    add(dk.beta_cos_theta_from_ratio, [5.0, 0.6], {}, 1, "alpha")
    add(dk.boost_exponent, [0.6], {}, 0, "alpha")
    add(dk.boost_exponent, [0.6], {}, "geometry", "geometry", nan=False)
    add(dk.beta_from_redshift, [0.1], {}, 0, "z")
    add(dk.velocity_readings, [0.1], {}, 0, "z")
    add(dk.compose_redshift, [0.1, 0.2], {}, 0, "z")
    add(dk.compose_redshift, [0.1, 0.2], {}, 1, "z")
    add(dk.redshift_locus, [0.1], {}, 0, "z")
    add(dk.solve_jet_pair, [-0.1045, 0.1648], {}, 0, "z", label="z_approaching")
    add(dk.solve_jet_pair, [-0.1045, 0.1648], {}, 1, "z", label="z_receding")
    pm = {"distance": 5 * u.kpc}
    add(dk.proper_motions, [0.24, 57.0], pm, "distance", "distance", nan=False)  # a bare NaN has no unit: refused
    add(dk.proper_motions, [0.24, 57.0], pm, 0, "beta")
    add(dk.proper_motions, [0.24, 57.0], pm, 1, "theta")
    mus = [10 * u.mas / u.yr, 5 * u.mas / u.yr, 5 * u.kpc]
    add(dk.solve_proper_motions, mus, {}, 0, "mu", label="mu_approaching", nan=False)
    add(dk.solve_proper_motions, mus, {}, 1, "mu", label="mu_receding", nan=False)
    add(dk.solve_proper_motions, mus, {}, 2, "distance", nan=False)
    # jets of active galaxies
    add(dk.apparent_speed_from_proper_motion, [1 * u.mas / u.yr, 0.5], {}, 0, "mu", nan=False)
    add(dk.apparent_speed_from_proper_motion, [1 * u.mas / u.yr, 0.5], {}, 1, "host_z", label="z")
    add(dk.apparent_speed_limits, [5.0], {}, 0, "ratio", label="beta_app", nan=False)
    add(dk.solve_apparent_and_doppler, [5.0, 8.0], {}, 1, "ratio", label="delta")
    add(dk.intrinsic_opening_angle, [20.0, 10.0], {}, 1, "theta")
    add(dk.intrinsic_opening_angle, [20.0, 10.0], {}, 0, "theta", label="apparent")
    add(dk.counterjet_limit, [100.0, 0.5], {}, 1, "ratio", label="counterjet_upper_limit")
    add(dk.counterjet_limit, [100.0, 0.5], {}, "alpha", "alpha")
    tv = [1 * u.Jy, 37 * u.GHz, 100 * u.d, 1.0]
    add(dk.variability_brightness_temperature, tv, {}, 0, "flux_density", label="delta_flux", nan=False)
    add(dk.variability_brightness_temperature, tv, {}, 1, "frequency", nan=False)
    add(dk.variability_brightness_temperature, tv, {}, 2, "timescale", nan=False)
    add(dk.variability_brightness_temperature, tv, {}, 3, "host_z", label="z")
    add(dk.variability_doppler_factor, [1e12 * u.K], {}, 0, "temperature", label="t_var", nan=False)
    add(dk.variability_doppler_factor, [1e12 * u.K], {}, "t_int", "temperature", label="t_int", nan=False)
    # fits: a measurement is required, so NaN is an error too
    jp = [-0.1045, 0.1648, 1e-3, 1e-3]
    add(F.fit_jet_pair, jp, {}, 0, "z", label="z_approaching", nan=False)
    add(F.fit_jet_pair, jp, {}, 1, "z", label="z_receding", nan=False)
    for i, name in ((2, "z_approaching_err"), (3, "z_receding_err")):
        for b in [0.0, -1e-3, NAN, np.inf, True, "x"]:
            a = list(jp)
            a[i] = b
            cases.append(pytest.param(F.fit_jet_pair, a, {}, name, False, id=f"fit_jet_pair-{name}-{b!r}"))
    for i, name in ((0, "z_approaching"), (1, "z_receding")):
        a = list(jp)
        a[i] = NAN
        cases.append(pytest.param(F.fit_jet_pair, a, {}, name, False, id=f"fit_jet_pair-{name}-nan"))
    for b in [1.0, -1.0, 1.5, NAN, True, "x"]:
        cases.append(pytest.param(F.fit_jet_pair, jp, {"z_corr": b}, "z_corr", False, id=f"fit_jet_pair-z_corr-{b!r}"))
        pair = (-0.1045, 0.1648, 1e-3, 1e-3, b)
        cases.append(pytest.param(F.fit_constraints, [], {"z_pairs": [pair]}, "z_pairs", False, id=f"fit_constraints-z_pairs-corr-{b!r}"))
    for b in [
        (NAN, 0.1, 1e-3, 1e-3),
        (-0.1, 0.1, 0.0, 1e-3),
        (-0.1, 0.1, 1e-3, -1.0),
        (-0.1, 0.1, 1e-3),
        (True, 0.1, 1e-3, 1e-3),
        ("a", 0.1, 1e-3, 1e-3),
    ]:
        cases.append(pytest.param(F.fit_constraints, [], {"z_pairs": [b]}, "z_pairs", False, id=f"fit_constraints-z_pairs-{b!r}"))
    for b in [(0.3, 0.0), (0.3, -1.0), (NAN, 0.1), (0.3, NAN), (True, 0.1)]:
        kw = {"z_pairs": [(-0.1045, 0.1648, 1e-3, 1e-3)], "priors": {"beta": b}}
        cases.append(pytest.param(F.fit_constraints, [], kw, "beta", False, id=f"fit_constraints-prior-{b!r}"))
    for key in ("apparent_speeds", "doppler_factors"):
        for b in [(NAN, 0.1), (5.0, 0.0), (5.0, -1.0), (-5.0, 0.5), (True, 0.1), (5.0,), "x"]:
            cases.append(pytest.param(F.fit_constraints, [], {key: [b]}, key, False, id=f"fit_constraints-{key}-{b!r}"))
    for b in [
        {"quantity": "beta", "lower": NAN},
        {"quantity": "beta"},
        {"quantity": "x", "lower": 1},
        {"quantity": "beta", "lower": 0.5, "scale": 0},
        "x",
    ]:
        kw = {"apparent_speeds": [(5.0, 0.5)], "limits": [b]}
        cases.append(pytest.param(F.fit_constraints, [], kw, "limits", False, id=f"fit_constraints-limits-{b!r}"))
    t = np.linspace(0.0, 300.0, 40)
    z1, z2 = np.full(40, -0.05), np.full(40, 0.1)
    for b in [NAN, -1.0, 0.0, True, "x"]:
        cases.append(pytest.param(F.fit_precessing_jet, [t, z1, z2, b], {}, "z_err", False, id=f"fit_precessing_jet-z_err-{b!r}"))
    for b in [(NAN, 1.0), (-5.0, 10.0), (10.0, 5.0), "x", (1.0,)]:
        kw = {"period_range": b}
        cases.append(
            pytest.param(F.fit_precessing_jet, [t, z1, z2, 1e-3], kw, "period_range", False, id=f"fit_precessing_jet-period_range-{b!r}")
        )
    for b in [(0.0, NAN), (0.0, 0.0), (0.0, -1e-4), True, "0"]:
        kw = {"z_systemic": b}
        cases.append(
            pytest.param(F.fit_precessing_jet, [t, z1, z2, 1e-3], kw, "z_systemic", False, id=f"fit_precessing_jet-z_systemic-{b!r}")
        )
    return cases


API_CASES = _api_cases()


@pytest.mark.parametrize(("fn", "args", "kwargs", "name", "propagates"), API_CASES)
def test_invalid_api_input_is_refused_by_name(fn, args, kwargs, name, propagates):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if propagates:
            # documented: NaN in the vectorised kinematics gives NaN out, no error (common practice, no source)
            out = fn(*args, **kwargs)
            values = out if isinstance(out, tuple) else (out,)
            if hasattr(out, "colnames"):
                values = [out[c] for c in out.colnames if c != "z"]
            assert any(np.any(np.isnan(np.asarray(getattr(v, "value", v), float))) for v in values), out
            return
        with pytest.raises(ERRORS) as exc:
            fn(*args, **kwargs)
    msg = str(exc.value)
    assert name in msg or name.split("_")[0] in msg, msg


BASE = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}


def _config_cases():
    cases = []

    def with_(section, key, value, expect):
        cfg = {k: (dict(v) if isinstance(v, dict) else [dict(x) for x in v]) for k, v in BASE.items()}
        if section == "line":
            cfg["line"][0][key] = value
            if key == "rest":
                cfg["line"][0].pop("name")
                cfg["line"][0]["medium"] = "vacuum"
        else:
            cfg.setdefault(section, {})[key] = value
        cases.append(pytest.param(cfg, expect, id=f"{section}-{key}-{value!r:.30}"))

    for v in (0, 7, 1.5, True, "2", -1):
        with_("line", "components", v, "components")
    for v in ("Nope", "H-alfa", ""):
        with_("line", "name", v, "name")
    for v in ("-6564.61 Angstrom", "nan Angstrom", "inf Angstrom", "6564 kg", "abc", "0 Angstrom", "[1, 2] Angstrom"):
        with_("line", "rest", v, "rest")
    for v in ("", "!!!"):
        with_("line", "label", v, "label")
    with_("line", "colour", "red", "colour")
    for v in ("x", "jetpair", 3):
        with_("kinematics", "model", v, "model")
    for v in (0, 1.0, -0.1, True, "0.5", float("nan"), 2):
        with_("kinematics", "beta_max", v, "beta_max")
    with_("kinematics", "speed", 0.3, "speed")
    for v in ("water", "", 1, True):
        with_("spectra", "medium", v, "medium")
    for v in ("xyzzy", "Angstromm"):
        with_("spectra", "spectral_unit", v, "spectral_unit")
        with_("spectra", "flux_unit", v, "flux_unit")
    with_("spectra", "mediums", "air", "mediums")
    for v in ("yes", 1, "true"):
        with_("fit", "tie", v, "tie")
    for v in ("both", "Emission", 1):
        with_("fit", "kind", v, "kind")
    for v in ("spline", "", 3):
        with_("fit", "continuum", v, "continuum")
    for v in (4, -1, 1.5, True, "2"):
        with_("fit", "continuum_degree", v, "continuum_degree")
    for key in ("window", "window_kms"):
        for v in (0, -1, True, "6", float("inf")):
            with_("fit", key, v, key)
    for key in ("z_min", "z_max"):
        for v in (-1.0, -2.0, True, "0", float("nan")):
            with_("fit", key, v, key)
    with_("fit", "z_maximum", 1.0, "z_maximum")
    for v in (
        "6470-6660",
        [["6470 Angstrom"]],
        [[6470, 6660]],
        [["6470 kg", "6660 kg"]],
        [["nan Angstrom", "6660 Angstrom"]],
        [["1 keV", "x"]],
    ):
        with_("fit", "exclude", v, "exclude")
    for v in ("yes", ["Nope"], [1, 2], [], 3):
        with_("host", "lines", v, "lines")
    for v in (True, -1.0, "0", float("nan")):
        with_("host", "z", v, "z")
    with_("host", "redshift", 0.1, "redshift")
    cases.append(pytest.param({**BASE, "fits": {}}, "fits", id="unknown-section"))
    cases.append(pytest.param({"kinematics": {"model": "jet-pair"}}, "[[line]]", id="no-line"))
    cases.append(pytest.param({**BASE, "line": [{"name": "H-alpha", "components": 1}]}, "jet-pair", id="pair-needs-two"))
    cases.append(pytest.param({**BASE, "fit": {"z_min": 0.5, "z_max": 0.1}}, "z_min", id="zmin>zmax"))
    two = [{"name": "H-alpha", "components": 2}, {"name": "H-beta", "components": 2, "label": "H alpha"}]
    cases.append(pytest.param({**BASE, "line": two}, "label", id="label-clash"))
    return cases


CONFIG_CASES = _config_cases()


@pytest.mark.parametrize(("cfg", "key"), CONFIG_CASES)
def test_invalid_config_is_refused_by_key(cfg, key):
    with pytest.raises(ConfigError) as exc:
        parse_config(cfg)
    assert key in str(exc.value), str(exc.value)


def test_the_table_is_large_enough():
    # the validation asks for >= 300 cases
    assert len(API_CASES) + len(CONFIG_CASES) >= 300
