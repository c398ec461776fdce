"""Batch fitting of whole directories of spectra, locally or on a Dask cluster.

``dopplerkit batch SPECTRA_DIR --config CONFIG.toml --output RESULTS.ecsv``

* Files are found recursively (``--pattern`` narrows them); the format is detected once per
  directory and extension and passed explicitly to the reader (a file whose layout differs is
  detected on its own).
* Work goes out in chunks (``--chunk-size``, default 100) as file paths and a plain config
  dict; results come back as plain rows. Locally a process pool (``--workers``); with
  ``--scheduler`` an existing Dask distributed cluster.
* Every finished row is appended at once to a journal beside the output
  (``.RESULTS.ecsv.journal.jsonl``, JSON lines), so a crash loses nothing already done;
  at the end the whole table is written atomically (temporary file + rename) and the journal
  removed. ``--resume`` reads the output and/or journal and skips spectra already fitted
  with the same configuration.
* One bad file never stops the batch: it gets a row with ``status = "error"`` and a message.

Safety of inputs and outputs:

* The output is never an input: a path among the spectra, or one the next run's search would
  take for a spectrum, is refused. An existing file that dopplerkit did not write (no
  ``config_hash``/``dopplerkit_version`` columns) is refused unless ``--overwrite``.
* A lock file beside the output (``.RESULTS.ecsv.lock``: pid, host, start time) refuses a
  second run on the same output and names the first; a lock left by a dead process on this
  host is taken over with a message.
* ``--resume`` refits every input whose size or modification time changed since its row was
  made, and refuses a different configuration (it says how to start afresh).
* Local workers are capped at the cores available; a worker that dies (killed, out of memory)
  has its chunk retried once in a fresh pool, then its files get error rows. SIGINT/SIGTERM
  stop the workers and keep the journal (resume with ``--resume``).
* On a Dask cluster tasks are retried once; a scheduler that cannot be reached, is lost, or
  has no worker for ``cluster_timeout`` seconds ends the run with exit code 3, journal kept.

Exit codes: 0 every spectrum fitted and ``ok``; 1 some spectra failed or are ``suspect`` (the
table is still written); 2 nothing could run (bad configuration, missing directory, no spectra,
an output that would destroy data, a locked output); 3 the Dask cluster was lost or had no
worker (journal kept; resume with ``--resume``); 130 interrupted (journal kept).
"""

from __future__ import annotations

import fnmatch
import functools
import hashlib
import json
import logging
import math
import os
import sys
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._version import __version__

__all__ = [
    "EXIT_CLUSTER_LOST",
    "EXIT_INTERRUPTED",
    "EXIT_NOTHING_RAN",
    "EXIT_OK",
    "EXIT_SOME_FAILED",
    "BatchConfig",
    "find_spectra",
    "jet_pair_closed_form",
    "load_config",
    "measure_file",
    "process_chunk",
    "run_batch",
]

#: Progress and diagnostics go to this logger (and its parent "dopplerkit"); the command line
#: shows them on stderr (:func:`log_to`), a library caller configures logging as it likes.
log = logging.getLogger("dopplerkit.batch")


class log_to:
    """Within the block, messages of the "dopplerkit" loggers at ``level`` and above are written to
    ``stream`` as plain lines (what the command line and the demo use)."""

    def __init__(self, stream, level=logging.INFO):
        self.handler = logging.StreamHandler(stream)
        self.handler.setFormatter(logging.Formatter("%(message)s"))
        self.handler.setLevel(level)
        self.level = level

    def __enter__(self):
        self.logger = logging.getLogger("dopplerkit")
        self.old = self.logger.level
        if self.logger.level == logging.NOTSET or self.logger.level > self.level:
            self.logger.setLevel(self.level)
        self.logger.addHandler(self.handler)
        return self

    def __exit__(self, *exc):
        self.logger.removeHandler(self.handler)
        self.logger.setLevel(self.old)
        return False


EXIT_OK = 0
EXIT_SOME_FAILED = 1
EXIT_NOTHING_RAN = 2
EXIT_CLUSTER_LOST = 3
EXIT_INTERRUPTED = 130

SPECTRUM_EXTENSIONS = (".fits", ".fit", ".fts", ".fits.gz", ".ecsv", ".csv", ".txt", ".dat")

_ALLOWED = {
    "line": {"name", "rest", "medium", "components", "label"},
    "kinematics": {"model", "beta_max", "constraints"},
    "spectra": {"medium", "spectral_unit", "flux_unit", "barycentric", "observatory"},
    "fit": {"tie", "kind", "continuum", "continuum_degree", "window", "window_kms", "z_min", "z_max", "exclude"},
    "host": {"lines", "z"},
}
#: Default largest speed: the line search covers the redshifts it allows (override with beta_max or z_min/z_max).
BETA_MAX_DEFAULT = 0.5
MODELS = {"jet-pair": "beta and viewing angle per spectrum from each two-component line", "none": "line shifts only"}


class ConfigError(ValueError):
    """The batch configuration is invalid; the message names the key and the allowed values."""


class ClusterError(RuntimeError):
    """The Dask cluster could not be reached, was lost, or had no worker in time (exit code 3)."""


@dataclass(frozen=True)
class BatchConfig:
    """A validated batch configuration (plain data, safe to send to workers)."""

    lines: tuple
    model: str = "none"
    medium: str | None = None
    spectral_unit: str | None = None
    flux_unit: str | None = None
    tie: bool = False
    kind: str = "emission"
    continuum: str = "auto"
    continuum_degree: int | None = None
    window: float = 6.0
    window_kms: float = 3000.0
    z_min: float = -0.9
    z_max: float = 3.0
    beta_max: float = 0.5
    host_lines: object = "auto"
    host_z: float = 0.0
    constraints: tuple = ()
    #: ranges of the spectral axis left out of every fit: ((low, high), ...) as quantity strings
    exclude: tuple = ()
    #: "auto": axes in the observer's frame (SPECSYS TOPOCENT/GEOCENTR) are moved to the barycentre
    #: from their header; "none": never (such rows are flagged where Earth's motion matters)
    barycentric: str = "auto"
    #: (east longitude deg, latitude deg, height m) for headers without OBSGEO-X/Y/Z, or ()
    observatory: tuple = ()

    def as_dict(self) -> dict:
        """The configuration as a plain dict (what workers receive)."""
        out = {}
        for k, v in self.__dict__.items():
            if k in ("lines", "constraints"):
                out[k] = list(map(dict, v))
            elif k == "exclude":
                if v:  # absent when empty: the hash of earlier configurations stays
                    out[k] = [list(p) for p in v]
            elif k in ("barycentric", "observatory"):
                if v != BatchConfig.__dataclass_fields__[k].default:  # absent when the default: earlier hashes stay
                    out[k] = list(v) if isinstance(v, tuple) else v
            else:
                out[k] = list(v) if isinstance(v, tuple) else v
        return out

    @property
    def hash(self) -> str:
        """Short hash of the canonical configuration (recorded in every row)."""
        return hashlib.sha256(json.dumps(self.as_dict(), sort_keys=True).encode()).hexdigest()[:12]


def _err(msg):
    raise ConfigError(msg)


def _unknown(where, section, keys, allowed):
    """ConfigError for unknown keys, with the nearest allowed key suggested."""
    import difflib

    hints = []
    for k in sorted(keys):
        near = difflib.get_close_matches(str(k), sorted(allowed), n=1)
        hints.append(f"{k!r}" + (f" (did you mean {near[0]!r}?)" if near else ""))
    _err(f"{where}: {section}: unknown key(s) {', '.join(hints)}; allowed: {sorted(allowed)}")


def _number(where, section, key, value, *, lo=None, hi=None, lo_open=False, integer=False):
    """A finite number (never a boolean) from the config, within [lo, hi]; ConfigError naming the key otherwise."""
    kind = "an integer" if integer else "a number"
    if isinstance(value, bool) or not isinstance(value, (int, float)) or (integer and not isinstance(value, int)):
        _err(f"{where}: {section} {key} must be {kind}, got {value!r} ({type(value).__name__})")
    if not math.isfinite(value):
        _err(f"{where}: {section} {key} must be finite, got {value!r}")
    if lo is not None and (value <= lo if lo_open else value < lo):
        _err(f"{where}: {section} {key} must be {'>' if lo_open else '>='} {lo}, got {value!r}")
    if hi is not None and value > hi:
        _err(f"{where}: {section} {key} must be <= {hi}, got {value!r}")
    return value


def load_config(path: str | Path) -> BatchConfig:
    """Read and validate a TOML batch configuration. See the module docs for the keys.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    BatchConfig

    Raises
    ------
    ConfigError
        A missing file, bad TOML, an unknown key (with a suggestion) or a bad value (naming it).
    """
    path = Path(path)
    if not path.is_file():
        _err(f"configuration file {str(path)!r} does not exist")
    try:
        with path.open("rb") as fh:
            data = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        _err(f"{path}: not valid TOML ({exc})")
    return parse_config(data, str(path), base=path.parent)


#: Columns of a per-object constraints table ([kinematics] constraints): what each adds to the fit.
CONSTRAINT_COLUMNS = {
    "object": "matched to the spectrum's file name without its extension (required)",
    "beta_app": "apparent transverse speed in units of c (with beta_app_err)",
    "beta_app_err": "its 1-sigma error",
    "doppler": "a Doppler factor, e.g. from variability (with doppler_err)",
    "doppler_err": "its 1-sigma error",
    "beta_cos_theta_min": "a lower limit on beta cos theta, e.g. from a counter-jet that is not detected",
}


def _constraints_table(path_text, where, base):
    """[kinematics] constraints = "table.ecsv" -> tuple of per-object dicts (sorted by object)."""
    from astropy.table import Table

    path = Path(path_text)
    if not path.is_absolute() and base is not None:
        path = Path(base) / path
    if not path.is_file():
        _err(f"{where}: [kinematics] constraints {str(path_text)!r}: no such file ({str(path)!r})")
    try:
        t = Table.read(path)
    except Exception as exc:
        _err(f"{where}: [kinematics] constraints {str(path)!r} cannot be read as a table ({exc})")
    cols = set(t.colnames)
    if "object" not in cols:
        _err(f"{where}: [kinematics] constraints {str(path)!r} needs an 'object' column; columns: {sorted(cols)}")
    extra = cols - set(CONSTRAINT_COLUMNS)
    if extra:
        _unknown(where, f"[kinematics] constraints table {path.name}", extra, set(CONSTRAINT_COLUMNS))
    for a, b in (("beta_app", "beta_app_err"), ("doppler", "doppler_err")):
        if (a in cols) != (b in cols):
            _err(f"{where}: [kinematics] constraints {str(path)!r}: {a} and {b} go together")
    out, seen = [], set()
    for i, r in enumerate(t):
        name = str(r["object"]).strip()
        if not name or name in seen:
            _err(f"{where}: [kinematics] constraints {str(path)!r} row {i + 1}: object {name!r} is empty or repeated")
        seen.add(name)
        entry = {"object": name}
        for k in CONSTRAINT_COLUMNS:
            if k == "object" or k not in cols or np.ma.is_masked(r[k]):
                continue
            v = float(r[k])
            if not math.isfinite(v) or (k != "beta_cos_theta_min" and v <= 0) or (k == "beta_cos_theta_min" and not -1 < v < 1):
                allowed = "in (-1, 1)" if k == "beta_cos_theta_min" else "> 0"
                _err(f"{where}: [kinematics] constraints {str(path)!r} row {i + 1} ({name}): {k} must be finite and {allowed}, got {v!r}")
            entry[k] = v
        out.append(entry)
    return tuple(tuple(sorted(e.items())) for e in sorted(out, key=lambda e: e["object"]))


def parse_config(data: dict, where: str = "config", base: str | Path | None = None) -> BatchConfig:
    """Validate a configuration given as a dict (the parsed TOML).

    ``base``: the directory that relative paths in the configuration (``[kinematics] constraints``)
    are taken from (the configuration file's; default the current directory).
    """
    unknown = set(data) - set(_ALLOWED)
    if unknown:
        _unknown(where, "sections", unknown, _ALLOWED)
    raw_lines = data.get("line")
    if not raw_lines or not isinstance(raw_lines, list):
        _err(f'{where}: at least one [[line]] table is required, e.g. [[line]] name = "H-alpha" components = 2')
    lines = []
    from .lines import get_line

    for i, ln in enumerate(raw_lines):
        if not isinstance(ln, dict):
            _err(f"{where}: [[line]] {i} must be a table of keys, got {ln!r}")
        bad = set(ln) - _ALLOWED["line"]
        if bad:
            _unknown(where, f"[[line]] {i}", bad, _ALLOWED["line"])
        comps = ln.get("components", 1)
        if not isinstance(comps, int) or isinstance(comps, bool) or not 1 <= comps <= 6:
            _err(f"{where}: [[line]] {i}: components must be an integer 1..6, got {comps!r}")
        if ("name" in ln) == ("rest" in ln):
            _err(f'{where}: [[line]] {i}: give exactly one of name (a catalogue line) or rest (e.g. rest = "6564.61 Angstrom")')
        entry = {"components": comps}
        if "name" in ln:
            try:
                entry["name"] = get_line(str(ln["name"])).name
            except KeyError as exc:
                _err(f"{where}: [[line]] {i}: name {ln['name']!r}: {exc.args[0]}")
        else:
            import astropy.units as u

            try:
                q = u.Quantity(str(ln["rest"]))
            except (TypeError, ValueError) as exc:
                _err(f'{where}: [[line]] {i}: rest {ln["rest"]!r} is not a quantity like "6564.61 Angstrom" ({exc})')
            if not q.unit.is_equivalent(u.AA, equivalencies=u.spectral()):
                _err(f"{where}: [[line]] {i}: rest {ln['rest']!r} must be a wavelength, frequency or energy")
            if not (q.isscalar and np.isfinite(q.value) and q.value > 0):
                _err(f"{where}: [[line]] {i}: rest {ln['rest']!r} must be one positive, finite value")
            med = ln.get("medium")
            if q.unit.physical_type == "length" and med not in ("air", "vacuum"):
                _err(f"{where}: [[line]] {i}: medium must be 'air' or 'vacuum' for a rest wavelength, got {med!r}")
            entry["rest"] = str(ln["rest"])
            entry["medium"] = med
        entry["label"] = str(ln.get("label", entry.get("name", entry.get("rest"))))
        if not slug(entry["label"]):
            _err(f"{where}: [[line]] {i}: label {entry['label']!r} has no letters or digits to name its columns")
        clash = next((other for other in lines if slug(other["label"]) == slug(entry["label"])), None)
        if clash is not None:
            _err(
                f"{where}: [[line]] {i}: label {entry['label']!r} gives the same column names as {clash['label']!r} "
                f"({slug(entry['label'])}_...); give each line its own label"
            )
        lines.append(entry)
    kin = data.get("kinematics", {})
    bad = set(kin) - _ALLOWED["kinematics"]
    if bad:
        _unknown(where, "[kinematics]", bad, _ALLOWED["kinematics"])
    beta_max = _number(where, "[kinematics]", "beta_max", kin.get("beta_max", BETA_MAX_DEFAULT), lo=0, lo_open=True, hi=0.9999)
    model = kin.get("model", "none")
    if model not in MODELS:
        _err(f"{where}: [kinematics] model must be one of {sorted(MODELS)}, got {model!r}")
    if model == "jet-pair" and not any(ln["components"] == 2 for ln in lines):
        _err(f"{where}: [kinematics] model 'jet-pair' needs a line with components = 2 (approaching and receding)")
    constraints = ()
    if "constraints" in kin:
        if model != "jet-pair":
            _err(f"{where}: [kinematics] constraints adds measurements to the jet-pair fit: set model = 'jet-pair'")
        if not isinstance(kin["constraints"], str):
            _err(f"{where}: [kinematics] constraints must be the path of a table (ECSV or CSV), got {kin['constraints']!r}")
        constraints = _constraints_table(kin["constraints"], where, base)
    sp = data.get("spectra", {})
    bad = set(sp) - _ALLOWED["spectra"]
    if bad:
        _unknown(where, "[spectra]", bad, _ALLOWED["spectra"])
    medium = sp.get("medium")
    if medium not in (None, "air", "vacuum"):
        _err(f"{where}: [spectra] medium must be 'air' or 'vacuum', got {medium!r}")
    barycentric = sp.get("barycentric", "auto")
    if barycentric not in ("auto", "none"):
        _err(
            f"{where}: [spectra] barycentric must be 'auto' (axes in the observer's frame, SPECSYS TOPOCENT or GEOCENTR, "
            f"moved to the barycentre from their header) or 'none', got {barycentric!r}"
        )
    observatory = sp.get("observatory", [])
    if not isinstance(observatory, list) or len(observatory) not in (0, 3):
        _err(f"{where}: [spectra] observatory must be [east longitude in deg, latitude in deg, height in m], got {observatory!r}")
    if observatory:
        lon = _number(where, "[spectra]", "observatory longitude", observatory[0], lo=-360, hi=360)
        lat = _number(where, "[spectra]", "observatory latitude", observatory[1], lo=-90, hi=90)
        height = _number(where, "[spectra]", "observatory height", observatory[2], lo=-500, hi=10000)
        observatory = (float(lon), float(lat), float(height))
    for key in ("spectral_unit", "flux_unit"):
        if key in sp:
            import astropy.units as u

            try:
                u.Unit(sp[key])
            except ValueError:
                _err(f"{where}: [spectra] {key} {sp[key]!r} is not a unit astropy knows")
    fit = data.get("fit", {})
    bad = set(fit) - _ALLOWED["fit"]
    if bad:
        _unknown(where, "[fit]", bad, _ALLOWED["fit"])
    kind = fit.get("kind", "emission")
    if kind not in ("emission", "absorption"):
        _err(f"{where}: [fit] kind must be 'emission' or 'absorption', got {kind!r}")
    continuum = fit.get("continuum", "auto")
    if continuum not in ("auto", "polynomial", "powerlaw"):
        _err(f"{where}: [fit] continuum must be 'auto' (chosen per spectrum by BIC), 'polynomial' or 'powerlaw', got {continuum!r}")
    deg = fit.get("continuum_degree")
    if deg is not None:
        deg = _number(where, "[fit]", "continuum_degree", deg, lo=0, hi=3, integer=True)
        if continuum == "powerlaw":
            _err(f"{where}: [fit] continuum_degree applies to a polynomial continuum, not continuum = 'powerlaw'")
    tie = fit.get("tie", False)
    if not isinstance(tie, bool):
        _err(f"{where}: [fit] tie must be true or false, got {tie!r}")
    if tie and len({ln["components"] for ln in lines}) > 1:
        _err(f"{where}: [fit] tie = true needs the same number of components for every line")
    window = float(_number(where, "[fit]", "window", fit.get("window", 6.0), lo=0, lo_open=True))
    window_kms = float(_number(where, "[fit]", "window_kms", fit.get("window_kms", 3000.0), lo=0, lo_open=True))
    host = data.get("host", {})
    if not isinstance(host, dict):
        _err(f"{where}: [host] must be a table with keys lines and z, got {host!r}")
    bad = set(host) - _ALLOWED["host"]
    if bad:
        _unknown(where, "[host]", bad, _ALLOWED["host"])
    host_z = float(_number(where, "[host]", "z", host.get("z", 0.0), lo=-1, lo_open=True))
    host_lines = host.get("lines", "auto")
    if isinstance(host_lines, str) and host_lines in ("auto", "none"):
        pass
    elif isinstance(host_lines, list) and host_lines and all(isinstance(h, str) for h in host_lines):
        for h in host_lines:
            try:
                get_line(h)
            except KeyError as exc:
                _err(f"{where}: [host] lines: {h!r}: {exc.args[0]}")
        host_lines = tuple(get_line(h).name for h in host_lines)
    else:
        _err(f'{where}: [host] lines must be "auto", "none" or a list of catalogue line names, got {host_lines!r}')
    exclude = _exclude_ranges(fit.get("exclude", []), where)
    # default search range: the redshifts a speed up to beta_max can give (head-on to straight away)
    from .kinematics import redshift

    z_lo, z_hi = float(redshift(beta_max, 0.0)), float(redshift(beta_max, 180.0))
    z_lo, z_hi = (1 + z_lo) * (1 + host_z) - 1, (1 + z_hi) * (1 + host_z) - 1  # seen from the host's redshift
    z_min = float(_number(where, "[fit]", "z_min", fit.get("z_min", round(z_lo, 6)), lo=-1, lo_open=True))
    z_max = float(_number(where, "[fit]", "z_max", fit.get("z_max", round(z_hi, 6)), lo=-1, lo_open=True))
    if not z_min < z_max:
        _err(f"{where}: [fit] needs z_min < z_max, got z_min = {z_min!r}, z_max = {z_max!r}")
    return BatchConfig(
        tuple(tuple(sorted(ln.items())) for ln in lines),
        model,
        medium,
        sp.get("spectral_unit"),
        sp.get("flux_unit"),
        tie,
        kind,
        continuum,
        deg,
        window,
        window_kms,
        z_min,
        z_max,
        float(beta_max),
        host_lines,
        host_z,
        constraints,
        exclude,
        barycentric,
        tuple(observatory),
    )


def _exclude_ranges(value, where) -> tuple:
    """``[fit] exclude``: a list of [low, high] pairs of quantity strings ("6540 Angstrom"); checked, kept as text."""
    import astropy.units as u

    example = '[["6540 Angstrom", "6590 Angstrom"], ["7590 Angstrom", "7700 Angstrom"]]'
    if not isinstance(value, list):
        _err(f"{where}: [fit] exclude must be a list of [low, high] ranges, e.g. {example}; got {value!r}")
    out = []
    for pair in value:
        if not (isinstance(pair, list) and len(pair) == 2 and all(isinstance(q, str) for q in pair)):
            _err(f"{where}: [fit] exclude: each range must be [low, high] as quantity strings, e.g. {example}; got {pair!r}")
        try:
            lo, hi = (u.Quantity(q) for q in pair)
            hi.to(lo.unit, equivalencies=u.spectral())
            if not lo.unit.is_equivalent(u.m, equivalencies=u.spectral()):
                raise u.UnitsError(f"{lo.unit} is not a spectral unit")
        except (TypeError, ValueError, u.UnitsError) as exc:
            _err(f"{where}: [fit] exclude: {pair!r} is not a range of wavelengths, frequencies or energies ({exc})")
        if not (np.isfinite(lo.value) and np.isfinite(hi.value)):
            _err(f"{where}: [fit] exclude: {pair!r}: the ends must be finite")
        out.append(tuple(pair))
    return tuple(out)


def _line_dicts(cfg: dict):
    return [dict(ln) for ln in cfg["lines"]]


def slug(text: str) -> str:
    """Column-name form of a line label: "H-alpha" -> "h_alpha"."""
    s = "".join(c.lower() if c.isalnum() else "_" for c in str(text))
    while "__" in s:
        s = s.replace("__", "_")
    return s.strip("_")


# ---------------------------------------------------------------------------
# File discovery
# ---------------------------------------------------------------------------
def find_spectra(directory: str | Path, pattern: str | None = None) -> list[Path]:
    """Every spectrum file under ``directory`` (recursive), sorted; ``pattern`` is a glob on the relative path or name.

    Parameters
    ----------
    directory : str or Path
    pattern : str, optional
        Glob on the path relative to ``directory`` or on the file name (default: every known
        spectrum extension).

    Returns
    -------
    list of Path
    """
    return [Path(p) for p in _walk_spectra(str(directory), pattern)]


def _walk_spectra(directory: str, pattern: str | None = None):
    """The files :func:`find_spectra` finds, as plain strings, in the same order.

    Entries of a directory are taken in name order, descending into a sub-directory where its
    name falls (the order of sorting whole paths part by part); symbolic links to files are
    followed, to directories not; hidden files are skipped. Strings, not Path objects: a run over
    100,000 files keeps ~100 bytes per file instead of ~600.
    """
    root = directory.rstrip(os.sep) or os.sep
    cut = len(root) + 1

    def walk(d):
        try:
            with os.scandir(d) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError:
            return
        for e in entries:
            if e.is_dir(follow_symlinks=False):
                yield from walk(e.path)
            elif not e.name.startswith(".") and e.is_file() and _is_spectrum_name(e.path[cut:].replace(os.sep, "/"), pattern):
                yield e.path

    yield from walk(root)


def _is_spectrum_name(rel: str, pattern: str | None) -> bool:
    """Would the file search take this path (relative to SPECTRA_DIR) for a spectrum?"""
    name = rel.rsplit("/", 1)[-1]
    if pattern is not None:
        return fnmatch.fnmatch(rel, pattern) or fnmatch.fnmatch(name, pattern)
    return name.lower().endswith(SPECTRUM_EXTENSIONS)


def _formats(paths) -> list[str | None]:
    """Format per file, detected once per (directory, extension)."""
    from .io import SpectrumReadError, detect_format

    cache: dict = {}
    fmts = []
    for p in map(Path, paths):
        key = (p.parent, "".join(p.suffixes[-2:]).lower() if p.name.lower().endswith(".gz") else p.suffix.lower())
        if key not in cache:
            try:
                cache[key] = detect_format(p)
            except SpectrumReadError:
                cache[key] = None  # e.g. an empty first file: let each file detect itself
        fmts.append(cache[key])
    return fmts


# ---------------------------------------------------------------------------
# Worker side
# ---------------------------------------------------------------------------
def jet_pair_closed_form(za, zr, ea, er, rho=0.0):
    """beta, beta_err, theta (deg), theta_err (deg) of a jet pair, with first-order error propagation.

    Gamma = (2 + z_a + z_r)/2, cos theta = (z_r - z_a)/(2 Gamma beta) (Margon 1984, ARA&A 22,
    507); the Jacobian of this exactly determined map gives the same errors as the lmfit fit
    of :func:`dopplerkit.fitting.fit_jet_pair` (a test checks it). NaN where unphysical.

    Parameters
    ----------
    za, zr : float
        Redshifts of the approaching and receding jet.
    ea, er : float
        Their 1-sigma errors.
    rho : float
        Correlation coefficient of the two errors (fitted in one spectrum, overlapping lines are
        correlated); 0 treats them as independent.

    Returns
    -------
    tuple of float
        (beta, beta_err, theta_deg, theta_err_deg).
    """
    g = 0.5 * (2.0 + za + zr)
    gm1 = 0.5 * (za + zr)
    if not (gm1 > 0):
        return math.nan, math.nan, math.nan, math.nan
    s = math.sqrt(gm1 * (g + 1.0))  # Gamma beta
    b = s / g
    d = zr - za
    c = d / (2.0 * s)
    if abs(c) > 1:
        return b, math.nan, math.nan, math.nan
    th = math.degrees(math.acos(c))
    db = 1.0 / (2.0 * g**3 * b)
    cov = rho * ea * er
    # var f = f_a^2 e_a^2 + f_r^2 e_r^2 + 2 f_a f_r cov (first order)
    beta_err = abs(db) * math.sqrt(max(ea * ea + er * er + 2 * cov, 0.0))
    dca = -1.0 / (2 * s) - d * g / (4 * s**3)
    dcr = 1.0 / (2 * s) - d * g / (4 * s**3)
    sin_t = math.sqrt(max(1.0 - c * c, 1e-300))
    th_err = math.degrees(math.sqrt(max((dca * ea) ** 2 + (dcr * er) ** 2 + 2 * dca * dcr * cov, 0.0)) / sin_t)
    return b, beta_err, th, th_err


def _host_arg(cfg):
    h = cfg.get("host_lines", "auto")
    return None if h == "none" else h if isinstance(h, str) else list(h)


def _fitters(cfg, unit, medium, cache):
    from .measure import LineFitter

    key = (unit, medium)
    if key not in cache:
        import astropy.units as u

        lines = _line_dicts(cfg)
        objs = []
        for ln in lines:
            objs.append(ln["name"] if "name" in ln else u.Quantity(ln["rest"]))
        z_range = (cfg["z_min"], cfg["z_max"])
        if cfg["tie"]:
            fitters = [
                (
                    lines,
                    LineFitter.for_lines(
                        objs,
                        unit,
                        medium=medium,
                        components=lines[0]["components"],
                        tie=True,
                        kind=cfg["kind"],
                        continuum=cfg["continuum"],
                        continuum_degree=cfg["continuum_degree"],
                        z_range=z_range,
                        window=cfg["window"],
                        window_kms=cfg["window_kms"],
                        host=_host_arg(cfg),
                        host_z=cfg.get("host_z", 0.0),
                    ),
                )
            ]
        else:
            fitters = [
                (
                    [ln],
                    LineFitter.for_lines(
                        [o],
                        unit,
                        medium=medium,
                        components=ln["components"],
                        kind=cfg["kind"],
                        continuum=cfg["continuum"],
                        continuum_degree=cfg["continuum_degree"],
                        z_range=z_range,
                        window=cfg["window"],
                        window_kms=cfg["window_kms"],
                        host=_host_arg(cfg),
                        host_z=cfg.get("host_z", 0.0),
                    ),
                )
                for ln, o in zip(lines, objs, strict=True)
            ]
        for lns, f in fitters:
            f.setup.names = [ln["label"] for ln in lns]  # rows and columns carry the configured labels
        cache[key] = fitters
    return cache[key]


#: Units of the batch table's line columns: centres in each line's catalogue unit (the unit of
#: its configured rest value), FWHM in km/s, integrated fluxes in erg/(s cm2) (photon spectra:
#: ph/(s cm2); spectra in non-physical units: a ``_flux_relative`` column without unit).
ENERGY_FLUX_UNIT = "erg / (s cm2)"
PHOTON_FLUX_UNIT = "ph / (s cm2)"


def _line_units(cfg) -> dict:
    """slug(label) -> unit string of the line's centre columns."""
    import astropy.units as u

    from .lines import get_line

    out = {}
    for ln in _line_dicts(cfg):
        unit = get_line(ln["name"]).unit if "name" in ln else u.Quantity(ln["rest"]).unit.to_string()
        out[slug(ln["label"])] = u.Unit(unit).to_string()
    return out


@functools.lru_cache(maxsize=64)
def _flux_column_for(flux_unit: str, axis_unit: str) -> tuple[str, float]:
    """:func:`_flux_column` for unit strings, remembered (the same pair repeats across a directory)."""
    from .io import _parse_unit

    return _flux_column(_parse_unit(flux_unit) * _parse_unit(axis_unit))


def _flux_column(unit) -> tuple[str, float]:
    """(column suffix, factor) for an integrated line flux in ``unit`` (flux density x axis unit)."""
    import astropy.units as u

    for suffix, target in (("flux", ENERGY_FLUX_UNIT), ("photon_flux", PHOTON_FLUX_UNIT)):
        try:
            return suffix, float(unit.to(u.Unit(target)))
        except u.UnitConversionError:
            continue
    return "flux_relative", 1.0


@functools.lru_cache(maxsize=256)
def _scale(unit, target):
    """Factor from ``unit`` to ``target`` when they are the same kind (None otherwise), remembered."""
    return float(unit.to(target)) if unit.is_equivalent(target) else None


def _centre_in(value: float, err: float, unit, medium, target) -> tuple[float, float, str]:
    """A line centre and its error from the file's axis unit into ``target``; and the medium of the
    result when it is a wavelength ("" otherwise). Lengths to lengths keep the file's medium;
    across kinds an air wavelength is made vacuum first (frequencies and energies are vacuum)."""
    import astropy.units as u

    k = _scale(unit, target)
    if k is not None:
        return value * k, abs(err * k), (medium or "") if target.is_equivalent(u.m) else ""
    q = value * unit
    if unit.is_equivalent(u.m) and medium == "air":
        from .lines import air_to_vacuum

        q = air_to_vacuum(q)
    x = float(q.to_value(target, equivalencies=u.spectral()))
    # wavelength, frequency and energy are proportional or inversely proportional: the relative error carries over
    return x, abs(x) * abs(err / value) if value else math.nan, "vacuum" if target.is_equivalent(u.m) else ""


def _report_unmatched_constraints(cfg, paths) -> None:
    """A constraints row whose object matches no spectrum is never used: say so (a misspelt name
    would otherwise silently drop a measurement from the fit)."""
    names = {dict(e)["object"] for e in cfg.constraints}
    if not names:
        return
    found = {os.path.basename(p).split(".")[0] for p in paths}
    missing = sorted(names - found)
    if missing:
        shown = ", ".join(missing[:10]) + (f" and {len(missing) - 10} more" if len(missing) > 10 else "")
        log.warning(
            f"dopplerkit batch: warning: {len(missing)} object(s) of [kinematics] constraints match no spectrum file name "
            f"(without extension) and are not used: {shown}"
        )


def _object_constraints(cfg, cache, path) -> dict:
    """fit_constraints keywords from the [kinematics] constraints row whose object is this file's name."""
    if not cfg.get("constraints"):
        return {}
    if "_constraints" not in cache:
        cache["_constraints"] = {dict(e)["object"]: dict(e) for e in cfg["constraints"]}
    name = os.path.basename(path).split(".")[0]
    e = cache["_constraints"].get(name)
    if not e:
        return {}
    kw: dict = {}
    if "beta_app" in e:
        kw["apparent_speeds"] = [(e["beta_app"], e["beta_app_err"])]
    if "doppler" in e:
        kw["doppler_factors"] = [(e["doppler"], e["doppler_err"])]
    if "beta_cos_theta_min" in e:
        kw["limits"] = [{"quantity": "beta_cos_theta", "lower": e["beta_cos_theta_min"]}]
    return kw


def _observatory(cfg: dict):
    """``[spectra] observatory`` as an astropy EarthLocation, or None when not given."""
    if not cfg.get("observatory"):
        return None
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    lon, lat, height = cfg["observatory"]
    return EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, height * u.m)


def _barycentric_axis(arr, axis_u, cfg: dict, cache: dict, row: dict):
    """The spectral axis to fit and its frame (SPECSYS): with ``[spectra] barycentric = "auto"`` an
    axis in the observer's frame whose header gives target, time and observatory is moved to the
    barycentre (``row["v_barycentric"]``, km/s); otherwise it stays, and the frame says so."""
    from .spectra import OBSERVER_FRAMES, _frame_axis, barycentric_correction, spectral_frame

    frame = spectral_frame(arr.meta)
    if frame is not None:
        row["frame"] = frame
    if frame not in OBSERVER_FRAMES:
        return arr.axis, frame
    if cfg.get("barycentric", "auto") != "auto":
        row["frame_note"] = "[spectra] barycentric = 'none' keeps the observer's frame"
        return arr.axis, frame
    if "_observatory" not in cache:
        cache["_observatory"] = _observatory(cfg)
    try:
        v = float(barycentric_correction(arr.meta, location=cache["_observatory"]).value)
    except ValueError as exc:
        why = str(exc).replace(", or location=)", "; or [spectra] observatory)")  # the batch's way to give it
        row["frame_note"] = why
        return arr.axis, frame
    row["v_barycentric"] = v
    row["frame"] = f"BARYCENT (from {frame})"
    return _frame_axis(arr.axis, axis_u, arr.medium, v), "BARYCENT"


def _fit_one(path: str, fmt: str | None, cfg: dict, cache: dict) -> dict:
    from .io import SpectrumReadError, detect_format, read_arrays

    try:
        arr = read_arrays(path, fmt, spectral_unit=cfg["spectral_unit"], flux_unit=cfg["flux_unit"], medium=cfg["medium"])
    except SpectrumReadError:
        det = None
        try:
            det = detect_format(path)
        except SpectrumReadError:
            pass
        if det is None or det == fmt:
            raise
        arr = read_arrays(path, det, spectral_unit=cfg["spectral_unit"], flux_unit=cfg["flux_unit"], medium=cfg["medium"])
    if arr.sigma is None:
        raise ValueError("the file has no uncertainty column (uncertainty, error or ivar): line centres need per-pixel errors")
    import astropy.units as u

    from .io import _parse_unit
    from .measure import _check_frame

    axis_u = _parse_unit(arr.axis_unit)  # parsed once per unit string (a cache): this runs for every file
    flux = arr.flux
    if cfg.get("exclude"):
        from .measure import excluded_pixels

        if "_exclude" not in cache:
            cache["_exclude"] = [tuple(u.Quantity(q) for q in pair) for pair in cfg["exclude"]]
        out = excluded_pixels(arr.axis, axis_u, cache["_exclude"])
        if out.any():
            flux = np.where(out, np.nan, arr.flux)  # NaN pixels are left out of the fit
    if axis_u.is_equivalent(u.m) and arr.medium is None:
        raise ValueError(
            "wavelength medium unknown: the file does not say (MEDIUM keyword, CTYPE1 AWAV/WAVE) and [spectra] medium is not set"
        )
    row: dict = {"axis_unit": arr.axis_unit}
    axis, frame = _barycentric_axis(arr, axis_u, cfg, cache, row)
    if "_units" not in cache:
        cache["_units"] = _line_units(cfg)
    canon = cache["_units"]
    flux_col, flux_k = _flux_column_for(arr.flux_unit, arr.axis_unit)
    flags = set()
    notes: list = []
    redchi, pvals, conts, hosts, scales = [], [], [], [], []
    for _lines, fitter in _fitters(cfg, arr.axis_unit, arr.medium, cache):
        rows, info = fitter.measure(axis, flux, arr.sigma)
        _check_frame(rows, frame, info, advice=row.get("frame_note", ""))
        if info.get("host"):
            hosts.append(info["host"])
        redchi.append(info["redchi"])
        pvals.append(info["p_value"])
        conts.append(info["continuum"])
        scales.append(info.get("error_scale", 1.0))
        corr = (info.get("z_corr") or [[]])[0]
        if len(corr) == 2:  # a pair's z errors are correlated when its lines overlap
            for ln in _lines:
                row[f"{slug(ln['label'])}_z_corr"] = float(corr[0][1])
        for r in rows:
            pre = f"{slug(r['line'])}_{r['component']}"
            target = canon.get(slug(r["line"]), arr.axis_unit)
            c, ce, medium = _centre_in(float(r["centre"]), float(r["centre_err"]), axis_u, arr.medium, _parse_unit(target))
            row[f"{pre}_centre"], row[f"{pre}_centre_err"] = c, ce
            if medium:
                row["medium"] = medium
            row[f"{pre}_z"] = float(r["z"])
            row[f"{pre}_z_err"] = float(r["z_err"])
            row[f"{pre}_fwhm"] = float(r["fwhm"])
            row[f"{pre}_{flux_col}"] = float(r["flux"]) * flux_k
            flags.update(r["flags"])
            notes += [n for n in r["notes"] if n not in notes]
    if cfg["model"] == "jet-pair":
        pairs = []
        # the jets move in the host's frame: 1 + z = (1 + z_host)(1 + z_kin) (the observed
        # redshifts in the row stay as measured; the host's redshift is taken as exact)
        hz = 1.0 + float(cfg.get("host_z", 0.0))
        for ln in _line_dicts(cfg):
            if ln["components"] == 2:
                pre = slug(ln["label"])
                za, ea, zr, er = (row[f"{pre}_{c}_{q}"] for c in ("approaching", "receding") for q in ("z", "z_err"))
                rho = row.get(f"{pre}_z_corr", 0.0)
                pairs.append(((1.0 + za) / hz - 1.0, ea / hz, (1.0 + zr) / hz - 1.0, er / hz, rho if np.isfinite(rho) else 0.0))
            if cfg["tie"]:
                break  # tied lines share one pair
        extra = _object_constraints(cfg, cache, path)
        if len(pairs) == 1 and not extra:
            za, ea, zr, er, rho = pairs[0]
            b, be, th, te = jet_pair_closed_form(za, zr, ea, er, rho)
        elif extra:
            import warnings

            from .fitting import fit_constraints

            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # the notes below carry what needs care
                f = fit_constraints(z_pairs=[(p[0], p[2], p[1], p[3], p[4]) for p in pairs], **extra)
            b, be, th, te = f.beta, f.beta_err, f.value("viewing_angle"), f.error("viewing_angle")
            row["constraints"] = ", ".join(k.replace("_", " ") for k in ("apparent_speeds", "doppler_factors", "limits") if extra.get(k))
            notes += [n for n in f.notes if n not in notes and "close to c" not in n]
            if f.p_value < 1e-3:
                flags.add("poor_fit")
        else:
            from .fitting import fit_constraints

            f = fit_constraints(z_pairs=[(p[0], p[2], p[1], p[3], p[4]) for p in pairs])
            b, be, th, te = f.beta, f.beta_err, f.value("viewing_angle"), f.error("viewing_angle")
        if not np.isfinite(b) or not np.isfinite(th):
            flags.add("unphysical_pair")
            notes.append("no equal-speed jet pair gives these redshifts ((1 + z_a)(1 + z_r) < 1, or |cos theta| > 1)")
        elif not (np.isfinite(be) and be > 0 and np.isfinite(te) and te > 0):
            flags.add("no_errors")
            notes.append("the speed or angle has no finite, non-zero uncertainty")
        elif b - 3 * be > cfg.get("beta_max", BETA_MAX_DEFAULT):
            flags.add("beyond_beta_max")
            notes.append(
                f"the pair needs beta = {b:.4f} +- {be:.2g}, above [kinematics] beta_max = {cfg.get('beta_max', BETA_MAX_DEFAULT):g}: "
                "the wrong line configured, or raise beta_max"
            )
        row.update({"beta": b, "beta_err": be, "viewing_angle": th, "viewing_angle_err": te})
    row.pop("frame_note", None)
    row["chi2_reduced"] = float(max(redchi)) if redchi else math.nan
    row["p_value"] = float(min(pvals)) if pvals else math.nan
    row["continuum"] = "; ".join(conts)
    row["error_scale"] = float(max(scales)) if scales else math.nan
    row["host"] = "; ".join(hosts)
    row["flags"] = ",".join(sorted(flags))
    row["status"] = "suspect" if flags else "ok"
    row["message"] = "; ".join(notes) if notes else ("; ".join(sorted(flags)) if flags else "")
    return row


def _barycentric_spectrum(spectrum, c: dict, exclude):
    """As :func:`_barycentric_axis` for a Spectrum: (spectrum to fit, exclude ranges still to apply).
    Excluded ranges are in the frame of the file (a telluric band): applied as a mask before the move."""
    from .measure import excluded_pixels
    from .spectra import OBSERVER_FRAMES, spectral_frame, to_barycentric

    if spectral_frame(spectrum) not in OBSERVER_FRAMES or c.get("barycentric", "auto") != "auto":
        return spectrum, exclude
    try:
        moved = to_barycentric(spectrum, location=_observatory(c))
    except ValueError:
        return spectrum, exclude  # measure_lines flags the components and says why
    if exclude:
        out = excluded_pixels(spectrum.spectral_axis.value, spectrum.spectral_axis.unit, exclude)
        moved.mask = out if moved.mask is None else (np.asarray(moved.mask, bool) | out)
    return moved, None


def measure_file(path: str | Path, config) -> tuple:
    """Read one spectrum and measure it as the batch does: the table behind one batch row.

    For figures and checks of a single row (the population explorer uses it): the lines,
    components, tie, continuum, window, redshift range and host lines of the configuration.

    Parameters
    ----------
    path : str or Path
        A spectrum file (any format the batch reads).
    config : str, Path, dict or BatchConfig
        The batch configuration.

    Returns
    -------
    spectrum : specutils.Spectrum
        The spectrum as fitted: as read (units and medium as the configuration asks), its axis
        moved to the barycentre where the batch does so (``[spectra] barycentric``).
    table : astropy.table.QTable
        The :func:`dopplerkit.measure.measure_lines` table, rows labelled as the batch's columns.
    """
    import astropy.units as u
    from astropy.table import vstack

    from .io import read_spectrum
    from .measure import measure_lines

    cfg = config if isinstance(config, BatchConfig) else parse_config(config) if isinstance(config, dict) else load_config(config)
    c = cfg.as_dict()
    spectrum = read_spectrum(path, spectral_unit=c["spectral_unit"], flux_unit=c["flux_unit"], medium=c["medium"])
    exclude = [tuple(u.Quantity(q) for q in pair) for pair in c.get("exclude", ())] or None
    spectrum, exclude = _barycentric_spectrum(spectrum, c, exclude)
    lines = _line_dicts(c)
    groups = [lines] if c["tie"] else [[ln] for ln in lines]
    tables = []
    for group in groups:
        objs = [ln["name"] if "name" in ln else u.Quantity(ln["rest"]) for ln in group]
        t = measure_lines(
            spectrum,
            objs,
            components=group[0]["components"],
            tie=bool(c["tie"]),
            kind=c["kind"],
            continuum=c["continuum"],
            continuum_degree=c["continuum_degree"],
            z_range=(c["z_min"], c["z_max"]),
            method="fast",
            window=c["window"],
            window_kms=c["window_kms"],
            host=_host_arg(c),
            host_z=c.get("host_z", 0.0),
            exclude=exclude,
        )
        labels = {str(o if isinstance(o, str) else ln.get("label")): ln["label"] for o, ln in zip(objs, group, strict=True)}
        t["label"] = [labels.get(str(x), str(x)) for x in t["line"]]
        tables.append(t)
    return spectrum, (tables[0] if len(tables) == 1 else vstack(tables))


def process_chunk(paths: list[str], fmts: list[str | None], cfg: dict) -> list[dict]:
    """Fit a chunk of files; plain rows out. Never raises for a bad file: it becomes an error row.

    Parameters
    ----------
    paths : list of str
    fmts : list of str or None
        Format of each file (None: detect it).
    cfg : dict
        ``BatchConfig.as_dict()``.

    Returns
    -------
    list of dict
        One row per file (the columns of the result table).
    """

    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        # the fits solve small matrices: threaded BLAS only costs here, and every worker is already one core
        return _process_chunk(paths, fmts, cfg)


def _process_chunk(paths, fmts, cfg):
    import warnings

    cache: dict = {}
    out = []
    for p, fmt in zip(paths, fmts, strict=True):
        t0 = time.perf_counter()
        try:
            digest = _content_hash(p)  # of the bytes about to be fitted (a file changed later is refitted on --resume)
        except OSError:
            digest = ""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                row = _fit_one(p, fmt, cfg, cache)
            row["file"] = p
        except Exception as exc:  # one bad file must not stop the batch
            msg = str(exc).replace("\n", " ")
            row = {"file": p, "status": "error", "message": f"{type(exc).__name__}: {msg}"}
        row["seconds"] = time.perf_counter() - t0
        row["file_hash"] = digest
        out.append(row)
    return out


# ---------------------------------------------------------------------------
# Driver
# ---------------------------------------------------------------------------
def _journal_path(output: Path) -> Path:
    return output.with_name(f".{output.name}.journal.jsonl")


def _read_previous(output: Path, config_hash: str, root: str | None = None) -> dict:
    """Rows already done, from the output table and the journal (journal rows are newer).

    Raises ConfigError when they were made with another configuration.
    """
    rows: dict = {}
    others: set = set()

    def take(d):
        h = d.get("config_hash")
        if h == config_hash:
            rows[d["file"]] = d
        elif h:
            others.add(h)

    if output.exists():
        try:
            from astropy.table import Table

            t = Table.read(output)
            for r in t:
                # an empty text cell comes back masked: it is empty (None), never the masked constant's 0.0
                d = {k: (None if np.ma.is_masked(r[k]) else r[k].item() if hasattr(r[k], "item") else r[k]) for k in t.colnames}
                d = {k: (v.decode("utf-8") if isinstance(v, bytes) else v) for k, v in d.items()}
                if root is not None and isinstance(d.get("file"), str):
                    d["file"] = os.path.join(root, d["file"])  # the table's paths are relative to SPECTRA_DIR
                take(d)
        except Exception as exc:
            log.warning(f"dopplerkit batch: warning: cannot read the existing output {output} for --resume ({exc}); starting over")
    j = _journal_path(output)
    if j.exists():
        with j.open() as fh:
            for line in fh:
                try:
                    d = json.loads(line)
                except json.JSONDecodeError:
                    continue  # a line torn by a crash
                if isinstance(d, dict) and "file" in d:
                    take(d)
    if others:
        raise ConfigError(
            f"--resume: {output} (or its journal) was made with a different configuration (hash {', '.join(sorted(others))}; "
            f"this configuration: {config_hash}); to start afresh run without --resume (the old results are replaced), "
            "or write to another --output"
        )
    return rows


def _stamp(path) -> tuple[int, int]:
    """(size in bytes, modification time in ns) of an input file: what --resume compares."""
    st = os.stat(path)
    return int(st.st_size), int(st.st_mtime_ns)


def _content_hash(path) -> str:
    """Short hash of a file's bytes (BLAKE2b, 64 bits): what --resume compares beside size and time."""
    h = hashlib.blake2b(digest_size=8)
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _still_valid(row: dict, path: Path) -> bool:
    """A previous row can be kept: it finished (not an error) and its input has not changed since
    (same size, modification time and content hash)."""
    if row.get("status") not in ("ok", "suspect"):
        return False
    try:
        size, mtime = _stamp(path)
        if not (int(row.get("file_size", -1)) == size and int(row.get("file_mtime_ns", -1)) == mtime):
            return False
        return bool(row.get("file_hash")) and row.get("file_hash") == _content_hash(path)
    except (OSError, TypeError, ValueError):
        return False


# ---------------------------------------------------------------------------
# Output safety: never write over an input or a file dopplerkit did not write; one run per output
# ---------------------------------------------------------------------------
_OUR_COLUMNS = {"config_hash", "dopplerkit_version"}


def _written_by_us(path: Path) -> bool:
    try:
        from astropy.table import Table

        return _OUR_COLUMNS <= set(Table.read(path).colnames)
    except Exception:
        return False


def _same_file_among(target: Path, paths) -> bool:
    """Is the existing file ``target`` one of ``paths`` (same device and inode, so links count)?"""
    try:
        st = os.stat(target)
    except OSError:
        return False  # does not exist (yet): it cannot be an input
    key = (st.st_dev, st.st_ino)
    for p in paths:
        try:
            s = os.stat(p)
        except OSError:
            continue
        if (s.st_dev, s.st_ino) == key:
            return True
    return False


def _check_output(output: Path, spectra_dir: Path, paths, pattern: str | None, overwrite: bool) -> None:
    """Refuse an output that would destroy data (ConfigError, exit code 2)."""
    target = output.resolve()
    for extra in (_journal_path(output), _lock_path(output)):
        if _same_file_among(extra, paths):
            raise ConfigError(f"--output {str(output)!r}: its journal or lock file {str(extra.resolve())!r} is one of the input spectra")
    if _same_file_among(output, paths):
        raise ConfigError(f"--output {str(output)!r} is one of the input spectra; it would be replaced by the results table")
    root = spectra_dir.resolve()
    if target.is_relative_to(root):
        if _is_spectrum_name(target.relative_to(root).as_posix(), pattern):
            raise ConfigError(
                f"--output {str(output)!r} lies inside SPECTRA_DIR and matches the spectra "
                f"({'--pattern ' + repr(pattern) if pattern else 'by its extension'}): the next run would read the results as a spectrum; "
                "write it elsewhere"
            )
    if output.exists() and not overwrite:
        if output.is_dir():
            raise ConfigError(f"--output {str(output)!r} is a directory; give a file name such as results.ecsv")
        if not _written_by_us(output):
            raise ConfigError(
                f"--output {str(output)!r} exists and is not a dopplerkit results table; refusing to replace it "
                "(pass --overwrite to replace it anyway)"
            )


def _lock_path(output: Path) -> Path:
    return output.with_name(f".{output.name}.lock")


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class _OutputLock:
    """An exclusive lock file beside the output: pid, host and start time of the run holding it."""

    def __init__(self, output: Path, out):
        self.path = _lock_path(output)
        self.output = output
        self.out = out
        self.held = False

    def __enter__(self):
        import socket

        me = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    other = json.loads(self.path.read_text() or "{}")
                except (OSError, json.JSONDecodeError):
                    other = {}
                pid, host = other.get("pid"), other.get("host")
                if host == me["host"] and isinstance(pid, int) and not _pid_alive(pid):
                    log.warning(
                        f"dopplerkit batch: note: taking over the lock of a run that died (pid {pid}, started {other.get('started')})"
                    )
                    self.path.unlink(missing_ok=True)
                    continue
                raise ConfigError(
                    f"another dopplerkit batch run (pid {pid}, host {host}, started {other.get('started')}) is writing {str(self.output)!r}; "
                    f"wait for it or choose another --output (if no such run exists, delete {str(self.path)!r})"
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.held = True
            return self
        raise ConfigError(f"cannot take the lock {str(self.path)!r}")  # pragma: no cover

    def __exit__(self, *exc):
        if self.held:
            self.path.unlink(missing_ok=True)
        return False


_TEXT_COLUMNS = (
    "file",
    "status",
    "message",
    "flags",
    "continuum",
    "host",
    "constraints",
    "axis_unit",
    "medium",
    "frame",
    "file_hash",
    "config_hash",
    "dopplerkit_version",
)
_INT_COLUMNS = ("file_size", "file_mtime_ns")
_FIXED_COLUMNS = ["file", "status", "message"]
_TAIL_COLUMNS = [
    "beta",
    "beta_err",
    "viewing_angle",
    "viewing_angle_err",
    "chi2_reduced",
    "p_value",
    "error_scale",
    "continuum",
    "host",
    "constraints",
    "flags",
    "axis_unit",
    "medium",
    "frame",
    "v_barycentric",
    "seconds",
    "file_size",
    "file_mtime_ns",
    "file_hash",
    "config_hash",
    "dopplerkit_version",
]


def _to_table(rows: list[dict]):
    """The result table of these rows, in this order."""
    return _fill_table(lambda: iter(enumerate(rows)), len(rows))


def _fill_table(source, n: int, keys=None, units=None):
    """Result table of ``n`` rows from ``source()``, an iterable of (position, row) that may repeat a
    position (the last row wins). Without ``keys`` (the column names) two passes over the source
    (columns, then values), so the rows never have to be held in memory together."""
    from astropy.table import Table

    if keys is None:
        keys, found = [], set()
        for _, r in source():
            for k in r:
                if k not in found:
                    found.add(k)
                    keys.append(k)
    seen = set(keys)
    middle = [k for k in keys if k not in _FIXED_COLUMNS and k not in _TAIL_COLUMNS]
    cols = _FIXED_COLUMNS + middle + [k for k in _TAIL_COLUMNS if k in seen]
    data = {}
    for k in cols:
        if k in _TEXT_COLUMNS:
            data[k] = np.full(n, "", dtype=object)
        elif k in _INT_COLUMNS:
            data[k] = np.full(n, -1, dtype=np.int64)
        else:
            data[k] = np.full(n, np.nan)
    for i, r in source():
        for k in cols:
            v = r.get(k)
            if k in _TEXT_COLUMNS:
                data[k][i] = "" if v is None else str(v)
            elif k in _INT_COLUMNS:
                data[k][i] = -1 if v is None else int(v)
            else:
                data[k][i] = np.nan if v is None else float(v)
    for k in _TEXT_COLUMNS:
        if k in data:
            data[k] = data[k].astype(str) if n else np.array([], dtype=str)
    t = Table(data)
    for k, unit in _column_units(t.colnames, units or {}).items():
        t[k].unit = unit
    t.meta["comment"] = [
        "dopplerkit batch results; viewing angles in degrees (0 = moving straight at us); z < 0 is a blueshift; "
        "line centres in each line's catalogue unit (wavelengths in the medium of the medium column), "
        "FWHM in km/s as observed (instrumental broadening not removed), integrated line fluxes in erg/(s cm2) (photon spectra: ph/(s cm2)); "
        "error_scale: the factor line errors were scaled up by for noise correlated between neighbouring pixels (1: none); "
        "<line>_z_corr: the correlation of a pair's two redshift errors (in beta's and the angle's errors); "
        "beta and viewing angle in the host's frame ([host] z divided out of the observed redshifts); "
        "frame: the file's SPECSYS (BARYCENT (from TOPOCENT) where [spectra] barycentric moved the axis by v_barycentric, km/s; "
        "z is then barycentric)"
    ]
    return t


def _column_units(colnames, line_units: dict) -> dict:
    """Column -> unit for the columns that carry one (line centres from ``line_units``: slug -> unit)."""
    out = {}
    fixed = {
        "viewing_angle": "deg",
        "viewing_angle_err": "deg",
        "v_barycentric": "km / s",
        "seconds": "s",
        "file_size": "byte",
        "file_mtime_ns": "ns",
    }
    for k in colnames:
        if k in fixed:
            out[k] = fixed[k]
        elif k.endswith("_fwhm"):
            out[k] = "km / s"
        elif k.endswith("_photon_flux"):
            out[k] = PHOTON_FLUX_UNIT
        elif k.endswith("_flux") and not k.endswith("_flux_relative"):
            out[k] = ENERGY_FLUX_UNIT
        elif k.endswith(("_centre", "_centre_err")):
            for line, unit in line_units.items():
                if k.startswith(line + "_"):
                    out[k] = unit
                    break
    return out


def run_batch(
    spectra_dir,
    config,
    output,
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    resume: bool = False,
    overwrite: bool = False,
    pattern: str | None = None,
    chunk_size: int = 100,
    quiet: bool = False,
    plot: str | None = None,
    plot_fits: str | None = None,
    cluster_timeout: float = 60.0,
    out=None,
) -> tuple[int, object]:
    """Fit every spectrum under ``spectra_dir``; return (exit code, result Table).

    Parameters
    ----------
    spectra_dir : str or Path
        Directory searched recursively for spectra.
    config : str, Path, dict or BatchConfig
        The TOML configuration file (see :func:`load_config`), or the same as a dict.
    output : str or Path
        Result table; format from the extension (.ecsv, .csv, .fits, .parquet). Never an input
        file; an existing file dopplerkit did not write is replaced only with ``overwrite``.
    workers : int, optional
        Local worker processes (default and maximum: the cores available to this process).
    scheduler : str, optional
        Address of a running Dask scheduler; the work goes there instead.
    resume : bool
        Keep rows of a previous run with the same configuration whose input is unchanged.
    overwrite : bool
        Replace an existing output file that dopplerkit did not write.
    pattern : str, optional
        Glob on the relative path or file name (default: every known spectrum extension).
    chunk_size : int
        Spectra per task.
    quiet : bool
        No progress bar or summary line.
    plot : str, optional
        Also write the population figure to this path.
    plot_fits : str, optional
        Also draw every ``suspect`` row's spectrum with its fit and residuals
        (:func:`measure_file`, :func:`dopplerkit.plotting.plot_line_fit`), one PNG per spectrum
        in this directory (created if missing), named after the spectrum's path under SPECTRA_DIR.
    cluster_timeout : float
        Seconds to wait for a Dask scheduler and for at least one worker (exit code 3 after).
    out : file, optional
        Where progress and messages go (default stderr).

    Returns
    -------
    code : int
        0 all ``ok``; 1 some ``error`` or ``suspect`` (table written); 3 cluster lost; 130 interrupted.
    table : astropy.table.Table or None
        The results, in input order (None when the run did not finish).

    Raises
    ------
    ConfigError
        Nothing could run: bad configuration or arguments, no spectra, an unsafe output, a locked output.
    """
    out = out or sys.stderr
    d = Path(spectra_dir)
    if not d.is_dir():
        raise ConfigError(f"SPECTRA_DIR {str(d)!r} is not a directory")
    if isinstance(config, BatchConfig):
        cfg = config
    elif isinstance(config, dict):
        cfg = parse_config(config)
    else:
        cfg = load_config(config)
    output = Path(output)
    from .io import TABLE_FORMATS

    if output.suffix.lower() not in TABLE_FORMATS:
        raise ConfigError(f"--output extension must be one of {sorted(TABLE_FORMATS)}, got {output.suffix!r}")
    if output.suffix.lower() == ".parquet":
        try:
            import pyarrow  # noqa: F401
        except ImportError:
            raise ConfigError("--output .parquet needs the pyarrow package (pip install pyarrow); or use .ecsv, .csv or .fits") from None
    if chunk_size < 1:
        raise ConfigError(f"--chunk-size must be >= 1, got {chunk_size}")
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers must be >= 1, got {workers}")
    if not cluster_timeout > 0:
        raise ConfigError(f"--cluster-timeout must be > 0 seconds, got {cluster_timeout}")
    paths = list(_walk_spectra(str(d), pattern))  # strings: the per-file bookkeeping stays small
    if not paths:
        raise ConfigError(
            f"no spectra found under {str(d)!r}"
            + (f" matching {pattern!r}" if pattern else f" (extensions {', '.join(SPECTRUM_EXTENSIONS)})")
        )
    _check_output(output, d, paths, pattern, overwrite)
    _report_unmatched_constraints(cfg, paths)
    if not output.parent.exists():
        output.parent.mkdir(parents=True)
        if not quiet:
            log.info(f"dopplerkit batch: created the output directory {output.parent}")
    with _OutputLock(output, out):
        code, table = _run_locked(cfg, output, d, paths, workers, scheduler, resume, chunk_size, quiet, plot, cluster_timeout, out)
    if plot_fits and code in (EXIT_OK, EXIT_SOME_FAILED):
        _plot_fits(table if table is not None else output, cfg, d, Path(plot_fits), quiet, out)
    return code, table


def _plot_fits(table, cfg, spectra_dir: Path, directory: Path, quiet: bool, out) -> int:
    """One figure per suspect row (the spectrum measured again as the batch did, with its fit); returns the count drawn."""
    import warnings

    from astropy.table import Table
    from matplotlib.figure import Figure

    from .io import atomic_path
    from .plotting import plot_line_fit

    if not isinstance(table, Table):
        table = Table.read(table)
    directory.mkdir(parents=True, exist_ok=True)
    n = 0
    for r in table[np.asarray(table["status"]) == "suspect"]:
        rel = str(r["file"])
        path = Path(rel) if os.path.isabs(rel) else spectra_dir / rel
        target = directory / (slug(rel.rsplit(".", 1)[0]) + ".png")
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                spectrum, m = measure_file(path, cfg)
                fig = plot_line_fit(spectrum, m, fig=Figure(figsize=(8.0, 4.6), layout="constrained"))
            import textwrap

            why = textwrap.shorten(str(r["message"]), 330, placeholder=" ...")
            fig.suptitle("\n".join(textwrap.wrap(f"{rel}: suspect: {why}", 120)), fontsize=8, ha="left", x=0.01)
            with atomic_path(target) as tmp:
                fig.savefig(tmp, dpi=120, format="png")
            n += 1
        except Exception as exc:  # one figure that cannot be drawn never stops the others
            log.warning(f"dopplerkit batch: warning: no figure for {rel}: {type(exc).__name__}: {exc}")
    if not quiet:
        log.info(f"{n} figures of suspect rows in {directory}")
    return n


def _root(spectra_dir) -> str:
    """SPECTRA_DIR as the file search spells it: every input path is this, a separator, its relative path."""
    return str(spectra_dir).rstrip(os.sep) or os.sep


def _run_locked(cfg, output, spectra_dir, paths, workers, scheduler, resume, chunk_size, quiet, plot, cluster_timeout, out):

    h = cfg.hash
    root = _root(spectra_dir)
    previous = _read_previous(output, h, root) if resume else {}
    journal = _journal_path(output)
    if not resume and journal.exists():
        journal.unlink()  # ours (the lock is held): a fresh run starts a fresh journal
    keep = {p: previous[p] for p in paths if p in previous and _still_valid(previous[p], p)}
    todo = [p for p in paths if p not in keep]
    fmts = _formats(todo)
    cfgd = cfg.as_dict()
    chunks = [(todo[i : i + chunk_size], fmts[i : i + chunk_size]) for i in range(0, len(todo), chunk_size)]
    t_start = time.perf_counter()
    n_new = 0
    pool = None
    if chunks and not scheduler:
        workers = _worker_count(workers, len(chunks), out, quiet)
        if workers > 1:
            pool = _make_pool(workers)  # before the progress bar starts its thread: the workers fork from a one-thread process
    bar = None
    if not quiet:
        from tqdm.auto import tqdm

        bar = tqdm(total=len(paths), initial=len(keep), unit="spectrum", desc="fitting", file=out, dynamic_ncols=True)
    code = None
    try:
        if journal.exists() and journal.stat().st_size:
            with journal.open("rb") as fh:
                fh.seek(-1, os.SEEK_END)
                torn = fh.read(1) != b"\n"
            if torn:  # a line torn by a crash: end it, so the next row starts a line of its own
                with journal.open("a") as fh:
                    fh.write("\n")
        with journal.open("a") as jf:

            def record(chunk_rows):
                nonlocal n_new
                for r in chunk_rows:
                    # size and time now, beside the hash of the bytes fitted: a file changed meanwhile is refitted on --resume
                    try:
                        r["file_size"], r["file_mtime_ns"] = _stamp(r["file"])
                    except OSError:
                        r["file_size"], r["file_mtime_ns"] = -1, -1
                    r["config_hash"] = h
                    r["dopplerkit_version"] = __version__
                    jf.write(json.dumps(r, default=float, allow_nan=True) + "\n")
                jf.flush()
                os.fsync(jf.fileno())
                n_new += len(chunk_rows)
                if bar is not None:
                    bar.update(len(chunk_rows))

            if chunks:
                with _stop_on_sigterm():
                    if scheduler:
                        _run_dask(scheduler, chunks, cfgd, record, cluster_timeout)
                    else:
                        _run_local(workers, chunks, cfgd, record, out, quiet, pool)
    except ClusterError as exc:
        code = EXIT_CLUSTER_LOST
        log.error(f"dopplerkit batch: error: {exc}; {n_new} new results kept in {journal}; run again with --resume")
    except KeyboardInterrupt:
        code = EXIT_INTERRUPTED
        log.warning(f"dopplerkit batch: interrupted; {n_new} new results kept in {journal}; run again with --resume")
    finally:
        if bar is not None:
            bar.close()
    if code is not None:
        return code, None
    table, counts = _write_results(journal, paths, keep, h, output, _line_units(cfg.as_dict()), root)
    journal.unlink(missing_ok=True)
    n_ok, n_err = counts.get("ok", 0), counts.get("error", 0)
    n_rows = sum(counts.values())
    n_sus = n_rows - n_ok - n_err
    elapsed = time.perf_counter() - t_start
    if plot:
        from astropy.table import Table

        from .plotting import plot_population

        plot_population(table if table is not None else Table.read(output), path=plot)
    if not quiet:
        rate = n_new / elapsed if elapsed > 0 else float("nan")
        log.info(
            f"ok {n_ok}, suspect {n_sus}, failed {n_err}, of {len(paths)} spectra ({len(keep)} kept from before); "
            f"elapsed {elapsed:.1f} s, {rate:.1f} spectra/s; results in {output}"
        )
    return (EXIT_OK if n_ok == n_rows else EXIT_SOME_FAILED), table


#: Text result tables (.ecsv, .csv) with more rows than this are written in blocks of this many
#: rows, so memory does not grow with the number of spectra; run_batch then returns no table.
STREAM_ROWS = 20000


def _write_results(journal: Path, paths, keep: dict, config_hash: str, output: Path, units=None, root: str | None = None):
    """Write the result table in input order: rows kept from before, this run's rows from the journal.

    One pass over the journal notes where each file's last row starts; rows are then read back
    in input order, block by block. Returns (the table, or None when streamed; counts by status).
    """
    from collections import Counter

    from .io import write_table, write_table_blocks

    files = paths  # every input has a row by now (a fit, an error, a dead worker's note)
    position = {f: i for i, f in enumerate(files)}
    n = len(files)
    offsets = np.full(n, -1, dtype=np.int64)
    keys: list = []
    seen: set = set()

    def note_keys(r):
        for k in r:
            if k not in seen:
                seen.add(k)
                keys.append(k)

    for f, r in keep.items():
        if f in position:
            note_keys(r)
    if journal.exists():
        with journal.open("rb") as fh:
            while True:
                off = fh.tell()
                line = fh.readline()
                if not line:
                    break
                try:
                    r = json.loads(line)
                except (json.JSONDecodeError, UnicodeDecodeError):
                    continue
                if isinstance(r, dict) and r.get("config_hash") == config_hash and r.get("file") in position:
                    offsets[position[r["file"]]] = off
                    note_keys(r)

    cut = len(root) + 1 if root is not None else 0

    def rel(f):  # the path below SPECTRA_DIR (the table says where that is, in meta["spectra_dir"])
        return f[cut:] if cut and f.startswith(root + os.sep) else f

    def rows(a, b):
        with journal.open("rb") if journal.exists() else open(os.devnull, "rb") as fh:
            for i in range(a, b):
                if offsets[i] >= 0:
                    fh.seek(int(offsets[i]))
                    r = json.loads(fh.readline())
                elif files[i] in keep:
                    r = dict(keep[files[i]])
                else:  # pragma: no cover - every finished run records a row per input
                    r = {"status": "error", "message": "no result was recorded for this file"}
                r["file"] = rel(files[i])
                yield i - a, r

    meta = {"spectra_dir": os.path.abspath(root)} if root is not None else {}

    counts: Counter = Counter()
    if output.suffix.lower() in (".ecsv", ".csv") and n > STREAM_ROWS:

        def blocks():
            for a in range(0, n, STREAM_ROWS):
                b = min(a + STREAM_ROWS, n)
                t = _fill_table(lambda a=a, b=b: rows(a, b), b - a, keys, units)
                t.meta.update(meta)
                counts.update(str(v) for v in t["status"])
                yield t

        write_table_blocks(blocks(), output)
        return None, counts
    table = _fill_table(lambda: rows(0, n), n, keys, units)
    table.meta.update(meta)
    counts.update(str(v) for v in table["status"])
    write_table(table, output)
    return table, counts


class _stop_on_sigterm:
    """Within the block, SIGTERM behaves like Ctrl-C (KeyboardInterrupt), so workers are stopped and the journal kept."""

    def __enter__(self):
        import signal
        import threading

        self.old = None
        if threading.current_thread() is threading.main_thread():
            self.old = signal.signal(signal.SIGTERM, self._raise)
        return self

    @staticmethod
    def _raise(signum, frame):
        raise KeyboardInterrupt

    def __exit__(self, *exc):
        import signal

        if self.old is not None:
            signal.signal(signal.SIGTERM, self.old)
        return False


def _available_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


def _dead_worker_rows(paths, reason):
    return [{"file": p, "status": "error", "message": reason, "seconds": math.nan} for p in paths]


def _worker_count(workers, n_chunks, out, quiet) -> int:
    """Requested workers, capped at the cores available (with a note) and at the number of chunks."""
    cores = _available_cores()
    n = workers or cores
    if n > cores:
        if not quiet:
            log.info(f"dopplerkit batch: note: --workers {n} capped at the {cores} cores available")
        n = cores
    return max(1, min(n, n_chunks))


#: What a worker imports for its first spectrum (read, measure, host-line refinement and polish),
#: imported before the workers start (:func:`_make_pool`).
_WORKER_MODULES = (
    "dopplerkit.batch",
    "dopplerkit.measure",
    "dopplerkit.io",
    "dopplerkit.spectra",  # the frame of the axis (SPECSYS) is read for every file
    "dopplerkit.lines",
    "astropy.io.fits",
    "astropy.io.misc.yaml",  # ECSV headers
    "astropy.table",
    "astropy.coordinates",
    "astropy.time",
    "scipy.ndimage",
    "scipy.special",
    "scipy.optimize",
    "threadpoolctl",
)


def _make_pool(n: int):
    """A process pool whose workers are already running.

    Forked from this process when it runs a single thread (nothing can hold a lock across the fork,
    and forking inherits every imported module at no cost); otherwise (threads running, a retry) a
    fork server (spawn where there is none). With fork or a fork server the modules a worker needs
    for its first spectrum are imported once, before the workers start (:data:`_WORKER_MODULES`): imported in each worker they cost every
    worker ~0.3-0.5 s of every run, and with fork this process keeps them for its next run.
    """
    import multiprocessing as mp
    import threading
    from concurrent.futures import ProcessPoolExecutor

    if "fork" in mp.get_all_start_methods() and threading.active_count() == 1:
        import importlib

        for name in _WORKER_MODULES:
            importlib.import_module(name)  # here, once: every forked worker inherits them
        ctx = mp.get_context("fork")
    else:
        method = "forkserver" if "forkserver" in mp.get_all_start_methods() else "spawn"
        ctx = mp.get_context(method)
        if method == "forkserver":
            ctx.set_forkserver_preload(list(_WORKER_MODULES))  # imported once in the server, inherited by every worker
    ex = ProcessPoolExecutor(max_workers=n, mp_context=ctx)
    ex.submit(int).result()  # launches the workers now (with fork: all of them, before the pool's own thread starts)
    return ex


def _run_local(workers, chunks, cfgd, record, out=sys.stderr, quiet=False, pool=None):
    n = workers if pool is not None else _worker_count(workers, len(chunks), out, quiet)
    if n == 1 and pool is None:
        for paths, fmts in chunks:
            record(process_chunk(paths, fmts, cfgd))
        return
    pending = list(chunks)
    for attempt in (1, 2):
        pending = _pool_pass(pool if attempt == 1 and pool is not None else _make_pool(n), pending, cfgd, record)
        if not pending:
            return
        if attempt == 1 and not quiet:
            log.warning(f"dopplerkit batch: note: a worker process died; retrying {len(pending)} chunk(s) once in a fresh pool")
    for paths, _fmts in pending:
        record(_dead_worker_rows(paths, "WorkerDied: the worker process fitting this file died twice (killed, or out of memory)"))


def _pool_pass(ex, chunks, cfgd, record):
    """Run chunks in a process pool; return the chunks whose worker died (BrokenProcessPool)."""
    from concurrent.futures import FIRST_COMPLETED, wait
    from concurrent.futures.process import BrokenProcessPool

    failed = []
    todo = iter(chunks)
    in_flight = max(2, 2 * getattr(ex, "_max_workers", 2))  # a few chunks queued per worker; results never pile up
    try:
        futs = {}
        for p, f in todo:
            futs[ex.submit(process_chunk, p, f, cfgd)] = (p, f)
            if len(futs) >= in_flight:
                break
        while futs:
            finished, _ = wait(futs, return_when=FIRST_COMPLETED)
            for fut in finished:
                job = futs.pop(fut)
                try:
                    res = fut.result()
                except BrokenProcessPool:
                    failed.append(job)
                    continue
                record(res)
            for p, f in todo:
                try:
                    futs[ex.submit(process_chunk, p, f, cfgd)] = (p, f)
                except BrokenProcessPool:
                    failed.append((p, f))
                    continue
                if len(futs) >= in_flight:
                    break
    except BaseException:
        _kill_pool(ex)
        raise
    ex.shutdown(wait=True, cancel_futures=True)
    return failed


def _kill_pool(ex):
    """Stop a process pool at once (Ctrl-C, SIGTERM): no worker outlives the command."""
    procs = list(getattr(ex, "_processes", {}).values())
    ex.shutdown(wait=False, cancel_futures=True)
    for p in procs:
        try:
            p.terminate()
        except Exception:  # pragma: no cover
            pass
    for p in procs:
        p.join(timeout=5)


def _run_dask(address, chunks, cfgd, record, timeout=60.0):
    try:
        from dask.distributed import Client, as_completed
    except ImportError as exc:  # pragma: no cover
        raise ConfigError("--scheduler needs dask[distributed]: pip install 'dopplerkit[cluster]'") from exc
    try:
        client = Client(address, timeout=f"{timeout}s")
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"cannot reach the Dask scheduler at {address} within {timeout:g} s ({type(exc).__name__})") from None
    try:
        try:
            client.wait_for_workers(1, timeout=timeout)
        except (TimeoutError, OSError) as exc:
            raise ClusterError(f"the Dask scheduler at {address} had no worker for {timeout:g} s ({type(exc).__name__})") from None
        futs = [client.submit(process_chunk, p, f, cfgd, pure=False, retries=1) for p, f in chunks]
        done = as_completed(futs)
        del futs  # each result is released once recorded: neither the client nor the workers keep them
        try:
            for fut in done:
                record(fut.result())
                fut.release()
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"lost the Dask scheduler at {address} ({type(exc).__name__}: {exc})") from None
        except Exception as exc:
            if type(exc).__name__ in ("CommClosedError", "CancelledError", "FutureCancelledError"):
                raise ClusterError(f"lost the Dask scheduler at {address} ({type(exc).__name__})") from None
            raise
    finally:
        try:
            client.close(timeout=5)
        except Exception:  # pragma: no cover
            pass


def run_batch_cli(args) -> int:
    """Entry from :mod:`dopplerkit.cli`."""
    try:
        with log_to(sys.stderr):
            code, _ = run_batch(
                args.spectra_dir,
                args.config,
                args.output,
                workers=args.workers,
                scheduler=args.scheduler,
                resume=args.resume,
                overwrite=args.overwrite,
                pattern=args.pattern,
                cluster_timeout=args.cluster_timeout,
                chunk_size=args.chunk_size,
                quiet=args.quiet,
                plot=args.plot,
                plot_fits=args.plot_fits,
            )
    except ConfigError as exc:
        print(f"dopplerkit batch: error: {exc}", file=sys.stderr)
        return EXIT_NOTHING_RAN
    except KeyboardInterrupt:
        print("dopplerkit batch: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    return code
