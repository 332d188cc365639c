"""Options of the redshift engine, in a module of its own.

:class:`MeasureConfig` is a plain frozen dataclass with no numerical imports, so the command
line and the batch client can build and hash it without loading numpy, scipy and the engine.

>>> from zsieve.engine.config import MeasureConfig
>>> MeasureConfig(n_resamples=50, seed=3).replace(z_max=2.0).z_max
2.0
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

__all__ = ["MeasureConfig"]


@dataclass(frozen=True)
class MeasureConfig:
    """Options of :func:`measure` (all have working defaults).

    Attributes
    ----------
    z_min, z_max : float
        Redshift range searched (stars: always within ``STAR_MAX_KMS`` of zero).
    classes : tuple of str
        Object classes tried.
    n_resamples : int
        Bootstrap resamples (0 = formal errors only, no probabilities).
    seed : int or None
        Seed of the resampling (``None`` = fresh entropy).
    snr_threshold : float
        Matched-filter S/N for a feature to count as detected.
    linelist : str, path or astropy Table, optional
        Line list (default: the bundled lists).
    mask_sky : bool
        Mask bright night-sky lines and telluric bands.
    sky_min_strength : float
        Only sky lines at least this strong (0-1 scale of the sky list) are masked (and
        telluric absorption bands at least ``max(this, 0.4)``).
    emission_in_bands : bool
        Measure the narrow emission lines of galaxies inside the shallow telluric bands (depth
        < 0.6 in the sky list), with a correction residual added to their noise; absorption
        lines, quasar lines and the correlation never use band pixels
        (:meth:`zsieve.engine.prepare.Prepared.for_class`).
    extra_masks : tuple of (lo, hi)
        More wavelength ranges (vacuum Angstrom) to leave out.
    resolution_kms : float or None
        Instrumental FWHM; ``None`` estimates it from the narrowest strong features (fallback
        150 km/s).
    continuum_kms : float
        Velocity scale of the continuum blocks.
    penalty : float
        Chi-square charged per line group a candidate uses.
    n_candidates : int
        Candidates refined and carried through the bootstrap.
    xcorr : bool
        Use the template cross-correlation (proposals and the ``xcorr-differs`` check).
    bootstrap_xcorr : bool
        Also correlate every resample (agreement fraction in ``extra``; costs time).
    """

    z_min: float = 0.0
    z_max: float = 6.0
    classes: tuple = ("emission-galaxy", "absorption-galaxy", "quasar", "star")
    n_resamples: int = 200
    seed: int | None = None
    snr_threshold: float = 4.5
    linelist: object = None
    mask_sky: bool = True
    sky_min_strength: float = 0.2
    emission_in_bands: bool = True
    extra_masks: tuple = ()
    resolution_kms: float | None = None
    continuum_kms: float = 8000.0
    penalty: float = 4.0
    n_candidates: int = 6
    xcorr: bool = True
    bootstrap_xcorr: bool = False

    def replace(self, **changes) -> "MeasureConfig":
        return dataclasses.replace(self, **changes)
