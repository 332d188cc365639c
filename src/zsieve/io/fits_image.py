"""FITS images: 1-D spectra with a WCS wavelength axis, and images whose rows are named.

Wavelength axis (FITS WCS Paper III, Greisen et al. 2006, A&A 446, 747), with p the 1-based
pixel number along NAXIS1:

- ``CTYPE1 = 'WAVE'`` (vacuum) or ``'AWAV'`` (air): λ = CRVAL1 + CDELT1·(p − CRPIX1);
- ``'WAVE-LOG'`` / ``'AWAV-LOG'``: λ = CRVAL1·exp(CDELT1·(p − CRPIX1)/CRVAL1);
- ``'LINEAR'``, blank or absent CTYPE1 (common practice in older files): linear, unless
  ``DC-FLAG = 1``, which means log10 sampling: λ = 10^(CRVAL1 + CDELT1·(p − CRPIX1));
- ``COEFF0``/``COEFF1`` (SDSS and LAMOST convention, common practice), when present in a file
  that also says DC-FLAG = 1 or WFITTYPE = 'LOG-LINEAR', or that has no CRVAL1:
  λ = 10^(COEFF0 + COEFF1·i) with i the 0-based pixel index.

CD1_1 is used when present, else CDELT1; CRPIX1 defaults to 1. CUNIT1 gives the unit; when
it is absent the unit is taken from an IRAF-style ``WAT1_001 = '... units=...'`` card, else
assumed to be Angstrom (common practice; the unit sanity rule of :mod:`zsieve.io.units`
catches the cases where that assumption is wrong). The medium is air for ``AWAV*`` and
vacuum for ``WAVE*``; otherwise it comes from VACUUM/AIRORVAC keywords (see
:mod:`zsieve.io.header`). Other spectral types (FREQ, ENER, VRAD, ...) and non-linear
algorithm codes (-TAB, -F2W, ...) are refused with a clear message.

Companion extensions of the same length are recognised by EXTNAME with the vocabulary of
:mod:`zsieve.io.names` (ERR/ERROR/SIGMA/STDDEV/UNCERT… → 1-sigma; VAR/VARIANCE → σ²;
IVAR/INVVAR/WEIGHT → 1/σ²; MASK/FLAGS/DQ → mask, non-zero = bad; WAVE/WAVELENGTH/LOGLAM →
an explicit wavelength array). An ``HDUCLAS3`` of RMSE, MSE or INVMSE (an ESO data-product
convention, from memory) overrides the name. A 2-D image whose rows are not named holds one
spectrum per row, all on the NAXIS1 grid.

Rows named by ``ARRAYn`` (SDSS spSpec), ``BANDIDn`` (IRAF, common practice) or the words of
``EXTEN0`` (LAMOST DR1, one word per row) are matched with the same vocabulary.
"""

from __future__ import annotations

import logging
import re

import numpy as np

from ..errors import SpectrumFileError
from .header import HeaderView, clean_text, medium_from_header
from .names import UNCERTAINTY_ROLES, role_of
from .units import canonical_wave_unit, is_log_unit, to_sigma, wave_unit_factor

__all__ = ["wcs_wavelength", "read_image_hdus", "row_roles", "uncertainty_kind_of_hdu"]

log = logging.getLogger(__name__)

_HDUCLAS3 = {"RMSE": "sigma", "MSE": "var", "INVMSE": "ivar"}
_WAT_UNITS = re.compile(r"units\s*=\s*([A-Za-z]+)", re.IGNORECASE)


def wcs_wavelength(path, header, n: int) -> tuple[np.ndarray, str, bool, str | None]:
    """Wavelength grid (Angstrom) of axis 1 of an image with ``n`` pixels.

    Returns ``(wave_A, unit_label, unit_guessed, medium_from_ctype)``; the last is ``'air'``,
    ``'vacuum'`` or ``None`` when CTYPE1 does not say.
    """
    h = header if isinstance(header, HeaderView) else HeaderView(header)
    ctype = (clean_text(h.get("CTYPE1")) or "").upper()
    for key in ("CRVAL1", "CD1_1", "CDELT1", "CRPIX1"):
        if h.get(key) is not None and h.number(key) is None:
            raise SpectrumFileError(path, f"{key} = {clean_text(h.get(key), 40)!r} is not a finite number")
    crval = h.number("CRVAL1")
    cdelt = h.number("CD1_1")
    if cdelt is None:
        cdelt = h.number("CDELT1")
    crpix = h.number("CRPIX1")
    crpix = 1.0 if crpix is None else crpix
    dcflag = h.number("DC-FLAG")
    wfit = (clean_text(h.get("WFITTYPE")) or "").upper()
    c0, c1 = h.number("COEFF0"), h.number("COEFF1")
    i = np.arange(n, dtype=float)
    medium = None
    base, _, algo = ctype.partition("-")
    algo = algo.strip("-")
    if base in ("WAVE", "AWAV"):
        medium = "air" if base == "AWAV" else "vacuum"
    elif base not in ("", "LINEAR", "LAMBDA", "WAVELENGTH", "WAVELENG", "PIXEL"):
        raise SpectrumFileError(path, f"spectral axis CTYPE1 = {ctype!r} is not a wavelength axis zsieve reads")
    if algo and algo != "LOG":
        raise SpectrumFileError(path, f"wavelength algorithm {ctype!r} is not supported (only linear and -LOG)")

    unit_text = clean_text(h.get("CUNIT1"))
    guessed = False
    if unit_text is None:
        m = _WAT_UNITS.search(clean_text(h.get("WAT1_001")) or "")
        if m:
            unit_text = m.group(1)
    if unit_text is None:
        unit_text, guessed = "Angstrom", True
    factor = wave_unit_factor(unit_text)
    if factor is None:
        raise SpectrumFileError(path, f"wavelength unit CUNIT1 = {unit_text!r} is not a length")

    # DC-FLAG = 1 (log10 sampling) is an IRAF convention for LINEAR/blank axes, not for WAVE/AWAV.
    log10 = (dcflag == 1 and base not in ("WAVE", "AWAV")) or is_log_unit(unit_text)
    if c0 is not None and c1 is not None and (log10 or wfit == "LOG-LINEAR" or crval is None) and base != "WAVE" and base != "AWAV":
        loglam = c0 + c1 * i
        wave = 10.0 ** loglam * factor
        return wave, "log10(Angstrom)" if factor == 1.0 else f"log10({canonical_wave_unit(unit_text)})", guessed, medium
    if crval is None or cdelt is None:
        missing = " and ".join(k for k, v in (("CRVAL1", crval), ("CDELT1/CD1_1", cdelt)) if v is None)
        raise SpectrumFileError(path, f"no wavelength axis: the header has no {missing} (nor COEFF0/COEFF1)")
    if cdelt == 0:
        raise SpectrumFileError(path, "wavelength step CDELT1/CD1_1 is zero")
    p = i + 1.0
    if algo == "LOG":
        if crval <= 0:
            raise SpectrumFileError(path, f"CRVAL1 = {crval} must be positive for a -LOG axis")
        wave = crval * np.exp(cdelt * (p - crpix) / crval) * factor
        label = canonical_wave_unit(unit_text)
    elif log10:
        wave = 10.0 ** (crval + cdelt * (p - crpix)) * factor
        label = f"log10({canonical_wave_unit(unit_text)})" if not is_log_unit(unit_text) else canonical_wave_unit(unit_text)
    else:
        wave = (crval + cdelt * (p - crpix)) * factor
        label = canonical_wave_unit(unit_text)
    return wave, label, guessed, medium


def uncertainty_kind_of_hdu(info) -> str | None:
    """The role ('sigma', 'var', 'ivar', 'mask', 'wave', 'loglam', 'flux') of an image extension."""
    h = HeaderView(info.header)
    cls3 = (clean_text(h.get("HDUCLAS3")) or "").upper()
    if cls3 in _HDUCLAS3:
        return _HDUCLAS3[cls3]
    return role_of(info.name) if info.name else None


def row_roles(header, nrows: int) -> dict[str, int]:
    """Map role -> row index for an image whose rows are named (ARRAYn, BANDIDn or EXTEN0)."""
    h = header if isinstance(header, HeaderView) else HeaderView(header)
    names: list[str | None] = [None] * nrows
    exten0 = clean_text(h.get("EXTEN0"))
    if exten0 and len(exten0.split()) == nrows:
        names = exten0.split()
    else:
        for r in range(nrows):
            for key in (f"ARRAY{r + 1}", f"BANDID{r + 1}"):
                v = clean_text(h.get(key))
                if v:
                    names[r] = v.split(" - ")[0]
                    break
    roles: dict[str, int] = {}
    for r, name in enumerate(names):
        role = role_of(name) if name else None
        if role and role not in roles:
            roles[role] = r
    return roles


def _squeeze_1d(shape) -> bool:
    return len(shape) >= 1 and all(s == 1 for s in shape[:-1]) and shape[-1] > 1


def read_image_hdus(path, ff, builder):
    """Spectra from the image HDUs of a FITS file (generic layout); [] if there is no image.

    ``builder(wave_a, flux, sigma, bad, file_medium, unit_label, guessed, headers, index, fmt)``
    makes one Spectrum; it is supplied by the package so every format shares one final check.
    """
    infos = ff.infos
    images = [i for i in infos if i.kind == "image" and i.has_data]
    if not images:
        return []
    primary = infos[0]
    # The flux HDU: the first image not named as a companion (uncertainty, mask, wavelength).
    flux_info = None
    for info in images:
        role = uncertainty_kind_of_hdu(info)
        if role in (None, "flux") or (info.index == 0 and role not in ("wave", "loglam")):
            flux_info = info
            break
    if flux_info is None:
        return []
    shape = flux_info.shape
    npix = shape[-1]
    h = HeaderView(primary.header, flux_info.header) if flux_info.index else HeaderView(primary.header)
    flux = ff.image(flux_info)
    flux = flux.reshape(-1, npix) if flux.ndim != 1 else flux.reshape(1, npix)
    # Companion extensions of the same shape.
    comp: dict[str, tuple[str, np.ndarray, object]] = {}
    for info in images:
        if info is flux_info:
            continue
        role = uncertainty_kind_of_hdu(info)
        if role in (None, "flux", "ormask") or role in comp:
            continue
        want = npix if role in ("wave", "loglam") else flux.size
        size = int(np.prod(info.shape))
        if size != want:
            raise SpectrumFileError(
                path, f"length mismatch: extension {info.name!r} has {size} values but the flux has {want}"
            )
        data = ff.image(info)
        data = data.reshape(-1) if role in ("wave", "loglam") else data.reshape(flux.shape)
        comp[role] = (role, data, info.header)
    # Rows named in the header: a survey-style stacked image (handled like the extensions).
    fmt = "fits-image"
    if flux.shape[0] > 1:
        roles = row_roles(h, flux.shape[0])
        fmt = "fits-image-rows"
        if "flux" in roles:
            fmt = "fits-image-named-rows"
            rows = flux
            flux = rows[roles["flux"]][None, :]
            from .survey import bitmask_is_informational

            row_mask = () if bitmask_is_informational(h) else ("mask",)
            for role in (*UNCERTAINTY_ROLES, *row_mask, "wave", "loglam"):
                if role in roles and role not in comp:
                    comp[role] = (role, rows[roles[role]][None, :] if role not in ("wave", "loglam") else rows[roles[role]], None)
    wave_a, unit_label, guessed, ctype_medium = _wavelength(path, h, npix, comp)
    file_medium = ctype_medium or medium_from_header(h)
    kind = next((k for k in UNCERTAINTY_ROLES if k in comp), None)
    sig_all, bad_unc = (to_sigma(comp[kind][1], kind) if kind else (None, None))
    mask_all = np.asarray(comp["mask"][1]) != 0 if "mask" in comp else None
    out = []
    headers = (primary.header, flux_info.header) if flux_info.index else (primary.header,)
    for r in range(flux.shape[0]):
        bad = None
        if mask_all is not None:
            bad = mask_all[r]
        if bad_unc is not None:
            bad = bad_unc[r] if bad is None else bad | bad_unc[r]
        sig = None if sig_all is None else sig_all[r]
        out.append(builder(wave_a, flux[r], sig, bad, file_medium, unit_label, guessed, headers, r, fmt))
    return out


def _wavelength(path, h, npix, comp):
    """Grid from an explicit wavelength extension/row if any, else from the WCS keywords."""
    for role in ("wave", "loglam"):
        if role in comp:
            _, data, hdr = comp[role]
            data = np.asarray(data, dtype=float).reshape(-1)
            if data.size != npix:
                raise SpectrumFileError(path, f"length mismatch: {data.size} wavelengths but {npix} flux values")
            hv = HeaderView(hdr) if hdr is not None else h
            unit_text = clean_text(hv.get("CUNIT1")) or clean_text(hv.get("BUNIT"))
            guessed = unit_text is None
            unit_text = unit_text or "Angstrom"
            factor = wave_unit_factor(unit_text)
            if factor is None:
                raise SpectrumFileError(path, f"wavelength unit {unit_text!r} is not a length")
            if is_log_unit(unit_text):
                return 10.0 ** data * factor, canonical_wave_unit(unit_text), guessed, None
            if role == "loglam":
                return 10.0 ** data * factor, f"log10({canonical_wave_unit(unit_text)})", guessed, None
            return data * factor, canonical_wave_unit(unit_text), guessed, None
    return wcs_wavelength(path, h, npix)
