"""The command line, driven through ``main(argv)`` directly."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from dopplerkit import __version__
from dopplerkit.cli import main


def test_version(capsys):
    assert main(["--version"]) == 0
    assert __version__ in capsys.readouterr().out


def test_help_lists_commands(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    for cmd in ("calc", "batch", "demo"):
        assert cmd in out


def test_no_command_is_usage_error(capsys):
    assert main([]) == 2


def test_calc_speed_and_angle(capsys):
    # beta = 0.6 head-on: delta = 2 exactly (Rybicki & Lightman 1979, eq. 4.11).
    assert main(["calc", "--beta", "0.6", "--angle", "0"]) == 0
    out = capsys.readouterr().out
    assert re.search(r"Doppler factor delta\s+2\n", out)
    assert re.search(r"Lorentz factor Gamma\s+1.25\n", out)
    assert re.search(r"redshift z\s+-0.5\n", out)


def test_calc_gamma(capsys):
    assert main(["calc", "--gamma", "1e6", "--angle", "0"]) == 0
    assert "Doppler factor delta" in capsys.readouterr().out


def test_calc_pair_and_single_z(capsys):
    # beta = 0.6 at theta = 60 deg: 1 + z = 1.25 (1 -/+ 0.3) (Rybicki & Lightman 1979, sec. 4.1).
    assert main(["calc", "--pair", "-0.125", "0.625"]) == 0
    out = capsys.readouterr().out
    assert re.search(r"beta\s+0.6\n", out)
    assert re.search(r"viewing angle of the approaching jet \(deg\)\s+60\n", out)
    assert main(["calc", "--z", "0.1"]) == 0
    assert "relativistic radial beta" in capsys.readouterr().out


@pytest.mark.parametrize(
    "argv,match",
    [
        (["calc", "--beta", "1.5", "--angle", "10"], r"beta must satisfy 0 <= beta < 1, got 1.5"),
        (["calc", "--pair", "-0.5", "0.1"], r"unphysical jet pair"),
        (["calc"], r"give a speed"),
        (["calc", "--beta", "x"], r"not a number: 'x'"),
        (["calc", "--beta", "nan", "--angle", "10"], r"--beta: must be a finite number, got 'nan'"),
        (["calc", "--z", "inf"], r"--z: must be a finite number"),
        (["calc", "--beta", "0.3", "--angle", "400"], r"--angle: must be a viewing angle in \[0, 180\] deg"),
        (["calc", "--beta", "0.3", "--angle", "-30"], r"--angle: must be a viewing angle in \[0, 180\] deg"),
    ],
)
def test_calc_errors(argv, match, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert re.search(match, err)
    assert "np." not in err  # numbers as a reader writes them, not numpy's repr


def test_batch_plot_fits_draws_each_suspect_row(tmp_path, capsys):
    import shutil

    from astropy.table import Table

    from dopplerkit.demo import default_data_dir

    survey = default_data_dir() / "survey"
    src = tmp_path / "spectra"
    src.mkdir()
    for name in ("dkj_001.fits", "dkj_039.fits", "dkj_041.fits"):  # one ok and two suspect rows in the demo survey
        shutil.copy(survey / "spectra" / name, src / name)
    out = tmp_path / "r.ecsv"
    code = main(
        ["batch", str(src), "--config", str(survey / "config.toml"), "--output", str(out), "--plot-fits", str(tmp_path / "figs"), "--quiet"]
    )
    t = Table.read(out)
    suspect = sorted(Path(str(f)).stem + ".png" for f, s in zip(t["file"], t["status"], strict=True) if s == "suspect")
    assert code == (1 if suspect else 0)
    assert sorted(p.name for p in (tmp_path / "figs").iterdir()) == suspect


def test_demo_data_never_inside_an_installed_package(tmp_path):
    # a wheel in site-packages gets its demo data in the user's cache (or DOPPLERKIT_DATA_DIR),
    # a source tree uses its data_demo/ (common practice, no source: XDG base directories)
    from dopplerkit.demo import _choose_data_dir, default_data_dir

    site = tmp_path / "lib" / "python3.11" / "site-packages" / "dopplerkit"
    site.mkdir(parents=True)
    (site.parent / "data_demo").mkdir()  # even if something called data_demo sits there
    assert _choose_data_dir(site, {"XDG_CACHE_HOME": str(tmp_path / "cache")}) == tmp_path / "cache" / "dopplerkit" / "data_demo"
    assert _choose_data_dir(site, {"DOPPLERKIT_DATA_DIR": str(tmp_path / "mine")}) == tmp_path / "mine"
    tree = tmp_path / "src" / "dopplerkit"
    tree.mkdir(parents=True)
    (tree.parent / "data_demo").mkdir()
    assert _choose_data_dir(tree, {}) == tree.parent / "data_demo"
    assert default_data_dir().name == "data_demo"


def test_optional_packages_name_their_extra(monkeypatch):
    import sys

    from dopplerkit._optional import require
    from dopplerkit.widgets import _widgets

    monkeypatch.setitem(sys.modules, "emcee", None)  # None in sys.modules: the import fails, as if not installed
    monkeypatch.setitem(sys.modules, "ipywidgets", None)
    with pytest.raises(ImportError, match=r"pip install 'dopplerkit\[posterior\]'"):
        require("emcee", "posterior sampling")
    with pytest.raises(ImportError, match=r"dopplerkit\.widgets needs the optional package 'ipywidgets'.*dopplerkit\[notebook\]"):
        _widgets()


def test_calc_apparent_motion_reading(capsys):
    # the numbers are those of dopplerkit.kinematics (tested against astropy distances and the
    # closed forms in tests/test_kinematics.py); here: the reading is complete and refuses bad input
    import astropy.units as u

    import dopplerkit as dk

    assert main(["calc", "--proper-motion", "0.3", "--host-z", "0.8", "--doppler", "12"]) == 0
    out = capsys.readouterr().out
    b = dk.apparent_speed_from_proper_motion(0.3 * u.mas / u.yr, 0.8)
    assert f"{b:.6g}" in out and "smallest Lorentz factor" in out and "largest viewing angle" in out
    g, th = dk.solve_apparent_and_doppler(b, 12.0)
    assert f"{g:.6g}" in out and f"{th.value:.6g}" in out
    assert main(["calc", "--proper-motion", "0.3"]) == 2
    assert "--proper-motion and --host-z go together" in capsys.readouterr().err
    assert main(["calc", "--proper-motion", "0.3", "--host-z", "0"]) == 2
    assert "--host-z must be a cosmological redshift > 0" in capsys.readouterr().err
