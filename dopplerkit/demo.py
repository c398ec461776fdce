"""Invented demo scenarios: their generator (``python -m dopplerkit.demo``) and the demo run.

Every source, name and parameter here is invented for the demo; nothing is a real
object's data. The generator is deterministic (fixed seeds), so the committed files in
``data_demo/`` can be regenerated bit for bit with ``python -m dopplerkit.demo --generate``.

Scenarios
---------
``binary_dkx1/``   the invented precessing-jet X-ray binary "DKX-1": 64 optical epochs with
                   H-alpha and He I 5876 from both jets (FITS in ``fits/``, ECSV in ``ecsv/``),
                   ``truth.toml`` with the model parameters and ``epochs.ecsv`` with true shifts.
``quasar_dkq7/``   the invented quasar "DKQ-7" at z = 0.871 with an ultra-fast outflow seen as
                   blueshifted Fe XXV He-alpha and Fe XXVI Ly-alpha absorption, 2-10 keV.
``agn_dka3/``      the invented active galaxy "DKA-3" (z = 0.62): proper motions of four jet knots,
                   a radio flare and a counter-jet limit, for the apparent-motion inference.
``survey/``        200 single-epoch spectra of invented jet sources (one H-alpha jet pair each)
                   plus deliberately bad files, ``truth.ecsv`` and ``config.toml`` for batch fits.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import astropy.units as u
import numpy as np

EXIT_OK = 0
EXIT_SOME_FAILED = 1

#: The invented precessing binary DKX-1 (not any real system).
BINARY = {
    "name": "DKX-1",
    "beta": 0.2400,
    "inclination_deg": 68.0,
    "cone_angle_deg": 23.0,
    "period_d": 121.7,
    "t0_mjd": 60012.3,
    "n_epochs": 64,
    "seed": 20261202,
}

#: The invented quasar DKQ-7 with an ultra-fast outflow along the line of sight.
QUASAR = {"name": "DKQ-7", "z_cosmo": 0.871, "beta_outflow": 0.23, "seed": 7}

#: The invented blazar-like active galaxy DKA-3: one jet at Lorentz factor 11, 4.5 deg from the line
#: of sight, four moving knots, a radio flare and no counter-jet.
ACTIVE = {
    "name": "DKA-3",
    "z_cosmo": 0.62,
    "gamma": 11.0,
    "viewing_angle_deg": 4.5,
    "knots": 4,
    "proper_motion_error": 0.06,  # fractional
    "flare_frequency_ghz": 37.0,
    "flare_amplitude_jy": 1.8,
    "t_int_k": 5e10,
    "timescale_error": 0.12,  # fractional
    "jet_flux_mjy": 250.0,
    "counterjet_limit_mjy": 0.8,
    "seed": 33,
}

#: The invented survey of jet sources.
SURVEY = {"n": 200, "seed": 4242, "beta_range": (0.05, 0.30), "angle_range_deg": (15.0, 85.0)}


def default_data_dir() -> Path:
    """Where the demo data are (or will be generated): never inside an installed package.

    1. ``$DOPPLERKIT_DATA_DIR`` when set;
    2. ``data_demo/`` beside the package in a source tree (a git clone, an editable install);
    3. otherwise (a wheel in site-packages) ``$XDG_CACHE_HOME/dopplerkit/data_demo``, by default
       ``~/.cache/dopplerkit/data_demo``: :func:`run_demo` generates the data there on first use.
    """
    return _choose_data_dir(Path(__file__).resolve().parent, os.environ)


def _choose_data_dir(package_dir: Path, environ) -> Path:
    if environ.get("DOPPLERKIT_DATA_DIR"):
        return Path(environ["DOPPLERKIT_DATA_DIR"])
    tree = package_dir.parent / "data_demo"
    installed = any(part in ("site-packages", "dist-packages") for part in package_dir.parts)
    if not installed and tree.is_dir():
        return tree
    cache = Path(environ["XDG_CACHE_HOME"]) if environ.get("XDG_CACHE_HOME") else Path.home() / ".cache"
    return cache / "dopplerkit" / "data_demo"


# ---------------------------------------------------------------------------
# Generator
# ---------------------------------------------------------------------------
def _binary(outdir: Path) -> None:
    from .io import write_spectrum, write_table
    from .models import LineComponent, precessing_jet_redshifts, synthesize_spectrum

    b = BINARY
    rng = np.random.default_rng(b["seed"])
    d = outdir / "binary_dkx1"
    (d / "fits").mkdir(parents=True, exist_ok=True)
    (d / "ecsv").mkdir(parents=True, exist_ok=True)
    t = np.sort(b["t0_mjd"] - 40.0 + rng.uniform(0.0, 300.0, b["n_epochs"]))
    z1, z2 = precessing_jet_redshifts(t, b["beta"], b["inclination_deg"] * u.deg, b["cone_angle_deg"] * u.deg, b["period_d"], b["t0_mjd"])
    grid = np.arange(5000.0, 8300.0, 2.2) * u.AA
    snr = rng.uniform(25.0, 60.0, t.size)
    from astropy.table import Table

    for k in range(t.size):
        comps = []
        for zz, lab in ((z1[k], "jet1"), (z2[k], "jet2")):
            comps.append(LineComponent("H-alpha", z=float(zz), fwhm=900 * u.km / u.s, strength=2.2, label=lab))
            comps.append(LineComponent("He I 5876", z=float(zz), fwhm=900 * u.km / u.s, strength=0.9, label=lab))
        spec = synthesize_spectrum(
            grid,
            comps,
            continuum={"kind": "powerlaw", "amplitude": 2.0e-15, "index": -1.2, "pivot": 6500 * u.AA},
            resolution=3000,
            snr=float(snr[k]),
            seed=rng,
            medium="vacuum",
            meta={"OBJECT": b["name"], "MJD-OBS": float(t[k])},
        )
        spec.meta.pop("dopplerkit_truth")
        write_spectrum(spec, d / "fits" / f"dkx1_{k:03d}.fits")
        write_spectrum(spec, d / "ecsv" / f"dkx1_{k:03d}.ecsv")
    ep = Table({"file": [f"dkx1_{k:03d}" for k in range(t.size)], "mjd": t, "z_jet1": z1, "z_jet2": z2, "snr": snr})
    ep.meta["comment"] = ["True (noise-free) redshifts of the invented binary DKX-1."]
    write_table(ep, d / "epochs.ecsv")
    truth = "\n".join(
        [
            "# Invented precessing-jet binary DKX-1: the parameters the demo spectra were made with.",
            f'name = "{b["name"]}"',
            f"beta = {b['beta']}",
            f"inclination_deg = {b['inclination_deg']}",
            f"cone_angle_deg = {b['cone_angle_deg']}",
            f"period_d = {b['period_d']}",
            f"t0_mjd = {b['t0_mjd']}",
            f"seed = {b['seed']}",
            "",
        ]
    )
    (d / "truth.toml").write_text(truth)


def _quasar(outdir: Path) -> None:
    from .io import write_spectrum
    from .kinematics import compose_redshift, redshift
    from .models import LineComponent, synthesize_spectrum

    q = QUASAR
    d = outdir / "quasar_dkq7"
    d.mkdir(parents=True, exist_ok=True)
    z_out = redshift(q["beta_outflow"], 0.0)  # straight at us
    z_tot = compose_redshift(q["z_cosmo"], z_out)
    grid = np.arange(2.0, 10.0, 0.002) * u.keV
    comps = [
        LineComponent("Fe XXV He-alpha w", z=float(z_tot), fwhm=4000 * u.km / u.s, strength=-0.35, label="outflow"),
        LineComponent("Fe XXVI Ly-alpha", z=float(z_tot), fwhm=4000 * u.km / u.s, strength=-0.30, label="outflow"),
        LineComponent("Fe I K-alpha", z=float(q["z_cosmo"]), fwhm=2000 * u.km / u.s, strength=0.25, label="host"),
    ]
    spec = synthesize_spectrum(
        grid,
        comps,
        continuum={"kind": "powerlaw", "amplitude": 2.0e-3, "index": -1.9, "pivot": 5 * u.keV},
        flux_unit="ph / (s cm2 keV)",
        resolution=1200,
        snr=40,
        seed=q["seed"],
        meta={"OBJECT": q["name"]},
    )
    spec.meta.pop("dopplerkit_truth")
    write_spectrum(spec, d / "dkq7_xray.fits")
    write_spectrum(spec, d / "dkq7_xray.ecsv")
    (d / "truth.toml").write_text(
        "# Invented quasar DKQ-7 with an ultra-fast outflow seen along the line of sight.\n"
        f'name = "{q["name"]}"\nz_cosmo = {q["z_cosmo"]}\nbeta_outflow = {q["beta_outflow"]}\n'
        f"viewing_angle_deg = 0.0\nz_outflow_kinematic = {z_out:.10f}\nz_total = {z_tot:.10f}\n"
    )


SURVEY_CONFIG = """\
# Batch fit of the invented survey: one H-alpha jet pair per spectrum.
[[line]]
name = "H-alpha"
components = 2

[kinematics]
model = "jet-pair"

[spectra]
medium = "vacuum"
"""


def _survey(outdir: Path) -> None:
    from astropy.table import Table

    from .io import write_spectrum, write_table
    from .kinematics import redshift
    from .models import LineComponent, synthesize_spectrum

    s = SURVEY
    rng = np.random.default_rng(s["seed"])
    d = outdir / "survey"
    (d / "spectra").mkdir(parents=True, exist_ok=True)
    n = s["n"]
    beta = rng.uniform(*s["beta_range"], n)
    ang = np.degrees(np.arccos(rng.uniform(np.cos(np.radians(s["angle_range_deg"][1])), np.cos(np.radians(s["angle_range_deg"][0])), n)))
    za = redshift(beta, ang * u.deg)
    zr = redshift(beta, (180.0 - ang) * u.deg)
    fwhm = rng.uniform(300.0, 1500.0, n)
    snr = rng.uniform(15.0, 60.0, n)
    grid = np.arange(4800.0, 9000.0, 3.0) * u.AA
    files = []
    for k in range(n):
        comps = [
            LineComponent("H-alpha", z=float(za[k]), fwhm=fwhm[k] * u.km / u.s, strength=float(rng.uniform(1.5, 3.0)), label="approaching"),
            LineComponent("H-alpha", z=float(zr[k]), fwhm=fwhm[k] * u.km / u.s, strength=float(rng.uniform(0.8, 2.0)), label="receding"),
        ]
        spec = synthesize_spectrum(
            grid,
            comps,
            continuum=1.0e-16,
            resolution=2500,
            snr=float(snr[k]),
            seed=rng,
            medium="vacuum",
            meta={"OBJECT": f"DKJ-{k + 1:03d}"},
        )
        spec.meta.pop("dopplerkit_truth")
        if k % 20 == 19:
            name = f"dkj_{k + 1:03d}.ecsv"
        elif k % 20 == 9:
            name = f"dkj_{k + 1:03d}.fits"
            write_spectrum(spec, d / "spectra" / name, layout="wcs1d-fits")
            files.append(name)
            continue
        else:
            name = f"dkj_{k + 1:03d}.fits"
        write_spectrum(spec, d / "spectra" / name)
        files.append(name)
    truth = Table(
        {
            "file": files,
            "beta": beta,
            "viewing_angle": ang * u.deg,
            "z_approaching": za,
            "z_receding": zr,
            "fwhm": fwhm * u.km / u.s,
            "snr": snr,
        }
    )
    truth.meta["comment"] = ["Invented jet sources: the true parameters of each demo spectrum."]
    write_table(truth, d / "truth.ecsv")
    # deliberately bad files: each must give an error row, never stop the batch
    bad = d / "spectra" / "bad"
    bad.mkdir(exist_ok=True)
    (bad / "empty.fits").write_bytes(b"")
    whole = (d / "spectra" / files[0]).read_bytes()
    (bad / "truncated.fits").write_bytes(whole[: len(whole) // 2])
    t = Table({"wavelength": grid, "flux": np.full(grid.size, np.nan) * u.Unit("erg / (s cm2 Angstrom)")})
    t.write(bad / "nan_only.ecsv", format="ascii.ecsv", overwrite=True)
    t = Table({"wavelength": grid.value * u.kg, "flux": np.ones(grid.size) * u.Unit("erg / (s cm2 Angstrom)")})
    t.write(bad / "wrong_units.ecsv", format="ascii.ecsv", overwrite=True)
    (bad / "single_pixel.csv").write_text("wavelength,flux,error\n6563.0,1.0,0.1\n")
    (bad / "not_a_spectrum.txt").write_text("this file holds no spectrum\n")
    (d / "config.toml").write_text(SURVEY_CONFIG)


def _active(outdir: Path) -> None:
    """DKA-3: knots' proper motions, a flare's amplitude and time scale, a counter-jet limit (all invented)."""
    from astropy.table import Table

    from .io import write_table
    from .kinematics import apparent_speed, apparent_speed_from_proper_motion, doppler_factor, variability_brightness_temperature

    a = ACTIVE
    rng = np.random.default_rng(a["seed"])
    d = outdir / "agn_dka3"
    d.mkdir(parents=True, exist_ok=True)
    b_app = float(apparent_speed(gamma=a["gamma"], theta=a["viewing_angle_deg"]))
    delta = float(doppler_factor(gamma=a["gamma"], theta=a["viewing_angle_deg"]))
    per_mu = float(apparent_speed_from_proper_motion(1 * u.mas / u.yr, a["z_cosmo"]))  # beta_app of 1 mas/yr
    mu_true = b_app / per_mu
    err = a["proper_motion_error"] * mu_true
    mu = mu_true + rng.normal(0.0, err, a["knots"])
    write_table(
        Table(
            {
                "knot": [f"K{k + 1}" for k in range(a["knots"])],
                "mu": np.round(mu, 5) * u.mas / u.yr,
                "mu_err": np.full(a["knots"], round(err, 5)) * u.mas / u.yr,
            },
            meta={"comment": [f"invented active galaxy {a['name']}: proper motions of four jet knots (observer's time)"]},
        ),
        d / "knots.ecsv",
    )
    # the flare time scale that gives the true Doppler factor at the equipartition limit, then measured with an error
    t_1d = variability_brightness_temperature(a["flare_amplitude_jy"] * u.Jy, a["flare_frequency_ghz"] * u.GHz, 1 * u.d, a["z_cosmo"])
    tau_true = float(np.sqrt(t_1d.to_value(u.K) / (a["t_int_k"] * delta**3)))
    tau = tau_true * (1 + a["timescale_error"] * rng.normal())
    (d / "measurements.toml").write_text(
        f"# Invented active galaxy {a['name']}: what an observer measured (see knots.ecsv for the proper motions).\n"
        f'name = "{a["name"]}"\nz_host = {a["z_cosmo"]}\n\n'
        "[flare]  # the largest radio flare: amplitude and e-folding time scale\n"
        f"frequency_ghz = {a['flare_frequency_ghz']}\namplitude_jy = {a['flare_amplitude_jy']}\n"
        f"timescale_d = {tau:.3f}\ntimescale_err_d = {a['timescale_error'] * tau_true:.3f}\n\n"
        "[counterjet]  # flux densities at equal distances from the core; the counter-jet is not detected\n"
        f"jet_mjy = {a['jet_flux_mjy']}\nupper_limit_mjy = {a['counterjet_limit_mjy']}\nalpha = 0.7\n"
    )
    (d / "truth.toml").write_text(
        f"# Invented active galaxy {a['name']}: the parameters the measurements were made from.\n"
        f'name = "{a["name"]}"\nz_cosmo = {a["z_cosmo"]}\ngamma = {a["gamma"]}\nviewing_angle_deg = {a["viewing_angle_deg"]}\n'
        f"beta_app = {b_app:.6f}\ndoppler_factor = {delta:.6f}\nproper_motion_mas_per_yr = {mu_true:.6f}\n"
        f"flare_timescale_d = {tau_true:.4f}\nt_int_k = {a['t_int_k']:g}\nseed = {a['seed']}\n"
    )


def generate(outdir: str | Path | None = None) -> Path:
    """Regenerate every demo scenario into ``outdir`` (default: the source tree's data_demo/)."""
    out = Path(outdir) if outdir is not None else default_data_dir()
    out.mkdir(parents=True, exist_ok=True)
    _binary(out)
    _quasar(out)
    _survey(out)
    _active(out)
    return out


# ---------------------------------------------------------------------------
# The demo run
# ---------------------------------------------------------------------------
def run_demo(output_dir: str | Path = "results", workers: int | None = None, out=None, data_dir: str | Path | None = None) -> int:
    """Run the main job on the demo data and print where the results are.

    1. Batch-fit the invented survey (``data_demo/survey``): results table and summary figure.
    2. Measure both jets in every epoch of the invented binary DKX-1, fit the precessing-jet
       model, and compare the relativistic and Galilean readings.
    3. Read the invented quasar's outflow speed from its Fe XXV/XXVI absorption.
    4. Combine the invented active galaxy's apparent speeds, flare and counter-jet limit.
    """
    import warnings

    from astropy.table import Table, join

    from .batch import run_batch

    out = out or sys.stdout
    data = Path(data_dir) if data_dir is not None else default_data_dir()
    if not (data / "survey" / "config.toml").exists():
        print(f"demo data not found under {data}; regenerating them", file=out)
        generate(data)
    res = Path(output_dir)
    res.mkdir(parents=True, exist_ok=True)

    print("== 1. batch fit of the invented survey (data_demo/survey) ==", file=out)
    from .batch import log_to

    with log_to(out):
        _code, table = run_batch(
            data / "survey" / "spectra",
            data / "survey" / "config.toml",
            res / "survey.ecsv",
            workers=workers,
            plot=str(res / "survey.png"),
            out=out,
        )
    truth = Table.read(data / "survey" / "truth.ecsv")
    t = table[table["status"] == "ok"]
    t["name"] = [Path(f).name for f in t["file"]]
    truth["name"] = truth["file"]
    j = join(t, truth, keys="name", table_names=["fit", "true"])
    pull_b = (j["beta_fit"] - j["beta_true"]) / j["beta_err"]
    pull_t = (np.asarray(j["viewing_angle_fit"]) - np.asarray(j["viewing_angle_true"])) / np.asarray(j["viewing_angle_err"])
    print(
        f"  against the invented truth: beta within 1 sigma for {np.mean(np.abs(pull_b) < 1):.0%}, viewing angle for {np.mean(np.abs(pull_t) < 1):.0%} of {len(j)} sources (68% expected)",
        file=out,
    )
    for status in ("suspect", "error"):
        for row in table[table["status"] == status]:
            why = " (expected: a deliberately bad file)" if status == "error" else ""
            print(f"  {status} row{why}: {Path(row['file']).name}: {row['message']}", file=out)
    print(f"  results: {res / 'survey.ecsv'}; figure: {res / 'survey.png'}", file=out)

    print("\n== 2. the invented precessing binary DKX-1 (data_demo/binary_dkx1) ==", file=out)
    from .fitting import compare_models
    from .io import read_spectrum
    from .measure import measure_lines

    epochs = Table.read(data / "binary_dkx1" / "epochs.ecsv")
    rows, skipped = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # every component's status and message say the same, per epoch
        for name, mjd in zip(epochs["file"], epochs["mjd"], strict=True):
            s = read_spectrum(data / "binary_dkx1" / "fits" / f"{name}.fits")
            m = measure_lines(s, ["H-alpha", "He I 5876"], components=2, tie=True, method="fast")
            if not np.all(m["status"] == "ok"):
                skipped.append((name, "; ".join(dict.fromkeys(msg for msg in m["message"] if msg)) or ",".join(m["flags"])))
                continue
            corr = m.meta["z_corr"][0][0][1]  # the two jets' z errors, fitted together, correlate where the lines overlap
            rows.append((mjd, m["z"][0], m["z"][2], m["z_err"][0], m["z_err"][2], corr))
    if skipped:
        print(f"  {len(skipped)} of {len(epochs)} epochs left out of the fit, their lines suspect:", file=out)
        for name, why in skipped:
            print(f"    {name}: {why}", file=out)
    arr = np.array(rows)
    lines_t = Table(arr, names=["mjd", "z_blue", "z_red", "z_blue_err", "z_red_err", "z_corr"])
    from .io import write_table

    write_table(lines_t, res / "dkx1_lines.ecsv")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cmp = compare_models("precessing-jet", arr[:, 0], arr[:, 1], arr[:, 2], arr[:, 3], z_2_err=arr[:, 4], z_corr=arr[:, 5])
    print(cmp.relativistic.report(), file=out)
    print(cmp.report(), file=out)
    _warning_summary(caught, out)
    print(
        f"  (invented truth: beta {BINARY['beta']}, inclination {BINARY['inclination_deg']} deg, cone {BINARY['cone_angle_deg']} deg, period {BINARY['period_d']} d)",
        file=out,
    )
    print(f"  line positions: {res / 'dkx1_lines.ecsv'}", file=out)

    print("\n== 3. the invented quasar DKQ-7 (data_demo/quasar_dkq7) ==", file=out)
    from .kinematics import beta_from_redshift, beta_from_redshift_error, velocity_readings

    s = read_spectrum(data / "quasar_dkq7" / "dkq7_xray.fits")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = measure_lines(s, ["Fe XXV He-alpha w", "Fe XXVI Ly-alpha"], tie=True, kind="absorption", continuum="powerlaw")
    z_tot, z_err = float(m["z"][0]), float(m["z_err"][0])
    z_kin = (1 + z_tot) / (1 + QUASAR["z_cosmo"]) - 1
    z_kin_err = z_err / (1 + QUASAR["z_cosmo"])  # the host z is taken as exact here
    v = velocity_readings(z_kin)[0]
    beta = -beta_from_redshift(z_kin)
    beta_err = beta_from_redshift_error(z_kin, z_kin_err)
    linear = -float(v["cz"].value) / 299792.458
    print(
        f"  absorption z = {_pm(z_tot, z_err)} (status {m['status'][0]}); host z = {QUASAR['z_cosmo']}; "
        f"outflow z (composed, not subtracted) = {_pm(z_kin, z_kin_err)}",
        file=out,
    )
    print(
        f"  relativistic line-of-sight speed {_pm(beta, beta_err)} c; the linear reading cz gives {linear:.4f} c, "
        f"{abs(linear - beta) / beta:.1%} {'lower' if linear < beta else 'higher'}; invented truth {QUASAR['beta_outflow']} c",
        file=out,
    )

    print("\n== 4. the invented active galaxy DKA-3 (data_demo/agn_dka3) ==", file=out)
    _active_galaxy(data / "agn_dka3", out)
    return EXIT_OK


def _active_galaxy(d: Path, out) -> None:
    """Apparent speeds of the knots, a variability Doppler factor and a counter-jet limit in one inference."""
    import tomllib
    import warnings

    from astropy.table import QTable

    from .fitting import fit_constraints
    from .kinematics import (
        apparent_speed_from_proper_motion,
        counterjet_limit,
        variability_brightness_temperature,
        variability_doppler_factor,
    )

    if not (d / "knots.ecsv").exists():
        _active(d.parent)
    knots = QTable.read(d / "knots.ecsv")
    m = tomllib.loads((d / "measurements.toml").read_text())
    z = m["z_host"]
    b_app = np.atleast_1d(apparent_speed_from_proper_motion(knots["mu"], z))
    b_err = b_app * np.asarray((knots["mu_err"] / knots["mu"]).value)
    f, c = m["flare"], m["counterjet"]
    t_var = variability_brightness_temperature(f["amplitude_jy"] * u.Jy, f["frequency_ghz"] * u.GHz, f["timescale_d"] * u.d, z)
    delta = variability_doppler_factor(t_var)
    delta_err = delta * (2 / 3) * f["timescale_err_d"] / f["timescale_d"]
    bc_min = counterjet_limit(c["jet_mjy"] * u.mJy, c["upper_limit_mjy"] * u.mJy, c["alpha"], "jet")
    print(
        f"  {len(knots)} knots: apparent speeds {', '.join(f'{b:.1f}' for b in b_app)} c (+/- {np.median(b_err):.2g}); "
        f"flare: T_var {t_var.to_value(u.K):.3g} K, delta_var {_pm(delta, delta_err)}; no counter-jet: beta cos theta >= {bc_min:.3f}",
        file=out,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_constraints(
            apparent_speeds=list(zip(b_app.tolist(), b_err.tolist(), strict=True)),
            doppler_factors=[(delta, delta_err)],
            limits=[{"quantity": "beta_cos_theta", "lower": bc_min}],
        )
    print(
        f"  joint: Lorentz factor {_pm(fit.value('gamma'), fit.error('gamma'))}, viewing angle "
        f"{_pm(fit.value('viewing_angle'), fit.error('viewing_angle'))} deg (chi-square {fit.chi2:.2f} for {fit.dof} dof, "
        f"probability {fit.p_value:.2f}); invented truth Gamma {ACTIVE['gamma']}, {ACTIVE['viewing_angle_deg']} deg",
        file=out,
    )


def _pm(value: float, err: float) -> str:
    """value +/- error, both rounded to two significant digits of the error."""
    from ._format import with_error

    return with_error(float(value), float(err))


def _warning_summary(caught, out) -> None:
    """The warnings of a demo step, counted by kind, each with its first message (in full)."""
    from collections import Counter

    if not caught:
        return
    counts = Counter(w.category.__name__ for w in caught)
    first = {}
    for w in caught:
        first.setdefault(w.category.__name__, str(w.message))
    for name, n in counts.most_common():
        print(f"  warnings: {n} x {name}; the first: {first[name]}", file=out)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m dopplerkit.demo", description="Regenerate the invented demo data (fixed seeds).")
    p.add_argument("--generate", action="store_true", help="write the demo scenarios")
    p.add_argument("--output", default=None, help="target directory (default: data_demo/ of the source tree)")
    args = p.parse_args(argv)
    if args.generate:
        where = generate(args.output)
        print(f"demo data written to {where}")
        return EXIT_OK
    p.print_help()
    return 2


if __name__ == "__main__":
    sys.exit(main())
