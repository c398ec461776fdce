"""The command line, driven through ``main(argv)`` directly."""

from __future__ import annotations

import re

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
    assert re.search(match, capsys.readouterr().err)
