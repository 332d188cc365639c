"""Text spectra: CSV, TSV, ECSV and whitespace-separated .txt/.dat files.

- **ECSV** (astropy's Enhanced CSV, ``# %ECSV`` first line): read with astropy.table; units
  come from the column units, facts about the observation from the table meta (the same
  keywords as a FITS header: OBJECT, RA, DEC, MJD-OBS, AIRORVAC/MEDIUM, ...).
- **CSV / TSV / whitespace**: a header row names the columns (the vocabulary of
  :mod:`zsieve.io.names`); a unit may follow the name in brackets or parentheses
  (``wavelength[nm]``, ``wave (um)``) or as a suffix (``wave_nm``, ``lambda_A``). The header
  row may itself be the last ``#`` comment line (common practice). Earlier comment lines of
  the form ``# key: value`` or ``# KEY = value`` are read as header cards, so ``# medium:
  air`` or ``# OBJECT = CDX-0042`` work. A file with no header row at all is read as
  wavelength, flux[, 1-sigma] columns. The delimiter is ``,`` for .csv, tab for .tsv, and
  otherwise whichever of tab, comma or whitespace the header row uses.
- A wavelength column without a unit uses the caller's ``wave_unit`` or else Angstrom, and
  the unit sanity rule of :mod:`zsieve.io.units` applies.

Numbers are parsed by numpy in C (``numpy.loadtxt``), never by a Python loop over rows.
Text bigger than :data:`MAX_TEXT_BYTES` is refused before it is read.
"""

from __future__ import annotations

import io
import logging
import os
import re
import warnings

import numpy as np

from ..errors import LimitExceededError, SpectrumFileError
from ..spectrum import MAX_PIXELS
from .fits_table import table_columns, wave_from_column
from .header import HeaderView, clean_text, medium_from_header
from .names import UNCERTAINTY_ROLES, medium_of_name
from .units import to_sigma

__all__ = ["read_text", "text_kind", "MAX_TEXT_BYTES", "split_name_unit"]

log = logging.getLogger(__name__)

#: Largest text file read (bytes): MAX_PIXELS rows of about 120 characters.
MAX_TEXT_BYTES = MAX_PIXELS * 120

_NAME_UNIT = re.compile(r"^(.*?)\s*[\[\(]\s*([^\]\)]*?)\s*[\]\)]\s*$")
_CARD = re.compile(r"^\s*([A-Za-z][A-Za-z0-9_\-]*)\s*[:=]\s*(.*?)\s*$")
_NUMBER = re.compile(r"^[\s,;\t]*[-+]?(\d|\.\d|nan|inf)", re.IGNORECASE)


def split_name_unit(token: str) -> tuple[str, str | None]:
    """``'wavelength[nm]'`` -> ``('wavelength', 'nm')``; ``'flux'`` -> ``('flux', None)``.

    >>> split_name_unit("wave (um)"), split_name_unit("flux")
    (('wave', 'um'), ('flux', None))
    """
    token = token.strip().strip("\"'")
    m = _NAME_UNIT.match(token)
    if m and m.group(1):
        return m.group(1).strip(), (m.group(2).strip() or None)
    return token, None


def text_kind(path, head: str) -> str:
    """'ecsv', 'csv', 'tsv' or 'text' from the extension and the first characters."""
    if head.lstrip("\ufeff").startswith("# %ECSV"):
        return "ecsv"
    ext = os.path.splitext(str(path))[1].lower()
    return {".csv": "csv", ".tsv": "tsv", ".ecsv": "ecsv"}.get(ext, "text")


def _read_text_file(path) -> str:
    try:
        size = os.path.getsize(path)
    except OSError as exc:
        raise SpectrumFileError(path, f"cannot be opened ({exc.strerror or exc})") from None
    if size > MAX_TEXT_BYTES:
        raise LimitExceededError(path, f"text file of {size} bytes is larger than the limit of {MAX_TEXT_BYTES}")
    with open(path, "rb") as fh:
        raw = fh.read()
    if b"\x00" in raw[:65536]:
        raise SpectrumFileError(path, "not a text spectrum (binary content)")
    return raw.decode("utf-8", errors="replace")


def read_text(path, builder, wave_unit=None):
    """Spectra (a list of one) from a text file; ``builder`` as in :mod:`zsieve.io`."""
    text = _read_text_file(path)
    kind = text_kind(path, text[:64])
    if kind == "ecsv":
        return [_read_ecsv(path, text, builder, wave_unit)]
    return [_read_delimited(path, text, kind, builder, wave_unit)]


def _columns_to_spectrum(path, names, units, columns, cards, builder, wave_unit, fmt):
    roles = table_columns(names)
    if "wave" not in roles and "loglam" not in roles:
        raise SpectrumFileError(path, f"no wavelength column among {', '.join(map(str, names[:8]))}")
    if "flux" not in roles:
        raise SpectrumFileError(path, f"no flux column among {', '.join(map(str, names[:8]))}")
    h = HeaderView(cards)
    jw = roles.get("wave", roles.get("loglam"))
    unit = units[jw]
    if unit is None:
        unit = clean_text(h.get("WAVE_UNIT")) or clean_text(h.get("WAVEUNIT")) or wave_unit
    wave_a, label, guessed = wave_from_column(path, columns[jw], names[jw], unit)
    flux = np.asarray(columns[roles["flux"]], dtype=float)
    sig = bad = None
    ukind = next((k for k in UNCERTAINTY_ROLES if k in roles), None)
    if ukind:
        sig, bad = to_sigma(columns[roles[ukind]], ukind)
    if "mask" in roles:
        m = np.asarray(columns[roles["mask"]], dtype=float)
        m = (m != 0) & ~np.isnan(m)
        bad = m if bad is None else bad | m
    medium = medium_of_name(names[jw]) or medium_from_header(h)
    flux_unit = units[roles["flux"]]
    if flux_unit and "BUNIT" not in cards:
        cards = dict(cards, BUNIT=flux_unit)
    return builder(wave_a, flux, sig, bad, medium, label, guessed, (cards,), 0, fmt)


_ECSV_NUMERIC = ("float16", "float32", "float64", "float128", "int8", "int16", "int32", "int64",
                 "uint8", "uint16", "uint32", "uint64", "bool")


def _ecsv_fast(path, text):
    """(names, units, columns, meta) of a plain numeric ECSV file, or ``None`` to use astropy.

    Handles the common case (every column a numeric scalar, no missing values, no custom YAML
    tags) with PyYAML's safe loader and numpy; astropy's full reader is about ten times slower.
    """
    import yaml

    lines = text.splitlines()
    k = 1
    while k < len(lines) and lines[k].startswith("#"):
        k += 1
    yaml_text = "\n".join(line[2:] if line.startswith("# ") else line[1:] for line in lines[1:k])
    try:
        loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
        head = yaml.load(yaml_text, Loader=loader)
    except yaml.YAMLError:
        return None
    if not isinstance(head, dict) or not isinstance(head.get("datatype"), list):
        return None
    cols = head["datatype"]
    if not all(isinstance(c, dict) and c.get("datatype") in _ECSV_NUMERIC and "subtype" not in c for c in cols):
        return None
    delim = head.get("delimiter", " ")
    delim = None if delim == " " else delim
    if k >= len(lines):
        return None
    names = [c["name"] for c in cols]
    header = lines[k].split(delim) if delim else lines[k].split()
    if [h.strip() for h in header] != [str(n) for n in names]:
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            data = np.loadtxt(io.StringIO("\n".join(lines[k + 1 :])), delimiter=delim, ndmin=2, dtype=float)
    except ValueError:
        return None  # missing values or something unusual: astropy knows the details
    if data.shape[1] != len(names):
        return None
    meta = head.get("meta") or {}
    if isinstance(meta, list):  # !!omap comes back as a list of pairs
        meta = dict(item for pair in meta for item in (pair.items() if isinstance(pair, dict) else [pair]))
    units = [c.get("unit") for c in cols]
    return names, units, [data[:, j] for j in range(len(names))], meta if isinstance(meta, dict) else {}


def _read_ecsv(path, text, builder, wave_unit):
    fast = _ecsv_fast(path, text)
    if fast is not None:
        names, units, columns, meta = fast
        if len(columns[0]) > MAX_PIXELS:
            raise LimitExceededError(path, f"{len(columns[0])} rows is more than the limit of {MAX_PIXELS}")
        cards = {str(k): v for k, v in meta.items() if not isinstance(v, (dict, list))}
        return _columns_to_spectrum(path, names, units, columns, cards, builder, wave_unit, "ecsv")
    from astropy.table import Table

    try:
        table = Table.read(text.splitlines(), format="ascii.ecsv")
    except Exception as exc:  # noqa: BLE001 - any parse failure is a bad file
        raise SpectrumFileError(path, f"not a readable ECSV table ({' '.join(str(exc).split())[:160]})") from None
    if len(table) > MAX_PIXELS:
        raise LimitExceededError(path, f"{len(table)} rows is more than the limit of {MAX_PIXELS}")
    names = list(table.colnames)
    units = [None if table[c].unit is None else table[c].unit.to_string() for c in names]
    columns = []
    for c in names:
        col = table[c]
        try:
            columns.append(np.asarray(col.filled(np.nan) if hasattr(col, "filled") else col, dtype=float))
        except (TypeError, ValueError):
            columns.append(np.full(len(table), np.nan))
    cards = {str(k): v for k, v in dict(table.meta).items() if not isinstance(v, (dict, list))}
    return _columns_to_spectrum(path, names, units, columns, cards, builder, wave_unit, "ecsv")


def _read_delimited(path, text, kind, builder, wave_unit):
    lines = text.splitlines()
    cards: dict[str, str] = {}
    comments: list[str] = []
    first_data = None
    for k, line in enumerate(lines):
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            body = s.lstrip("#").strip()
            comments.append(body)
            m = _CARD.match(body)
            if m:
                cards.setdefault(m.group(1).upper(), m.group(2).strip().strip("'\""))
            continue
        first_data = k
        break
    if first_data is None:
        raise SpectrumFileError(path, "no spectrum found (the file has no data lines)")
    header_line = None
    body_start = first_data
    if not _NUMBER.match(lines[first_data]):
        header_line = lines[first_data]
        body_start = first_data + 1
    elif comments and not _CARD.match(comments[-1]):
        header_line = comments[-1]
    sample = header_line if header_line is not None else lines[body_start] if body_start < len(lines) else ""
    if kind == "csv":
        delim = ","
    elif kind == "tsv":
        delim = "\t"
    elif "\t" in sample:
        delim = "\t"
    elif "," in sample:
        delim = ","
    else:
        delim = None
    body = "\n".join(lines[body_start:])
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # "input contained no data": handled below
            data = np.loadtxt(io.StringIO(body), delimiter=delim, comments="#", ndmin=2, dtype=float)
    except ValueError:
        try:  # empty fields: fill with NaN
            data = np.genfromtxt(io.StringIO(body), delimiter=delim, comments="#", dtype=float, filling_values=np.nan)
            data = np.atleast_2d(data)
        except ValueError as exc:
            raise SpectrumFileError(path, f"unreadable numbers ({' '.join(str(exc).split())[:160]})") from None
    if data.size == 0:
        raise SpectrumFileError(path, "no spectrum found (the file has no data lines)")
    ncol = data.shape[1]
    if header_line is not None:
        hl = re.sub(r"\s+([\[\(])", r"\1", header_line.strip()) if delim is None else header_line.strip()
        hl = re.sub(r"([\[\(])\s*([^\]\)]*?)\s*([\]\)])", lambda m: m.group(1) + m.group(2).replace(" ", "") + m.group(3), hl) if delim is None else hl
        tokens = [t for t in (hl.split(delim) if delim else hl.split())]
        if len(tokens) != ncol:
            raise SpectrumFileError(path, f"length mismatch: header names {len(tokens)} columns but the data have {ncol}")
        names, units = zip(*(split_name_unit(t) for t in tokens))
        names, units = list(names), list(units)
    else:
        if ncol < 2:
            raise SpectrumFileError(path, "no spectrum found (one column of numbers and no header row)")
        names = ["wavelength", "flux", "sigma"][:ncol] + [f"col{j}" for j in range(3, ncol)]
        units = [None] * ncol
        log.info("%s: no header row; reading the columns as %s", path, ", ".join(names[:3]))
    columns = [data[:, j] for j in range(ncol)]
    return _columns_to_spectrum(path, names, units, columns, cards, builder, wave_unit, kind)
