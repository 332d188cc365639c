"""Survey layouts, recognised by content (never by file name), and their conventions.

- **SDSS spec** (idlspec2d, BOSS/eBOSS/Legacy re-reductions): HDU 1 is a binary table
  ``COADD`` with columns ``loglam`` (log10 λ/Å), ``flux`` (1e-17 erg/s/cm²/Å), ``ivar`` and
  ``and_mask``. Only the co-add is read (later HDUs of full files hold single exposures).
  Pixels with ivar = 0 or a non-zero and_mask are masked (the and_mask rule is what
  specutils' SDSS loader does too).
- **SDSS spSpec** (DR6/DR7 spectro1d): primary 5 × N image; rows named by ARRAYn
  ('SPECTRUM', 'CONTINUUM-SUBTRACTED SPECTRUM', 'ERROR', 'MASK'); λ = 10^(COEFF0 + COEFF1·i)
  with i the 0-based pixel index; error 0 = bad pixel; mask non-zero = bad.
- **LAMOST DR1**: primary 5 × N image; EXTEN0 names the rows ('Flux Inverse Subcontinuum
  Andmask Ormask'); row 0 flux, row 1 inverse variance, row 3 and-mask; COEFF0/COEFF1 as above.

Pixel masks: in SDSS and LAMOST files only ivar = 0 / error = 0 masks a pixel; the and-mask
bits are informational (see :func:`bitmask_is_informational` for the measured reason).
LAMOST DR1 DATE-BEG/DATE-END are local time, so the observation time is taken from DATE-OBS,
which LAMOST writes as the median UTC.

Both image layouts are read by the generic named-row reader of :mod:`zsieve.io.fits_image`;
this module only names the format and applies the survey conventions: SDSS wavelengths are
vacuum (VACUUM = T) and heliocentric (SDSS convention, common practice); LAMOST says
HELIO = T itself. SDSS has no object-name keyword (NAME is the plate), so the object is
named plate-MJD-fiber from PLATEID, MJD and FIBERID (the SDSS convention).

Why not specutils' SDSS loaders (measured on the files in ``../shared/realdata``, astropy 8,
specutils 2.4, this machine): reading an SDSS spec file through ``Spectrum.read(...,
format='SDSS-III/IV spec')`` took about 20 ms (plus ~80 ms if the format has to be
identified), against 1-3 ms here (62 ms against 9 ms when the machine was loaded); the spSpec loader took about 80 ms and, more
important, puts the wavelengths one pixel too red: its first wavelength is
10^(COEFF0 + COEFF1), not 10^COEFF0, a shift of 1e-4 in log10 λ (69 km/s, Δz ≈ 2.3e-4),
because it reads the CRPIX1 = 1 reference pixel as 0-based. For batches of thousands of files
and for redshift work both matter, so the layouts are read directly; the test suite checks
our SDSS spec arrays against specutils' loader (flux, ivar and mask identical) as an outside
reference.
"""

from __future__ import annotations

from .header import HeaderView, as_bool, clean_text, parse_date
from .names import role_of

__all__ = ["sdss_coadd_index", "survey_overrides", "bitmask_is_informational"]


def _telescope(h: HeaderView) -> str:
    return (clean_text(h.get("TELESCOP")) or "").upper()


def bitmask_is_informational(h: HeaderView) -> bool:
    """True for SDSS and LAMOST files: their and-mask bits are not used to mask pixels.

    In these files ivar = 0 (or error = 0) already marks the unusable pixels, while the bit
    masks also flag pixels that are fine for a redshift (e.g. SDSS MANYBADCOLUMNS, BRIGHTSKY):
    measured on ../shared/realdata, and_mask != 0 would drop 1563 of the 4587 pixels of eBOSS
    7877-56898-0604 and half of DR7 spSpec-51984-0296-640, against the README check of more
    than 3600 good pixels per file (counted from the inverse variance).
    """
    t = _telescope(h)
    return t.startswith("SDSS") or t.startswith("LAMOST")


def sdss_coadd_index(infos) -> int | None:
    """Index of the SDSS ``COADD`` table HDU if the file has the SDSS spec layout."""
    for info in infos[1:3]:
        if info.kind == "bintable" and info.name.upper() == "COADD":
            roles = {role_of(c) for c in info.columns}
            if {"loglam", "flux", "ivar"} <= roles:
                return info.index
    return None


def survey_overrides(h: HeaderView, fmt: str) -> dict:
    """Format name, frame and object name implied by a survey layout (may be empty)."""
    out: dict = {}
    telescope = _telescope(h)
    sdss = telescope.startswith("SDSS")
    if fmt == "fits-image-named-rows":
        if clean_text(h.get("EXTEN0")) and "LAMOST" in telescope:
            out["format"] = "lamost-dr1"
        elif sdss and h.get("ARRAY1") is not None:
            out["format"] = "sdss-spspec"
    elif fmt == "sdss-spec":
        out["format"] = "sdss-spec"
    if sdss and as_bool(h.get("VACUUM")) and h.get("SPECSYS") is None:
        out["frame"] = "heliocentric"
        out["frame_source"] = "SDSS convention (heliocentric vacuum wavelengths)"
    if telescope.startswith("LAMOST"):
        # LAMOST writes DATE-OBS as the median UTC of the exposures and DATE-BEG/DATE-END in
        # local time (UTC+8), as the header comments say; use DATE-OBS as it is.
        mjd_obs = parse_date(h.get("DATE-OBS"))
        if mjd_obs is not None:
            out["mjd"] = round(mjd_obs, 10)
            out["time_source"] = "DATE-OBS (LAMOST: median UTC of the exposures)"
    plate, mjd, fiber = h.number("PLATEID"), h.number("MJD"), h.number("FIBERID")
    if sdss and plate is not None and mjd is not None and fiber is not None and h.get("OBJECT") is None:
        out["object_name"] = f"{int(plate):04d}-{int(mjd)}-{int(fiber):04d}"
    return out
