"""Wavelength units, the unit sanity rule, and uncertainty conversion to 1-sigma.

Units
-----
Wavelengths are converted to Angstrom at load time. Recognised spellings (case-insensitive):
Angstrom (``A``, ``AA``, ``Å``, ``Angstrom(s)``, ``Ang``, ``0.1nm``), nanometre (``nm``),
micron (``um``, ``µm``, ``micron(s)``, ``micrometer``), ``m``, ``cm``, ``mm``; anything else
astropy.units parses as a length is accepted too. ``log10(Angstrom)`` / ``dex(Angstrom)``
(and a column named ``loglam``) mean log10 of the wavelength in Angstrom.

The unit sanity rule
--------------------
A unit mistake shifts every redshift by a factor of ten, so a grid whose unit looks wrong is
refused rather than read: after conversion to Angstrom the grid must reach above
:data:`MIN_PLAUSIBLE_MAX_A` (1000 Å) and start below :data:`MAX_PLAUSIBLE_MIN_A` (10 µm).
A grid entirely below 1000 Å is far-UV/EUV, where zsieve's lines and templates do not
apply, and is almost always nm or µm read as Angstrom (3000-10000 Å written as 300-1000 nm);
a grid that starts above 10 µm is almost always Angstrom read as nm or µm. When the unit was
*guessed* (no unit in the file and none from the caller) and the numbers look like another
unit, the error message says which one and how to pass it. A unit that was given explicitly
but puts the grid in an unusual though possible place (below 3000 Å, or above 2.5 µm) is
read and logged as a warning.

Uncertainties
-------------
:func:`to_sigma` turns a sigma, variance or inverse-variance array into 1-sigma with
``inf`` for unusable pixels (zero/negative/NaN), and returns the mask of those pixels.

Examples
--------
>>> wave_unit_factor("nm"), wave_unit_factor("µm"), wave_unit_factor("Angstroms")
(10.0, 10000.0, 1.0)
>>> is_log_unit("log10(Angstrom)"), is_log_unit("dex(AA)"), is_log_unit("nm")
(True, True, False)
>>> import numpy as np
>>> s, bad = to_sigma(np.array([4.0, 0.0, -1.0]), "ivar")
>>> s.tolist(), bad.tolist()
([0.5, inf, inf], [False, True, True])
"""

from __future__ import annotations

import logging
import math

import numpy as np

from ..errors import SpectrumFileError

__all__ = [
    "wave_unit_factor",
    "canonical_wave_unit",
    "is_log_unit",
    "check_wave_plausible",
    "to_sigma",
    "MIN_PLAUSIBLE_MAX_A",
    "MAX_PLAUSIBLE_MIN_A",
]

log = logging.getLogger(__name__)

#: A grid in Angstrom must reach above this (else it is probably nm or µm).
MIN_PLAUSIBLE_MAX_A = 1000.0
#: A grid in Angstrom must start below this (else it is probably Angstrom read as nm/µm).
MAX_PLAUSIBLE_MIN_A = 1.0e5

_FACTORS = {
    "a": 1.0, "aa": 1.0, "å": 1.0, "Å": 1.0, "angstrom": 1.0, "angstroms": 1.0, "ang": 1.0,
    "angs": 1.0, "0.1nm": 1.0, "1e-10m": 1.0, "ångström": 1.0,
    "nm": 10.0, "nanometer": 10.0, "nanometers": 10.0, "nanometre": 10.0, "nanometres": 10.0,
    "um": 1e4, "µm": 1e4, "μm": 1e4, "micron": 1e4, "microns": 1e4, "micrometer": 1e4,
    "micrometers": 1e4, "micrometre": 1e4, "micrometres": 1e4, "mum": 1e4,
    "mm": 1e7, "cm": 1e8, "m": 1e10, "meter": 1e10, "metre": 1e10,
}
_CANONICAL = {1.0: "Angstrom", 10.0: "nm", 1e4: "um", 1e7: "mm", 1e8: "cm", 1e10: "m"}


def _clean(unit) -> str:
    return str(unit).strip().strip("[]()").strip().replace(" ", "").lower()


def is_log_unit(unit) -> bool:
    """True if ``unit`` says log10 of a wavelength (``log10(Angstrom)``, ``dex(AA)``, ``log(A)``)."""
    if unit is None:
        return False
    u = _clean(unit)
    return u.startswith(("log10(", "log(", "dex(", "log10", "dex")) and u not in ("dex", "log10")


def wave_unit_factor(unit) -> float | None:
    """Multiply a wavelength in ``unit`` by this to get Angstrom; ``None`` if not a length.

    For log units (see :func:`is_log_unit`) this is the factor of the unit inside the log.
    """
    if unit is None:
        return None
    u = _clean(unit)
    if is_log_unit(unit):
        inner = u.split("(", 1)[1].rstrip(")") if "(" in u else u.replace("log10", "").replace("dex", "")
        return wave_unit_factor(inner) if inner else 1.0
    if u in _FACTORS:
        return _FACTORS[u]
    try:  # anything else astropy understands as a length
        import astropy.units as au

        q = au.Unit(str(unit).strip(), parse_strict="silent")
        return float(q.to(au.AA))
    except Exception:  # noqa: BLE001 - any failure means "not a length we know"
        return None


def canonical_wave_unit(unit) -> str:
    """A tidy name for ``unit`` (``"Angstrom"``, ``"nm"``, ``"um"``, ...); log units keep a log prefix."""
    factor = wave_unit_factor(unit)
    name = _CANONICAL.get(factor, str(unit).strip()) if factor is not None else str(unit).strip()
    return f"log10({name})" if is_log_unit(unit) else name


def _suggest(wave_a: np.ndarray) -> str | None:
    """Which unit would put a grid read as Angstrom into the optical/near-IR window."""
    lo, hi = float(np.nanmin(wave_a)), float(np.nanmax(wave_a))
    for name, factor in (("nm", 10.0), ("um", 1e4), ("log10(Angstrom)", None)):
        if factor is None:
            if 2.5 < lo and hi < 5.5:
                return name
            continue
        if 900.0 <= lo * factor and hi * factor <= 60000.0:
            return name
    for name, factor in (("Angstrom (the numbers look 10x too large for nm)", 0.1),):
        if 900.0 <= lo * factor and hi * factor <= 60000.0:
            return name
    return None


def check_wave_plausible(path, wave_a, unit_label: str, guessed: bool) -> None:
    """Apply the unit sanity rule of this module to a grid already converted to Angstrom.

    Raises :class:`~zsieve.errors.SpectrumFileError` if the grid cannot be in the stated (or
    guessed) unit; logs a warning if it is merely unusual.
    """
    wave_a = np.asarray(wave_a, dtype=float)
    lo, hi = float(np.nanmin(wave_a)), float(np.nanmax(wave_a))
    how = "assumed (no unit given)" if guessed else "as given"
    if hi < MIN_PLAUSIBLE_MAX_A or lo > MAX_PLAUSIBLE_MIN_A:
        hint = _suggest(wave_a / (wave_unit_factor(unit_label) or 1.0))
        tip = f"; the numbers look like {hint}: pass wave_unit=... to say so" if hint else ""
        raise SpectrumFileError(
            path,
            f"wavelengths {lo:.6g}-{hi:.6g} Angstrom (unit {unit_label!r} {how}) are outside the "
            f"range a UV-to-near-IR spectrum can have, so the unit is probably wrong{tip}",
        )
    if lo < 3000.0 and hi < 3000.0 or lo > 25000.0:
        log.warning(
            "%s: wavelengths %.6g-%.6g Angstrom (unit %r %s) are unusual for a redshift survey; "
            "check the unit", path, lo, hi, unit_label, how,
        )


def to_sigma(values, kind: str) -> tuple[np.ndarray, np.ndarray]:
    """Convert an uncertainty array of ``kind`` ('sigma', 'var' or 'ivar') to 1-sigma.

    Returns ``(sigma, bad)``: ``sigma`` is ``inf`` where the value is zero, negative or not
    finite (the pixel carries no usable uncertainty), and ``bad`` marks those pixels.
    """
    v = np.asarray(values, dtype=float)
    good = np.isfinite(v) & (v > 0)
    sigma = np.full(v.shape, math.inf)
    if kind == "sigma":
        sigma[good] = v[good]
    elif kind == "var":
        sigma[good] = np.sqrt(v[good])
    elif kind == "ivar":
        sigma[good] = 1.0 / np.sqrt(v[good])
    else:
        raise ValueError(f"unknown uncertainty kind {kind!r}")
    return sigma, ~good
