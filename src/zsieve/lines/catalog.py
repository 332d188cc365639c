"""Rest-frame line lists and night-sky features.

The bundled lists are ECSV files in the top-level ``linelists/`` directory of the source
tree, shipped inside the installed package as ``zsieve/lines/data/*.ecsv``:

``galaxy_emission``
    narrow emission lines of star-forming galaxies (and the narrow lines of quasars);
``galaxy_absorption``
    absorption lines of passive galaxies;
``quasar``
    broad quasar emission lines with their mean velocity offsets from systemic;
``stellar``
    absorption lines of ordinary stars;
``sky``
    night-sky emission lines and telluric bands in **air** (see :func:`sky_features`).

Every rest wavelength is **vacuum Angstrom** and every row names its source. A line that
behaves differently in two classes (H-alpha narrow in a galaxy, broad in a quasar, in
absorption in a star) has one row per list, so ``width_kms`` and ``kind`` always describe
the class that row is typical of. The extra column ``list`` says which file a row came from.

Examples
--------
>>> tab = load_linelist()
>>> row = tab[(tab["name"] == "[O III] 5008") & (tab["list"] == "galaxy_emission")][0]
>>> round(float(row["wave_vac"]), 2), str(row["group"]), float(row["ratio"])
(5008.24, 'OIII_5008', 2.98)
>>> sky = sky_features()
>>> line = sky[sky["name"] == "[O I] 5577"][0]
>>> round(float(line["wave_lo_vac"]), 2)    # 5577.34 in air
5578.89
"""

from __future__ import annotations

import functools
import logging
import os
from importlib import resources
from pathlib import Path

import numpy as np
from astropy.table import Table, vstack

from ..errors import ZsieveError
from .medium import air_to_vacuum

__all__ = [
    "BUNDLED_LISTS",
    "CLASS_COLUMNS",
    "LINE_COLUMNS",
    "LineListError",
    "bundled_path",
    "load_linelist",
    "sky_features",
]

log = logging.getLogger(__name__)

#: Names of the bundled line lists (without ``.ecsv``), in the order of the default table.
BUNDLED_LISTS = ("galaxy_emission", "galaxy_absorption", "quasar", "stellar")

#: Per-class strength columns, keyed by the class name used across zsieve.
CLASS_COLUMNS = {
    "emission-galaxy": "strength_emission_galaxy",
    "absorption-galaxy": "strength_absorption_galaxy",
    "quasar": "strength_quasar",
    "star": "strength_star",
}

#: Columns of every table :func:`load_linelist` returns (plus ``list``).
LINE_COLUMNS = (
    "name", "species", "wave_vac", "kind", "group", "ratio",
    *CLASS_COLUMNS.values(),
    "width_kms", "qso_offset_kms", "source",
)

_DEFAULTS = {
    "species": "",
    "kind": "emission",
    "group": "",
    "ratio": 1.0,
    "width_kms": 0.0,
    "qso_offset_kms": 0.0,
}
_FLOAT_COLUMNS = ("wave_vac", "ratio", *CLASS_COLUMNS.values(), "width_kms", "qso_offset_kms")
_STRING_COLUMNS = ("name", "species", "kind", "group", "source", "list")


class LineListError(ZsieveError):
    """A line-list file is missing, unreadable or lacks the columns it needs.

    The message starts with the file name, like :class:`zsieve.errors.SpectrumFileError`.
    """

    def __init__(self, path, problem: str):
        self.path = str(path)
        self.problem = str(problem)
        super().__init__(f"{self.path}: {self.problem}")


def _data_dir():
    """The directory (a Traversable) holding the bundled ECSV files."""
    return resources.files("zsieve.lines").joinpath("data")


def bundled_path(name: str) -> Path:
    """Filesystem path of the bundled list ``name`` (e.g. ``"quasar"`` or ``"sky"``).

    Raises
    ------
    LineListError
        If there is no bundled list of that name.
    """
    item = _data_dir().joinpath(f"{name}.ecsv")
    if not item.is_file():
        known = ", ".join((*BUNDLED_LISTS, "sky"))
        raise LineListError(f"{name}.ecsv", f"no bundled line list of that name (known: {known})")
    return Path(str(item))


def _read_table(path) -> Table:
    """Read an ECSV/CSV/TSV/whitespace table, raising :class:`LineListError` on failure."""
    p = Path(path)
    if not p.is_file():
        raise LineListError(p, "line-list file not found")
    suffix = p.suffix.lower()
    fmt = {".ecsv": "ascii.ecsv", ".csv": "ascii.csv", ".tsv": "ascii.tab"}.get(suffix)
    try:
        if fmt is None:
            tab = Table.read(p, format="ascii")
        else:
            tab = Table.read(p, format=fmt)
    except Exception as exc:  # astropy raises many kinds; report one clear sentence
        raise LineListError(p, f"cannot be read as a table ({type(exc).__name__}: {exc})") from None
    return tab


def _normalise(tab: Table, path, list_name: str) -> Table:
    """Check and complete a raw line table; wavelengths end up in vacuum Angstrom."""
    lower = {c.lower(): c for c in tab.colnames}
    if "name" not in lower:
        raise LineListError(path, "line list needs a 'name' column")
    tab = tab.copy()
    for low, orig in lower.items():
        if low != orig and low not in tab.colnames:
            tab.rename_column(orig, low)
    n = len(tab)
    if n == 0:
        raise LineListError(path, "line list has no rows")

    def floats(col):
        try:
            vals = np.asarray(tab[col], dtype=float)
        except (TypeError, ValueError):
            raise LineListError(path, f"column '{col}' is not numeric") from None
        return vals

    if "wave_vac" in tab.colnames:
        wave = floats("wave_vac")
    elif "wave_air" in tab.colnames:
        wave = np.asarray(air_to_vacuum(floats("wave_air")), dtype=float)
    elif "wave" in tab.colnames and ("medium" in tab.colnames or "medium" in tab.meta):
        raw = floats("wave")
        if "medium" in tab.colnames:
            medium = np.char.lower(np.asarray(tab["medium"], dtype=str))
        else:
            medium = np.full(n, str(tab.meta["medium"]).lower())
        bad = ~np.isin(medium, ("air", "vacuum"))
        if bad.any():
            raise LineListError(path, f"medium must be 'air' or 'vacuum' (row {int(np.argmax(bad))})")
        wave = np.where(medium == "air", air_to_vacuum(raw), raw)
    else:
        raise LineListError(
            path, "line list needs a 'wave_vac' column (or 'wave_air', or 'wave' with a 'medium')"
        )
    if not np.all(np.isfinite(wave)) or np.any(wave <= 0):
        raise LineListError(path, "wavelengths must be finite and positive")

    out = Table()
    out["name"] = np.asarray(tab["name"], dtype=str)
    out["species"] = (
        np.asarray(tab["species"], dtype=str) if "species" in tab.colnames else np.full(n, "", dtype="<U1")
    )
    out["wave_vac"] = wave
    out["wave_vac"].unit = "Angstrom"
    kind = (
        np.char.lower(np.asarray(tab["kind"], dtype=str))
        if "kind" in tab.colnames
        else np.full(n, _DEFAULTS["kind"])
    )
    bad = ~np.isin(kind, ("emission", "absorption"))
    if bad.any():
        raise LineListError(path, f"kind must be 'emission' or 'absorption' (row {int(np.argmax(bad))})")
    out["kind"] = kind
    if "group" in tab.colnames:
        grp = np.asarray(tab["group"].filled("") if hasattr(tab["group"], "filled") else tab["group"], dtype=str)
        out["group"] = np.where(np.isin(grp, ("--", "None", "nan")), "", grp)
    else:
        out["group"] = np.full(n, "", dtype="<U1")
    out["ratio"] = floats("ratio") if "ratio" in tab.colnames else np.full(n, _DEFAULTS["ratio"])
    have_any_class = any(c in tab.colnames for c in CLASS_COLUMNS.values())
    for col in CLASS_COLUMNS.values():
        if col in tab.colnames:
            out[col] = floats(col)
        else:
            # a user line with no class strengths is considered typical of every class
            out[col] = np.full(n, 0.0 if have_any_class else 1.0)
    for col in ("width_kms", "qso_offset_kms"):
        out[col] = floats(col) if col in tab.colnames else np.full(n, _DEFAULTS[col])
    out["width_kms"].unit = "km / s"
    out["qso_offset_kms"].unit = "km / s"
    if "source" in tab.colnames:
        out["source"] = np.asarray(tab["source"], dtype=str)
    else:
        out["source"] = np.full(n, f"user list {Path(str(path)).name}")
    out["list"] = np.full(n, list_name)
    out.meta["source_file"] = str(path)
    if "version" in tab.meta:
        out.meta["version"] = str(tab.meta["version"])
    return out


@functools.lru_cache(maxsize=16)
def _load_cached(key: str) -> Table:
    if key == "default":
        parts = [_load_cached(name) for name in BUNDLED_LISTS]
        tab = vstack(parts, metadata_conflicts="silent")
        versions = sorted({p.meta.get("version", "?") for p in parts})
        tab.meta = {"source_file": "bundled: " + ", ".join(BUNDLED_LISTS), "version": "+".join(versions)}
        return tab
    if key in BUNDLED_LISTS:
        path = bundled_path(key)
        return _normalise(_read_table(path), path, key)
    path = Path(key)
    tab = _normalise(_read_table(path), path, path.stem)
    log.info("loaded %d lines from %s", len(tab), path)
    return tab


def load_linelist(name_or_path=None) -> Table:
    """The rest-frame line list as an :class:`astropy.table.Table`.

    Parameters
    ----------
    name_or_path : str or os.PathLike, optional
        ``None`` (or ``"default"``) for all bundled lists together; the name of one bundled
        list (``"galaxy_emission"``, ``"galaxy_absorption"``, ``"quasar"``, ``"stellar"``);
        or the path of a user file (ECSV, CSV, TSV or whitespace-separated with a header).
        A user file needs ``name`` and ``wave_vac`` -- or ``wave_air`` (converted with the
        IAU formula), or ``wave`` plus a ``medium`` column or ECSV meta key. Missing columns
        get defaults: ``kind='emission'``, ``group=''``, ``ratio=1``, ``width_kms=0``
        (narrow), ``qso_offset_kms=0``, ``source='user list <file>'``; if no strength
        column is given at all, the lines count as typical (strength 1) of every class,
        otherwise missing strength columns are 0.

    Returns
    -------
    astropy.table.Table
        Columns :data:`LINE_COLUMNS` plus ``list`` (the file stem each row came from),
        ``wave_vac`` in vacuum Angstrom. A fresh copy: callers may modify it.

    Raises
    ------
    LineListError
        Naming the file, if it is missing, unreadable or lacks the needed columns.

    Examples
    --------
    >>> qso = load_linelist("quasar")
    >>> civ = qso[qso["name"] == "C IV 1549"][0]
    >>> float(civ["wave_vac"]), bool(civ["qso_offset_kms"] < 0)
    (1549.06, True)
    """
    if name_or_path is None:
        key = "default"
    elif isinstance(name_or_path, (str, os.PathLike)):
        key = os.fspath(name_or_path)
        if key not in BUNDLED_LISTS and key != "default":
            path = Path(key).expanduser()
            if not path.exists() and not path.suffix and len(path.parts) == 1:
                known = ", ".join(BUNDLED_LISTS)
                raise LineListError(key, f"neither a bundled line list ({known}) nor an existing file")
            key = str(path.resolve())
    else:
        raise TypeError("name_or_path must be None, a list name or a path")
    return _load_cached(key).copy()


@functools.lru_cache(maxsize=4)
def _sky_cached(path_key: str) -> Table:
    path = Path(path_key)
    raw = _read_table(path)
    need = {"name", "wave_air_lo", "wave_air_hi", "kind"}
    missing = need - set(raw.colnames)
    if missing:
        raise LineListError(path, f"sky list lacks columns {sorted(missing)}")
    lo = np.asarray(air_to_vacuum(np.asarray(raw["wave_air_lo"], dtype=float)), dtype=float)
    hi = np.asarray(air_to_vacuum(np.asarray(raw["wave_air_hi"], dtype=float)), dtype=float)
    kind = np.asarray(raw["kind"], dtype=str)
    if not np.all(np.isin(kind, ("line", "band"))) or np.any(hi < lo):
        raise LineListError(path, "sky list rows need kind 'line' or 'band' and lo <= hi")
    out = Table()
    out["name"] = np.asarray(raw["name"], dtype=str)
    out["wave_lo_vac"] = lo
    out["wave_hi_vac"] = hi
    out["wave_lo_vac"].unit = "Angstrom"
    out["wave_hi_vac"].unit = "Angstrom"
    out["kind"] = kind
    out["strength"] = (
        np.asarray(raw["strength"], dtype=float) if "strength" in raw.colnames else np.ones(len(raw))
    )
    out["source"] = np.asarray(raw["source"], dtype=str) if "source" in raw.colnames else "sky list"
    out["wave_air_lo"] = np.asarray(raw["wave_air_lo"], dtype=float)
    out["wave_air_hi"] = np.asarray(raw["wave_air_hi"], dtype=float)
    out.meta["source_file"] = str(path)
    if "version" in raw.meta:
        out.meta["version"] = str(raw.meta["version"])
    return out


def sky_features(path=None) -> Table:
    """Night-sky emission lines and telluric absorption bands, in vacuum Angstrom.

    Parameters
    ----------
    path : str or os.PathLike, optional
        A sky list of one's own with columns ``name, wave_air_lo, wave_air_hi, kind``
        (``strength``, ``source`` optional); default the bundled ``sky.ecsv``.

    Returns
    -------
    astropy.table.Table
        ``name, wave_lo_vac, wave_hi_vac, kind ('line'|'band'), strength, source`` plus the
        original air values ``wave_air_lo, wave_air_hi``. For a ``'line'`` the two vacuum
        values are equal (the line centre): mask a resolution element either side of it.
    """
    key = str(bundled_path("sky")) if path is None else str(Path(path).expanduser().resolve())
    return _sky_cached(key).copy()
