"""Turn arrays read from any format into a checked :class:`~zsieve.spectrum.Spectrum`.

Every reader ends here, so the rules are the same for all formats:

- wavelength, flux, uncertainty and mask must have one length, else "length mismatch";
- an empty spectrum, non-finite wavelengths, or flux that is NaN everywhere are errors;
- decreasing wavelengths are legal: all arrays are reversed; wavelengths that repeat or go
  back and forth are an error naming the first offending pixel;
- wavelengths must be positive; the unit sanity rule of :mod:`zsieve.io.units` is applied (after conversion to Angstrom);
- air wavelengths become vacuum with :func:`zsieve.lines.air_to_vacuum` (Morton 2000) when the
  file says air or the caller passes ``medium="air"``; the caller's word wins over the file's;
- pixels with a zero, negative or non-finite uncertainty are masked; if no pixel with finite
  flux and a usable uncertainty remains, the file is refused; so is one with fewer than
  :data:`MIN_USABLE_PIXELS` (10) usable pixels.
"""

from __future__ import annotations

import logging

import numpy as np

from ..errors import SpectrumFileError
from ..spectrum import MAX_PIXELS, Spectrum, SpectrumMeta
from .units import check_wave_plausible

__all__ = ["build_spectrum", "resolve_medium", "MEDIA", "MIN_USABLE_PIXELS"]

log = logging.getLogger(__name__)

MEDIA = ("air", "vacuum")
#: Fewest usable pixels a spectrum may have (fewer constrain no line and no continuum).
MIN_USABLE_PIXELS = 10


def resolve_medium(path, requested, from_file, default: str = "vacuum") -> tuple[str, str]:
    """(medium, how it was decided) from the caller's request and what the file says."""
    if requested is not None:
        req = str(requested).strip().lower()
        req = {"vac": "vacuum"}.get(req, req)
        if req not in MEDIA:
            raise ValueError(f"medium must be 'air' or 'vacuum', not {requested!r}")
        if from_file is not None and from_file != req:
            log.warning("%s: file says %s wavelengths, reading them as %s as requested", path, from_file, req)
        return req, "caller"
    if from_file is not None:
        return from_file, "file"
    return default, "default"


def build_spectrum(
    path,
    wave_a,
    flux,
    sigma=None,
    bad=None,
    *,
    medium: str = "vacuum",
    unit_label: str = "Angstrom",
    unit_guessed: bool = False,
    meta: dict | None = None,
) -> Spectrum:
    """Check and assemble one spectrum (see the module docstring for the rules).

    Parameters
    ----------
    path : str
        The file, for error messages and ``meta.source``.
    wave_a : array
        Wavelengths already converted to Angstrom, in the file's ``medium``.
    flux, sigma : array
        Flux and 1-sigma uncertainty (``inf`` = unknown/unusable), or ``sigma=None``.
    bad : array of bool, optional
        Pixels the file flags as bad.
    medium : 'air' or 'vacuum'
        The medium of ``wave_a``.
    meta : dict
        SpectrumMeta keyword arguments (``medium`` and ``source`` are set here).
    """
    wave = np.asarray(wave_a, dtype=float).ravel()
    flux = np.asarray(flux, dtype=float).ravel()
    n = wave.size
    if n == 0:
        raise SpectrumFileError(path, "no spectrum found (zero pixels)")
    if n > MAX_PIXELS:
        from ..errors import LimitExceededError

        raise LimitExceededError(path, f"{n} pixels is more than the limit of {MAX_PIXELS}")
    parts = {"flux": flux}
    if sigma is not None:
        parts["uncertainty"] = np.asarray(sigma, dtype=float).ravel()
    if bad is not None:
        parts["mask"] = np.asarray(bad, dtype=bool).ravel()
    for label, arr in parts.items():
        if arr.size != n:
            raise SpectrumFileError(
                path, f"length mismatch: {n} wavelengths but {arr.size} {label} values"
            )
    sigma = parts.get("uncertainty")
    bad = parts.get("mask")
    if not np.all(np.isfinite(wave)):
        k = int(np.flatnonzero(~np.isfinite(wave))[0])
        raise SpectrumFileError(path, f"wavelength of pixel {k} is not a finite number")
    if not np.any(np.isfinite(flux)):
        raise SpectrumFileError(path, "flux is NaN (or infinite) at every pixel")
    if n > 1:
        d = np.diff(wave)
        if np.all(d < 0):
            wave, flux = wave[::-1], flux[::-1]
            sigma = None if sigma is None else sigma[::-1]
            bad = None if bad is None else bad[::-1]
            d = -d[::-1]
        if not np.all(d > 0):
            k = int(np.flatnonzero(d <= 0)[0])
            what = "duplicated" if d[k] == 0 else "not monotonic"
            raise SpectrumFileError(
                path, f"wavelengths are {what} at pixel {k + 1} ({wave[k + 1]:.6g} after {wave[k]:.6g})"
            )
    if wave[0] <= 0:
        raise SpectrumFileError(path, f"wavelengths must be positive (the grid starts at {wave[0]:.6g})")
    check_wave_plausible(path, wave, unit_label, unit_guessed)
    if medium == "air":
        from ..lines import air_to_vacuum

        wave = np.asarray(air_to_vacuum(wave), dtype=float)
    mask = ~np.isfinite(flux)
    if sigma is not None:
        mask |= ~(sigma > 0) | ~np.isfinite(sigma)
    if bad is not None:
        mask |= bad
    if mask.all():
        raise SpectrumFileError(
            path, "no usable pixel: every pixel is flagged or has NaN flux or a zero/negative uncertainty"
        )
    n_good = int((~mask).sum())
    if n_good < MIN_USABLE_PIXELS:
        raise SpectrumFileError(
            path, f"only {n_good} usable pixel(s): a spectrum needs at least {MIN_USABLE_PIXELS}"
        )
    kw = dict(meta or {})
    kw["medium"] = medium
    kw["source"] = str(path)
    try:
        return Spectrum(wave, flux, sigma, mask, SpectrumMeta(**kw))
    except ValueError as exc:  # should not happen after the checks above
        raise SpectrumFileError(path, str(exc)) from None
