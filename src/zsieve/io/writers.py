"""Writers: a Spectrum to a FITS image with WCS, a FITS binary table, or CSV/TSV/ECSV.

They write what the readers read back to float precision (the round-trip tests prove it),
and are used by the demo-spectrum generator and the robustness corpus.

- :func:`write_fits_image`: primary 1-D image on a grid uniform in λ (``CTYPE1 'WAVE'``) or in
  ln λ (``'WAVE-LOG'``, FITS WCS Paper III: λ = CRVAL1·exp(CDELT1·(p − CRPIX1)/CRVAL1)),
  ``'AWAV'``/``'AWAV-LOG'`` for air. The spectrum's (vacuum) wavelengths are converted to the
  chosen medium and unit first; that grid must be uniform in the chosen sampling (to 1e-6 of
  a pixel step), else :class:`ValueError`. Optional ``SIGMA``/``VARIANCE``/``IVAR`` extension
  (with HDUCLAS2 = 'ERROR' and HDUCLAS3 = RMSE/MSE/INVMSE) and a ``MASK`` extension.
- :func:`write_fits_table`: one binary-table HDU ``SPECTRUM`` with columns WAVELENGTH (or
  LOGLAM = log10 λ/Å), FLUX, an uncertainty column SIGMA/VAR/IVAR and MASK; TUNITn set.
- :func:`write_text`: CSV, TSV or ECSV (by ``fmt`` or the file extension), header row with
  units in brackets (``wavelength[nm]``), observation facts as ``# KEY: value`` comment lines
  (ECSV: table meta), numbers with 17 significant digits.

Observation facts written (when known): OBJECT, RA, DEC, MJD-OBS (the mid-exposure time, so
EXPTIME is not written), OBSGEO-X/Y/Z (metres, from the geodetic site via astropy), SPECSYS,
BUNIT, and VACUUM/AIRORVAC for the medium. Bad pixels get ``inf`` sigma/variance and zero
inverse variance and are set in the mask. Files are written to a temporary name in the
target folder and renamed into place, so a reader never sees half a file.
"""

from __future__ import annotations

import logging
import os
import tempfile

import numpy as np

__all__ = ["write_fits_image", "write_fits_table", "write_text"]

log = logging.getLogger(__name__)

_UNCERT_EXT = {"sigma": ("SIGMA", "RMSE"), "var": ("VARIANCE", "MSE"), "ivar": ("IVAR", "INVMSE")}
_SPECSYS = {"topocentric": "TOPOCENT", "heliocentric": "HELIOCEN", "barycentric": "BARYCENT"}
_UNITS = {"angstrom": ("Angstrom", 1.0), "nm": ("nm", 10.0), "um": ("um", 1e4)}


def _unit(wave_unit: str) -> tuple[str, float]:
    key = {"a": "angstrom", "aa": "angstrom", "å": "angstrom", "µm": "um", "micron": "um"}.get(
        str(wave_unit).lower(), str(wave_unit).lower()
    )
    if key not in _UNITS:
        raise ValueError(f"wave_unit must be Angstrom, nm or um, not {wave_unit!r}")
    return _UNITS[key]


def _medium_wave(spec, medium: str) -> np.ndarray:
    if medium == "air":
        from ..lines import vacuum_to_air

        return np.asarray(vacuum_to_air(spec.wavelength), dtype=float)
    if medium != "vacuum":
        raise ValueError(f"medium must be 'air' or 'vacuum', not {medium!r}")
    return spec.wavelength


def _uncertainty(spec, kind: str) -> np.ndarray:
    bad = spec.mask | ~np.isfinite(spec.sigma)
    if kind == "sigma":
        return np.where(bad, np.inf, spec.sigma)
    if kind == "var":
        return np.where(bad, np.inf, spec.sigma**2)
    if kind == "ivar":
        return spec.ivar
    raise ValueError(f"uncertainty must be 'sigma', 'var', 'ivar' or None, not {kind!r}")


def _usable_uncertainty(spec, kind):
    """``kind``, or ``None`` when the spectrum has no known uncertainty at all."""
    return kind if np.isfinite(spec.sigma).any() else None


def _meta_cards(spec, medium: str) -> list[tuple[str, object, str]]:
    from .header import clean_text

    m = spec.meta
    cards: list[tuple[str, object, str]] = []
    def ascii(text):  # FITS cards hold printable ASCII only
        return text.encode("ascii", "replace").decode("ascii") if text else text

    name = ascii(clean_text(m.object_name, limit=68))  # one card, no control characters
    if name:
        cards.append(("OBJECT", name, "object name"))
    if m.ra_deg is not None and m.dec_deg is not None:
        cards += [("RA", float(m.ra_deg), "[deg] ICRS"), ("DEC", float(m.dec_deg), "[deg] ICRS")]
    if m.mjd is not None:
        cards.append(("MJD-OBS", float(m.mjd), "[d] UTC, mid-exposure"))
    if m.site_lon_deg is not None and m.site_lat_deg is not None:
        import astropy.units as u
        from astropy.coordinates import EarthLocation

        loc = EarthLocation.from_geodetic(m.site_lon_deg, m.site_lat_deg, m.site_height_m or 0.0)
        for axis, value in zip("XYZ", (loc.x, loc.y, loc.z)):
            cards.append((f"OBSGEO-{axis}", float(value.to_value(u.m)), "[m] observatory, geocentric"))
    if m.frame in _SPECSYS:
        cards.append(("SPECSYS", _SPECSYS[m.frame], "velocity frame of the wavelengths"))
    if clean_text(m.flux_unit):
        cards.append(("BUNIT", ascii(clean_text(m.flux_unit, limit=68)), "flux unit"))
    cards.append(("VACUUM", medium == "vacuum", "wavelengths are in vacuum"))
    cards.append(("AIRORVAC", "air" if medium == "air" else "vac", "wavelength medium"))
    return cards


def _atomic_write(path, write_fn):
    """Call ``write_fn(tmp_path)`` then rename over ``path``."""
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=os.path.basename(path), dir=folder)
    os.close(fd)
    try:
        write_fn(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_fits_image(
    spec,
    path,
    *,
    sampling: str = "linear",
    uncertainty: str | None = "sigma",
    medium: str = "vacuum",
    wave_unit: str = "Angstrom",
    mask: bool = True,
    dtype=np.float64,
) -> None:
    """Write ``spec`` as a primary 1-D image with WCS keywords (see the module docstring).

    Parameters
    ----------
    sampling : {'linear', 'log'}
        Uniform in λ (``WAVE``) or in ln λ (``WAVE-LOG``).
    uncertainty : {'sigma', 'var', 'ivar', None}
        What the uncertainty extension holds (``None``: no extension).
    medium : {'vacuum', 'air'}
    wave_unit : {'Angstrom', 'nm', 'um'}
    mask : bool
        Write a MASK extension (uint8, 1 = bad) if any pixel is masked.
    """
    from astropy.io import fits

    unit, factor = _unit(wave_unit)
    uncertainty = _usable_uncertainty(spec, uncertainty)
    wave = _medium_wave(spec, medium) / factor
    n = wave.size
    if n < 2:
        raise ValueError("a WCS image needs at least two pixels")
    if sampling == "linear":
        step = (wave[-1] - wave[0]) / (n - 1)
        model = wave[0] + step * np.arange(n)
        ctype = "AWAV" if medium == "air" else "WAVE"
    elif sampling == "log":
        # Paper III -LOG: lambda = CRVAL1 * exp(CDELT1 * (p - CRPIX1) / CRVAL1), CRPIX1 = 1.
        dln = np.log(wave[-1] / wave[0]) / (n - 1)
        step = wave[0] * dln
        model = wave[0] * np.exp(dln * np.arange(n))
        ctype = "AWAV-LOG" if medium == "air" else "WAVE-LOG"
    else:
        raise ValueError(f"sampling must be 'linear' or 'log', not {sampling!r}")
    pix = np.abs(np.diff(model)).min()
    if np.max(np.abs(wave - model)) > 1e-6 * pix:
        raise ValueError(
            f"the {medium} wavelength grid is not uniform in {sampling} sampling; "
            "use write_fits_table or write_text for irregular grids"
        )
    hdu = fits.PrimaryHDU(np.asarray(spec.flux, dtype=dtype))
    hdr = hdu.header
    hdr["CTYPE1"] = (ctype, "Paper III spectral type")
    hdr["CUNIT1"] = (unit, "wavelength unit")
    hdr["CRPIX1"] = (1.0, "reference pixel (1-based)")
    hdr["CRVAL1"] = (float(wave[0]), "wavelength at CRPIX1")
    hdr["CDELT1"] = (float(step), "wavelength step at CRPIX1")
    for key, value, comment in _meta_cards(spec, medium):
        hdr[key] = (value, comment)
    hdus = [hdu]
    if uncertainty is not None:
        extname, cls3 = _UNCERT_EXT.get(uncertainty, (None, None))
        data = _uncertainty(spec, uncertainty)
        ext = fits.ImageHDU(np.asarray(data, dtype=dtype), name=extname)
        ext.header["HDUCLAS2"] = ("ERROR", "uncertainty of the primary flux")
        ext.header["HDUCLAS3"] = (cls3, "RMSE sigma, MSE variance, INVMSE 1/var")
        hdus.append(ext)
    if mask and spec.mask.any():
        hdus.append(fits.ImageHDU(spec.mask.astype(np.uint8), name="MASK"))
    _atomic_write(path, lambda tmp: fits.HDUList(hdus).writeto(tmp, overwrite=True))


def write_fits_table(
    spec,
    path,
    *,
    log10: bool = False,
    uncertainty: str | None = "sigma",
    medium: str = "vacuum",
    wave_unit: str = "Angstrom",
) -> None:
    """Write ``spec`` as a binary table (one pixel per row); ``log10=True`` writes LOGLAM."""
    from astropy.io import fits

    unit, factor = _unit(wave_unit)
    uncertainty = _usable_uncertainty(spec, uncertainty)
    wave = _medium_wave(spec, medium)
    cols = []
    if log10:
        cols.append(fits.Column(name="LOGLAM", format="D", unit="log10(Angstrom)", array=np.log10(wave)))
    else:
        cols.append(fits.Column(name="WAVELENGTH", format="D", unit=unit, array=wave / factor))
    cols.append(fits.Column(name="FLUX", format="D", unit=spec.meta.flux_unit or None, array=spec.flux))
    if uncertainty is not None:
        name = {"sigma": "SIGMA", "var": "VAR", "ivar": "IVAR"}.get(uncertainty)
        cols.append(fits.Column(name=name, format="D", array=_uncertainty(spec, uncertainty)))
    cols.append(fits.Column(name="MASK", format="B", array=spec.mask.astype(np.uint8)))
    table = fits.BinTableHDU.from_columns(cols, name="SPECTRUM")
    primary = fits.PrimaryHDU()
    for key, value, comment in _meta_cards(spec, medium):
        primary.header[key] = (value, comment)
    _atomic_write(path, lambda tmp: fits.HDUList([primary, table]).writeto(tmp, overwrite=True))


def write_text(
    spec,
    path,
    *,
    fmt: str | None = None,
    uncertainty: str | None = "sigma",
    medium: str = "vacuum",
    wave_unit: str = "Angstrom",
) -> None:
    """Write ``spec`` as CSV, TSV or ECSV (``fmt`` or the extension of ``path``)."""
    fmt = (fmt or os.path.splitext(os.fspath(path))[1].lstrip(".") or "csv").lower()
    if fmt not in ("csv", "tsv", "ecsv"):
        raise ValueError(f"fmt must be csv, tsv or ecsv, not {fmt!r}")
    unit, factor = _unit(wave_unit)
    uncertainty = _usable_uncertainty(spec, uncertainty)
    wave = _medium_wave(spec, medium) / factor
    cols = {"wavelength": wave, "flux": spec.flux}
    uname = {"sigma": "sigma", "var": "variance", "ivar": "ivar", None: None}[uncertainty]
    if uname:
        cols[uname] = _uncertainty(spec, uncertainty)
    cols["mask"] = spec.mask.astype(np.int8)
    cards = _meta_cards(spec, medium)
    if fmt == "ecsv":
        from astropy.table import Table

        table = Table(cols)
        table["wavelength"].unit = unit
        if spec.meta.flux_unit:
            table["flux"].description = f"flux in {spec.meta.flux_unit}"
        table.meta.update({k: v for k, v, _ in cards})
        _atomic_write(path, lambda tmp: table.write(tmp, format="ascii.ecsv", overwrite=True))
        return
    delim = "," if fmt == "csv" else "\t"
    names = [f"wavelength[{unit}]"] + list(cols)[1:]
    header = "\n".join(f"# {k}: {v}" for k, v, _ in cards) + "\n" + delim.join(names)
    data = np.column_stack([np.asarray(v, dtype=float) for v in cols.values()])
    fmts = ["%.17g"] * (data.shape[1] - 1) + ["%d"]

    def write(tmp):
        np.savetxt(tmp, data, fmt=fmts, delimiter=delim, header=header, comments="")

    _atomic_write(path, write)
