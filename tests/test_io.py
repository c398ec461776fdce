"""Spectrum files: round trips through every layout, the fast FITS table reader against astropy.io.fits.

No physics here: the checks are round trips and agreement with astropy.io.fits as a reference
library (common practice, no source).
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from numpy.testing import assert_allclose

from dopplerkit.io import SpectrumReadError, _read_simple_bintable, detect_format, read_arrays, write_spectrum
from dopplerkit.models import LineComponent, synthesize_spectrum


@pytest.fixture
def spec():
    grid = np.linspace(6000.0, 7000.0, 500) * u.AA
    return synthesize_spectrum(grid, [LineComponent("H-alpha", z=0.01, strength=2.0)], continuum=1e-16, snr=20, seed=1, medium="air")


@pytest.mark.parametrize("name,layout", [("a.fits", "tabular-fits"), ("b.fits", "wcs1d-fits"), ("c.ecsv", None), ("d.csv", None)])
def test_round_trip(spec, tmp_path, name, layout):
    path = write_spectrum(spec, tmp_path / name, layout=layout)
    a = read_arrays(path, spectral_unit="Angstrom", flux_unit="erg / (s cm2 Angstrom)", medium="air")
    assert_allclose(a.axis, spec.spectral_axis.value, rtol=1e-12)
    assert_allclose(a.flux, spec.flux.value, rtol=1e-5)  # float32 on disk
    assert_allclose(a.sigma, spec.uncertainty.array, rtol=1e-5)
    assert a.medium == "air"
    if layout:
        assert detect_format(path) == layout


def test_fast_table_reader_equals_astropy(spec, tmp_path):
    path = write_spectrum(spec, tmp_path / "s.fits")
    cols, units, ehdr, _ = _read_simple_bintable(path)
    t = Table.read(path)
    for name in t.colnames:
        assert_allclose(cols[name], np.asarray(t[name], float), rtol=0)
        assert u.Unit(units[name], format="fits") == t[name].unit
    assert ehdr["MEDIUM"] == "air"


def test_fast_reader_falls_back_and_detects_truncation(tmp_path):
    # a vector column (not scalar) is left to astropy.io.fits
    col = fits.Column(name="wavelength", format="2D", array=np.ones((3, 2)))
    hdul = fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns([col])])
    hdul.writeto(tmp_path / "v.fits")
    assert _read_simple_bintable(tmp_path / "v.fits") is None
    x = np.linspace(1, 2, 1000)
    cols = [
        fits.Column(name=n, format="D", array=x, unit="Angstrom" if n == "wavelength" else "Jy") for n in ("wavelength", "flux", "error")
    ]
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(tmp_path / "w.fits")
    whole = (tmp_path / "w.fits").read_bytes()
    (tmp_path / "t.fits").write_bytes(whole[: len(whole) - 3000])
    with pytest.raises(SpectrumReadError, match="truncated"):
        read_arrays(tmp_path / "t.fits", "tabular-fits")


def test_gzipped_table_goes_through_astropy(spec, tmp_path):
    import gzip

    plain = write_spectrum(spec, tmp_path / "s.fits")
    gz = tmp_path / "s.fits.gz"
    gz.write_bytes(gzip.compress(plain.read_bytes()))
    a, b = read_arrays(plain), read_arrays(gz)
    assert_allclose(b.flux, a.flux, rtol=0)
    assert b.medium == a.medium == "air" and b.flux_unit == a.flux_unit
