"""A directory of unusual files, valid and invalid, through the batch command.

The same invented jet pair (beta 0.2 at 60 deg, H-alpha, S/N 40) is written in 30 valid but
unusual ways: scaled, unsigned and null-flagged integer FITS columns, array and variable-length
columns, 1-D WCS images in air and vacuum, log10-linear images (IRAF DC-FLAG, COEFF0/COEFF1) and a loglam column, frequency, energy, nm and micron axes, descending
axes, inverse-variance and variance columns, masked and NaN pixels, gzip, odd names and more,
all written by astropy (not by dopplerkit's writer). Every one must fit right (ok, beta within 5
sigma); each of 14 invalid files must get an error row naming the trouble, and the run must go on.
"""

from __future__ import annotations

import gzip
import shutil

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

import dopplerkit as dk
from dopplerkit.batch import run_batch
from dopplerkit.models import LineComponent, synthesize_spectrum

BETA, ANGLE = 0.2, 60.0
CONFIG = {
    "line": [{"name": "H-alpha", "components": 2}],
    "kinematics": {"model": "jet-pair"},
    "spectra": {"medium": "vacuum", "spectral_unit": "Angstrom", "flux_unit": "erg / (s cm2 Angstrom)"},
}


def _spectrum():
    kms = u.km / u.s
    comps = [LineComponent("H-alpha", z=dk.redshift(BETA, ANGLE), fwhm=800 * kms, strength=2.0)]
    comps.append(LineComponent("H-alpha", z=dk.redshift(BETA, 180 - ANGLE), fwhm=800 * kms, strength=1.4))
    s = synthesize_spectrum(np.arange(5200.0, 8600.0, 2.0) * u.AA, comps, continuum=1.0, snr=40, seed=11, resolution=4000)
    return s.spectral_axis.value, s.flux.value, s.uncertainty.array


FU = "erg / (s cm2 Angstrom)"


def _table_fits(path, cols, header=None, primary=None):
    hdu = fits.BinTableHDU.from_columns(cols)
    if header:
        hdu.header.update(header)
    fits.HDUList([primary or fits.PrimaryHDU(), hdu]).writeto(path)


def _valid(d):
    w, f, e = _spectrum()
    n = w.size

    def col(name, fmt, arr, unit=None, **kw):
        return fits.Column(name=name, format=fmt, array=arr, unit=unit, **kw)

    def plain(path, wname="wavelength", fname="flux", ename="error", wunit="Angstrom", header=None):
        _table_fits(path, [col(wname, "D", w, wunit), col(fname, "D", f, FU), col(ename, "D", e, FU)], header)

    plain(d / "plain.fits")
    plain(d / "UPPER_CASE.fits", "WAVELENGTH", "FLUX", "ERR")
    plain(d / "with spaces and ünïcødé.fits")
    plain(d / "medium_keyword.fits", header={"MEDIUM": "vacuum"})
    # scaled int16 flux (TSCAL/TZERO), int32 wavelength with TZERO
    tscal, tzero = (f.max() - f.min()) / 60000, 0.5 * (f.max() + f.min())
    cols = [
        col("wavelength", "J", np.round((w - 5000) * 1000).astype(np.int32), "Angstrom"),
        col("flux", "I", np.round((f - tzero) / tscal).astype(np.int16), FU),
        col("error", "E", e.astype(np.float32), FU),
    ]
    _table_fits(d / "scaled_int.fits", cols, {"TSCAL1": 1e-3, "TZERO1": 5000.0, "TSCAL2": tscal, "TZERO2": tzero})
    # unsigned 16-bit flux (astropy writes TZERO = 32768)
    fs = 1e4  # the flux in units of 1e-4 erg/(s cm2 A) fits 16 bits unsigned
    assert f.max() * fs < 65535
    t = Table({"wavelength": w * u.AA, "flux": np.round(f * fs).astype(np.uint16), "error": e * fs})
    t["flux"].unit = t["error"].unit = u.Unit("1e-4 erg / (s cm2 Angstrom)")
    t.write(d / "unsigned16.fits")
    # null-flagged integer flux (TNULL) on a few pixels
    raw = np.round((f - tzero) / tscal).astype(np.int32)
    raw[[100, 900, 1500]] = -999999
    cols = [col("wavelength", "D", w, "Angstrom"), col("flux", "J", raw, FU, null=-999999), col("error", "D", e, FU)]
    _table_fits(d / "tnull.fits", cols, {"TSCAL2": tscal, "TZERO2": tzero})
    # NaN pixels in a float table
    fn = f.copy()
    fn[[50, 51, 52, 1400]] = np.nan
    _table_fits(d / "nan_pixels.fits", [col("wavelength", "D", w, "Angstrom"), col("flux", "D", fn, FU), col("error", "D", e, FU)])
    # float32 columns
    _table_fits(
        d / "float32.fits",
        [col("wavelength", "D", w, "Angstrom"), col("flux", "E", f.astype(np.float32), FU), col("error", "E", e.astype(np.float32), FU)],
    )
    # one-row table, whole arrays in cells (TDIM / repeat count)
    cols = [col("wavelength", f"{n}D", w[None], "Angstrom"), col("flux", f"{n}D", f[None], FU), col("error", f"{n}D", e[None], FU)]
    _table_fits(d / "one_row_arrays.fits", cols)
    # variable-length arrays (heap)
    cols = [col("wavelength", "PD()", np.array([w], dtype=object), "Angstrom"), col("flux", "PD()", np.array([f], dtype=object), FU)]
    cols.append(col("error", "PD()", np.array([e], dtype=object), FU))
    _table_fits(d / "variable_length.fits", cols)
    # extra columns and inverse variance
    fu = u.Unit(FU)
    cols = [
        col("wavelength", "D", w, "Angstrom"),
        col("sky", "D", np.ones(n)),
        col("flux", "D", f, FU),
        col("ivar", "D", 1 / e**2, (fu**-2).to_string("fits")),
    ]
    _table_fits(d / "ivar_and_extra.fits", cols)
    _table_fits(
        d / "variance.fits", [col("wave", "D", w, "Angstrom"), col("flux", "D", f, FU), col("var", "D", e**2, (fu**2).to_string("fits"))]
    )
    # flux per unit frequency (mJy) on a wavelength axis, and the .fit extension
    eq = u.spectral_density(w * u.AA)
    fm, em = (f * fu).to_value(u.mJy, equivalencies=eq), (e * fu).to_value(u.mJy, equivalencies=eq)
    _table_fits(
        d / "fnu_millijansky.fit", [col("wavelength", "D", w, "Angstrom"), col("flux", "D", fm, "mJy"), col("error", "D", em, "mJy")]
    )
    # other axis units and directions
    _table_fits(
        d / "nanometre.fits",
        [col("wavelength", "D", w / 10, "nm"), col("flux", "D", f * 10, "erg / (s cm2 nm)"), col("error", "D", e * 10, "erg / (s cm2 nm)")],
    )
    _table_fits(d / "micron.fits", [col("wavelength", "D", w / 1e4, "um"), col("flux", "D", f, FU), col("error", "D", e, FU)])
    _table_fits(
        d / "descending.fits", [col("wavelength", "D", w[::-1], "Angstrom"), col("flux", "D", f[::-1], FU), col("error", "D", e[::-1], FU)]
    )
    nu = (w * u.AA).to_value(u.Hz, equivalencies=u.spectral())
    _table_fits(d / "frequency.fits", [col("frequency", "D", nu, "Hz"), col("flux", "D", f, FU), col("error", "D", e, FU)])
    ev = (w * u.AA).to_value(u.eV, equivalencies=u.spectral())
    _table_fits(d / "energy.fits", [col("energy", "D", ev, "eV"), col("flux", "D", f, FU), col("error", "D", e, FU)])
    # air wavelengths, said by the MEDIUM keyword
    air = dk.lines.vacuum_to_air(w * u.AA).to_value(u.AA)
    _table_fits(
        d / "air_medium.fits",
        [col("wavelength", "D", air, "Angstrom"), col("flux", "D", f, FU), col("error", "D", e, FU)],
        {"MEDIUM": "air"},
    )
    # 1-D WCS images: vacuum (WAVE) and air (AWAV; a non-linear air grid is close enough to linear over 2 A pixels? no: resample)
    for name, ctype, grid in (("wcs_vacuum.fits", "WAVE", w), ("wcs_air.fits", "AWAV", None)):
        if grid is None:
            grid = np.linspace(air[0], air[-1], n)
            ff, ee = np.interp(grid, air, f), np.interp(grid, air, e)
        else:
            ff, ee = f, e
        h = fits.Header({"CTYPE1": ctype, "CUNIT1": "Angstrom", "CRPIX1": 1.0, "CRVAL1": grid[0], "CDELT1": grid[1] - grid[0], "BUNIT": FU})
        err = fits.ImageHDU(ee, header=fits.Header({"EXTNAME": "ERROR", "BUNIT": FU}))
        fits.HDUList([fits.PrimaryHDU(ff, header=h), err]).writeto(d / name)
    # log10-linear images: IRAF's DC-FLAG = 1 with the unit in WAT1_001 (the IRAF spectral WCS,
    # Valdes 1993; from memory), and two coefficients COEFF0/COEFF1 for log10 of the wavelength in
    # Angstrom (the SDSS convention; from memory)
    loglam = np.arange(np.log10(w[0]), np.log10(w[-1]), 5e-5)
    lf, le = np.interp(10**loglam, w, f), np.interp(10**loglam, w, e)
    h = fits.Header({"CTYPE1": "LINEAR", "CRPIX1": 1.0, "CRVAL1": loglam[0], "CD1_1": 5e-5, "DC-FLAG": 1, "BUNIT": FU})
    h["WAT1_001"] = "wtype=linear label=Wavelength units=angstroms"
    err = fits.ImageHDU(le, header=fits.Header({"EXTNAME": "ERROR", "BUNIT": FU}))
    fits.HDUList([fits.PrimaryHDU(lf, header=h), err]).writeto(d / "iraf_loglinear.fits")
    h = fits.Header({"COEFF0": loglam[0], "COEFF1": 5e-5, "BUNIT": FU})
    err = fits.ImageHDU(le, header=fits.Header({"EXTNAME": "ERROR", "BUNIT": FU}))
    fits.HDUList([fits.PrimaryHDU(lf, header=h), err]).writeto(d / "coefficients_loglinear.fits")
    # a table with loglam (log10 of the wavelength in Angstrom) and ivar columns, flux unit from the
    # config: the SDSS column convention (from memory)
    _table_fits(d / "loglam_ivar.fits", [col("flux", "E", lf), col("loglam", "E", loglam), col("ivar", "E", 1 / le**2)])
    # gzip
    with open(d / "plain.fits", "rb") as src, gzip.open(d / "compressed.fits.gz", "wb") as dst:
        shutil.copyfileobj(src, dst)
    # text formats
    t = Table({"wavelength": w * u.AA, "flux": f * u.Unit(FU), "uncertainty": e * u.Unit(FU)}, meta={"medium": "vacuum"})
    t.write(d / "table.ecsv")
    tm = Table(t, masked=True)
    tm["flux"].mask = np.zeros(n, bool)
    tm["flux"].mask[[10, 11, 700]] = True
    tm.write(d / "masked.ecsv")
    Table({"Wavelength": w, "Flux": f, "Error": e}).write(d / "plain.csv", format="ascii.csv")
    Table({"wave": w, "flux": f, "sigma": e}).write(d / "spaces.txt", format="ascii.basic")
    Table({"lambda": w, "flux": f, "err": e}).write(d / "columns.dat", format="ascii.basic", delimiter="\t")
    Table({"wavelength": w, "flux": f, "error": e}).write(d / "no_units.fits")  # units from the config
    # primary HDU that carries an (unrelated) image before the table
    _table_fits(
        d / "primary_with_data.fits",
        [col("wavelength", "D", w, "Angstrom"), col("flux", "D", f, FU), col("error", "D", e, FU)],
        primary=fits.PrimaryHDU(np.zeros((4, 4))),
    )
    return sorted(p for p in d.iterdir())


def _invalid(d):
    w, f, e = _spectrum()
    bad = {}
    (d / "empty.fits").write_bytes(b"")
    bad["empty.fits"] = "empty"
    whole = (d / "plain.fits").read_bytes()
    (d / "truncated.fits").write_bytes(whole[: len(whole) // 2])
    bad["truncated.fits"] = "truncated"
    (d / "garbage.fits").write_bytes(np.random.default_rng(1).bytes(5000))
    bad["garbage.fits"] = "FITS"
    (d / "html.fits").write_text("<html><body>404 not found</body></html>")
    bad["html.fits"] = "FITS"
    Table({"wavelength": w * u.AA, "flux": np.full(w.size, np.nan) * u.Unit(FU), "error": e * u.Unit(FU)}).write(d / "all_nan.ecsv")
    bad["all_nan.ecsv"] = "finite"
    Table({"wavelength": w * u.kg, "flux": f * u.Unit(FU), "error": e * u.Unit(FU)}).write(d / "mass_axis.ecsv")
    bad["mass_axis.ecsv"] = "kg"
    Table({"wavelength": [6563.0] * u.AA, "flux": [1.0] * u.Unit(FU), "error": [0.1] * u.Unit(FU)}).write(d / "one_pixel.ecsv")
    bad["one_pixel.ecsv"] = "pixel"
    order = np.random.default_rng(2).permutation(w.size)
    Table({"wavelength": w[order] * u.AA, "flux": f[order] * u.Unit(FU), "error": e[order] * u.Unit(FU)}).write(d / "shuffled.ecsv")
    bad["shuffled.ecsv"] = "monotonic"
    ww = w.copy()
    ww[500] = ww[499]
    Table({"wavelength": ww * u.AA, "flux": f * u.Unit(FU), "error": e * u.Unit(FU)}).write(d / "repeated.ecsv")
    bad["repeated.ecsv"] = "monotonic"
    Table({"wavelength": w * u.AA, "flux": f * u.Unit(FU)}).write(d / "no_errors.ecsv")
    bad["no_errors.ecsv"] = "uncertainty"
    Table({"wavelength": w * u.AA, "flux": f * u.Unit(FU), "error": -e * u.Unit(FU)}).write(d / "negative_errors.ecsv")
    bad["negative_errors.ecsv"] = "sigma"
    Table({"name": ["a", "b"], "value": [1, 2]}).write(d / "not_a_spectrum.ecsv")
    bad["not_a_spectrum.ecsv"] = "spectral axis"
    # an image with no spectral axis at all: pixel numbers are no wavelengths, even with a unit configured
    err = fits.ImageHDU(e, header=fits.Header({"EXTNAME": "ERROR", "BUNIT": FU}))
    fits.HDUList([fits.PrimaryHDU(f, header=fits.Header({"BUNIT": FU})), err]).writeto(d / "image_without_axis.fits")
    bad["image_without_axis.fits"] = "no spectral axis"
    (d / "header_only.csv").write_text("wavelength,flux,error\n")
    bad["header_only.csv"] = ""
    Table({"wavelength": w * u.AA, "flux": f * u.Unit(FU), "error": np.zeros(w.size) * u.Unit(FU)}).write(d / "zero_errors.ecsv")
    bad["zero_errors.ecsv"] = "sigma"
    return bad


@pytest.fixture(scope="module")
def unusual(tmp_path_factory):
    d = tmp_path_factory.mktemp("unusual")
    spectra = d / "spectra"
    spectra.mkdir()
    valid = [p.name for p in _valid(spectra)]
    bad = _invalid(spectra)
    out = d / "results.ecsv"
    code, _ = run_batch(spectra, CONFIG, out, workers=1, quiet=True)
    return valid, bad, Table.read(out), code


def test_there_are_enough_files(unusual):
    valid, bad, _, _ = unusual
    assert len(valid) >= 30 and len(bad) >= 14


def test_every_valid_unusual_file_fits_right(unusual):
    valid, _, t, _ = unusual
    rows = {str(f).replace("\\", "/").split("/")[-1]: r for f, r in zip(t["file"], t, strict=True)}
    wrong = []
    for name in valid:
        r = rows[name]
        if (
            r["status"] != "ok"
            or not abs(r["beta"] - BETA) < 5 * r["beta_err"]
            or not abs(r["viewing_angle"] - ANGLE) < 5 * r["viewing_angle_err"]
        ):
            wrong.append(
                f"{name}: {r['status']} beta {r['beta']:.4f} +- {r['beta_err']:.2g}, angle {r['viewing_angle']:.2f}: {r['message']}"
            )
    assert not wrong, "\n".join(wrong)


def test_every_invalid_file_gets_an_error_row_saying_why(unusual):
    _, bad, t, code = unusual
    rows = {str(f).replace("\\", "/").split("/")[-1]: r for f, r in zip(t["file"], t, strict=True)}
    for name, word in bad.items():
        r = rows[name]
        assert r["status"] == "error", (name, r["status"], r["message"])
        assert word.lower() in str(r["message"]).lower(), (name, r["message"])
    assert code == 1  # some rows failed; the table is written
