"""FITS tables (binary or ASCII) with wavelength, flux and uncertainty columns.

Columns are found by name with the vocabulary of :mod:`zsieve.io.names` (wave, wavelength,
lambda, lam, loglam = log10 λ/Å, flux, f, fluxdens, error/err/sigma/flux_err/noise,
ivar/invvar, var/variance, mask/and_mask/flags...). When a file has several uncertainty
columns, 1-sigma is preferred, then inverse variance, then variance. Units come from TUNITn
(a wavelength column without TUNITn is assumed to be Angstrom, subject to the unit sanity
rule of :mod:`zsieve.io.units`; a ``log10(...)``/``dex(...)`` unit means log10 λ).

Layouts:

- one spectrum per table: scalar columns, one pixel per row;
- one spectrum per row: array columns (TFORM repeat > 1, or variable-length arrays), one
  spectrum per table row; a wavelength column of a single row may serve every row.

Every table HDU with a wavelength and a flux column contributes its spectra, in HDU order.
A column name ending in _air/_vac (or AWAV) gives the medium; else VACUUM/AIRORVAC keywords.
"""

from __future__ import annotations

import logging

import numpy as np

from ..errors import SpectrumFileError
from .header import HeaderView, medium_from_header
from .names import UNCERTAINTY_ROLES, medium_of_name, role_of
from .units import canonical_wave_unit, is_log_unit, to_sigma, wave_unit_factor

__all__ = ["table_columns", "read_table_hdus", "wave_from_column"]

log = logging.getLogger(__name__)


def table_columns(names) -> dict[str, int]:
    """role -> column index, first column of each role wins.

    >>> table_columns(["flux", "loglam", "ivar", "and_mask", "or_mask"])
    {'flux': 0, 'loglam': 1, 'ivar': 2, 'mask': 3, 'ormask': 4}
    """
    roles: dict[str, int] = {}
    for j, name in enumerate(names):
        role = role_of(name)
        if role is None:
            role = _role_with_unit_suffix(name)[0]
        if role and role not in roles:
            roles[role] = j
    if "loglam" in roles and "wave" in roles:
        del roles["loglam"]
    return roles


_UNIT_SUFFIXES = ("angstrom", "ang", "aa", "a", "nm", "um", "micron", "air", "vac")


def _role_with_unit_suffix(name) -> tuple[str | None, str | None]:
    """('wave', 'nm') for names like 'wave_nm' or 'lambda_A' (unit written into the name)."""
    text = str(name).strip()
    for sep in ("_", "-", " "):
        if sep in text:
            head, tail = text.rsplit(sep, 1)
            if tail.lower() in _UNIT_SUFFIXES:
                role = role_of(head)
                if role in ("wave", "loglam"):
                    return role, (tail if tail.lower() not in ("air", "vac") else None)
    return None, None


def wave_from_column(path, values, name, unit) -> tuple[np.ndarray, str, bool]:
    """(wavelength in Angstrom, unit label, unit guessed) for a wavelength column."""
    role = role_of(name) or _role_with_unit_suffix(name)[0]
    if unit is None:
        unit = _role_with_unit_suffix(name)[1]
    guessed = unit is None
    unit_text = unit or "Angstrom"
    factor = wave_unit_factor(unit_text)
    if factor is None:
        raise SpectrumFileError(path, f"wavelength column {name!r} has unit {unit_text!r}, which is not a length")
    values = np.asarray(values, dtype=float)
    if is_log_unit(unit_text):
        return 10.0 ** values * factor, canonical_wave_unit(unit_text), guessed
    if role == "loglam":
        return 10.0 ** values * factor, f"log10({canonical_wave_unit(unit_text)})", False
    return values * factor, canonical_wave_unit(unit_text), guessed


def _cells(col):
    """Per-row 1-D arrays for array columns (2-D or variable-length), ``None`` for scalars."""
    if col.dtype == object:
        return list(col)
    if col.ndim >= 2:
        return list(col.reshape(col.shape[0], -1))
    return None


def read_table_hdus(path, ff, builder, only=None, use_mask=True):
    """Spectra from the table HDUs of FitsFile ``ff`` (``only``: restrict to these HDU indices).

    ``use_mask=False`` ignores mask columns (survey layouts whose bit masks are informational).
    """
    infos = ff.infos
    primary = infos[0]
    out = []
    for info in infos:
        if info.kind not in ("bintable", "table") or (only is not None and info.index not in only):
            continue
        roles = table_columns(info.columns)
        wrole = "wave" if "wave" in roles else "loglam" if "loglam" in roles else None
        if wrole is None or "flux" not in roles:
            log.debug("%s: HDU %d has no wavelength/flux columns", path, info.index)
            continue
        h = HeaderView(primary.header, info.header)
        jw, jf = roles[wrole], roles["flux"]
        wname, wunit = info.columns[jw], info.units[jw]
        file_medium = medium_of_name(wname) or medium_from_header(h)
        ukind = next((k for k in UNCERTAINTY_ROLES if k in roles), None)
        if info.shape[0] == 0:
            continue
        if not use_mask:
            roles.pop("mask", None)
        wanted = sorted({jw, jf, *(roles[k] for k in (ukind, "mask") if k in roles)})
        cols = ff.columns(info, wanted)
        nrows = info.shape[0]
        headers = (primary.header, info.header)
        wave_cells, flux_cells = _cells(cols[jw]), _cells(cols[jf])
        if flux_cells is None:  # one spectrum per table
            if wave_cells is not None:
                raise SpectrumFileError(path, f"HDU {info.index}: array wavelength column but scalar flux column")
            wave_a, label, guessed = wave_from_column(path, cols[jw], wname, wunit)
            flux = cols[jf]
            sig = bad = None
            if ukind:
                sig, bad = to_sigma(cols[roles[ukind]], ukind)
            if "mask" in roles:
                m = cols[roles["mask"]] != 0
                bad = m if bad is None else bad | m
            out.append(builder(wave_a, flux, sig, bad, file_medium, label, guessed, headers, info.index, "fits-table"))
            continue
        if wave_cells is None:
            raise SpectrumFileError(path, f"HDU {info.index}: scalar wavelength column but array flux column")
        unc_cells = _cells(cols[roles[ukind]]) if ukind else None
        mask_cells = _cells(cols[roles["mask"]]) if "mask" in roles else None
        for r in range(nrows):
            w = wave_cells[r] if len(wave_cells) > 1 else wave_cells[0]
            wave_a, label, guessed = wave_from_column(path, w, wname, wunit)
            sig = bad = None
            if unc_cells is not None:
                sig, bad = to_sigma(unc_cells[r], ukind)
            if mask_cells is not None:
                m = mask_cells[r] != 0
                bad = m if bad is None or bad.size != m.size else bad | m
            out.append(builder(wave_a, flux_cells[r], sig, bad, file_medium, label, guessed, headers, r, "fits-table-rows"))
    return out


