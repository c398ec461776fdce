"""Reading and writing 1-D spectra and result tables.

Formats (``FORMATS``), chosen once per directory and passed explicitly to the reader:

- ``tabular-fits``: FITS binary table in HDU 1 (columns as below); plain tables of scalar
  float/integer columns are read straight into numpy, anything with scaled (TSCALn/TZEROn,
  unsigned), null-flagged (TNULLn), array (TDIMn) or heap columns by astropy.io.fits, which
  applies those keywords;
- ``wcs1d-fits``: FITS image with a 1-D WCS (linear, or log10-linear with IRAF's DC-FLAG = 1 or
  ``-LOG``), or with COEFF0/COEFF1 (log10 of the wavelength in Angstrom), read with
  astropy.io.fits; an image with none of these is refused;
- ``ecsv``: astropy ECSV table;
- ``ascii``: plain text or CSV with a header line.

Table columns are found by name, case-insensitively: the axis is ``wavelength``,
``frequency`` or ``energy`` (also ``wave``, ``lambda``, ``freq``), or ``loglam`` (log10 of the
wavelength in Angstrom, as SDSS writes it); the flux is ``flux``;
the uncertainty is ``uncertainty`` or ``error``/``err``/``sigma`` (standard deviation),
``ivar`` (inverse variance) or ``variance``/``var``. Units come from the file (ECSV units,
FITS TUNITn / BUNIT / CUNIT1); where the file has none they must be given.

Null entries (TNULLn, BLANK, masked table cells) and NaN become masked pixels: NaN in the
arrays, a ``mask`` on the Spectrum; they are never fitted.

The wavelength medium comes from ``meta["medium"]``, a FITS keyword ``MEDIUM``
('air'/'vacuum') or a 1-D WCS CTYPE1 (``AWAV`` = air, ``WAVE`` = vacuum).

The header keywords of :data:`META_KEYWORDS` go into ``meta``: the object and time, and the
reference frame of the spectral axis (FITS ``SPECSYS``) with what a barycentric correction needs
(target RA/DEC, observatory OBSGEO-X/Y/Z; see :func:`dopplerkit.spectra.to_barycentric`).

Every writer writes to a temporary file in the target directory and renames it into
place, so a crash never leaves a half-written file under the final name.
"""

from __future__ import annotations

import functools
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import astropy.units as u
import numpy as np

__all__ = [
    "FORMATS",
    "META_KEYWORDS",
    "SpectrumArrays",
    "SpectrumReadError",
    "atomic_path",
    "detect_format",
    "read_arrays",
    "read_spectrum",
    "write_spectrum",
    "write_table",
]

FORMATS = {
    "tabular-fits": "FITS binary table (HDU 1)",
    "wcs1d-fits": "FITS image with a linear 1-D WCS",
    "ecsv": "astropy ECSV table",
    "ascii": "plain text / CSV table with a header line",
}

_FITS_EXT = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz")
_ASCII_EXT = (".csv", ".txt", ".dat", ".tsv")

AXIS_NAMES = {
    "wavelength": "wavelength",
    "wave": "wavelength",
    "lambda": "wavelength",
    "wavelen": "wavelength",
    "frequency": "frequency",
    "freq": "frequency",
    "energy": "energy",
}
SIGMA_NAMES = {
    "uncertainty": "stddev",
    "error": "stddev",
    "err": "stddev",
    "sigma": "stddev",
    "stddev": "stddev",
    "ivar": "ivar",
    "inverse_variance": "ivar",
    "variance": "var",
    "var": "var",
}


class SpectrumReadError(ValueError):
    """A file could not be read as a 1-D spectrum; the message says why."""


@dataclass
class SpectrumArrays:
    """A spectrum as plain arrays (what crosses process boundaries in batch work)."""

    axis: np.ndarray
    axis_unit: str
    flux: np.ndarray
    flux_unit: str
    sigma: np.ndarray | None
    medium: str | None = None
    meta: dict = field(default_factory=dict)

    def to_spectrum(self):
        """A specutils Spectrum (StdDevUncertainty; meta medium set)."""
        from astropy.nddata import StdDevUncertainty
        from specutils import Spectrum

        meta = dict(self.meta)
        if self.medium is not None:
            meta["medium"] = self.medium
        unc = None if self.sigma is None else StdDevUncertainty(self.sigma)
        bad = ~np.isfinite(self.flux)
        if self.sigma is not None:
            bad |= ~np.isfinite(self.sigma)
        return Spectrum(
            flux=self.flux * u.Unit(self.flux_unit),
            spectral_axis=self.axis * u.Unit(self.axis_unit),
            uncertainty=unc,
            mask=bad if bad.any() else None,
            meta=meta,
        )


def detect_format(path: str | Path) -> str:
    """Format name of a spectrum file, from its extension (and HDU 1 for FITS).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    str
        One of ``FORMATS``.

    Raises
    ------
    SpectrumReadError
        Unknown extension, or a FITS file that is neither a table nor a 1-D image.
    """
    p = str(path).lower()
    if p.endswith(_FITS_EXT):
        quick = _quick_fits_kind(path)
        if quick is not None:
            return quick
        import warnings

        from astropy.io import fits

        try:
            with warnings.catch_warnings(), fits.open(path, memmap=False) as hdul:
                warnings.simplefilter("error")  # a truncated file warns: make it an error here
                if len(hdul) > 1 and isinstance(hdul[1], fits.BinTableHDU):
                    return "tabular-fits"
                return "wcs1d-fits"
        except Exception as exc:  # unreadable FITS: the reader will say why
            raise SpectrumReadError(f"{path}: not a readable FITS file ({exc})") from exc
    if p.endswith(".ecsv"):
        return "ecsv"
    if p.endswith(_ASCII_EXT):
        return "ascii"
    raise SpectrumReadError(f"{path}: unknown spectrum format (extension); allowed: .fits, .ecsv, .csv, .txt, .dat")


@functools.lru_cache(maxsize=256)
def _parse_unit(text: str) -> u.UnitBase:
    # unit strings repeat across a directory; parsing one costs ~0.4 ms
    try:
        return u.Unit(text)
    except ValueError:
        return u.Unit(text, format="fits")


def _unit(text, what, path, default):
    if isinstance(text, u.UnitBase):
        return text
    if text in (None, "", "None"):
        if default is None:
            raise SpectrumReadError(f"{path}: the file gives no unit for the {what}, and none was configured")
        return _parse_unit(str(default))
    try:
        return _parse_unit(str(text))
    except ValueError as exc:
        raise SpectrumReadError(f"{path}: unit {text!r} of the {what} is not a unit astropy knows") from exc


_TFORM = {"D": ">f8", "E": ">f4", "J": ">i4", "I": ">i2", "K": ">i8"}
# Column keywords that change what the stored numbers mean (FITS Standard 4.0, sec. 7.3.2):
# scaling (TSCAL/TZERO, also how unsigned integers are stored), null values (TNULL), array
# shapes (TDIM). A table with any of them is read by astropy.io.fits, which applies them.
_UNUSUAL_COLUMN_KEYS = ("TSCAL", "TZERO", "TNULL", "TDIM")


def _card_value(text: str):
    text = text.strip()
    if text.startswith("'"):
        out, i = [], 1
        while i < len(text):
            c = text[i]
            if c == "'":
                if i + 1 < len(text) and text[i + 1] == "'":
                    out.append("'")
                    i += 2
                    continue
                break
            out.append(c)
            i += 1
        return "".join(out).rstrip()
    text = text.split("/", 1)[0].strip()
    if text in ("T", "F"):
        return text == "T"
    try:
        return int(text)
    except ValueError:
        try:
            return float(text.replace("D", "E"))
        except ValueError:
            return text


def _read_header(buf: bytes, start: int):
    """Parse one FITS header from ``start``; returns (dict, offset of the data) or None if malformed."""
    hdr = {}
    pos = start
    while pos + 2880 <= len(buf):
        block = buf[pos : pos + 2880].decode("ascii", errors="replace")
        pos += 2880
        for k in range(36):
            card = block[80 * k : 80 * k + 80]
            key = card[:8].strip()
            if key == "END":
                return hdr, pos
            if card[8:10] == "= ":
                hdr[key] = _card_value(card[10:])
    return None


def _quick_fits_kind(path) -> str | None:
    """ "tabular-fits" when the headers alone show a primary HDU without data and a binary table
    after it (read without astropy: the common case costs a fraction of a millisecond); None when
    unsure (astropy decides)."""
    if str(path).lower().endswith(".gz"):
        return None
    try:
        with open(path, "rb") as fh:
            buf = fh.read(2880 * 40)
    except OSError:
        return None
    if not buf.startswith(b"SIMPLE  ="):
        return None
    first = _read_header(buf, 0)
    if first is None or first[0].get("NAXIS", 0) != 0:
        return None
    second = _read_header(buf, first[1])
    if second is None or second[0].get("XTENSION") != "BINTABLE":
        return None
    return "tabular-fits"


def _read_simple_bintable(path):
    """A plain uncompressed FITS binary table (HDU 1, scalar D/E/J/I/K columns) read straight into numpy.

    Returns (columns, units, extension header, primary header), or None for anything else (then
    astropy.io.fits reads the file). Reading this way costs a fraction of the general reader;
    a file shorter than its headers announce raises SpectrumReadError (truncated).
    """
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        buf = fh.read(min(size, 2880 * 64))  # the headers (the data are read below, in blocks)
    if not buf.startswith(b"SIMPLE  ="):
        return None
    first = _read_header(buf, 0)
    if first is None:
        return None
    phdr, pos = first
    if phdr.get("NAXIS", 0) != 0:
        return None
    second = _read_header(buf, pos)
    if second is None:
        return None
    ehdr, pos = second
    if ehdr.get("XTENSION") != "BINTABLE" or ehdr.get("PCOUNT", 0) != 0 or ehdr.get("GCOUNT", 1) != 1:
        return None
    nrow, rowlen, nf = ehdr.get("NAXIS2"), ehdr.get("NAXIS1"), ehdr.get("TFIELDS")
    if not all(isinstance(v, int) for v in (nrow, rowlen, nf)):
        return None
    names, formats, units = [], [], {}
    if "THEAP" in ehdr or any(key.startswith(_UNUSUAL_COLUMN_KEYS) for key in ehdr):
        return None  # scaled, null-flagged, multi-dimensional or heap columns: astropy.io.fits applies them
    for i in range(1, nf + 1):
        tform = str(ehdr.get(f"TFORM{i}", "")).strip()
        code = tform[1:] if tform[:1] == "1" else tform
        if code not in _TFORM:
            return None
        name = str(ehdr.get(f"TTYPE{i}", f"col{i}"))
        names.append(name)
        formats.append(_TFORM[code])
        units[name] = ehdr.get(f"TUNIT{i}") or None
    dtype = np.dtype({"names": names, "formats": formats})
    if dtype.itemsize != rowlen:
        return None
    if size < pos + nrow * rowlen:
        raise SpectrumReadError(f"{path}: truncated FITS file: {size} bytes, the headers announce {pos + nrow * rowlen}")
    # rows in blocks of ~8 MB straight into float columns: memory peaks at the columns, not at file + columns
    out = {n: np.empty(nrow, float) for n in names}
    per = max(1, (8 << 20) // max(rowlen, 1))
    with open(path, "rb") as fh:
        fh.seek(pos)
        for i in range(0, nrow, per):
            m = min(per, nrow - i)
            block = np.frombuffer(fh.read(m * rowlen), dtype=dtype, count=m)
            for n in names:
                out[n][i : i + m] = block[n]
    return out, units, ehdr, phdr


def _masked_fits_column(hdu, c):
    """One FITS table column with TSCAL/TZERO applied (by astropy) and TNULL entries masked."""
    data = hdu.data[c.name]  # astropy applies TSCALn/TZEROn (and so unsigned integers)
    if c.null is not None and np.asarray(data).dtype.kind in "iu":
        raw = hdu.data.base[c.name] if hdu.data.base is not None else data
        # TNULL refers to the stored (unscaled) integer (FITS Standard 4.0, sec. 7.3.2)
        data = np.ma.masked_array(np.asarray(data), mask=np.asarray(raw) == c.null)
    return data


class _ArrayColumns:
    """The little of the Table interface that _from_table needs, from plain arrays and unit strings."""

    class _Col:
        def __init__(self, data, unit):
            self.value = data
            self.unit = unit

    def __init__(self, columns, units):
        self._columns = columns
        self._units = units
        self.colnames = list(columns)

    def __getitem__(self, name):
        unit = self._units.get(name)
        return self._Col(self._columns[name], None if unit is None else _parse_unit(unit))


def _float_column(data, path, name) -> np.ndarray:
    """A column as a 1-D float array; masked (null) entries become NaN, i.e. masked pixels.

    A spectrum stored as ONE row of array cells (fixed-length with TDIMn, or variable-length on
    the heap) is unpacked to its 1-D arrays.
    """
    if np.ma.isMaskedArray(data):
        arr = np.ma.filled(np.ma.asarray(data).astype(float), np.nan)
    else:
        arr = np.asarray(data)
        if arr.dtype == object:  # variable-length arrays: one cell per row
            if arr.size != 1:
                raise SpectrumReadError(f"{path}: column {name!r} holds {arr.size} variable-length rows; one row per file is supported")
            arr = np.asarray(arr.ravel()[0])
        arr = arr.astype(float, copy=False)
    if arr.ndim > 1 and arr.shape[0] == 1:
        arr = arr.reshape(arr.shape[1:])
    if arr.ndim > 1 and arr.size == max(arr.shape):
        arr = arr.ravel()
    return arr


def _from_table(t, path, spectral_unit, flux_unit):
    names = {c.lower(): c for c in t.colnames}
    axis_col = next((names[n] for n in AXIS_NAMES if n in names), None)
    log_axis = axis_col is None and "loglam" in names  # log10 of the wavelength in Angstrom (the SDSS convention)
    if log_axis:
        axis_col = names["loglam"]
    if axis_col is None:
        raise SpectrumReadError(
            f"{path}: no spectral axis column; expected one of {sorted(AXIS_NAMES)} or loglam (case-insensitive), found {t.colnames}"
        )
    if "flux" not in names:
        raise SpectrumReadError(f"{path}: no 'flux' column; found {t.colnames}")
    flux_col = names["flux"]
    sig_col, sig_kind = next(((names[n], k) for n, k in SIGMA_NAMES.items() if n in names), (None, None))

    def col(name):
        c = t[name]
        unit = getattr(c, "unit", None)
        return _float_column(getattr(c, "value", c) if not np.ma.isMaskedArray(c) else c, path, name), unit

    axis, au = col(axis_col)
    flux, fu = col(flux_col)
    if log_axis:
        axis, au = 10.0**axis, "Angstrom"
    au = _unit(au, "spectral axis", path, spectral_unit)
    fu = _unit(fu, "flux", path, flux_unit)
    sigma = None
    if sig_col is not None:
        s, su = col(sig_col)
        with np.errstate(divide="ignore", invalid="ignore"):
            if sig_kind == "ivar":
                sigma = np.where(s > 0, 1.0 / np.sqrt(s), np.nan)
            elif sig_kind == "var":
                sigma = np.sqrt(s)
            else:
                sigma = s
        if su not in (None, "") and sig_kind == "stddev" and su != fu:
            sigma = (sigma * _unit(su, "uncertainty", path, None)).to_value(fu)
    return axis, au, flux, fu, sigma


#: Header keywords kept in ``meta``: the object and time, and what the reference frame of the
#: spectral axis needs (SPECSYS, the target, the observatory; see dopplerkit.spectra.to_barycentric).
META_KEYWORDS = (
    "OBJECT",
    "DATE-OBS",
    "MJD-OBS",
    "DATE-AVG",
    "MJD-AVG",
    "TIME-OBS",
    "UT",
    "EXPTIME",
    "SPECSYS",
    "SSYSOBS",
    "VELOSYS",
    "RA_OBJ",
    "DEC_OBJ",
    "RA",
    "DEC",
    "OBSGEO-X",
    "OBSGEO-Y",
    "OBSGEO-Z",
    "OBSGEO-L",
    "OBSGEO-B",
    "OBSGEO-H",
)


def _header_meta(primary, extension=None) -> dict:
    """The :data:`META_KEYWORDS` found in the headers (the extension's, where it has one, win)."""
    out = {}
    for hdr in (primary, extension):
        if hdr is None:
            continue
        for k in META_KEYWORDS:
            v = hdr.get(k)
            if isinstance(v, (str, int, float)) and not isinstance(v, bool) and not (isinstance(v, str) and not v.strip()):
                out[k] = v
    return out


def read_arrays(
    path: str | Path, fmt: str | None = None, *, spectral_unit=None, flux_unit=None, medium: str | None = None
) -> SpectrumArrays:
    """Read a 1-D spectrum into plain arrays, with checks that give clear messages.

    Parameters
    ----------
    path : str or Path
    fmt : str, optional
        One of :data:`FORMATS`; detected from the file when None (costs a file open).
    spectral_unit, flux_unit : str, optional
        Units to use when the file does not give them.
    medium : {"air", "vacuum"}, optional
        Wavelength medium when the file does not say.

    Raises
    ------
    SpectrumReadError
        Empty, truncated, unreadable files; missing columns or units; fewer than 3 finite
        pixels; an unsorted or repeated spectral axis; a spectral axis that is not a
        wavelength, frequency or energy.
    """
    path = Path(path)
    if not path.exists():
        raise SpectrumReadError(f"{path}: no such file")
    if path.stat().st_size == 0:
        raise SpectrumReadError(f"{path}: empty file")
    fmt = fmt or detect_format(path)
    if fmt not in FORMATS:
        raise SpectrumReadError(f"format must be one of {sorted(FORMATS)}, got {fmt!r}")
    file_medium = None
    meta = {}
    try:
        if fmt in ("ecsv", "ascii"):
            from astropy.table import Table

            if fmt == "ecsv":
                t = Table.read(path, format="ascii.ecsv")
            else:
                t = Table.read(path, format="ascii.csv" if path.suffix.lower() == ".csv" else "ascii.basic")
            file_medium = (t.meta or {}).get("medium")
            meta = {k: v for k, v in (t.meta or {}).items() if isinstance(v, (str, int, float))}
            axis, au, flux, fu, sigma = _from_table(t, path, spectral_unit, flux_unit)
        elif (
            fmt == "tabular-fits"
            and str(path).lower().endswith((".fits", ".fit", ".fts"))
            and (simple := _read_simple_bintable(path)) is not None
        ):
            cols, units, ehdr, phdr = simple
            file_medium = ehdr.get("MEDIUM") or phdr.get("MEDIUM")
            meta = _header_meta(phdr, ehdr)
            axis, au, flux, fu, sigma = _from_table(_ArrayColumns(cols, units), path, spectral_unit, flux_unit)
        else:
            import warnings

            from astropy.io import fits
            from astropy.utils.exceptions import AstropyUserWarning

            with warnings.catch_warnings(), fits.open(path, memmap=False) as hdul:
                warnings.simplefilter("error", AstropyUserWarning)  # e.g. "File may have been truncated"
                if fmt == "tabular-fits":
                    if len(hdul) < 2 or not isinstance(hdul[1], fits.BinTableHDU):
                        raise SpectrumReadError(f"{path}: tabular FITS needs a binary table in HDU 1")
                    hdr = hdul[1].header
                    file_medium = hdr.get("MEDIUM") or hdul[0].header.get("MEDIUM")
                    hdu = hdul[1]
                    cols = {c.name: _masked_fits_column(hdu, c) for c in hdu.columns}
                    units = {c.name: (c.unit or None) for c in hdu.columns}
                    axis, au, flux, fu, sigma = _from_table(_ArrayColumns(cols, units), path, spectral_unit, flux_unit)
                else:
                    axis, au, flux, fu, sigma, file_medium = _read_wcs1d(hdul, path, spectral_unit, flux_unit)
                meta = _header_meta(hdul[0].header, hdul[1].header if fmt == "tabular-fits" else None)
    except SpectrumReadError:
        raise
    except Exception as exc:
        raise SpectrumReadError(f"{path}: cannot read as {fmt} ({type(exc).__name__}: {exc})") from exc
    if not au.is_equivalent(u.AA, equivalencies=u.spectral()):
        raise SpectrumReadError(f"{path}: spectral axis unit {au} is not a wavelength, frequency, energy or wavenumber")
    if flux.ndim != 1 or axis.shape != flux.shape:
        raise SpectrumReadError(f"{path}: expected 1-D axis and flux of equal length, got shapes {axis.shape} and {flux.shape}")
    good = np.isfinite(axis) & np.isfinite(flux)
    if sigma is not None:
        good &= np.isfinite(sigma)
    if good.sum() < 3:
        raise SpectrumReadError(f"{path}: fewer than 3 finite pixels ({int(good.sum())} of {axis.size}); nothing to fit")
    fin = np.isfinite(axis)
    d = np.diff(axis if fin.all() else axis[fin])
    del fin
    if not (np.all(d > 0) or np.all(d < 0)):
        raise SpectrumReadError(f"{path}: spectral axis is not strictly monotonic (unsorted or repeated values)")
    med = file_medium if file_medium is not None else medium
    if isinstance(med, str):
        med = {"vac": "vacuum", "air": "air", "vacuum": "vacuum"}.get(med.strip().lower(), med)
    if med not in (None, "air", "vacuum"):
        raise SpectrumReadError(f"{path}: medium must be 'air' or 'vacuum', got {med!r}")
    if not au.is_equivalent(u.m):
        med = "vacuum"
    return SpectrumArrays(axis, au.to_string(), flux, fu.to_string(), sigma, med, meta)


def _read_wcs1d(hdul, path, spectral_unit, flux_unit):
    """A 1-D image spectrum: the axis from its WCS (IRAF's DC-FLAG = 1 for log10 wavelengths, the
    unit from WAT1_001 when CUNIT1 is absent), or from COEFF0/COEFF1 (log10 of the wavelength in
    Angstrom, as SDSS writes it); an image with neither is refused, never read on pixel numbers."""
    from astropy.wcs import WCS

    hdu = hdul[0] if hdul[0].data is not None else (hdul[1] if len(hdul) > 1 else None)
    if hdu is None or hdu.data is None:
        raise SpectrumReadError(f"{path}: no image data in HDU 0 or 1")
    data = np.asarray(hdu.data, dtype=float)
    blank = hdu.header.get("BLANK")
    if blank is not None and np.asarray(hdu.data).dtype.kind in "iu":
        # an unscaled integer image keeps its BLANK pixels as numbers: mask them (FITS Standard 4.0, sec. 4.4.2.5)
        data[np.asarray(hdu.data) == blank] = np.nan
    if data.ndim != 1:
        raise SpectrumReadError(f"{path}: 1-D WCS spectrum must have 1-D data, got shape {data.shape}")
    hdr = hdu.header
    cunit = hdr.get("CUNIT1")
    ctype = str(hdr.get("CTYPE1", ""))
    has_wcs = "CRVAL1" in hdr and ("CDELT1" in hdr or "CD1_1" in hdr)
    if not has_wcs and "COEFF0" in hdr and "COEFF1" in hdr:
        # log10-linear wavelengths in Angstrom by two coefficients (the convention of SDSS spectra)
        axis = 10.0 ** (float(hdr["COEFF0"]) + float(hdr["COEFF1"]) * np.arange(data.size))
        au = _unit(cunit or "Angstrom", "spectral axis", path, spectral_unit)
    elif not has_wcs:
        raise SpectrumReadError(
            f"{path}: the image header gives no spectral axis (no CRVAL1 with CDELT1 or CD1_1, no COEFF0/COEFF1): "
            "pixel numbers are not wavelengths"
        )
    else:
        import warnings

        from astropy.wcs import FITSFixedWarning

        with warnings.catch_warnings():
            # astropy's normalisations of a valid header (OBSGEO-L/B/H derived from OBSGEO-X/Y/Z, dates
            # in the standard form) are no reason to refuse the file
            warnings.simplefilter("ignore", FITSFixedWarning)
            w = WCS(hdr, naxis=1)
        axis = np.asarray(w.pixel_to_world_values(np.arange(data.size)), dtype=float)
        if cunit in (None, "") and "units=angstroms" in str(hdr.get("WAT1_001", "")).lower():
            cunit = "Angstrom"  # the IRAF multispec convention: the unit is in WAT1_001
        au = _unit(cunit, "spectral axis", path, spectral_unit)
        # astropy WCS returns SI values for known CTYPEs
        if w.wcs.cunit[0] and str(w.wcs.cunit[0]) != "":
            au_wcs = u.Unit(str(w.wcs.cunit[0]))
            axis = (axis * au_wcs).to_value(au)
        if int(hdr.get("DC-FLAG", 0) or 0) == 1 and not ctype.upper().endswith("-LOG"):
            axis = 10.0**axis  # IRAF's DC-FLAG = 1: the WCS gives log10 of the wavelength
    fu = _unit(hdr.get("BUNIT"), "flux", path, flux_unit)
    sigma = None
    for ext in hdul[1:]:
        name = (ext.name or "").lower()
        if name in SIGMA_NAMES and ext.data is not None:
            s = np.asarray(ext.data, dtype=float)
            kind = SIGMA_NAMES[name]
            with np.errstate(divide="ignore", invalid="ignore"):
                sigma = np.where(s > 0, 1 / np.sqrt(s), np.nan) if kind == "ivar" else (np.sqrt(s) if kind == "var" else s)
            break
    medium = "air" if ctype.upper().startswith("AWAV") else ("vacuum" if ctype.upper().startswith("WAVE") else hdr.get("MEDIUM"))
    return axis, au, data, fu, sigma, medium


def read_spectrum(path, fmt=None, **kwargs):
    """Read a file into a :class:`specutils.Spectrum` (see :func:`read_arrays`).

    Parameters
    ----------
    path : str or Path
    fmt : str, optional
        One of ``FORMATS`` (default: from :func:`detect_format`).
    **kwargs
        ``spectral_unit``, ``flux_unit``, ``medium``: as in :func:`read_arrays`.

    Returns
    -------
    specutils.Spectrum
        With its uncertainty, a mask for null or NaN pixels, and ``meta["medium"]``.
    """
    return read_arrays(path, fmt, **kwargs).to_spectrum()


class atomic_path:
    """Context manager yielding a temporary path beside ``target``; renamed onto it on success."""

    def __init__(self, target: str | Path):
        self.target = Path(target)

    def __enter__(self) -> Path:
        self.target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.target.name}.", suffix=".tmp" + "".join(self.target.suffixes), dir=self.target.parent)
        os.close(fd)
        os.unlink(tmp)
        self.tmp = Path(tmp)
        return self.tmp

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            os.replace(self.tmp, self.target)
        elif self.tmp.exists():
            self.tmp.unlink()
        return False


def write_spectrum(spectrum, path: str | Path, *, layout: str | None = None, dtype="float32") -> Path:
    """Write a Spectrum atomically: .fits (layout "tabular-fits" default, or "wcs1d-fits" for a linear grid), .ecsv, .csv.

    The wavelength medium (``meta["medium"]``) is kept: keyword MEDIUM (tabular FITS),
    CTYPE1 AWAV/WAVE (1-D WCS), table meta (ECSV); so are the header keywords of
    :data:`META_KEYWORDS` found in ``meta`` (object, time, SPECSYS, target, observatory).

    Parameters
    ----------
    spectrum : specutils.Spectrum
    path : str or Path
        Format from the extension: .fits, .ecsv or .csv.
    layout : {"tabular-fits", "wcs1d-fits"}, optional
        FITS layout (default a binary table).
    dtype : str
        Data type of the stored columns (default float32).

    Returns
    -------
    Path
    """
    from astropy.io import fits
    from astropy.table import Table

    path = Path(path)
    ax = spectrum.spectral_axis
    flux = spectrum.flux
    sig = None
    if spectrum.uncertainty is not None:
        from astropy.nddata import StdDevUncertainty

        sig = spectrum.uncertainty.represent_as(StdDevUncertainty).array
    medium = (spectrum.meta or {}).get("medium")
    kind = {u.m.physical_type: "wavelength"}.get(ax.unit.physical_type, "energy" if ax.unit.is_equivalent(u.J) else "frequency")
    name = path.name.lower()
    with atomic_path(path) as tmp:
        if name.endswith(_FITS_EXT):
            layout = layout or "tabular-fits"
            phdr = fits.Header()
            for k in META_KEYWORDS:
                v = (spectrum.meta or {}).get(k)
                if isinstance(v, (str, int, float)) and not isinstance(v, bool):
                    phdr[k] = v
            if layout == "tabular-fits":
                cols = [
                    fits.Column(name=kind, array=np.asarray(ax.value, dtype="float64"), format="D", unit=ax.unit.to_string("fits")),
                    fits.Column(
                        name="flux",
                        array=np.asarray(flux.value, dtype=dtype),
                        format="E" if dtype == "float32" else "D",
                        unit=flux.unit.to_string("fits"),
                    ),
                ]
                if sig is not None:
                    cols.append(
                        fits.Column(
                            name="uncertainty",
                            array=np.asarray(sig, dtype=dtype),
                            format="E" if dtype == "float32" else "D",
                            unit=flux.unit.to_string("fits"),
                        )
                    )
                tab = fits.BinTableHDU.from_columns(cols)
                if medium:
                    tab.header["MEDIUM"] = medium
                fits.HDUList([fits.PrimaryHDU(header=phdr), tab]).writeto(tmp)
            elif layout == "wcs1d-fits":
                x = np.asarray(ax.value, dtype=float)
                step = np.diff(x)
                if not np.allclose(step, step[0], rtol=1e-9, atol=0):
                    raise ValueError("layout 'wcs1d-fits' needs a linear spectral grid")
                hdr = phdr.copy()
                hdr["CRPIX1"] = 1.0
                hdr["CRVAL1"] = x[0]
                hdr["CDELT1"] = step[0]
                hdr["CUNIT1"] = ax.unit.to_string("fits")
                hdr["CTYPE1"] = (
                    ("AWAV" if medium == "air" else "WAVE") if kind == "wavelength" else ("FREQ" if kind == "frequency" else "ENER")
                )
                hdr["BUNIT"] = flux.unit.to_string("fits")
                hdus = [fits.PrimaryHDU(np.asarray(flux.value, dtype=dtype), header=hdr)]
                if sig is not None:
                    hdus.append(fits.ImageHDU(np.asarray(sig, dtype=dtype), name="UNCERTAINTY"))
                fits.HDUList(hdus).writeto(tmp)
            else:
                raise ValueError(f"layout must be 'tabular-fits' or 'wcs1d-fits', got {layout!r}")
        else:
            t = Table()
            t[kind] = np.asarray(ax.value) * ax.unit
            t["flux"] = np.asarray(flux.value, dtype=dtype) * flux.unit
            if sig is not None:
                t["uncertainty"] = np.asarray(sig, dtype=dtype) * flux.unit
            if medium:
                t.meta["medium"] = medium
            for k in META_KEYWORDS:
                v = (spectrum.meta or {}).get(k)
                if isinstance(v, (str, int, float)) and not isinstance(v, bool):
                    t.meta[k] = v
            if name.endswith(".ecsv"):
                for c in ("flux", "uncertainty"):
                    if c in t.colnames:
                        t[c].info.format = ".6g"
                t.write(tmp, format="ascii.ecsv")
            elif name.endswith(_ASCII_EXT):
                t.write(tmp, format="ascii.csv")
            else:
                raise ValueError(f"cannot write a spectrum to {path.name!r}: use .fits, .ecsv or .csv")
    return path


TABLE_FORMATS = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv", ".fits": "fits", ".parquet": "parquet"}


def write_table(table, path: str | Path) -> Path:
    """Write an astropy Table atomically; format from the extension (.ecsv, .csv, .fits, .parquet).

    Parameters
    ----------
    table : astropy.table.Table
        The table (units and meta are kept where the format can hold them).
    path : str or Path
        Target file; written to a temporary file beside it, then renamed into place. Text of any
        script is kept: in FITS, non-ASCII text columns are stored as UTF-8 bytes.

    Returns
    -------
    Path
        ``path``.
    """
    path = Path(path)
    fmt = TABLE_FORMATS.get(path.suffix.lower())
    if fmt is None:
        raise ValueError(f"result table extension must be one of {sorted(TABLE_FORMATS)}, got {path.suffix!r}")
    if fmt == "fits":
        table = _utf8_text_columns(table)
    import warnings

    with atomic_path(path) as tmp, warnings.catch_warnings():
        # long meta keys (spectra_dir) become HIERARCH cards, which astropy reads back by the same name
        warnings.filterwarnings("ignore", message=".*HIERARCH card will be created")
        table.write(tmp, format=fmt)
    return path


def write_table_blocks(blocks, path: str | Path) -> Path:
    """Write a text table (.ecsv or .csv) given as successive astropy Tables of the same columns.

    The first block brings the header (ECSV: column names, types, units, meta); later blocks add
    only their data lines, formatted by astropy's own writer, so the file is what one
    ``Table.write`` of all rows would give, without all rows in memory at once. Atomic like
    :func:`write_table`.
    """
    import io as _io

    path = Path(path)
    fmt = TABLE_FORMATS.get(path.suffix.lower())
    if fmt not in ("ascii.ecsv", "ascii.csv"):
        raise ValueError(f"block-wise writing is for .ecsv and .csv tables, got {path.suffix!r}")
    sep = " " if fmt == "ascii.ecsv" else ","
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8", newline="") as fh:
        names = None
        for t in blocks:
            if names is None:  # the header (and the first block) by astropy's writer
                buf = _io.StringIO()
                t.write(buf, format=fmt)
                fh.write(buf.getvalue())
                names = t.colnames
                continue
            if t.colnames != names:
                raise ValueError("every block must have the same columns")
            # later blocks: data lines as astropy writes them (calling its writer per block holds memory)
            cols = [np.asarray(t[c]) for c in names]
            for i in range(len(t)):
                fh.write(sep.join(_text_cell(col[i], sep) for col in cols) + "\n")
    return path


def _text_cell(v, sep: str) -> str:
    """One cell of an ECSV/CSV data line: floats in their shortest exact form, text quoted when needed."""
    if isinstance(v, (str, np.str_)):
        v = str(v)
        if v == "" or sep in v or '"' in v or " " in v or "," in v or "\n" in v:
            return '"' + v.replace('"', '""') + '"'
        return v
    if isinstance(v, (float, np.floating)):
        return repr(float(v))
    return str(v)


def _utf8_text_columns(table):
    """FITS text columns are ASCII: non-ASCII text (file names in any script) is stored as UTF-8 bytes.

    astropy reads such a column back as bytes that decode with UTF-8 (``.decode("utf-8")``).
    """
    out = None
    for name in table.colnames:
        col = table[name]
        if col.dtype.kind == "U" and any(not str(v).isascii() for v in col):
            if out is None:
                out = table.copy(copy_data=False)
            out[name] = np.char.encode(np.asarray(col, dtype=str), "utf-8")
            out[name].unit = col.unit
    # header keywords have at most 8 characters (long text continues on CONTINUE cards): known long
    # meta keys get a short name (FITS_META_KEYS); header values are ASCII: non-ASCII text (a
    # directory name) is percent-encoded (urllib.parse.unquote gives it back)
    renamed = {FITS_META_KEYS.get(k, k): v for k, v in table.meta.items()}
    bad = [k for k, v in renamed.items() if isinstance(v, str) and not v.isascii()]
    if bad or renamed.keys() != table.meta.keys():
        from urllib.parse import quote

        if out is None:
            out = table.copy(copy_data=False)
        out.meta = renamed
        for k in bad:
            out.meta[k] = quote(renamed[k], safe="/:._-~ ")
    return table if out is None else out


#: Meta keys written under a short name in FITS headers (keywords have at most 8 characters).
FITS_META_KEYS = {"spectra_dir": "SPECDIR"}


def table_meta(table, key: str, default=None):
    """A meta value of a table read from any format: ``key`` or its FITS name (:data:`FITS_META_KEYS`),
    percent-decoded.

    Parameters
    ----------
    table : astropy.table.Table
    key : str
    default : object
        Returned when the table has neither name.

    Returns
    -------
    object
    """
    from urllib.parse import unquote

    for k in (key, FITS_META_KEYS.get(key, key), FITS_META_KEYS.get(key, key).lower()):
        if k in table.meta:
            v = table.meta[k]
            return unquote(v) if isinstance(v, str) else v
    return default
