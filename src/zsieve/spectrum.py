"""The spectrum object every stage of zsieve works on.

A :class:`Spectrum` holds one 1-D spectrum on a strictly increasing grid of **vacuum
wavelengths in Angstrom** (readers convert air wavelengths and other units at load time),
the flux, its 1-sigma uncertainty and a boolean mask (``True`` = bad pixel, as in
specutils). :class:`SpectrumMeta` carries what the header told us about the observation.

The numerics use the plain arrays; :meth:`Spectrum.to_specutils` gives the same data as a
:class:`specutils.Spectrum` (with units) for interoperability.

Examples
--------
>>> import numpy as np
>>> wave = np.linspace(4000.0, 9000.0, 6)
>>> spec = Spectrum(wave, np.ones(6), np.full(6, 0.5))
>>> spec.n_pix, bool(spec.mask.any())
(6, False)
>>> float(spec.ivar[0])
4.0
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Spectrum", "SpectrumMeta", "MAX_PIXELS"]

#: Largest spectrum zsieve accepts, in pixels (readers refuse bigger ones before allocating).
MAX_PIXELS = 2_000_000


@dataclass(frozen=True)
class SpectrumMeta:
    """What is known about an observation besides its arrays.

    All fields are optional; readers fill what the file says and leave the rest ``None``.

    Attributes
    ----------
    source : str
        The file the spectrum came from (as given by the user).
    object_name : str
        Object name from the header (untrusted text: never use it as a path unsanitised).
    ra_deg, dec_deg : float
        ICRS position in degrees.
    mjd : float
        Time of the observation (MJD, UTC), mid-exposure where known.
    site_lon_deg, site_lat_deg, site_height_m : float
        Geodetic position of the observatory.
    medium : str
        Wavelength medium of the file as read: ``"air"`` or ``"vacuum"``. The arrays of
        :class:`Spectrum` are always vacuum; this says whether a conversion was made.
    wave_unit : str
        Wavelength unit of the file before conversion to Angstrom.
    flux_unit : str
        Flux unit as given by the file (flux values are never rescaled).
    frame : str
        Velocity frame of the wavelengths as delivered: ``"topocentric"``, ``"heliocentric"``,
        ``"barycentric"`` or ``"unknown"`` (FITS SPECSYS or the survey's convention).
    format : str
        Name of the layout the reader recognised (e.g. ``"fits-image-wcs"``).
    index : int
        Which spectrum of a multi-spectrum file this is (0-based).
    extra : dict
        Other header facts worth keeping (plain JSON-able values).
    """

    source: str | None = None
    object_name: str | None = None
    ra_deg: float | None = None
    dec_deg: float | None = None
    mjd: float | None = None
    site_lon_deg: float | None = None
    site_lat_deg: float | None = None
    site_height_m: float | None = None
    medium: str = "vacuum"
    wave_unit: str = "Angstrom"
    flux_unit: str | None = None
    frame: str = "unknown"
    format: str | None = None
    index: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    def replace(self, **changes) -> "SpectrumMeta":
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dictionary of all fields."""
        return dataclasses.asdict(self)


class Spectrum:
    """One 1-D spectrum in vacuum Angstrom.

    Parameters
    ----------
    wavelength : array_like
        Vacuum wavelengths in Angstrom, strictly increasing.
    flux : array_like
        Flux density per pixel, any unit (see ``meta.flux_unit``).
    sigma : array_like, optional
        1-sigma uncertainty of the flux. Non-finite or non-positive values mark the pixel bad.
        If omitted, every pixel gets ``inf`` (unknown) and the measurement falls back on the
        flux scatter.
    mask : array_like of bool, optional
        ``True`` where a pixel is bad. Combined with the non-finite flux and sigma.
    meta : SpectrumMeta, optional

    Raises
    ------
    ValueError
        If the arrays differ in length or the wavelengths are not strictly increasing.
    """

    __slots__ = ("wavelength", "flux", "sigma", "mask", "meta")

    def __init__(self, wavelength, flux, sigma=None, mask=None, meta: SpectrumMeta | None = None):
        wave = np.asarray(wavelength, dtype=float)
        flux = np.asarray(flux, dtype=float)
        if wave.ndim != 1 or flux.shape != wave.shape:
            raise ValueError(
                f"wavelength and flux must be 1-D of one length (got {wave.shape} and {flux.shape})"
            )
        if sigma is None:
            sigma = np.full(wave.shape, np.inf)
        sigma = np.asarray(sigma, dtype=float)
        if sigma.shape != wave.shape:
            raise ValueError(f"uncertainty has {sigma.size} pixels, flux has {flux.size}")
        bad = ~np.isfinite(flux) | ~(sigma > 0) | np.isnan(sigma)
        if mask is not None:
            mask = np.asarray(mask, dtype=bool)
            if mask.shape != wave.shape:
                raise ValueError(f"mask has {mask.size} pixels, flux has {flux.size}")
            bad = bad | mask
        if wave.size > 1 and not np.all(np.diff(wave) > 0):
            raise ValueError("wavelengths must be strictly increasing")
        if not np.all(np.isfinite(wave)):
            raise ValueError("wavelengths must be finite")
        self.wavelength = wave
        self.flux = flux
        self.sigma = sigma
        self.mask = bad
        self.meta = meta if meta is not None else SpectrumMeta()

    # ------------------------------------------------------------------ views
    @property
    def n_pix(self) -> int:
        """Number of pixels."""
        return int(self.wavelength.size)

    @property
    def good(self) -> np.ndarray:
        """Boolean array, ``True`` where the pixel is usable."""
        return ~self.mask

    @property
    def ivar(self) -> np.ndarray:
        """Inverse variance, 0 on bad pixels."""
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            iv = np.where(self.mask | ~np.isfinite(self.sigma), 0.0, 1.0 / self.sigma**2)
        # sigma below ~1e-154 has no float64 inverse variance (1/sigma^2 overflows): such
        # pixels cannot be weighted at this flux scale, so they get 0 (and a warning)
        over = ~np.isfinite(iv)
        if over.any():
            import logging

            logging.getLogger(__name__).warning(
                "%d pixel(s) with sigma too small for a float64 inverse variance (1/sigma^2 "
                "overflows) get ivar 0; rescale the flux (zsieve.engine.measure does)", int(over.sum()))
            iv = np.where(over, 0.0, iv)
        return iv

    def replace(self, **changes) -> "Spectrum":
        """A new spectrum with some of ``wavelength, flux, sigma, mask, meta`` changed."""
        kw = dict(
            wavelength=self.wavelength, flux=self.flux, sigma=self.sigma, mask=self.mask, meta=self.meta
        )
        kw.update(changes)
        return Spectrum(**kw)

    def __repr__(self) -> str:
        name = self.meta.object_name or self.meta.source or "spectrum"
        if self.n_pix:
            rng = f"{self.wavelength[0]:.1f}-{self.wavelength[-1]:.1f} A (vacuum)"
        else:
            rng = "empty"
        return f"<Spectrum {name!r}: {self.n_pix} pixels, {rng}, {int(self.mask.sum())} masked>"

    # ------------------------------------------------------ specutils bridge
    def to_specutils(self):
        """The same data as a :class:`specutils.Spectrum` (or ``Spectrum1D`` on old specutils).

        Wavelength in Angstrom, flux in ``meta.flux_unit`` if astropy understands it (else
        dimensionless), :class:`~astropy.nddata.StdDevUncertainty`, and the mask.
        """
        import astropy.units as u
        from astropy.nddata import StdDevUncertainty

        try:
            from specutils import Spectrum as _SU
        except ImportError:  # specutils < 2
            from specutils import Spectrum1D as _SU

        try:
            funit = u.Unit(self.meta.flux_unit) if self.meta.flux_unit else u.dimensionless_unscaled
        except (ValueError, TypeError):
            funit = u.dimensionless_unscaled
        sig = np.where(np.isfinite(self.sigma), self.sigma, np.nan)
        return _SU(
            spectral_axis=self.wavelength * u.AA,
            flux=self.flux * funit,
            uncertainty=StdDevUncertainty(sig * funit),
            mask=self.mask.copy(),
            meta={"zsieve": self.meta.to_dict()},
        )

    @classmethod
    def from_specutils(cls, spec, meta: SpectrumMeta | None = None) -> "Spectrum":
        """Build from a specutils spectrum whose spectral axis is a wavelength (taken as vacuum)."""
        import astropy.units as u
        from astropy.nddata import InverseVariance, StdDevUncertainty, VarianceUncertainty

        wave = spec.spectral_axis.to_value(u.AA, equivalencies=u.spectral())
        flux = np.asarray(spec.flux.value, dtype=float)
        sigma = None
        unc = spec.uncertainty
        if isinstance(unc, StdDevUncertainty):
            sigma = np.asarray(unc.array, dtype=float)
        elif isinstance(unc, VarianceUncertainty):
            with np.errstate(invalid="ignore"):
                sigma = np.sqrt(np.asarray(unc.array, dtype=float))
        elif isinstance(unc, InverseVariance):
            with np.errstate(divide="ignore", invalid="ignore"):
                sigma = 1.0 / np.sqrt(np.asarray(unc.array, dtype=float))
        mask = None if spec.mask is None else np.asarray(spec.mask, dtype=bool)
        if wave.size > 1 and wave[0] > wave[-1]:
            wave, flux = wave[::-1], flux[::-1]
            sigma = None if sigma is None else sigma[::-1]
            mask = None if mask is None else mask[::-1]
        if meta is None:
            meta = SpectrumMeta(flux_unit=str(spec.flux.unit))
        return cls(wave, flux, sigma, mask, meta)
