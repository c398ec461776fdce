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
        truth[name.relative_to(spectra).as_posix()] = (beta, ang)  # the table's paths are relative to SPECTRA_DIR
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
        "error_scale",
        "config_hash",
        "dopplerkit_version",
    } <= set(t.colnames)
    assert np.all(ok["error_scale"] == 1.0)  # white noise: no errors scaled
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
        ConfigError,
        match=r"\[spectra\]: unknown key\(s\) 'colour'; allowed: \['barycentric', 'flux_unit', 'medium', 'observatory', 'spectral_unit'\]",
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
    assert _run(survey, out, "--workers", "1", "--pattern", "s0*", "--resume") == 0
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
    _assert_same_table(ref, out)


def _assert_same_table(ref, out, rtol=0.0):
    """Two result tables agree row for row (the fit's run time apart)."""
    a, b = Table.read(ref), Table.read(out)
    assert list(a["file"]) == list(b["file"])
    for col in a.colnames:
        if col in ("seconds",):
            continue
        if a[col].dtype.kind == "f":
            assert_allclose(b[col], a[col], rtol=rtol, atol=0, equal_nan=True, err_msg=col)
        else:
            assert list(a[col]) == list(b[col]), col


def test_journal_lines_are_plain_json(survey, tmp_path, capsys):
    out = tmp_path / "j.ecsv"
    journal = tmp_path / ".j.ecsv.journal.jsonl"
    journal.write_text('{"torn line')
    assert _run(survey, out, "--workers", "1", "--pattern", "s00.fits", "--resume") == 0
    t = Table.read(out)
    assert list(t["file"]) == ["s00.fits"]  # a line torn by a crash is ignored
    # rows made with another configuration: --resume refuses and says how to start afresh
    journal.write_text('{"file": "x", "status": "ok", "config_hash": "zz"}\n')
    assert _run(survey, out, "--workers", "1", "--pattern", "s00.fits", "--resume") == 2
    assert "different configuration (hash zz" in capsys.readouterr().err and journal.exists()


def test_closed_form_matches_lmfit():
    # the batch's closed-form jet pair and its propagated errors equal the lmfit fit (Margon 1984 model)
    from dopplerkit.fitting import fit_jet_pair

    for beta, ang in ((0.1, 30.0), (0.3, 70.0), (0.8, 10.0)):
        za, zr = dk.redshift(beta, ang * u.deg), dk.redshift(beta, (180 - ang) * u.deg)
        b, be, th, te = jet_pair_closed_form(za, zr, 1e-3, 2e-3)
        f = fit_jet_pair(za, zr, 1e-3, 2e-3)
        assert_allclose([b, th], [f.beta, f.value("viewing_angle")], rtol=1e-7)
        assert_allclose([be, te], [f.beta_err, f.error("viewing_angle")], rtol=1e-3)
        # with correlated errors (two overlapping lines fitted together): the same, both ways
        for rho in (-0.6, 0.85):
            b, be, th, te = jet_pair_closed_form(za, zr, 1e-3, 2e-3, rho)
            f = fit_jet_pair(za, zr, 1e-3, 2e-3, z_corr=rho)
            g = dk.fitting.fit_constraints(z_pairs=[(za, zr, 1e-3, 2e-3, rho)])
            assert_allclose([be, te], [f.beta_err, f.error("viewing_angle")], rtol=1e-3)
            assert_allclose([be, te], [g.beta_err, g.error("viewing_angle")], rtol=1e-3)


def test_correlated_pair_errors_propagate_as_sampled():
    # First-order propagation with the covariance term, var f = f_a^2 s_a^2 + f_r^2 s_r^2 +
    # 2 f_a f_r rho s_a s_r (Bevington & Robinson 2003, Data Reduction and Error Analysis, eq.
    # 3.13; from memory), against the scatter of beta and angle over sampled correlated pairs
    rng = np.random.default_rng(47)
    za, zr = float(dk.redshift(0.03, 87.0)), float(dk.redshift(0.03, 93.0))
    ea, er = 4e-5, 5e-5
    for rho in (0.0, 0.9, -0.7):
        cov = [[ea * ea, rho * ea * er], [rho * ea * er, er * er]]
        s = rng.multivariate_normal([za, zr], cov, size=20000)
        out = np.array([jet_pair_closed_form(a, r, ea, er, rho) for a, r in s])
        _, be, _, te = jet_pair_closed_form(za, zr, ea, er, rho)
        assert_allclose(np.std(out[:, 0]), be, rtol=0.03)
        assert_allclose(np.std(out[:, 2]), te, rtol=0.03)


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class _DaskCluster:
    """A Dask scheduler and one single-threaded worker as separate processes (as on a real cluster)."""

    def __enter__(self):
        dask_bin = Path(sys.executable).with_name("dask")
        if not dask_bin.exists():
            pytest.fail(f"the dask command is missing beside {sys.executable}; install dopplerkit[cluster]")
        port = _free_port()
        self.addr = addr = f"tcp://127.0.0.1:{port}"
        env = dict(os.environ, MALLOC_TRIM_THRESHOLD_="65536")
        self.procs = procs = []
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
                self.__exit__()
                pytest.fail("the Dask scheduler/worker did not come up within 90 s")
            time.sleep(0.5)
        return self

    def __exit__(self, *exc):
        for p in self.procs:
            try:
                os.killpg(p.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
        for p in self.procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()


@pytest.mark.cluster
def test_dask_scheduler_matches_local(survey, tmp_path):
    with _DaskCluster() as cluster:
        local, remote = tmp_path / "local.ecsv", tmp_path / "remote.ecsv"
        assert _run(survey, local, "--workers", "1", "--pattern", "s[0-9]*") == 0
        assert _run(survey, remote, "--scheduler", cluster.addr, "--pattern", "s[0-9]*", "--chunk-size", "6") == 0
        a, b = Table.read(local), Table.read(remote)
        assert list(a["file"]) == list(b["file"])
        for col in ("beta", "beta_err", "viewing_angle", "h_alpha_receding_z"):
            assert_allclose(b[col], a[col], rtol=1e-12)


@pytest.mark.cluster
@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs process groups")
def test_scheduler_killed_then_resume_equals_uninterrupted(survey, tmp_path):
    ref = tmp_path / "ref.ecsv"
    assert _run(survey, ref, "--workers", "1", "--pattern", "s[0-9]*") == 0
    out = tmp_path / "r.ecsv"
    journal = tmp_path / ".r.ecsv.journal.jsonl"
    with _DaskCluster() as cluster:
        cmd = [sys.executable, "-m", "dopplerkit", "batch", str(survey["dir"]), "--config", str(survey["config"]), "--output", str(out)]
        cmd += ["--scheduler", cluster.addr, "--chunk-size", "1", "--cluster-timeout", "10", "--pattern", "s[0-9]*", "--quiet"]
        proc = subprocess.Popen(cmd, start_new_session=True, stderr=subprocess.PIPE, text=True)
        _wait_for_journal(proc, journal, 3)
        os.killpg(cluster.procs[0].pid, signal.SIGKILL)  # the scheduler, dead without a word
        _, err = proc.communicate(timeout=300)
    assert proc.returncode == 3, err
    assert "--resume" in err and journal.exists() and not out.exists()
    assert _run(survey, out, "--workers", "1", "--pattern", "s[0-9]*", "--resume") == 0
    _assert_same_table(ref, out, rtol=1e-12)


# ---------------------------------------------------------------------------
# Outputs never destroy data (common practice, no source)
# ---------------------------------------------------------------------------
@pytest.fixture
def small(tmp_path):
    """Three good spectra in a directory of their own (they may be changed by a test)."""
    d = tmp_path / "spectra"
    d.mkdir()
    rng = np.random.default_rng(5)
    for k in range(3):
        write_spectrum(_spectrum(k, rng)[0], d / f"é{k}.fits")
    cfg = tmp_path / "config.toml"
    cfg.write_text(CONFIG)
    return {"dir": d, "config": cfg}


def test_output_over_an_input_is_refused(small, capsys):
    victim = small["dir"] / "é0.fits"
    before = victim.read_bytes()
    assert _run(small, victim, "--overwrite") == 2
    assert "is one of the input spectra" in capsys.readouterr().err
    assert victim.read_bytes() == before


def test_output_linked_to_an_input_is_refused(small, tmp_path, capsys):
    # a symbolic link and a hard link outside SPECTRA_DIR that name an input file
    victim = small["dir"] / "é1.fits"
    before = victim.read_bytes()
    (tmp_path / "soft.fits").symlink_to(victim)
    os.link(victim, tmp_path / "hard.fits")
    for name in ("soft.fits", "hard.fits"):
        assert _run(small, tmp_path / name, "--overwrite") == 2
        assert "is one of the input spectra" in capsys.readouterr().err
    assert victim.read_bytes() == before


def test_file_search_order_and_rules(tmp_path):
    # the string walk keeps the order of sorting whole paths part by part (pathlib's), skips
    # hidden files, follows links to files but not to directories (common practice, no source)
    from dopplerkit.batch import _walk_spectra, find_spectra

    names = ["a.fits", "a-b/x.fits", "a/x.fits", "a/b/y.fits", "a.b/z.fits", "B.fits", "c/.hidden.fits", ".h/v.fits", "c/notes.md"]
    for n in names:
        (tmp_path / n).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / n).write_bytes(b"")
    (tmp_path / "c" / "link.fits").symlink_to(tmp_path / "a.fits")
    (tmp_path / "dirlink").symlink_to(tmp_path / "a", target_is_directory=True)
    expected = sorted(p for p in tmp_path.rglob("*") if p.is_file() and not p.name.startswith(".") and p.suffix == ".fits")
    assert find_spectra(tmp_path) == expected
    assert list(_walk_spectra(str(tmp_path))) == [str(p) for p in expected]
    assert [p.name for p in find_spectra(tmp_path, "a/*")] == ["y.fits", "x.fits"]


def test_output_that_the_next_run_would_read_is_refused(small, capsys):
    assert _run(small, small["dir"] / "results.ecsv") == 2
    assert "next run would read the results as a spectrum" in capsys.readouterr().err
    assert not (small["dir"] / "results.ecsv").exists()


def test_foreign_file_is_kept_unless_overwrite(small, tmp_path, capsys):
    other = tmp_path / "notes.ecsv"
    Table({"a": [1, 2]}).write(other)
    before = other.read_bytes()
    assert _run(small, other) == 2
    assert "is not a dopplerkit results table" in capsys.readouterr().err and other.read_bytes() == before
    assert _run(small, other, "--overwrite") in (0, 1)
    assert "config_hash" in Table.read(other).colnames
    assert _run(small, other) in (0, 1)  # now ours: replaced without --overwrite


def test_missing_output_directory_is_created(small, tmp_path):
    out = tmp_path / "new" / "deeper" / "r.ecsv"
    assert _run(small, out) in (0, 1) and out.exists()
    assert not list(out.parent.glob(".*"))  # no journal, lock or temporary file left behind


def test_a_live_lock_refuses_and_a_dead_one_is_taken_over(small, tmp_path, capsys):
    import json

    out = tmp_path / "r.ecsv"
    lock = tmp_path / ".r.ecsv.lock"
    lock.write_text(json.dumps({"pid": os.getpid(), "host": socket.gethostname(), "started": "earlier"}))
    assert _run(small, out) == 2
    assert f"another dopplerkit batch run (pid {os.getpid()}" in capsys.readouterr().err and not out.exists()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(), "started": "earlier"}))
    assert main(["batch", str(small["dir"]), "--config", str(small["config"]), "--output", str(out)]) in (0, 1)
    assert "taking over the lock of a run that died" in capsys.readouterr().err
    assert out.exists() and not lock.exists()


def test_resume_refits_a_changed_input(small, tmp_path):
    out = tmp_path / "r.ecsv"
    assert _run(small, out) in (0, 1)
    first = Table.read(out)
    # replace one input by another spectrum (different speed): its stale row must not survive --resume
    changed = small["dir"] / "é1.fits"
    write_spectrum(_spectrum(9, np.random.default_rng(99))[0], changed)
    assert _run(small, out, "--resume") in (0, 1)
    again = Table.read(out)
    i = list(again["file"]).index(changed.name)
    assert again["beta"][i] != first["beta"][i]
    j = list(again["file"]).index("é0.fits")
    assert again["beta"][j] == first["beta"][j] and again["seconds"][j] == first["seconds"][j]  # unchanged input kept
    # same size and modification time, other bytes (a copy that kept its time stamp): the content hash tells
    same = small["dir"] / "é2.fits"
    st = same.stat()
    data = bytearray(same.read_bytes())
    other = bytearray((small["dir"] / "é0.fits").read_bytes())
    assert len(data) == len(other)
    same.write_bytes(bytes(other))
    os.utime(same, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert _run(small, out, "--resume") in (0, 1)
    third = Table.read(out)
    k = list(third["file"]).index(same.name)
    assert third["beta"][k] == third["beta"][j] != again["beta"][k]  # refitted: now the same spectrum as é0


@pytest.mark.parametrize("ext", [".ecsv", ".csv", ".fits"])
def test_unicode_file_names_in_every_format(small, tmp_path, ext):
    out = tmp_path / f"résultats{ext}"
    assert _run(small, out) in (0, 1)
    assert _run(small, out, "--resume") in (0, 1)  # and resume reads them back
    t = Table.read(out)
    names = [v.decode("utf-8") if isinstance(v, bytes) else str(v) for v in t["file"]]
    assert names == [f"é{k}.fits" for k in range(3)]  # relative to SPECTRA_DIR, which the table's meta gives
    from dopplerkit.io import table_meta

    if ext != ".csv":  # CSV keeps no metadata
        assert table_meta(t, "spectra_dir") == os.path.abspath(small["dir"])


def test_workers_capped_at_the_cores(small, tmp_path, capsys):
    out = tmp_path / "r.ecsv"
    assert main(
        ["batch", str(small["dir"]), "--config", str(small["config"]), "--output", str(out), "--workers", "200", "--chunk-size", "1"]
    ) in (0, 1)
    assert "--workers 200 capped at the" in capsys.readouterr().err


def test_workers_start_with_everything_a_fit_imports(tmp_path):
    # The pool imports _WORKER_MODULES before the workers start, so no worker pays for an import
    # on its first spectrum: fitting the demo survey (good and bad files, in every format it has)
    # after those imports must import nothing more (a module added to the fit path but not to the
    # list would cost every worker of every run). Common practice, no source.
    demo = Path(__file__).resolve().parents[1] / "data_demo" / "survey"
    code = f"""
import importlib, sys
from pathlib import Path
from dopplerkit.batch import _WORKER_MODULES, load_config, process_chunk
for name in _WORKER_MODULES:
    importlib.import_module(name)
before = set(sys.modules)
files = sorted(str(p) for p in Path({str(demo / "spectra")!r}).rglob("*") if p.is_file())
good = [f for f in files if "/bad/" not in f]
files = [f for f in files if "/bad/" in f] + good[:6] + [f for f in good if not f.endswith(".fits")][:6]
rows = process_chunk(files, [None] * len(files), load_config({str(demo / "config.toml")!r}).as_dict())
assert {{r["status"] for r in rows}} >= {{"ok", "error"}}, rows
print(sorted(set(sys.modules) - before))
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=tmp_path)
    assert out.stdout.strip() == "[]", out.stdout


# ---------------------------------------------------------------------------
# Faults: a dead worker, SIGTERM of the command (common practice, no source)
# ---------------------------------------------------------------------------
def _descendants(pid):
    kids = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        kids.setdefault(int(fields[1]), []).append(int(stat.parent.name))
    out, todo = [], [pid]
    while todo:
        for c in kids.get(todo.pop(), []):
            out.append(c)
            todo.append(c)
    return out


def _batch_proc(survey, out, *extra):
    cmd = [sys.executable, "-m", "dopplerkit", "batch", str(survey["dir"]), "--config", str(survey["config"])]
    cmd += ["--output", str(out), "--workers", "2", "--chunk-size", "1", "--quiet", *extra]
    return subprocess.Popen(cmd, start_new_session=True, stderr=subprocess.PIPE, text=True)


def _wait_for_journal(proc, journal, n):
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        if journal.exists() and journal.read_text().count("\n") >= n:
            return
        time.sleep(0.02)
    pytest.fail("the run finished (or stalled) before the fault could be injected")


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="finds worker processes through /proc")
def test_a_killed_worker_is_retried_and_the_table_written(survey, tmp_path):
    out = tmp_path / "r.ecsv"
    proc = _batch_proc(survey, out, "--pattern", "s[0-9]*")
    _wait_for_journal(proc, tmp_path / ".r.ecsv.journal.jsonl", 2)
    workers = _descendants(proc.pid)  # the fork server and the pool workers it started
    victims = workers[-1:]  # the newest process: a pool worker
    for p in victims:
        os.kill(p, signal.SIGKILL)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode in (0, 1), err
    t = Table.read(out)
    assert len(t) == survey["n_good"]  # every file has its row: retried, or an error row naming the death
    assert all(s == "ok" or "WorkerDied" in m or s == "suspect" for s, m in zip(t["status"], t["message"], strict=True))
    # and a resume (refitting any file the dead worker took with it) gives the uninterrupted table
    assert _run(survey, out, "--workers", "1", "--pattern", "s[0-9]*", "--resume") == 0
    ref = tmp_path / "ref.ecsv"
    assert _run(survey, ref, "--workers", "1", "--pattern", "s[0-9]*") == 0
    _assert_same_table(ref, out)


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="finds worker processes through /proc")
def test_sigterm_stops_workers_keeps_journal_and_resume_completes(survey, tmp_path):
    out = tmp_path / "r.ecsv"
    journal = tmp_path / ".r.ecsv.journal.jsonl"
    proc = _batch_proc(survey, out, "--pattern", "s[0-9]*")
    _wait_for_journal(proc, journal, 2)
    kids = _descendants(proc.pid)
    os.kill(proc.pid, signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert "interrupted" in err and "--resume" in err
    assert journal.exists() and not out.exists() and not (tmp_path / ".r.ecsv.lock").exists()
    time.sleep(0.5)
    alive = [p for p in kids if Path(f"/proc/{p}").exists() and "Z" not in Path(f"/proc/{p}/stat").read_text().rsplit(")", 1)[1].split()[0]]
    assert not alive, f"worker processes outlived the command: {alive}"
    assert _run(survey, out, "--workers", "1", "--pattern", "s[0-9]*", "--resume") in (0, 1)
    assert len(Table.read(out)) == survey["n_good"]


def test_unreachable_scheduler_is_exit_code_3(small, tmp_path, capsys):
    pytest.importorskip("distributed", reason="the [cluster] extra is not installed")
    out = tmp_path / "r.ecsv"
    addr = f"tcp://127.0.0.1:{_free_port()}"  # nothing listens there
    assert _run(small, out, "--scheduler", addr, "--cluster-timeout", "2") == 3
    err = capsys.readouterr().err
    assert f"cannot reach the Dask scheduler at {addr}" in err and "--resume" in err
    assert not out.exists()


@pytest.mark.cluster
def test_scheduler_without_workers_is_exit_code_3(small, tmp_path, capsys):
    dask_bin = Path(sys.executable).with_name("dask")
    port = _free_port()
    sched = subprocess.Popen(
        [str(dask_bin), "scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )
    try:
        out = tmp_path / "r.ecsv"
        assert _run(small, out, "--scheduler", f"tcp://127.0.0.1:{port}", "--cluster-timeout", "20") == 3
        assert "had no worker for 20 s" in capsys.readouterr().err
    finally:
        os.killpg(sched.pid, signal.SIGTERM)
        sched.wait(timeout=30)


def test_suspect_rows_are_kept_filled_and_give_exit_code_1(tmp_path, capsys):
    # one spectrum whose counter-jet is not there: the row is suspect (not ok, not an error), says why,
    # keeps its numbers, and the run exits with 1 (README)
    d = tmp_path / "spectra"
    d.mkdir()
    grid = np.arange(5000.0, 8800.0, 2.5) * u.AA
    one = synthesize_spectrum(grid, [LineComponent("H-alpha", z=-0.05, fwhm=700 * u.km / u.s, strength=2.0)], snr=30, seed=1)
    write_spectrum(one, d / "one_jet.fits")
    cfg = tmp_path / "c.toml"
    cfg.write_text(CONFIG)
    out = tmp_path / "r.ecsv"
    assert main(["batch", str(d), "--config", str(cfg), "--output", str(out)]) == 1
    assert "ok 0, suspect 1, failed 0" in capsys.readouterr().err
    t = Table.read(out)
    assert t["status"][0] == "suspect" and "not detected" in t["message"][0]
    assert np.isfinite(t["h_alpha_approaching_z"][0]) and t["continuum"][0]


def test_pair_faster_than_beta_max_is_suspect(tmp_path):
    # an H-alpha pair (beta 0.2, 50 deg) fitted as He II 4686: both redshifts scale by 6564.6/4685.7, so the
    # transverse term (1 + z_a)(1 + z_r) = Gamma^2 (1 - beta^2 cos^2 theta) (Rybicki & Lightman 1979,
    # Radiative Processes in Astrophysics, sec. 4.8) grows by 1.96 and the pair needs beta ~ 0.7
    from dopplerkit.batch import process_chunk

    grid = np.arange(5000.0, 8800.0, 2.5) * u.AA
    za, zr = dk.redshift(0.2, 50), dk.redshift(0.2, 130)
    comps = [LineComponent("H-alpha", z=z, fwhm=700 * u.km / u.s, strength=2.0) for z in (za, zr)]
    path = tmp_path / "pair.fits"
    write_spectrum(synthesize_spectrum(grid, comps, snr=30, seed=3), path)
    cfg = {
        "line": [{"name": "He II 4686", "components": 2}],
        "kinematics": {"model": "jet-pair", "beta_max": 0.5},
        "spectra": {"medium": "vacuum"},
    }
    cfg["fit"] = {"z_min": -0.5, "z_max": 1.0}  # wide enough for the wrong reading
    row = process_chunk([str(path)], [None], parse_config(cfg).as_dict())[0]
    assert row["status"] == "suspect" and "beyond_beta_max" in row["flags"], row["message"]
    assert "raise beta_max" in row["message"]
    cfg["line"] = [{"name": "H-alpha", "components": 2}]
    row = process_chunk([str(path)], [None], parse_config(cfg).as_dict())[0]
    assert row["status"] == "ok", row["message"]
    assert abs(row["beta"] - 0.2) < 5 * row["beta_err"]


def test_host_table_in_the_config(tmp_path):
    from dopplerkit.batch import process_chunk

    base = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    assert parse_config(base).host_lines == "auto" and parse_config(base).host_z == 0.0
    cfg = parse_config({**base, "host": {"lines": ["H-alpha", "[N II] 6584"], "z": 0.001}})
    assert cfg.host_lines == ("H-alpha", "[N II] 6585") and cfg.host_z == 0.001
    for bad, match in (
        ({"lines": "yes"}, "lines must be"),
        ({"lines": ["[N II] 9999"]}, "no line named"),
        ({"z": True}, "z must be a number"),
        ({"z": -1.0}, "z must be >"),
        ({"redshift": 0.1}, "did you mean 'z'|unknown key"),
    ):
        with pytest.raises(ConfigError, match=match):
            parse_config({**base, "host": bad})
    # a slow pair under the host's narrow H-alpha and [N II] (vacuum 6549.86, 6585.27 A; NIST ASD, from memory)
    kms = u.km / u.s
    za, zr = dk.redshift(0.03, 75), dk.redshift(0.03, 105)
    comps = [LineComponent("H-alpha", z=z, fwhm=900 * kms, strength=q) for z, q in ((za, 2.0), (zr, 1.5))]
    comps += [
        LineComponent(w, z=0.0, fwhm=150 * kms, strength=q) for w, q in (("H-alpha", 1.5), (6585.27 * u.AA, 1.2), (6549.86 * u.AA, 0.4))
    ]
    path = tmp_path / "host.fits"
    write_spectrum(synthesize_spectrum(np.arange(5500.0, 7800.0, 2.0) * u.AA, comps, snr=25, seed=4, resolution=4000), path)
    row = process_chunk([str(path)], [None], parse_config(base).as_dict())[0]
    assert row["status"] == "ok", row["message"]
    assert "[N II] 6585 (S/N" in row["host"]
    assert abs(row["beta"] - 0.03) < 4 * row["beta_err"]
    row = process_chunk([str(path)], [None], parse_config({**base, "host": {"lines": "none"}}).as_dict())[0]
    assert row["status"] == "suspect" and row["host"] == ""


@pytest.mark.parametrize("ext", [".ecsv", ".fits", ".csv"])
def test_resume_from_a_finished_table_keeps_empty_text_empty(small, tmp_path, ext):
    # an empty message cell reads back masked; it must stay empty, not become the masked constant's "0.0"
    out = tmp_path / f"r{ext}"
    assert _run(small, out) == 0
    first = Table.read(out)
    assert _run(small, out, "--resume") == 0
    again = Table.read(out)
    for col in ("message", "flags", "host"):
        assert ["" if np.ma.is_masked(v) else str(v) for v in again[col]] == ["" if np.ma.is_masked(v) else str(v) for v in first[col]], col


@pytest.mark.parametrize("ext", [".ecsv", ".csv"])
def test_a_large_table_is_written_in_blocks_identical_to_one_write(survey, tmp_path, monkeypatch, ext):
    # memory must not grow with the number of spectra: big text tables go out block by block
    import dopplerkit.batch as batch

    ref = tmp_path / f"ref{ext}"
    assert _run(survey, ref, "--workers", "1") == 1  # the bad files give error rows
    monkeypatch.setattr(batch, "STREAM_ROWS", 4)
    out = tmp_path / f"blocks{ext}"
    code, table = batch.run_batch(survey["dir"], survey["config"], out, workers=1, quiet=True)
    assert code == 1 and table is None
    _assert_same_table(ref, out)  # every column but the fit's run time, to the last digit


def test_every_line_column_carries_its_unit_whatever_the_file_units(tmp_path):
    # the same spectrum written with its axis in Angstrom and in nm: one set of centres, in the
    # line's catalogue unit (Angstrom) with the unit on the column (unit conversion: common practice, no source)
    from astropy.table import QTable

    from dopplerkit.batch import run_batch
    from dopplerkit.demo import default_data_dir
    from dopplerkit.io import read_spectrum, write_spectrum

    src = tmp_path / "spectra"
    src.mkdir()
    s = read_spectrum(default_data_dir() / "survey" / "spectra" / "dkj_001.fits")
    write_spectrum(s, src / "a_angstrom.fits")
    from specutils import Spectrum

    nm = Spectrum(spectral_axis=s.spectral_axis.to(u.nm), flux=s.flux, uncertainty=s.uncertainty, meta=dict(s.meta))
    write_spectrum(nm, src / "b_nm.fits")
    cfg = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    _code, _t = run_batch(src, cfg, tmp_path / "r.ecsv", workers=1, quiet=True)
    t = QTable.read(tmp_path / "r.ecsv")
    assert t["h_alpha_approaching_centre"].unit == u.AA and t["h_alpha_approaching_fwhm"].unit == u.km / u.s
    assert t["h_alpha_approaching_flux"].unit == u.erg / u.s / u.cm**2 and t["viewing_angle"].unit == u.deg
    assert list(t["axis_unit"]) == ["Angstrom", "nm"] and list(t["medium"]) == ["vacuum", "vacuum"]
    assert_allclose(t["h_alpha_approaching_centre"][1].value, t["h_alpha_approaching_centre"][0].value, rtol=1e-6)
    assert_allclose(t["h_alpha_approaching_flux"][1].value, t["h_alpha_approaching_flux"][0].value, rtol=1e-4)


def test_x_ray_photon_spectrum_gives_centres_in_kev_and_photon_fluxes(tmp_path):
    from astropy.table import QTable

    from dopplerkit.batch import run_batch
    from dopplerkit.demo import default_data_dir

    src = tmp_path / "spectra"
    src.mkdir()
    (src / "q.fits").write_bytes((default_data_dir() / "quasar_dkq7" / "dkq7_xray.fits").read_bytes())
    cfg = {
        "line": [{"name": "Fe XXV He-alpha w", "components": 1}, {"name": "Fe XXVI Ly-alpha", "components": 1}],
        "fit": {"tie": True, "kind": "absorption", "z_min": -0.5, "z_max": 1.5},
    }
    _code, _t = run_batch(src, cfg, tmp_path / "r.ecsv", workers=1, quiet=True)
    t = QTable.read(tmp_path / "r.ecsv")
    centre = next(c for c in t.colnames if c.startswith("fe_xxv") and c.endswith("_centre"))
    assert t[centre].unit == u.keV and 4.0 < t[centre][0].value < 5.0
    assert any(c.endswith("_photon_flux") and t[c].unit == u.ph / u.s / u.cm**2 for c in t.colnames)


def test_progress_and_diagnostics_go_through_logging(small, tmp_path, caplog):
    # the library logs (logger "dopplerkit.batch"); the command line shows the records on stderr
    import io
    import logging

    from dopplerkit.batch import run_batch

    with caplog.at_level(logging.INFO, logger="dopplerkit"):
        code, _t = run_batch(small["dir"], small["config"], tmp_path / "new" / "r.ecsv", workers=1, quiet=False, out=io.StringIO())
    assert code in (0, 1)
    messages = [r.getMessage() for r in caplog.records if r.name == "dopplerkit.batch"]
    assert any("created the output directory" in m for m in messages)
    assert any(m.startswith("ok ") and "spectra/s" in m for m in messages)


def test_per_object_constraints_join_the_pair_fit(tmp_path, caplog):
    # [kinematics] constraints: a table of apparent speeds, Doppler factors and counter-jet limits per object,
    # added to the redshift pair in one fit (dopplerkit.fitting.fit_constraints; Rees 1966 for beta_app)
    from astropy.table import Table

    from dopplerkit.batch import ConfigError, parse_config, run_batch
    from dopplerkit.demo import default_data_dir

    survey = default_data_dir() / "survey"
    truth = {str(r["file"]): r for r in Table.read(survey / "truth.ecsv")}
    src = tmp_path / "spectra"
    src.mkdir()
    for name in ("dkj_001.fits", "dkj_002.fits"):
        (src / name).write_bytes((survey / "spectra" / name).read_bytes())
    t1 = truth["dkj_001.fits"]
    b_app = float(dk.apparent_speed(float(t1["beta"]), float(t1["viewing_angle"])))
    Table({"object": ["dkj_001"], "beta_app": [b_app], "beta_app_err": [0.01 * b_app], "beta_cos_theta_min": [0.0]}).write(
        tmp_path / "objects.ecsv"
    )
    cfg = tmp_path / "config.toml"
    cfg.write_text(
        '[[line]]\nname = "H-alpha"\ncomponents = 2\n[kinematics]\nmodel = "jet-pair"\nconstraints = "objects.ecsv"\n'
        '[spectra]\nmedium = "vacuum"\n'
    )
    import logging

    Table(
        {"object": ["dkj_001", "dkj_01"], "beta_app": [b_app, 1.0], "beta_app_err": [0.01 * b_app, 0.1], "beta_cos_theta_min": [0.0, 0.0]}
    ).write(tmp_path / "objects.ecsv", overwrite=True)  # "dkj_01": a misspelt object, named in a warning
    with caplog.at_level(logging.WARNING, logger="dopplerkit"):
        _code, t = run_batch(src, cfg, tmp_path / "r.ecsv", workers=1, quiet=True)
    assert any("match no spectrum" in r.getMessage() and "dkj_01" in r.getMessage() for r in caplog.records)
    rows = {str(f): r for f, r in zip(t["file"], t, strict=True)}
    with_c, without = rows["dkj_001.fits"], rows["dkj_002.fits"]
    assert with_c["constraints"] == "apparent speeds, limits" and without["constraints"] == ""
    assert abs(with_c["beta"] - float(t1["beta"])) < 4 * with_c["beta_err"]
    assert abs(with_c["viewing_angle"] - float(t1["viewing_angle"])) < 4 * with_c["viewing_angle_err"]
    # the table is part of the configuration: another table, another hash (a resume refits)
    h1 = parse_config(
        {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair", "constraints": "objects.ecsv"}}, base=tmp_path
    ).hash
    Table({"object": ["dkj_001"], "doppler": [1.2], "doppler_err": [0.1]}).write(tmp_path / "objects.ecsv", overwrite=True)
    h2 = parse_config(
        {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair", "constraints": "objects.ecsv"}}, base=tmp_path
    ).hash
    assert h1 != h2
    bad = [
        ({"object": ["a"], "speed": [1.0]}, "unknown"),
        ({"object": ["a"], "beta_app": [3.0]}, "beta_app and beta_app_err go together"),
        ({"object": ["a"], "doppler": [-1.0], "doppler_err": [0.1]}, "doppler must be finite and > 0"),
        ({"object": ["a", "a"], "doppler": [1.0, 1.0], "doppler_err": [0.1, 0.1]}, "empty or repeated"),
        ({"name": ["a"]}, "needs an 'object' column"),
    ]
    for cols, match in bad:
        Table(cols).write(tmp_path / "bad.ecsv", overwrite=True)
        with pytest.raises(ConfigError, match=match):
            parse_config(
                {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair", "constraints": "bad.ecsv"}},
                base=tmp_path,
            )
    with pytest.raises(ConfigError, match="no such file"):
        parse_config(
            {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair", "constraints": "none.ecsv"}}, base=tmp_path
        )


def test_exclude_ranges_in_the_config(tmp_path):
    # A broad stationary H-alpha (FWHM 2000 km/s at rest, invented) beside a jet pair: without
    # help the row is suspect ('rival': which two features are the pair is not decided); with the
    # stationary line left out by [fit] exclude, the pair is measured and ok (common practice:
    # masking a known feature; no source)
    from dopplerkit.batch import process_chunk

    base = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    assert parse_config(base).hash == parse_config({**base, "fit": {"exclude": []}}).hash  # no exclusion: the same hash
    cut = {**base, "fit": {"exclude": [["6470 Angstrom", "6660 Angstrom"]]}}
    assert parse_config(cut).exclude == (("6470 Angstrom", "6660 Angstrom"),)
    assert parse_config(cut).hash != parse_config(base).hash
    for bad, match in (
        ("6470-6660", "must be a list of"),
        ([["6470 Angstrom"]], "each range must be"),
        ([[6470, 6660]], "each range must be"),
        ([["6470 Angstrom", "3 kg"]], "not a range of wavelengths"),
        ([["6470 kg", "6660 kg"]], "not a range of wavelengths"),
        ([["nan Angstrom", "6660 Angstrom"]], "must be finite"),
    ):
        with pytest.raises(ConfigError, match=match):
            parse_config({**base, "fit": {"exclude": bad}})
    kms = u.km / u.s
    b, a = 0.2, 50.0
    za, zr = float(dk.redshift(b, a)), float(dk.redshift(b, 180 - a))
    comps = [LineComponent("H-alpha", z=z, fwhm=800 * kms, strength=q) for z, q in ((za, 2.0), (zr, 1.2))]
    comps += [LineComponent("H-alpha", z=0.0, fwhm=2000 * kms, strength=2.0)]
    path = tmp_path / "stationary.fits"
    write_spectrum(synthesize_spectrum(np.arange(5000.0, 8500.0, 2.0) * u.AA, comps, snr=30, seed=5, resolution=4000), path)
    row = process_chunk([str(path)], [None], parse_config(base).as_dict())[0]
    assert row["status"] == "suspect" and "rival" in row["flags"], row["message"]
    row = process_chunk([str(path)], [None], parse_config(cut).as_dict())[0]
    assert row["status"] == "ok", row["message"]
    assert abs(row["beta"] - b) < 5 * row["beta_err"] and abs(row["viewing_angle"] - a) < 5 * row["viewing_angle_err"]
    # the same through measure_file (measure_lines underneath)
    from dopplerkit.batch import measure_file

    _, t = measure_file(path, cut)
    assert set(t["status"]) == {"ok"}


def test_a_jet_pair_behind_a_host_redshift_is_read_in_the_host_frame(tmp_path):
    # A jet pair (beta 0.2, 60 deg; invented) in a host at z = 0.05 with [host] z = 0.05: the
    # batch gave beta 0.3595 +- 2e-5, status ok, from the observed redshifts. The host's redshift
    # composes by product, 1 + z = (1 + z_host)(1 + z_kin) (Davis & Lineweaver 2004, PASA 21, 97;
    # from memory), and the pair formulas hold for z_kin (Margon 1984, ARA&A 22, 507)
    from dopplerkit.batch import process_chunk

    zh, b, a = 0.05, 0.2, 60.0
    za, zr = ((1 + float(dk.redshift(b, t))) * (1 + zh) - 1 for t in (a, 180 - a))
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=z, fwhm=800 * kms, strength=q) for z, q in ((za, 2.0), (zr, 1.4))]
    path = tmp_path / "far.fits"
    write_spectrum(synthesize_spectrum(np.arange(5000.0, 9500.0, 2.0) * u.AA, comps, snr=30, seed=3, resolution=4000), path)
    base = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    cfg = parse_config({**base, "host": {"z": zh}})
    # the default line search follows the host: the redshifts beta_max allows, seen from z_host
    lo, hi = (1 + float(dk.redshift(0.5, 0.0))) * (1 + zh) - 1, (1 + float(dk.redshift(0.5, 180.0))) * (1 + zh) - 1
    assert_allclose([cfg.z_min, cfg.z_max], [lo, hi], atol=1e-6)
    row = process_chunk([str(path)], [None], cfg.as_dict())[0]
    assert row["status"] == "ok", row["message"]
    assert abs(row["h_alpha_approaching_z"] - za) < 5 * row["h_alpha_approaching_z_err"]  # the row keeps the observed z
    assert abs(row["beta"] - b) < 5 * row["beta_err"] and abs(row["viewing_angle"] - a) < 5 * row["viewing_angle_err"]
    # measure_lines: v_radial in the host's frame (astropy's doppler_redshift as the reference)
    import warnings

    from dopplerkit.io import read_spectrum
    from dopplerkit.measure import measure_lines

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = measure_lines(read_spectrum(path), "H-alpha", components=2, host_z=zh, method="fast")
    zk = (1 + float(t["z"][0])) / (1 + zh) - 1
    ref = u.Quantity(zk).to_value(u.km / u.s, equivalencies=u.doppler_redshift())
    assert_allclose(t["v_radial"][0].to_value(u.km / u.s), ref, rtol=1e-9)
    assert t.meta["host_z"] == zh


def test_topocentric_files_are_moved_to_the_barycentre(tmp_path):
    # files whose header says the axis is topocentric (FITS SPECSYS; Greisen et al. 2006, A&A 446, 747;
    # from memory) and gives target, time and observatory are moved to the barycentre (astropy computes
    # the correction; its own check is in test_spectra); one without the observatory stays, suspect,
    # and says what is missing; [spectra] barycentric = "none" keeps every axis as it is
    from dopplerkit.batch import process_chunk
    from dopplerkit.spectra import barycentric_correction

    kms = u.km / u.s
    site = {"OBSGEO-X": 4843319.3, "OBSGEO-Y": 2499823.5, "OBSGEO-Z": -3304672.2}
    za, zr = float(dk.redshift(0.2, 50.0)), float(dk.redshift(0.2, 130.0))
    grid = np.arange(5500.0, 8500.0, 0.5) * u.AA
    comps = [LineComponent("H-alpha", z=z, fwhm=300 * kms, strength=q) for z, q in ((za, 3.0), (zr, 2.0))]
    paths, vs = [], []
    for k, keys in enumerate((site, {})):
        from specutils import Spectrum

        s = synthesize_spectrum(grid, comps, snr=80, seed=k, resolution=20000)
        meta = {"SPECSYS": "TOPOCENT", "RA": "16:40:00", "DEC": "-12:30:00", "MJD-OBS": 60810.3 + 40 * k, "medium": "vacuum"} | keys
        v = barycentric_correction(meta | site).to_value(kms)
        topo = Spectrum(flux=s.flux, spectral_axis=grid / (1 + v / 299792.458), uncertainty=s.uncertainty, meta=meta)
        paths.append(str(tmp_path / f"epoch{k}.fits"))
        write_spectrum(topo, paths[-1])
        vs.append(v)
    base = {"line": [{"name": "H-alpha", "components": 2}], "kinematics": {"model": "jet-pair"}, "spectra": {"medium": "vacuum"}}
    assert parse_config(base).hash == parse_config({**base, "spectra": {"medium": "vacuum", "barycentric": "auto"}}).hash
    moved, kept = process_chunk(paths, [None, None], parse_config(base).as_dict())
    assert moved["status"] == "ok" and moved["frame"] == "BARYCENT (from TOPOCENT)", moved["message"]
    assert_allclose(moved["v_barycentric"], vs[0], atol=1e-6)
    assert abs(moved["h_alpha_approaching_z"] - za) < 4 * moved["h_alpha_approaching_z_err"]
    assert abs(moved["beta"] - 0.2) < 4 * moved["beta_err"]
    assert kept["status"] == "suspect" and "topocentric" in kept["flags"] and kept["frame"] == "TOPOCENT"
    # the single-row view measures what the batch measured
    from dopplerkit.batch import measure_file

    spec, tab = measure_file(paths[0], base)
    assert spec.meta["SPECSYS"] == "BARYCENT" and list(tab["status"]) == ["ok", "ok"]
    assert_allclose(tab["z"][0], moved["h_alpha_approaching_z"], rtol=0, atol=1e-9)
    assert "lacks the observatory (OBSGEO-X/Y/Z in metres or OBSGEO-L/B/H; or [spectra] observatory)" in kept["message"]
    # the observatory given in the configuration (the invented site above, as longitude, latitude, height)
    from astropy.coordinates import EarthLocation

    geo = EarthLocation.from_geocentric(*site.values(), unit=u.m).to_geodetic()
    where = [float(geo.lon.deg), float(geo.lat.deg), float(geo.height.to_value(u.m))]
    cfg = parse_config({**base, "spectra": {"medium": "vacuum", "observatory": where}})
    assert cfg.hash != parse_config(base).hash
    row = process_chunk(paths[1:], [None], cfg.as_dict())[0]
    assert row["status"] == "ok" and abs(row["v_barycentric"] - vs[1]) < 1e-3, row["message"]
    off = process_chunk(paths[:1], [None], parse_config({**base, "spectra": {"medium": "vacuum", "barycentric": "none"}}).as_dict())[0]
    assert off["status"] == "suspect" and "barycentric = 'none' keeps the observer's frame" in off["message"]
    for bad, match in (
        ({"barycentric": "yes"}, "barycentric must be 'auto'"),
        ({"observatory": [1.0, 2.0]}, r"observatory must be \[east longitude in deg, latitude in deg, height in m\]"),
        ({"observatory": [1.0, 95.0, 0.0]}, "observatory latitude must be <= 90"),
    ):
        with pytest.raises(ConfigError, match=match):
            parse_config({**base, "spectra": {"medium": "vacuum", **bad}})
