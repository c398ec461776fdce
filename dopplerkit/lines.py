"""Rest-line catalogue with media and sources, name look-up, and air/vacuum conversion.

Every entry records its value, unit, the medium of a wavelength (``"air"`` or
``"vacuum"``; ``None`` for frequencies and energies, which have no medium) and where the
value comes from. Wavelengths below 2000 Angstrom are always vacuum (IAU convention,
Morton 2000, ApJS 130, 403).

The values are laboratory (rest) values. Where the source is marked "from memory" the
number was recalled, not copied from the source; check it before publishing a
sub-km/s result.

Air <-> vacuum conversion follows :func:`specutils.utils.wcs_utils.air_to_vac` and
``vac_to_air`` (default method Morton 2000, the IAU standard; that formula is evaluated here,
checked against specutils in the tests, so a fresh process need not import specutils). Mixing an air wavelength
with a vacuum spectral axis never happens silently: :func:`rest_value` converts, given
the medium of the axis, or raises when the medium is unknown.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass
from pathlib import Path

import astropy.units as u
import numpy as np

__all__ = [
    "AIR_VACUUM_METHODS",
    "MEDIA",
    "Line",
    "air_to_vacuum",
    "catalogue",
    "get_line",
    "load_lines",
    "normalise_name",
    "register_line",
    "rest_value",
    "vacuum_to_air",
]

#: Allowed media of a wavelength.
MEDIA = {"air": "wavelength measured in standard air", "vacuum": "wavelength in vacuum"}

#: Air/vacuum methods (specutils ``refraction_index``), name -> reference.
AIR_VACUUM_METHODS = {
    "Morton2000": "Morton 2000, ApJS 130, 403 (IAU standard; default)",
    "Ciddor1996": "Ciddor 1996, Appl. Opt. 35, 1566",
    "Edlen1966": "Edlen 1966, Metrologia 2, 71",
    "Edlen1953": "Edlen 1953, JOSA 43, 339",
    "PeckReeder1972": "Peck & Reeder 1972, JOSA 62, 958",
    "Greisen2006": "Greisen et al. 2006, A&A 446, 747",
}

_VACUUM_BELOW = 2000.0  # Angstrom


@dataclass(frozen=True)
class Line:
    """One rest line.

    Attributes
    ----------
    name : str
        Display name, e.g. ``"H-alpha"``.
    value : float
        Rest value in ``unit``.
    unit : str
        Unit of ``value`` (a wavelength, frequency or energy unit).
    medium : {"air", "vacuum"} or None
        Medium of a wavelength value; None for frequencies and energies.
    source : str
        Where the value comes from.
    """

    name: str
    value: float
    unit: str
    medium: str | None
    source: str

    @property
    def quantity(self) -> u.Quantity:
        """The rest value as a Quantity, in its own unit and medium."""
        return self.value * u.Unit(self.unit)

    def rest(self, unit: str | u.UnitBase = "Angstrom", medium: str | None = "vacuum", method: str = "Morton2000") -> u.Quantity:
        """The rest value in ``unit``; wavelengths in ``medium`` (see :func:`rest_value`)."""
        return rest_value(self, unit, medium=medium, method=method)


def normalise_name(name: str) -> str:
    """Case- and punctuation-tolerant key: ``"H-alpha"``, ``"Halpha"``, ``"H alpha"`` -> ``"halpha"``.

    Parameters
    ----------
    name : str

    Returns
    -------
    str
    """
    if not isinstance(name, str):
        raise TypeError(f"line name must be a string, got {type(name).__name__} {name!r}")
    key = name.lower().replace("α", "alpha").replace("β", "beta").replace("γ", "gamma").replace("δ", "delta")
    return re.sub(r"[^a-z0-9]", "", key)


_NIST = "NIST ASD (value from memory)"
_DRAKE = "Drake 1988, Can. J. Phys. 66, 586 (value from memory)"
_JS = "Johnson & Soff 1985, At. Data Nucl. Data Tables 33, 405 (value from memory)"
_BEARDEN = "Bearden 1967, Rev. Mod. Phys. 39, 78 (value from memory)"
_RADIO = "Lovas 2004, J. Phys. Chem. Ref. Data 33, 177 (value from memory)"

_BUILTIN: list[tuple[str, float, str, str | None, str, tuple[str, ...]]] = [
    # optical / UV (name, value, unit, medium, source, aliases)
    ("H-alpha", 6564.614, "Angstrom", "vacuum", _NIST, ("Ha", "Balmer-alpha", "H I 6563")),
    ("H-beta", 4862.683, "Angstrom", "vacuum", _NIST, ("Hb", "H I 4861")),
    ("H-gamma", 4341.684, "Angstrom", "vacuum", _NIST, ("Hg", "H I 4340")),
    ("H-delta", 4102.892, "Angstrom", "vacuum", _NIST, ("Hd", "H I 4102")),
    ("He I 5876", 5875.621, "Angstrom", "air", _NIST, ("HeI 5876", "He I 5875")),
    ("He I 6678", 6678.151, "Angstrom", "air", _NIST, ("HeI 6678",)),
    ("He I 7065", 7065.19, "Angstrom", "air", _NIST, ("HeI 7065",)),
    ("He I 4471", 4471.48, "Angstrom", "air", _NIST, ("HeI 4471",)),
    ("He II 4686", 4685.710, "Angstrom", "air", _NIST, ("HeII 4686",)),
    ("[O III] 5007", 5006.843, "Angstrom", "air", _NIST, ("OIII 5007", "O III 5007")),
    ("[O III] 4959", 4958.911, "Angstrom", "air", _NIST, ("OIII 4959", "O III 4959")),
    ("[N II] 6585", 6583.45, "Angstrom", "air", _NIST, ("NII 6584", "[N II] 6584", "N II 6584")),
    ("[N II] 6550", 6548.05, "Angstrom", "air", _NIST, ("NII 6548", "[N II] 6548", "N II 6548")),
    ("[S II] 6718", 6716.44, "Angstrom", "air", _NIST, ("SII 6716", "[S II] 6716")),
    ("[S II] 6733", 6730.82, "Angstrom", "air", _NIST, ("SII 6731", "[S II] 6731")),
    ("[O I] 6302", 6300.30, "Angstrom", "air", _NIST, ("OI 6300", "[O I] 6300")),
    ("Na I D2", 5889.950, "Angstrom", "air", _NIST, ("NaD2", "Na D2")),
    ("Na I D1", 5895.924, "Angstrom", "air", _NIST, ("NaD1", "Na D1")),
    ("Ca II K", 3933.663, "Angstrom", "air", _NIST, ("CaK", "Ca K")),
    ("Ca II H", 3968.468, "Angstrom", "air", _NIST, ("CaH", "Ca H")),
    ("Mg II 2796", 2796.352, "Angstrom", "vacuum", _NIST, ("MgII 2796",)),
    ("Mg II 2803", 2803.531, "Angstrom", "vacuum", _NIST, ("MgII 2803",)),
    ("C IV 1548", 1548.202, "Angstrom", "vacuum", _NIST, ("CIV 1548",)),
    ("C IV 1551", 1550.774, "Angstrom", "vacuum", _NIST, ("CIV 1551", "C IV 1550")),
    ("Ly-alpha", 1215.670, "Angstrom", "vacuum", _NIST, ("Lya", "Lyman-alpha", "H I 1216")),
    # X-ray (keV)
    ("Fe I K-alpha1", 6.40384, "keV", None, _BEARDEN, ("Fe K-alpha1", "Fe Ka1")),
    ("Fe I K-alpha2", 6.39084, "keV", None, _BEARDEN, ("Fe K-alpha2", "Fe Ka2")),
    ("Fe I K-alpha", 6.400, "keV", None, _BEARDEN + "; blend of K-alpha1 and K-alpha2", ("Fe K-alpha", "Fe Ka", "Fe 6.4")),
    ("Fe XXV He-alpha w", 6.7004, "keV", None, _DRAKE, ("Fe XXV w", "Fe XXV resonance", "Fe XXV He-alpha")),
    ("Fe XXV He-alpha x", 6.6823, "keV", None, _DRAKE, ("Fe XXV x",)),
    ("Fe XXV He-alpha y", 6.6676, "keV", None, _DRAKE, ("Fe XXV y", "Fe XXV intercombination")),
    ("Fe XXV He-alpha z", 6.6366, "keV", None, _DRAKE, ("Fe XXV z", "Fe XXV forbidden")),
    ("Fe XXVI Ly-alpha1", 6.9732, "keV", None, _JS, ("Fe XXVI Lya1",)),
    ("Fe XXVI Ly-alpha2", 6.9520, "keV", None, _JS, ("Fe XXVI Lya2",)),
    ("Fe XXVI Ly-alpha", 6.966, "keV", None, _JS + "; 2:1 weighted doublet", ("Fe XXVI Lya", "Fe XXVI")),
    ("Si XIV Ly-alpha", 2.0055, "keV", None, _JS, ("Si XIV", "Si XIV Lya")),
    ("S XVI Ly-alpha", 2.6227, "keV", None, _JS, ("S XVI", "S XVI Lya")),
    ("O VIII Ly-alpha", 0.65362, "keV", None, _JS, ("O VIII", "O VIII Lya")),
    # radio / mm
    ("H I 21cm", 1420.405751768, "MHz", None, _RADIO, ("HI 21cm", "HI", "21 cm", "H I hyperfine")),
    ("OH 1667", 1667.3590, "MHz", None, _RADIO, ("OH 1667 MHz",)),
    ("H2O 22GHz", 22.235080, "GHz", None, _RADIO, ("H2O maser", "water maser")),
    ("CO 1-0", 115.2712018, "GHz", None, _RADIO, ("CO(1-0)", "12CO 1-0")),
    ("CO 2-1", 230.5380000, "GHz", None, _RADIO, ("CO(2-1)", "12CO 2-1")),
]

_CATALOGUE: dict[str, Line] = {}
_ALIASES: dict[str, str] = {}


def register_line(line: Line, aliases: tuple[str, ...] = (), *, replace: bool = False) -> Line:
    """Add a line (and aliases) to the catalogue used by :func:`get_line`.

    Raises ValueError if the name is taken and ``replace`` is False, or if the entry is
    inconsistent (unknown medium, non-spectral unit, a vacuum-only wavelength marked air).

    Parameters
    ----------
    line : Line
        Name, rest value, unit, medium (wavelengths) and source.
    aliases : tuple of str
        Other names that find it.
    replace : bool
        Replace an existing line of the same name.

    Returns
    -------
    Line
    """
    _validate(line)
    key = normalise_name(line.name)
    if key in _ALIASES and not replace:
        raise ValueError(f"line name {line.name!r} is already in the catalogue; pass replace=True to override")
    _CATALOGUE[key] = line
    _ALIASES[key] = key
    for a in aliases:
        _ALIASES.setdefault(normalise_name(a), key)
    return line


def _validate(line: Line) -> None:
    try:
        unit = u.Unit(line.unit)
    except ValueError as exc:
        raise ValueError(f"line {line.name!r}: unit {line.unit!r} is not a unit astropy knows") from exc
    q = line.value * unit
    if not q.unit.is_equivalent(u.AA, equivalencies=u.spectral()):
        raise ValueError(f"line {line.name!r}: unit {line.unit!r} is not a wavelength, frequency, energy or wavenumber unit")
    if not np.isfinite(line.value) or line.value <= 0:
        raise ValueError(f"line {line.name!r}: value must be a positive finite number, got {line.value!r}")
    is_wav = q.unit.physical_type == "length"
    if is_wav:
        if line.medium not in MEDIA:
            raise ValueError(f"line {line.name!r}: a wavelength needs medium 'air' or 'vacuum', got {line.medium!r}")
        if line.medium == "air" and q.to_value(u.AA) < _VACUUM_BELOW:
            raise ValueError(
                f"line {line.name!r}: wavelengths below {_VACUUM_BELOW:g} Angstrom are vacuum by convention (Morton 2000), got medium 'air'"
            )
    elif line.medium not in (None, "vacuum"):
        raise ValueError(f"line {line.name!r}: a frequency or energy has no air medium, got medium {line.medium!r}")


for _name, _val, _unit, _medium, _src, _aliases in _BUILTIN:
    register_line(Line(_name, _val, _unit, _medium, _src), _aliases)


def get_line(name: str | Line) -> Line:
    """Look a line up by name, tolerant of case and punctuation.

    ``get_line("H-alpha")``, ``get_line("Halpha")`` and ``get_line("h alpha")`` are the same.
    A :class:`Line` is returned unchanged. Unknown names raise KeyError listing near matches.

    Parameters
    ----------
    name : str or Line
        Catalogue name or alias.

    Returns
    -------
    Line

    Raises
    ------
    KeyError
        Unknown name (the message lists near matches).
    """
    if isinstance(name, Line):
        return name
    key = normalise_name(name)
    if key in _ALIASES:
        return _CATALOGUE[_ALIASES[key]]
    import difflib

    near = difflib.get_close_matches(key, list(_ALIASES), n=5, cutoff=0.5)
    near_names = list(dict.fromkeys(_CATALOGUE[_ALIASES[k]].name for k in near))  # closest first
    hint = f"; did you mean {', '.join(repr(n) for n in near_names)}?" if near_names else ""
    raise KeyError(f"no line named {name!r} in the catalogue{hint} (see dopplerkit.lines.catalogue())")


def catalogue():
    """The whole catalogue as an astropy Table (name, value, unit, medium, source)."""
    from astropy.table import Table

    rows = list(_CATALOGUE.values())
    return Table(
        {
            "name": [r.name for r in rows],
            "value": [r.value for r in rows],
            "unit": [r.unit for r in rows],
            "medium": [r.medium or "" for r in rows],
            "source": [r.source for r in rows],
        }
    )


def load_lines(path: str | Path, *, register: bool = True) -> list[Line]:
    """Read user lines from a TOML or ECSV file (and add them to the catalogue).

    TOML::

        [[line]]
        name = "Fe XXV He-beta"
        value = 7.881
        unit = "keV"
        source = "my lab table"

        [[line]]
        name = "Pa-beta"
        value = 12821.6
        unit = "Angstrom"
        medium = "vacuum"
        source = "NIST ASD"

    ECSV: columns ``name``, ``value``, ``unit``, ``medium`` (wavelengths), ``source``.

    Parameters
    ----------
    path : str or Path
        A ``.toml`` or ``.ecsv`` file.
    register : bool
        Also add the lines to the catalogue (:func:`register_line`), so names find them.

    Returns
    -------
    list of Line
    """
    path = Path(path)
    if path.suffix.lower() == ".toml":
        with path.open("rb") as fh:
            data = tomllib.load(fh)
        unknown = set(data) - {"line"}
        if unknown:
            raise ValueError(f"{path}: unknown top-level key(s) {sorted(unknown)}; allowed: 'line' (an array of tables [[line]])")
        entries = data.get("line", [])
    elif path.suffix.lower() == ".ecsv":
        from astropy.table import Table

        t = Table.read(path, format="ascii.ecsv")
        entries = [{k: (row[k].item() if hasattr(row[k], "item") else row[k]) for k in t.colnames} for row in t]
    else:
        raise ValueError(f"{path}: line files must be .toml or .ecsv, got {path.suffix!r}")
    allowed = {"name", "value", "unit", "medium", "source", "aliases"}
    lines = []
    for i, e in enumerate(entries):
        bad = set(e) - allowed
        if bad:
            raise ValueError(f"{path}: line {i}: unknown key(s) {sorted(bad)}; allowed: {sorted(allowed)}")
        for req in ("name", "value", "unit"):
            if req not in e:
                raise ValueError(f"{path}: line {i}: missing required key {req!r}")
        medium = e.get("medium") or None
        line = Line(str(e["name"]), float(e["value"]), str(e["unit"]), medium, str(e.get("source", f"user file {path.name}")))
        _validate(line)
        lines.append(line)
        if register:
            register_line(line, tuple(e.get("aliases", ())), replace=True)
    return lines


def _check_method(method: str) -> str:
    if method not in AIR_VACUUM_METHODS:
        raise ValueError(f"method must be one of {', '.join(repr(m) for m in AIR_VACUUM_METHODS)}; got {method!r}")
    return method


def _morton2000_index(vacuum_aa: np.ndarray) -> np.ndarray:
    """Refractive index of standard air at a vacuum wavelength in Angstrom: Morton 2000, ApJS 130,
    403, eq. 8 (the formula and constants of specutils' ``refraction_index(method="Morton2000")``)."""
    s2 = (1e4 / vacuum_aa) ** 2  # (1 / micrometre)^2
    return 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - s2) + 1.5998e-4 / (38.9 - s2)


# The default method by hand (the formula above): specutils' own functions import specutils,
# gwcs and matplotlib (2-3 s in every fresh process, every batch worker). A test checks these
# two against specutils' vac_to_air and air_to_vac(scheme="iteration") to 1e-12 relative.
def _morton2000_vac_to_air(wavelength: u.Quantity, method: str = "Morton2000") -> u.Quantity:
    aa = wavelength.to_value(u.AA)
    return aa / _morton2000_index(aa) * u.AA


def _morton2000_air_to_vac(wavelength: u.Quantity, method: str = "Morton2000") -> u.Quantity:
    """Iterate lambda_vac = n(lambda_vac) lambda_air (the index is a function of the vacuum wavelength)."""
    air = wavelength.to_value(u.AA)
    vac = air * _morton2000_index(air)
    for _ in range(30):
        new = air * _morton2000_index(vac)
        done = np.all(np.abs(new - vac) <= 1e-15 * np.abs(vac))
        vac = new
        if done:
            break
    return vac * u.AA


def _convert(wavelength, method, fn, **kw) -> u.Quantity:
    """Apply a specutils air/vacuum function above 2000 Angstrom; shorter wavelengths stay as they are."""
    _check_method(method)
    w = u.Quantity(wavelength)
    if not w.unit.is_equivalent(u.AA):
        raise u.UnitsError(f"wavelength must be a length, got unit {w.unit!r}")
    aa = np.atleast_1d(w.to_value(u.AA)).astype(float)
    out = aa.copy()
    ok = aa >= _VACUUM_BELOW
    if ok.any():
        out[ok] = fn(aa[ok] * u.AA, method=method, **kw).to_value(u.AA)
    return (out.reshape(np.shape(w.value)) * u.AA).to(w.unit)


def air_to_vacuum(wavelength: u.Quantity, method: str = "Morton2000") -> u.Quantity:
    """Air wavelength -> vacuum wavelength (specutils; default Morton 2000, ApJS 130, 403).

    Values below 2000 Angstrom are returned unchanged (they are vacuum by convention). The
    iterative scheme makes this the exact inverse of :func:`vacuum_to_air`.

    Parameters
    ----------
    wavelength : Quantity
        Wavelengths in standard air (any length unit).
    method : str
        "Morton2000" (default), "Ciddor1996", "Edlen1966", ... (see ``AIR_VACUUM_METHODS``).

    Returns
    -------
    Quantity
        Vacuum wavelengths, in the unit given.
    """
    if method == "Morton2000":
        return _convert(wavelength, method, _morton2000_air_to_vac)
    from specutils.utils.wcs_utils import air_to_vac

    return _convert(wavelength, method, air_to_vac, scheme="iteration")


def vacuum_to_air(wavelength: u.Quantity, method: str = "Morton2000") -> u.Quantity:
    """Vacuum wavelength -> air wavelength (specutils; default Morton 2000). Below 2000 Angstrom: unchanged.

    Parameters
    ----------
    wavelength : Quantity
        Vacuum wavelengths (any length unit).
    method : str
        As in :func:`air_to_vacuum`.

    Returns
    -------
    Quantity
        Wavelengths in standard air, in the unit given.
    """
    if method == "Morton2000":
        return _convert(wavelength, method, _morton2000_vac_to_air)
    from specutils.utils.wcs_utils import vac_to_air

    return _convert(wavelength, method, vac_to_air)


def rest_value(
    line: str | Line | u.Quantity,
    unit: str | u.UnitBase = "Angstrom",
    *,
    medium: str | None = "vacuum",
    line_medium: str | None = None,
    method: str = "Morton2000",
) -> u.Quantity:
    """Rest value of a line in the unit (and, for wavelengths, the medium) of a spectral axis.

    Parameters
    ----------
    line : str, Line or Quantity
        A catalogue name, a :class:`Line`, or a rest value Quantity (then ``line_medium``
        must say the medium of a wavelength above 2000 Angstrom).
    unit : unit or str
        The spectral axis unit (wavelength, frequency, energy or wavenumber).
    medium : {"air", "vacuum"} or None
        Medium of the spectral axis when it is a wavelength. None means "unknown" and
        raises ValueError for a wavelength axis above 2000 Angstrom: an air value on a vacuum
        axis (0.3 per mil, ~80 km/s in the optical) must never pass silently.
        Frequency and energy axes are vacuum by nature (the conversion goes through the
        vacuum wavelength).
    line_medium : {"air", "vacuum"}, optional
        Medium of a bare Quantity wavelength given as ``line``.
    method : str
        Air/vacuum method, one of :data:`AIR_VACUUM_METHODS` (default Morton2000).

    Returns
    -------
    Quantity
        The rest value in ``unit``.
    """
    unit = u.Unit(unit)
    if not unit.is_equivalent(u.AA, equivalencies=u.spectral()):
        raise u.UnitsError(f"unit must be a spectral unit (wavelength, frequency, energy, wavenumber), got {unit!r}")
    if isinstance(line, u.Quantity):
        if line.unit.physical_type == "length" and line.to_value(u.AA) >= _VACUUM_BELOW:
            if line_medium not in MEDIA:
                raise ValueError(f"line_medium must be 'air' or 'vacuum' for a rest wavelength of {line:.6g}, got {line_medium!r}")
        line = Line(
            f"{line:g}",
            float(line.value),
            line.unit.to_string(),
            line_medium if line.unit.physical_type == "length" else None,
            "user value",
        )
    else:
        line = get_line(line)
    q = line.quantity
    # to vacuum first
    if q.unit.physical_type == "length" and line.medium == "air":
        q = air_to_vacuum(q, method=method)
    if unit.physical_type == "length":
        vac = q.to(unit, equivalencies=u.spectral())
        if vac.to_value(u.AA) < _VACUUM_BELOW or medium == "vacuum":
            return vac
        if medium == "air":
            return vacuum_to_air(vac, method=method).to(unit)
        raise ValueError(
            f"medium of the wavelength axis must be 'air' or 'vacuum' for line {line.name!r} ({vac.to(u.AA):.2f} vacuum), got {medium!r}"
        )
    return q.to(unit, equivalencies=u.spectral())
