"""Packaging: the lower bounds in pyproject.toml are versions the tests pass with.

A fresh environment is made with uv's ``--resolution lowest-direct`` (every direct dependency at
the lowest version pyproject.toml allows, their own dependencies as resolved), dopplerkit is
installed from this source tree, and the core tests run there (not the notebook, browser, docs
or cluster tests, whose extras keep the tested versions as their lower bounds).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.slow
def test_lowest_direct_versions_pass_the_core_tests(tmp_path):
    uv = shutil.which("uv", path=str(Path(sys.executable).parent)) or shutil.which("uv")
    if uv is None:
        if os.environ.get("DOPPLERKIT_CI"):
            pytest.fail("uv is missing: it comes with the [test] extra")
        pytest.skip("uv not installed (pip install uv)")
    src = tmp_path / "src"
    shutil.copytree(
        ROOT, src, ignore=shutil.ignore_patterns(".venv", ".git", "docs", "test-artifacts", "results", "*.egg-info", "__pycache__")
    )
    env_dir = tmp_path / "lowest"
    run = {"cwd": src, "capture_output": True, "text": True, "timeout": 1200}
    out = subprocess.run([uv, "venv", "-q", "-p", sys.executable, str(env_dir)], **run)
    assert out.returncode == 0, out.stderr
    py = env_dir / "bin" / "python"
    out = subprocess.run(
        [uv, "pip", "install", "-q", "--python", str(py), "--resolution", "lowest-direct", "-e", ".[test,posterior]"], **run
    )
    assert out.returncode == 0, out.stderr[-3000:]
    versions = subprocess.run(
        [str(py), "-c", "import numpy, scipy, astropy, specutils, lmfit, matplotlib; print(numpy.__version__, astropy.__version__)"], **run
    )
    print(f"\nlowest-direct environment: numpy, astropy = {versions.stdout.strip()}")
    core = [
        f"tests/{name}"
        for name in (
            "test_kinematics.py",
            "test_lines.py",
            "test_spectra.py",
            "test_models.py",
            "test_measure.py",
            "test_fitting.py",
            "test_io.py",
            "test_batch.py",
            "test_plotting.py",
            "test_validation.py",
            "test_cli.py",
            "test_readme.py",
        )
    ]
    env = {k: v for k, v in os.environ.items() if k != "DOPPLERKIT_CI"}
    out = subprocess.run(
        [str(py), "-m", "pytest", "-q", "-p", "no:cacheprovider", "-m", "not slow and not browser and not cluster", *core],
        env=env,
        **run,
    )
    assert out.returncode == 0, out.stdout[-4000:]
