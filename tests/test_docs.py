"""The documentation site builds with warnings as errors, and its examples run as doctests.

The same commands as ``make docs``; the gallery scripts (invented data) run during the html build.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.slow
@pytest.mark.parametrize("builder", ["html", "doctest"])
def test_docs_build_without_warnings(builder, tmp_path):
    sphinx = Path(sys.executable).with_name("sphinx-build")
    out = subprocess.run(
        [str(sphinx), "-W", "--keep-going", "-q", "-b", builder, "-d", str(tmp_path / "doctrees"), "docs", str(tmp_path / builder)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=900,
    )
    assert out.returncode == 0, out.stderr[-4000:] + out.stdout[-2000:]
    if builder == "html":
        assert "fit_jet_pair" in (tmp_path / "html" / "api" / "fitting.html").read_text()  # generated from the docstrings
        assert "measure_lines" in (tmp_path / "html" / "api" / "measure.html").read_text()
        for page in ("plot_doppler_factor", "plot_jet_pair_fit", "plot_outflow_reading"):  # each example shows its figures
            assert "sphx_glr_" + page + "_001.png" in (tmp_path / "html" / "gallery" / f"{page}.html").read_text()
