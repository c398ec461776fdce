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


# ---------------------------------------------------------------------------
# Valid FITS tables written by astropy.io.fits (not by dopplerkit) with the column features of
# the FITS Standard 4.0 (Pence et al. 2010, A&A 524, A42; sec. 7.3): every one must read right.
# ---------------------------------------------------------------------------
_WAVE = np.linspace(5600.0, 5900.0, 301)
_FLUX = 1.0 + 3.0 * np.exp(-0.5 * ((_WAVE - 5734.0) / 4.0) ** 2)
_SIG = np.full_like(_WAVE, 0.05)


def _write_table(path, cols, header=None):
    tab = fits.BinTableHDU.from_columns(cols)
    for k, v in (header or {}).items():
        tab.header[k] = v
    tab.header["MEDIUM"] = "vacuum"
    fits.HDUList([fits.PrimaryHDU(), tab]).writeto(path)
    return path


def _plain_cols(wave=_WAVE, flux=_FLUX, sig=_SIG):
    return [
        fits.Column(name="wavelength", format="D", unit="Angstrom", array=wave),
        fits.Column(name="flux", format="D", unit="Jy", array=flux),
        fits.Column(name="error", format="D", unit="Jy", array=sig),
    ]


def test_scaled_integer_flux_column(tmp_path):
    # int16 storage with TSCAL/TZERO: physical = TZERO + TSCAL * stored (FITS Standard 4.0, eq. 7.3.2)
    tscal, tzero = 1e-4, 2.0
    stored = np.round((_FLUX - tzero) / tscal).astype(np.int16)
    cols = _plain_cols()
    cols[1] = fits.Column(name="flux", format="I", unit="Jy", array=stored)  # raw integers, scaled by the header below
    a = read_arrays(_write_table(tmp_path / "s.fits", cols, {"TSCAL2": tscal, "TZERO2": tzero}))
    assert_allclose(a.flux, tzero + tscal * stored, rtol=1e-12)
    assert _read_simple_bintable(tmp_path / "s.fits") is None  # left to astropy.io.fits


def test_zero_offset_on_the_wavelength_column(tmp_path):
    # TZERO1 = 4000: the stored numbers are offsets from 4000 Angstrom
    cols = _plain_cols()
    # (astropy takes the physical values and stores them minus TZERO)
    cols[0] = fits.Column(name="wavelength", format="D", unit="Angstrom", array=_WAVE, bzero=4000.0)
    a = read_arrays(_write_table(tmp_path / "s.fits", cols))
    assert_allclose(a.axis, _WAVE, rtol=1e-12)
    assert abs(a.axis[np.argmax(a.flux)] - 5734.0) < 1.0


def test_unsigned_16_bit_column(tmp_path):
    # astropy stores uint16 as int16 with TZERO = 32768 (FITS Standard 4.0, table 19)
    counts = np.round(_FLUX * 20000).astype(np.uint16)
    cols = _plain_cols()
    cols[1] = fits.Column(name="flux", format="I", unit="count", array=counts, bzero=32768)
    cols[2] = fits.Column(name="error", format="D", unit="count", array=np.sqrt(counts))
    a = read_arrays(_write_table(tmp_path / "s.fits", cols))
    assert_allclose(a.flux, counts.astype(float), rtol=0)
    assert a.flux.max() > 32767  # not wrapped through int16


def test_null_integer_pixels_become_masked(tmp_path):
    stored = np.round(_FLUX * 1000).astype(np.int32)
    stored[[10, 150]] = -999
    cols = _plain_cols()
    cols[1] = fits.Column(name="flux", format="J", unit="Jy", array=stored, null=-999)
    a = read_arrays(_write_table(tmp_path / "s.fits", cols))
    assert np.isnan(a.flux[10]) and np.isnan(a.flux[150])
    assert np.isfinite(np.delete(a.flux, [10, 150])).all()
    spec = a.to_spectrum()
    assert spec.mask is not None and spec.mask[10] and spec.mask[150] and spec.mask.sum() == 2


def test_nan_pixels_masked_on_the_fast_path(tmp_path):
    flux = _FLUX.copy()
    flux[5] = np.nan
    path = _write_table(tmp_path / "s.fits", _plain_cols(flux=flux))
    assert _read_simple_bintable(path) is not None
    spec = read_arrays(path).to_spectrum()
    assert spec.mask[5] and spec.mask.sum() == 1


@pytest.mark.parametrize("kind", ["tdim", "heap"])
def test_one_row_array_cells(tmp_path, kind):
    # a whole spectrum in one row: fixed-length array cells (TDIMn) or variable-length ones on the heap
    n = _WAVE.size
    if kind == "tdim":
        cols = [
            fits.Column(name=nm, format=f"{n}D", unit=un, dim=f"({n})", array=arr[None, :])
            for nm, un, arr in (("wavelength", "Angstrom", _WAVE), ("flux", "Jy", _FLUX), ("error", "Jy", _SIG))
        ]
    else:
        cols = [
            fits.Column(name=nm, format="PD()", unit=un, array=np.array([arr], dtype=object))
            for nm, un, arr in (("wavelength", "Angstrom", _WAVE), ("flux", "Jy", _FLUX), ("error", "Jy", _SIG))
        ]
    path = _write_table(tmp_path / "s.fits", cols)
    assert _read_simple_bintable(path) is None
    a = read_arrays(path)
    assert_allclose(a.axis, _WAVE, rtol=0)
    assert_allclose(a.flux, _FLUX, rtol=0)
    assert_allclose(a.sigma, _SIG, rtol=0)


def test_scaled_axis_and_flux_measure_the_right_line(tmp_path):
    # end to end: both columns scaled, the measured centre is where the line was put
    from dopplerkit.measure import measure_lines

    cols = [
        fits.Column(name="wavelength", format="J", unit="Angstrom", array=np.round((_WAVE - 4000.0) * 100).astype(np.int32)),
        fits.Column(name="flux", format="I", unit="Jy", array=np.round((_FLUX - 2.0) / 1e-4).astype(np.int16)),
        fits.Column(name="error", format="D", unit="Jy", array=_SIG),
    ]
    scaling = {"TSCAL1": 0.01, "TZERO1": 4000.0, "TSCAL2": 1e-4, "TZERO2": 2.0}
    spec = read_arrays(_write_table(tmp_path / "s.fits", cols, scaling)).to_spectrum()
    t = measure_lines(spec, 5734.0 * u.AA, method="fast")
    assert abs(t["centre"][0].to_value(u.AA) - 5734.0) < 0.05


def test_blank_pixels_of_an_integer_image_are_masked(tmp_path):
    data = np.round(_FLUX * 1000).astype(np.int32)
    data[7] = -32768
    hdr = fits.Header(
        {
            "CRPIX1": 1.0,
            "CRVAL1": _WAVE[0],
            "CDELT1": _WAVE[1] - _WAVE[0],
            "CUNIT1": "Angstrom",
            "CTYPE1": "WAVE",
            "BUNIT": "Jy",
            "BLANK": -32768,
        }
    )
    fits.PrimaryHDU(data, header=hdr).writeto(tmp_path / "img.fits")
    a = read_arrays(tmp_path / "img.fits")
    assert np.isnan(a.flux[7]) and np.isfinite(np.delete(a.flux, 7)).all()


@pytest.mark.parametrize("name,layout", [("s.fits", "tabular-fits"), ("s.fits", "wcs1d-fits"), ("s.ecsv", None)])
def test_frame_keywords_round_trip(tmp_path, name, layout):
    # SPECSYS (FITS WCS, Greisen et al. 2006, A&A 446, 747; from memory), the target, time and observatory
    # survive a write and a read, so a barycentric correction can be made later (common practice, no source)
    from astropy.nddata import StdDevUncertainty
    from specutils import Spectrum

    from dopplerkit.io import read_arrays, read_spectrum

    meta = {"SPECSYS": "TOPOCENT", "RA": "16:40:00", "DEC": "-12:30:00", "DATE-OBS": "2025-05-01T03:00:00", "EXPTIME": 900.0}
    meta |= {"OBSGEO-X": 4843319.3, "OBSGEO-Y": 2499823.5, "OBSGEO-Z": -3304672.2, "OBJECT": "DKX-9", "medium": "air"}
    s = Spectrum(
        flux=np.ones(50) * u.Jy,
        spectral_axis=np.linspace(6000, 6100, 50) * u.AA,
        uncertainty=StdDevUncertainty(np.full(50, 0.1)),
        meta=meta,
    )
    path = write_spectrum(s, tmp_path / name, layout=layout)
    got = read_arrays(path).meta
    for k, v in meta.items():
        if k != "medium":
            assert got[k] == v, k
    from dopplerkit.spectra import spectral_frame

    assert spectral_frame(read_spectrum(path)) == "TOPOCENT"
