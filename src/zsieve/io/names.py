"""What a column, extension or image row holds, judged from its name.

One vocabulary serves FITS table columns (``TTYPEn``), image extensions (``EXTNAME``),
named rows of survey images (``ARRAYn``, ``BANDIDn``, ``EXTEN0``) and text-file headers.
Names are compared after lower-casing and dropping everything but letters and digits, so
``Flux_Err``, ``flux-err`` and ``FLUXERR`` are the same name.

The rule for uncertainties (documented here once, applied everywhere):

============  ===========================================================================
role          names
============  ===========================================================================
``sigma``     err, error, errors, sigma, stddev, std, stdev, uncert, uncertainty, noise,
              fluxerr, fluxerror, fluxsigma, eflux, errflux, dflux, rmse
``var``       var, variance, fluxvar, fluxvariance, mse
``ivar``      ivar, invvar, inversevariance, inverse, fluxivar, weight, weights, wht,
              invmse
============  ===========================================================================

Masks (``mask``): mask, andmask, flags, flag, dq, quality, badpix, bpm, pixmask, pixelmask;
a non-zero value marks the pixel bad. ``ormask`` is recognised but not used as a mask (an
OR over exposures flags pixels that are fine in the co-add; common practice for SDSS).

Wavelengths (``wave``): wave, wavelength, wavelen, lambda, lam, wl, wav, awav, vacwave,
airwave, wavevac, waveair, lambdavac, lambdaair; ``loglam`` (log10 of the wavelength in
Angstrom): loglam, loglambda, logwave, log10lam, log10lambda, log10wave.
Flux (``flux``): flux, f, fluxdens, fluxdensity, flam, flambda, fnu, spectrum, spec,
counts, data, sci.

Examples
--------
>>> role_of("Flux_Err"), role_of("IVAR"), role_of("loglam"), role_of("and_mask")
('sigma', 'ivar', 'loglam', 'mask')
>>> role_of("Inverse Variance"), role_of("CONTINUUM-SUBTRACTED SPECTRUM")
('ivar', None)
>>> medium_of_name("wave_air"), medium_of_name("lambda"), medium_of_name("vacwave")
('air', None, 'vacuum')
"""

from __future__ import annotations

import re

__all__ = ["normalise", "role_of", "medium_of_name", "ROLES", "UNCERTAINTY_ROLES"]

_ROLE_NAMES: dict[str, tuple[str, ...]] = {
    "wave": (
        "wave", "wavelength", "wavelengths", "wavelen", "lambda", "lam", "wl", "wav", "awav",
        "vacwave", "airwave", "wavevac", "waveair", "lambdavac", "lambdaair", "wavelengthvac",
        "wavelengthair", "vacuumwavelength", "airwavelength",
    ),
    "loglam": ("loglam", "loglambda", "logwave", "log10lam", "log10lambda", "log10wave", "logwl"),
    "flux": (
        "flux", "f", "fluxdens", "fluxdensity", "flam", "flambda", "fnu", "spectrum", "spec",
        "counts", "data", "sci", "fluxcal", "specflux",
    ),
    "sigma": (
        "err", "error", "errors", "sigma", "stddev", "std", "stdev", "uncert", "uncertainty",
        "noise", "fluxerr", "fluxerror", "fluxsigma", "eflux", "errflux", "dflux", "rmse",
        "fluxunc", "fluxuncertainty", "fluxnoise",
    ),
    "var": ("var", "variance", "fluxvar", "fluxvariance", "mse"),
    "ivar": (
        "ivar", "invvar", "inversevariance", "inverse", "fluxivar", "weight", "weights", "wht",
        "invmse", "fluxinvvar",
    ),
    "mask": (
        "mask", "andmask", "flags", "flag", "dq", "quality", "badpix", "bpm", "pixmask",
        "pixelmask", "fluxmask",
    ),
    "ormask": ("ormask",),
}

#: Every role a name can have.
ROLES = tuple(_ROLE_NAMES)
#: Roles that carry a flux uncertainty, in order of preference when a file has several.
UNCERTAINTY_ROLES = ("sigma", "ivar", "var")

_LOOKUP = {name: role for role, names in _ROLE_NAMES.items() for name in names}
_NON_ALNUM = re.compile(r"[^0-9a-z]+")
_AIR = ("awav", "airwave", "waveair", "lambdaair", "wavelengthair", "airwavelength")
_VAC = ("vacwave", "wavevac", "lambdavac", "wavelengthvac", "vacuumwavelength")


def normalise(name) -> str:
    """Lower-case ``name`` and keep only letters and digits."""
    return _NON_ALNUM.sub("", str(name).strip().lower())


def role_of(name) -> str | None:
    """The role (one of :data:`ROLES`) a column/extension/row ``name`` stands for, or ``None``."""
    if name is None:
        return None
    return _LOOKUP.get(normalise(name))


def medium_of_name(name) -> str | None:
    """``"air"`` or ``"vacuum"`` if a wavelength column's name says so, else ``None``."""
    key = normalise(name)
    if key in _AIR:
        return "air"
    if key in _VAC:
        return "vacuum"
    return None
