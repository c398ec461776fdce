"""Batch fitting: formats, robustness to bad files, exit codes, resume after kill -9, Dask.

Spectra here are invented test data made with dopplerkit.models (known inputs to recover).
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from numpy.testing import assert_allclose

import dopplerkit as dk
from dopplerkit.batch import ConfigError, jet_pair_closed_form, load_config, parse_config
from dopplerkit.cli import main
from dopplerkit.io import write_spectrum
from dopplerkit.models import LineComponent, synthesize_spectrum

CONFIG = """
[[line]]
name = "H-alpha"
components = 2

[kinematics]
model = "jet-pair"

[spectra]
medium = "vacuum"
"""


def _spectrum(k, rng):
    beta, ang = rng.uniform(0.08, 0.25), rng.uniform(25, 80)
    za, zr = dk.redshift(beta, ang * u.deg), dk.redshift(beta, (180 - ang) * u.deg)
    grid = np.arange(5000.0, 8800.0, 2.5) * u.AA
    comps = [
        LineComponent("H-alpha", z=za, fwhm=700 * u.km / u.s, strength=2.0),
        LineComponent("H-alpha", z=zr, fwhm=700 * u.km / u.s, strength=1.6),
    ]
    return synthesize_spectrum(grid, comps, continuum=1e-16, snr=30, seed=rng, resolution=3000), beta, ang


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    d = tmp_path_factory.mktemp("survey")
    spectra = d / "spectra"
    (spectra / "sub").mkdir(parents=True)
    rng = np.random.default_rng(77)
    truth = {}
    for k in range(24):
        s, beta, ang = _spectrum(k, rng)
        if k % 4 == 0:
            name = spectra / f"s{k:02d}.fits"
            write_spectrum(s, name)
        elif k % 4 == 1:
            name = spectra / "sub" / f"s{k:02d}.fits"
            write_spectrum(s, name, layout="wcs1d-fits")
        elif k % 4 == 2:
            name = spectra / f"s{k:02d}.ecsv"
            write_spectrum(s, name)
        else:
            name = spectra / f"s{k:02d}.csv"  # plain CSV: no units in the file, taken from the config
            t = Table({"Wavelength": s.spectral_axis.value, "FLUX": s.flux.value, "Error": s.uncertainty.array})
            t.write(name, format="ascii.csv")
        truth[str(name)] = (beta, ang)
    bad = spectra / "bad"
    bad.mkdir()
    (bad / "empty.fits").write_bytes(b"")
    whole = (spectra / "s00.fits").read_bytes()
    (bad / "truncated.fits").write_bytes(whole[: len(whole) // 2])
    (bad / "garbage.fits").write_bytes(os.urandom(5000))
    g = np.arange(5000.0, 8800.0, 2.5)
    Table({"wavelength": g * u.AA, "flux": np.full(g.size, np.nan) * u.Jy, "uncertainty": np.ones(g.size) * u.Jy}).write(
        bad / "nan_only.ecsv", format="ascii.ecsv"
    )
    Table({"wavelength": g * u.kg, "flux": np.ones(g.size) * u.Jy, "uncertainty": np.ones(g.size) * u.Jy}).write(
        bad / "wrong_units.ecsv", format="ascii.ecsv"
    )
    Table({"wavelength": [6563.0] * u.AA, "flux": [1.0] * u.Jy, "uncertainty": [0.1] * u.Jy}).write(
        bad / "single_pixel.ecsv", format="ascii.ecsv"
    )
    shuffled = rng.permutation(g.size)
    Table({"wavelength": g[shuffled] * u.AA, "flux": np.ones(g.size) * u.Jy, "uncertainty": np.ones(g.size) * u.Jy}).write(
        bad / "unsorted.ecsv", format="ascii.ecsv"
    )
    cfg = d / "config.toml"
    cfg.write_text(CONFIG + 'spectral_unit = "Angstrom"\nflux_unit = "erg / (s cm2 Angstrom)"\n')
    return {"dir": spectra, "config": cfg, "truth": truth, "n_good": 24, "n_bad": 7}


def _run(survey, out, *extra):
    return main(["batch", str(survey["dir"]), "--config", str(survey["config"]), "--output", str(out), "--quiet", *extra])


def test_batch_end_to_end(survey, tmp_path):
    out = tmp_path / "res.ecsv"
    code = _run(survey, out, "--workers", "2", "--chunk-size", "5")
    assert code == 1  # some files failed, results still written
    t = Table.read(out)
    assert len(t) == survey["n_good"] + survey["n_bad"]
    ok = t[t["status"] == "ok"]
    assert len(ok) == survey["n_good"]
    for r in ok:
        beta, ang = survey["truth"][r["file"]]
        assert abs(r["beta"] - beta) < 4 * r["beta_err"]
        assert abs(r["viewing_angle"] - ang) < 4 * r["viewing_angle_err"]
    assert {
        "file",
        "status",
        "message",
        "h_alpha_approaching_centre",
        "h_alpha_approaching_z_err",
        "beta_err",
        "viewing_angle_err",
        "config_hash",
        "dopplerkit_version",
    } <= set(t.colnames)
    # nothing left beside the output: the journal is removed, temporary files renamed
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res.ecsv"]


@pytest.mark.parametrize(
    "name,pattern",
    [
        ("empty.fits", "empty file"),
        ("truncated.fits", "truncated"),
        ("garbage.fits", "not a readable FITS file|cannot read"),
        ("nan_only.ecsv", "fewer than 3 finite pixels"),
        ("wrong_units.ecsv", "not a wavelength, frequency, energy"),
        ("single_pixel.ecsv", "fewer than 3 finite pixels"),
        ("unsorted.ecsv", "not strictly monotonic"),
    ],
)
def test_each_bad_file_gets_a_clear_error_row(survey, tmp_path, name, pattern):
    import re

    out = tmp_path / "bad.ecsv"
    assert _run(survey, out, "--pattern", f"bad/{name}", "--workers", "1") == 1
    t = Table.read(out)
    assert len(t) == 1 and t["status"][0] == "error"
    assert re.search(pattern, t["message"][0]), t["message"][0]


def test_output_formats(survey, tmp_path):
    for ext in (".csv", ".fits"):
        out = tmp_path / f"r{ext}"
        assert _run(survey, out, "--pattern", "s0*.fits", "--workers", "1") == 0
        t = Table.read(out)
        assert len(t) == 6 and set(t["status"]) == {"ok"}  # s00, s04, s08 and sub/s01, s05, s09


def test_config_errors(tmp_path, survey):
    bad = tmp_path / "bad.toml"
    bad.write_text(CONFIG + "colour = 3\n")
    with pytest.raises(
        ConfigError, match=r"\[spectra\]: unknown key\(s\) \['colour'\]; allowed: \['flux_unit', 'medium', 'spectral_unit'\]"
    ):
        load_config(bad)
    with pytest.raises(ConfigError, match=r"model must be one of \['jet-pair', 'none'\], got 'cone'"):
        parse_config({"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "cone"}})
    with pytest.raises(ConfigError, match=r"no line named 'H-alpah'"):
        parse_config({"line": [{"name": "H-alpah"}]})
    with pytest.raises(ConfigError, match=r"medium must be 'air' or 'vacuum' for a rest wavelength"):
        parse_config({"line": [{"rest": "6564.61 Angstrom"}]})
    assert (
        parse_config(
            {"line": [{"rest": "6564.61 Angstrom", "medium": "vacuum", "components": 2}], "kinematics": {"model": "jet-pair"}}
        ).model
        == "jet-pair"
    )
    # nothing could run: exit code 2
    assert main(["batch", str(survey["dir"]), "--config", str(bad), "--output", str(tmp_path / "x.ecsv"), "--quiet"]) == 2
    assert (
        main(["batch", str(tmp_path / "missing"), "--config", str(survey["config"]), "--output", str(tmp_path / "x.ecsv"), "--quiet"]) == 2
    )
    assert (
        main(
            [
                "batch",
                str(survey["dir"]),
                "--config",
                str(survey["config"]),
                "--output",
                str(tmp_path / "x.ecsv"),
                "--pattern",
                "*.nothing",
                "--quiet",
            ]
        )
        == 2
    )
    assert not (tmp_path / "x.ecsv").exists()


def test_resume_skips_done(survey, tmp_path):
    out = tmp_path / "res.ecsv"
    _run(survey, out, "--workers", "1", "--pattern", "s0*")
    first = Table.read(out)
    t0 = time.perf_counter()
    assert _run(survey, out, "--workers", "1", "--pattern", "s0*", "--resume") == 0
    assert time.perf_counter() - t0 < 30  # sanity only, no speed claim
    again = Table.read(out)
    assert list(again["file"]) == list(first["file"])
    assert_allclose(again["beta"], first["beta"], rtol=0)


def test_kill_then_resume_equals_uninterrupted(survey, tmp_path):
    ref = tmp_path / "ref.ecsv"
    assert _run(survey, ref, "--workers", "1", "--pattern", "s[0-9]*") == 0
    out = tmp_path / "run.ecsv"
    journal = tmp_path / ".run.ecsv.journal.jsonl"
    cmd = [
        sys.executable,
        "-m",
        "dopplerkit",
        "batch",
        str(survey["dir"]),
        "--config",
        str(survey["config"]),
        "--output",
        str(out),
        "--workers",
        "1",
        "--chunk-size",
        "1",
        "--pattern",
        "s[0-9]*",
        "--quiet",
    ]
    proc = subprocess.Popen(cmd, start_new_session=True)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        if journal.exists() and journal.read_text().count("\n") >= 4:
            break
        if proc.poll() is not None:
            break
        time.sleep(0.02)
    assert proc.poll() is None, "the run finished before it could be killed"
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not out.exists() and journal.exists()
    n_done = journal.read_text().count("\n")
    assert 4 <= n_done < survey["n_good"]
    assert _run(survey, out, "--workers", "1", "--pattern", "s[0-9]*", "--resume") == 0
    a, b = Table.read(ref), Table.read(out)
    assert list(a["file"]) == list(b["file"])
    for col in a.colnames:
        if col in ("seconds",):
            continue
        if a[col].dtype.kind == "f":
            assert_allclose(b[col], a[col], rtol=0, atol=0, equal_nan=True, err_msg=col)
        else:
            assert list(a[col]) == list(b[col]), col


def test_journal_lines_are_plain_json(survey, tmp_path):
    out = tmp_path / "j.ecsv"
    journal = tmp_path / ".j.ecsv.journal.jsonl"
    journal.write_text('{"file": "x", "status": "ok", "config_hash": "zz"}\n{"torn line')
    _run(survey, out, "--workers", "1", "--pattern", "s00.fits", "--resume")
    t = Table.read(out)
    assert list(t["file"]) == [str(survey["dir"] / "s00.fits")]  # foreign/torn journal lines ignored


def test_closed_form_matches_lmfit():
    # the batch's closed-form jet pair and its propagated errors equal the lmfit fit (Margon 1984 model)
    from dopplerkit.fitting import fit_jet_pair

    for beta, ang in ((0.1, 30.0), (0.3, 70.0), (0.8, 10.0)):
        za, zr = dk.redshift(beta, ang * u.deg), dk.redshift(beta, (180 - ang) * u.deg)
        b, be, th, te = jet_pair_closed_form(za, zr, 1e-3, 2e-3)
        f = fit_jet_pair(za, zr, 1e-3, 2e-3)
        assert_allclose([b, th], [f.beta, f.value("viewing_angle")], rtol=1e-7)
        assert_allclose([be, te], [f.beta_err, f.error("viewing_angle")], rtol=1e-3)


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.cluster
def test_dask_scheduler_matches_local(survey, tmp_path):
    dask_bin = Path(sys.executable).with_name("dask")
    if not dask_bin.exists():
        pytest.fail(f"the dask command is missing beside {sys.executable}; install dopplerkit[cluster]")
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, MALLOC_TRIM_THRESHOLD_="65536")
    procs = []
    try:
        procs.append(
            subprocess.Popen(
                [str(dask_bin), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
                start_new_session=True,
            )
        )
        procs.append(
            subprocess.Popen(
                [str(dask_bin), "worker", addr, "--nworkers", "1", "--nthreads", "1", "--no-dashboard"],
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
                env=env,
                start_new_session=True,
            )
        )
        from dask.distributed import Client

        deadline = time.monotonic() + 90
        while True:
            try:
                with Client(addr, timeout="5s") as c:
                    if c.scheduler_info()["workers"]:
                        break
            except OSError:
                pass
            if time.monotonic() > deadline:
                pytest.fail("the Dask scheduler/worker did not come up within 90 s")
            time.sleep(0.5)
        local, remote = tmp_path / "local.ecsv", tmp_path / "remote.ecsv"
        assert _run(survey, local, "--workers", "1", "--pattern", "s[0-9]*") == 0
        assert _run(survey, remote, "--scheduler", addr, "--pattern", "s[0-9]*", "--chunk-size", "6") == 0
        a, b = Table.read(local), Table.read(remote)
        assert list(a["file"]) == list(b["file"])
        for col in ("beta", "beta_err", "viewing_angle", "h_alpha_receding_z"):
            assert_allclose(b[col], a[col], rtol=1e-12)
    finally:
        for p in procs:
            try:
                os.killpg(p.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()
