"""A corpus of bad (and a few good) spectrum files, made at test time.

``build_corpus(directory, seed)`` writes every case into ``directory`` and returns the list of
:class:`Case` descriptions. Nothing here is committed as a blob: the files are produced from
numpy arrays with astropy (FITS, ECSV) and plain text (CSV/TSV), then damaged on purpose at
the byte level where the damage is the point (truncation, corrupted cards, garbage).

Each case declares what a well-behaved loader plus engine must do with it:

``"fit"``
    the data are usable: reading gives a spectrum and the measurement returns a result;
``"error"``
    the data are not usable: reading raises one :class:`zsieve.errors.SpectrumFileError`
    whose message names the file (``limit=True``: specifically ``LimitExceededError``,
    refused before the large allocation);
``"reject"``
    too little to measure (one pixel, one finite value): the reader refuses it as for
    ``"error"``, or it loads and the measurement returns a result with ``status != "ok"``
    and a message - a clean refusal either way;
``"either"``
    both clean outcomes are defensible (e.g. a CSV cut exactly after a complete row, a
    FITS header with a default-able keyword missing). The case still must end in one of
    the two clean outcomes, and where the file's wavelength unit is ambiguous
    (``wave_range`` set) a fitted result must have the true wavelength range or the
    reader must have warned: never a silent factor of 10 in 1+z.

The base spectrum is an emission-line galaxy built from NIST vacuum rest wavelengths (from
memory) at a known redshift, so the usable cases can also check the answer.

Run ``python tests/robustness/corpus.py DIR`` to write the corpus into DIR and list it.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import os
import sys
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

__all__ = ["Case", "build_corpus", "galaxy_flux", "REST_LINES", "Z_TRUE", "MAX_PIXELS_FALLBACK"]

#: Vacuum rest wavelengths (Angstrom) of strong galaxy emission lines, NIST ASD (from memory).
REST_LINES = {
    "[O II] 3727": 3727.09,
    "[O II] 3730": 3729.88,
    "H-beta": 4862.68,
    "[O III] 4960": 4960.30,
    "[O III] 5008": 5008.24,
    "H-alpha": 6564.61,
}
#: Relative peak heights (typical star-forming galaxy, common practice; approximate). Six lines
#: keep each fit quick while leaving the redshift unambiguous.
_HEIGHTS = {
    "[O II] 3727": 2.0, "[O II] 3730": 2.6, "H-beta": 1.8, "[O III] 4960": 1.3,
    "[O III] 5008": 3.9, "H-alpha": 5.0,
}
#: The redshift of the corpus galaxy.
Z_TRUE = 0.2
#: Used only if zsieve.spectrum cannot be imported (it always can in this project).
MAX_PIXELS_FALLBACK = 2_000_000
C_KMS = 299792.458  # speed of light, km/s (SI definition)

_FITS_BLOCK = 2880
DLOG10 = 2e-4  # log10 step of the log-sampled corpus spectra
DW = 2.7  # Angstrom step of the linear ones


@dataclass
class Case:
    """One corpus file and what must become of it."""

    name: str
    filename: str
    expect: str  # "fit" | "error" | "reject" | "either"
    why: str
    family: str
    limit: bool = False  # must be refused as LimitExceededError before allocating
    z_true: float | None = None  # check the fitted z (clean baseline cases only)
    wave_range: tuple[float, float] | None = None  # true vacuum range, Angstrom (unit checks)
    hostile_name: bool = False  # the header carries an untrusted OBJECT name
    tags: list[str] = field(default_factory=list)

    def to_dict(self):
        return asdict(self)


# ----------------------------------------------------------------------------- spectra
def galaxy_flux(wave, z=Z_TRUE, *, sigma_kms=120.0, continuum=1.0, scale=1.0):
    """Noiseless emission-line galaxy: sloped continuum plus Gaussian lines at redshift z."""
    wave = np.asarray(wave, dtype=float)
    flux = continuum * (1.0 + 0.15 * (wave - 6000.0) / 3000.0)
    for name, rest in REST_LINES.items():
        centre = rest * (1.0 + z)
        s = centre * sigma_kms / C_KMS
        flux = flux + scale * _HEIGHTS[name] * np.exp(-0.5 * ((wave - centre) / s) ** 2)
    return flux


def _noisy(wave, rng, noise=0.08, z=Z_TRUE):
    flux = galaxy_flux(wave, z) + rng.normal(0.0, noise, wave.size)
    return flux, np.full(wave.size, noise)


def _log_grid(n=1900, w0=3800.0, dlog10=None):
    dlog10 = DLOG10 if dlog10 is None else dlog10
    return w0 * 10.0 ** (dlog10 * np.arange(n))


def _lin_grid(n=2000, w0=3800.0, dw=DW):
    return w0 + dw * np.arange(n)


# ----------------------------------------------------------------------------- writers
def _fits_image_bytes(flux, header=None, extensions=(), dtype="f8", primary_data=True):
    """FITS bytes: primary 1-D image with ``header`` cards, plus (extname, array, cards)."""
    from astropy.io import fits

    data = np.asarray(flux, dtype=dtype) if primary_data else None
    hdu = fits.PrimaryHDU(data)
    for k, v in (header or {}).items():
        hdu.header[k] = v
    hdus = [hdu]
    for extname, arr, cards in extensions:
        ext = fits.ImageHDU(np.asarray(arr, dtype=dtype), name=extname)
        for k, v in (cards or {}).items():
            ext.header[k] = v
        hdus.append(ext)
    buf = io.BytesIO()
    fits.HDUList(hdus).writeto(buf)
    return buf.getvalue()


def _wcs_linear(w0=3800.0, dw=DW, ctype="WAVE", cunit="Angstrom", **more):
    h = {"CTYPE1": ctype, "CUNIT1": cunit, "CRVAL1": w0, "CDELT1": dw, "CRPIX1": 1.0}
    h.update(more)
    return h


def _fits_table_bytes(columns, units=None, header=None, one_row=False):
    """FITS bytes: empty primary plus a binary table (rows = pixels, or one row of arrays)."""
    from astropy.io import fits
    from astropy.table import Table

    if one_row:
        t = Table({k: [np.asarray(v)] for k, v in columns.items()})
    else:
        t = Table({k: np.asarray(v) for k, v in columns.items()})
    for k, u in (units or {}).items():
        t[k].unit = u
    tab = fits.table_to_hdu(t)
    for k, v in (header or {}).items():
        tab.header[k] = v
    buf = io.BytesIO()
    fits.HDUList([fits.PrimaryHDU(), tab]).writeto(buf)
    return buf.getvalue()


def _csv_text(header, rows, delimiter=",", comments=()):
    out = io.StringIO()
    for c in comments:
        out.write(f"# {c}\n")
    w = csv.writer(out, delimiter=delimiter, lineterminator="\n")
    if header is not None:
        w.writerow(header)
    for r in rows:
        w.writerow(r)
    return out.getvalue()


def _rows(*cols, fmt="%.6f"):
    return [[fmt % v for v in row] for row in zip(*cols)]


def _ecsv_text(columns, units=None, meta=None):
    from astropy.table import Table

    t = Table({k: np.asarray(v) for k, v in columns.items()}, meta=meta or {})
    for k, u in (units or {}).items():
        t[k].unit = u
    buf = io.StringIO()
    t.write(buf, format="ascii.ecsv")
    return buf.getvalue()


# ------------------------------------------------------------------- byte surgery
def _header_end(data: bytes, start=0) -> int:
    """Byte offset just past the header starting at ``start`` (block aligned)."""
    pos = start
    while pos + 80 <= len(data):
        if data[pos : pos + 8] == b"END     ":
            end = pos + 80
            return ((end + _FITS_BLOCK - 1) // _FITS_BLOCK) * _FITS_BLOCK
        pos += 80
    raise ValueError("no END card")


def _set_card(data: bytes, key: str, text: str | bytes | None, hdu_start=0) -> bytes:
    """Replace the card ``key`` of the header at ``hdu_start`` by raw ``text`` (None = delete)."""
    b = bytearray(data)
    end = _header_end(data, hdu_start)
    k = key.encode().ljust(8)
    for pos in range(hdu_start, end, 80):
        if bytes(b[pos : pos + 8]) == k:
            if text is None:
                # delete: shift the rest of the header up by one card, pad with blanks
                rest = bytes(b[pos + 80 : end]) + b" " * 80
                b[pos:end] = rest
            else:
                raw = text.encode("latin-1") if isinstance(text, str) else text
                b[pos : pos + 80] = raw.ljust(80)[:80]
            return bytes(b)
    raise KeyError(key)


def _card(key, value: str) -> str:
    return f"{key:<8}= {value:>20}"


# --------------------------------------------------------------------- the corpus
class _Builder:
    def __init__(self, directory: Path, seed: int):
        self.dir = Path(directory)
        self.dir.mkdir(parents=True, exist_ok=True)
        self.rng = np.random.default_rng(seed)
        self.cases: list[Case] = []
        try:
            from zsieve.spectrum import MAX_PIXELS
        except ImportError:  # pragma: no cover - the package is always present here
            MAX_PIXELS = MAX_PIXELS_FALLBACK
        self.max_pixels = int(MAX_PIXELS)

    def add(self, family, slug, ext, content, expect, why, **kw):
        name = f"{len(self.cases):03d}_{family}_{slug}"
        filename = kw.pop("filename", None) or f"{name}.{ext}"
        path = self.dir / filename
        if isinstance(content, str):
            content = content.encode(kw.pop("encoding", "utf-8"))
        path.write_bytes(content)
        self.cases.append(Case(name=name, filename=filename, expect=expect, why=why, family=family, **kw))
        return path


def build_corpus(directory, seed: int = 20261202) -> list[Case]:
    """Write the whole corpus into ``directory``; return the cases (at least 200)."""
    b = _Builder(Path(directory), seed)
    rng = b.rng
    _baselines(b, rng)
    _truncations(b, rng)
    _wcs_cases(b, rng)
    _shape_and_limit_cases(b, rng)
    _value_cases(b, rng)
    _wavelength_order_cases(b, rng)
    _uncertainty_cases(b, rng)
    _unit_cases(b, rng)
    _text_cases(b, rng)
    _garbage_cases(b, rng)
    _header_text_cases(b, rng)
    _bitflip_cases(b, rng)
    names = [c.filename for c in b.cases]
    assert len(set(names)) == len(names), "duplicate corpus file names"
    return b.cases


# Each family below adds cases; expectations follow /work issue 2's list of bad inputs
# (unreadable/truncated, no spectrum, non-monotonic or duplicated wavelengths, length
# mismatch, all-NaN flux, bad uncertainties masked, absurd declared sizes).


def _baselines(b, rng):
    lw = _lin_grid()
    f, s = _noisy(lw, rng)
    b.add("base", "image_linear", "fits",
          _fits_image_bytes(f, _wcs_linear(), [("ERR", s, None)]), "fit",
          "valid 1-D image, linear vacuum WCS, 1-sigma extension", z_true=Z_TRUE)
    b.add("base", "image_flux_only", "fits", _fits_image_bytes(f, _wcs_linear()), "fit",
          "valid 1-D image without uncertainty", z_true=Z_TRUE)
    b.add("base", "image_cd1_1", "fits",
          _fits_image_bytes(f, {"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 3800.0,
                                "CD1_1": DW, "CRPIX1": 1.0}), "fit",
          "valid image with CD1_1 instead of CDELT1", z_true=Z_TRUE)
    lg = _log_grid()
    f2, s2 = _noisy(lg, rng)
    b.add("base", "image_wave_log", "fits",
          _fits_image_bytes(f2, {"CTYPE1": "WAVE-LOG", "CUNIT1": "Angstrom", "CRVAL1": lg[0],
                                 "CDELT1": lg[0] * np.log(10) * DLOG10, "CRPIX1": 1.0},
                            [("ERR", s2, None)]), "fit",
          "valid WAVE-LOG image (Paper III: CDELT1 = CRVAL1 * dlnlambda)", z_true=Z_TRUE)
    b.add("base", "table", "fits",
          _fits_table_bytes({"WAVELENGTH": lg, "FLUX": f2, "ERROR": s2},
                            {"WAVELENGTH": "Angstrom"}), "fit",
          "valid binary table, one pixel per row", z_true=Z_TRUE)
    b.add("base", "table_one_row", "fits",
          _fits_table_bytes({"WAVELENGTH": lg, "FLUX": f2, "ERROR": s2},
                            {"WAVELENGTH": "Angstrom"}, one_row=True), "fit",
          "valid binary table, one spectrum in one row of array columns", z_true=Z_TRUE)
    b.add("base", "csv", "csv", _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2)),
          "fit", "valid CSV", z_true=Z_TRUE)
    b.add("base", "tsv", "tsv",
          _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2), delimiter="\t"),
          "fit", "valid TSV", z_true=Z_TRUE)
    b.add("base", "ecsv", "ecsv",
          _ecsv_text({"wavelength": lg, "flux": f2, "error": s2}, {"wavelength": "Angstrom"}),
          "fit", "valid ECSV with units", z_true=Z_TRUE)
    b.add("base", "file name with spaces", "csv",
          _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2)), "fit",
          "file name with spaces", z_true=Z_TRUE,
          filename="base file name with spaces é.csv")
    b.add("base", "leading_dash", "csv",
          _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2)), "fit",
          "file name starting with a dash (must not be read as an option)", z_true=Z_TRUE,
          filename="-base-leading-dash.csv")
    b.add("base", "gzipped_fits", "fits.gz",
          gzip.compress(_fits_image_bytes(f, _wcs_linear()), mtime=0), "either",
          "gzip-compressed FITS image (astropy reads .fits.gz transparently)")


def _truncations(b, rng):
    """Files cut at seeded random offsets inside their header or data."""
    lw = _lin_grid(1500)
    f, s = _noisy(lw, rng)
    lg = _log_grid(1500)
    f2, s2 = _noisy(lg, rng)
    sources = {
        "image": (_fits_image_bytes(f, _wcs_linear(), dtype="f4"), "fits"),
        "image_err": (_fits_image_bytes(f, _wcs_linear(), [("ERR", s, None)], dtype="f4"), "fits"),
        "table": (_fits_table_bytes({"WAVELENGTH": lg, "FLUX": f2, "ERROR": s2},
                                    {"WAVELENGTH": "Angstrom"}), "fits"),
    }
    for label, (data, ext) in sources.items():
        # the end of the real data of the last HDU (the block padding after it excluded:
        # cutting only padding leaves the data complete, a separate 'either' case)
        from astropy.io import fits

        with fits.open(io.BytesIO(data)) as hdul:
            last = hdul[-1]
            h = last.header
            n = int(np.prod([h[f"NAXIS{k}"] for k in range(1, h["NAXIS"] + 1)])) if h["NAXIS"] else 0
            nbytes = abs(h["BITPIX"]) // 8 * h.get("GCOUNT", 1) * (h.get("PCOUNT", 0) + n)
            data_end = last.fileinfo()["datLoc"] + nbytes
        offsets = sorted(set(int(x) for x in rng.integers(1, data_end, 14)))
        offsets += [80 * 3, _FITS_BLOCK, data_end - 1]  # mid-header, header only, one byte short
        for off in sorted(set(offsets)):
            b.add("trunc", f"{label}_at_{off}", ext, data[:off], "error",
                  f"FITS {label} truncated at byte {off} of {len(data)} (data end at {data_end})")
        if data_end < len(data):
            b.add("trunc", f"{label}_padding_at_{data_end + 1}", ext, data[: data_end + 1], "either",
                  "FITS cut inside the block padding after complete data (non-standard length)")
    text = _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2))
    header_len = text.index("\n") + 1
    b.add("trunc", "csv_in_header", "csv", text[: header_len // 2], "error",
          "CSV cut inside its header row (no data)")
    for off in sorted(set(int(x) for x in rng.integers(header_len + 2000, len(text) - 1, 10))):
        b.add("trunc", f"csv_at_{off}", "csv", text[:off], "either",
              f"CSV cut at byte {off}: the last row may be partial (drop it or refuse)")
    ecsv = _ecsv_text({"wavelength": lg, "flux": f2, "error": s2}, {"wavelength": "Angstrom"})
    yaml_end = ecsv.index("wavelength flux error")
    for off in sorted(set(int(x) for x in rng.integers(10, yaml_end - 5, 4))):
        b.add("trunc", f"ecsv_header_at_{off}", "ecsv", ecsv[:off], "error",
              f"ECSV cut inside its YAML header at byte {off}")


def _wcs_cases(b, rng):
    lw = _lin_grid()
    f, s = _noisy(lw, rng)
    good = _fits_image_bytes(f, _wcs_linear(), [("ERR", s, None)])

    def patched(key, text):
        return _set_card(good, key, text)

    b.add("wcs", "no_crval1", "fits", patched("CRVAL1", None), "error",
          "no CRVAL1: wavelengths would start at 0 (FITS default)")
    b.add("wcs", "no_cdelt1", "fits", patched("CDELT1", None), "either",
          "no CDELT1 or CD1_1 (FITS default 1.0 per pixel)")
    b.add("wcs", "no_crpix1", "fits", patched("CRPIX1", None), "either",
          "no CRPIX1 (FITS default 0: a one-pixel shift)", z_true=None)
    b.add("wcs", "no_ctype1", "fits", patched("CTYPE1", None), "either",
          "no CTYPE1 (a linear axis of unknown kind)")
    nowcs = _fits_image_bytes(f)
    b.add("wcs", "no_wcs_at_all", "fits", nowcs, "error", "a bare array: no wavelength solution")
    b.add("wcs", "cdelt1_zero", "fits", patched("CDELT1", _card("CDELT1", "0.0")), "error",
          "CDELT1 = 0: every pixel at one wavelength")
    b.add("wcs", "cdelt1_text", "fits", patched("CDELT1", "CDELT1  = 'two'"), "error",
          "CDELT1 is a string")
    b.add("wcs", "crval1_text", "fits", patched("CRVAL1", "CRVAL1  = 'blue end'"), "error",
          "CRVAL1 is a string")
    b.add("wcs", "cdelt1_nan", "fits", patched("CDELT1", _card("CDELT1", "NAN")), "error",
          "CDELT1 = NAN (not a FITS number)")
    b.add("wcs", "crval1_inf", "fits", patched("CRVAL1", _card("CRVAL1", "1.0E999")), "error",
          "CRVAL1 overflows a double")
    b.add("wcs", "ctype1_celestial", "fits", patched("CTYPE1", "CTYPE1  = 'RA---TAN'"), "error",
          "the axis is a sky coordinate, not a wavelength")
    b.add("wcs", "ctype1_freq", "fits", patched("CTYPE1", "CTYPE1  = 'FREQ    '"), "either",
          "the axis claims to be frequency while the values are Angstrom-like")
    b.add("wcs", "cunit1_furlong", "fits", patched("CUNIT1", "CUNIT1  = 'furlong '"), "error",
          "CUNIT1 is not a wavelength unit")
    b.add("wcs", "cunit1_garbage", "fits", patched("CUNIT1", "CUNIT1  = '%%$#@!  '"), "error",
          "CUNIT1 unparsable")
    b.add("wcs", "negative_wavelengths", "fits",
          _fits_image_bytes(f, _wcs_linear(w0=100.0, dw=-5.0)), "error",
          "the solution runs through zero to negative wavelengths")
    b.add("wcs", "crval1_huge", "fits", _fits_image_bytes(f, _wcs_linear(w0=1e30, dw=1e26)),
          "either", "wavelengths of 1e30 Angstrom")
    lg = _log_grid()
    f2, _ = _noisy(lg, rng)
    b.add("wcs", "wave_log_given_as_log10", "fits",
          _fits_image_bytes(f2, {"CTYPE1": "WAVE-LOG", "CUNIT1": "Angstrom",
                                 "CRVAL1": float(np.log10(lg[0])), "CDELT1": DLOG10,
                                 "CRPIX1": 1.0}), "either",
          "WAVE-LOG with CRVAL1/CDELT1 given as log10 values (not Paper III)",
          wave_range=(float(lg[0]), float(lg[-1])))
    b.add("wcs", "reversed_cdelt", "fits",
          _fits_image_bytes(f[::-1], _wcs_linear(w0=float(lw[-1]), dw=-DW),
                            [("ERR", s[::-1], None)]), "fit",
          "negative CDELT1: wavelengths decrease along the array (legal)", z_true=Z_TRUE)
    air = _fits_image_bytes(f, _wcs_linear(ctype="AWAV"))
    from zsieve.lines import air_to_vacuum

    b.add("wcs", "awav", "fits", air, "fit", "air wavelengths (AWAV): converted to vacuum",
          wave_range=(float(air_to_vacuum(lw[0])), float(air_to_vacuum(lw[-1]))))


def _shape_and_limit_cases(b, rng):
    from astropy.io import fits

    lw = _lin_grid(800)
    f, s = _noisy(lw, rng)
    small = _fits_image_bytes(f, _wcs_linear(), dtype="f4")
    big = str(10**12)
    b.add("limit", "naxis1_1e12", "fits", _set_card(small, "NAXIS1", _card("NAXIS1", big)),
          "error", "header claims 10**12 pixels over a tiny data block", limit=True)
    b.add("limit", "naxis1_over_max", "fits",
          _set_card(small, "NAXIS1", _card("NAXIS1", str(b.max_pixels + 1))), "error",
          "header claims one pixel more than zsieve's maximum", limit=True)
    b.add("limit", "naxis1_int64_max", "fits",
          _set_card(small, "NAXIS1", _card("NAXIS1", str(2**63 - 1))), "error",
          "header claims 2**63-1 pixels", limit=True)
    two_d = _fits_image_bytes(np.vstack([f, s]), _wcs_linear(), dtype="f4")
    t = _set_card(two_d, "NAXIS1", _card("NAXIS1", str(10**6)))
    b.add("limit", "naxis2d_1e12", "fits", _set_card(t, "NAXIS2", _card("NAXIS2", str(10**6))),
          "error", "2-D header claims 10**6 x 10**6 values", limit=True)
    tab = _fits_table_bytes({"WAVELENGTH": lw, "FLUX": f}, {"WAVELENGTH": "Angstrom"})
    start = _header_end(tab, 0)
    b.add("limit", "table_naxis2_1e12", "fits",
          _set_card(tab, "NAXIS2", _card("NAXIS2", big), hdu_start=start), "error",
          "binary table claims 10**12 rows", limit=True)
    tab1 = _fits_table_bytes({"WAVELENGTH": lw, "FLUX": f}, {"WAVELENGTH": "Angstrom"},
                             one_row=True)
    start1 = _header_end(tab1, 0)
    t2 = _set_card(tab1, "TFORM1", "TFORM1  = '1000000000D'", hdu_start=start1)
    t2 = _set_card(t2, "TFORM2", "TFORM2  = '1000000000D'", hdu_start=start1)
    b.add("limit", "table_tform_1e9", "fits",
          _set_card(t2, "NAXIS1", _card("NAXIS1", str(16 * 10**9)), hdu_start=start1), "error",
          "one-row table whose array columns claim 10**9 elements", limit=True)
    # a real file larger than any spectrum: sparse (no disk used), valid header in front
    csv_head = _csv_text(["wavelength", "flux"], _rows(lw[:400], f[:400])).encode()
    for ext, head in (("fits", small[:_FITS_BLOCK]), ("csv", csv_head)):
        p = b.add("limit", f"sparse_3GiB_{ext}", ext, head, "error",
                  "a 3 GiB file (sparse): refused by size before reading", limit=True)
        with open(p, "r+b") as fh:
            fh.truncate(3 * 1024**3)
    b.add("shape", "naxis1_negative", "fits", _set_card(small, "NAXIS1", _card("NAXIS1", "-5")),
          "error", "NAXIS1 = -5")
    b.add("shape", "naxis1_text", "fits", _set_card(small, "NAXIS1", "NAXIS1  = 'many'"),
          "error", "NAXIS1 is a string")
    b.add("shape", "naxis1_larger_than_data", "fits",
          _set_card(small, "NAXIS1", _card("NAXIS1", str(5000))), "error",
          "NAXIS1 = 5000 but the data block holds 800 pixels")
    b.add("shape", "naxis1_smaller_than_data", "fits",
          _set_card(small, "NAXIS1", _card("NAXIS1", str(400))), "either",
          "NAXIS1 = 400 but 800 pixels follow (trailing bytes after the HDU)")
    b.add("shape", "bitpix_invalid", "fits", _set_card(small, "BITPIX", _card("BITPIX", "13")),
          "error", "BITPIX = 13 is not a FITS type")
    b.add("shape", "no_data", "fits", _fits_image_bytes(None, primary_data=False), "error",
          "a primary header and nothing else")
    b.add("shape", "naxis1_zero", "fits",
          _fits_image_bytes(np.zeros(0), _wcs_linear()), "error", "zero-length image")
    b.add("shape", "one_pixel_image", "fits",
          _fits_image_bytes(f[:1], _wcs_linear()), "reject", "one-pixel image")
    b.add("shape", "one_row_table", "fits",
          _fits_table_bytes({"WAVELENGTH": lw[:1], "FLUX": f[:1]}, {"WAVELENGTH": "Angstrom"}),
          "reject", "one-pixel table")
    b.add("shape", "zero_row_table", "fits",
          _fits_table_bytes({"WAVELENGTH": lw[:0], "FLUX": f[:0]}, {"WAVELENGTH": "Angstrom"}),
          "error", "table with zero rows")
    b.add("shape", "csv_header_only", "csv", "wavelength,flux,error\n", "error",
          "CSV with a header and no rows")
    b.add("shape", "csv_one_row", "csv", _csv_text(["wavelength", "flux"], _rows(lw[:1], f[:1])),
          "reject", "CSV with one pixel")
    b.add("shape", "csv_three_rows", "csv", _csv_text(["wavelength", "flux"], _rows(lw[:3], f[:3])),
          "reject", "CSV with three pixels")
    b.add("shape", "empty_fits", "fits", b"", "error", "zero-byte .fits")
    b.add("shape", "empty_csv", "csv", b"", "error", "zero-byte .csv")
    b.add("shape", "blank_csv", "csv", "\n\n   \n\t\n", "error", "whitespace-only .csv")
    b.add("shape", "cube", "fits", _fits_image_bytes(np.ones((4, 5, 6)), _wcs_linear()), "error",
          "a 3-D cube is not a 1-D spectrum")
    b.add("shape", "err_length_mismatch", "fits",
          _fits_image_bytes(f, _wcs_linear(), [("ERR", s[:700], None)]), "error",
          "flux has 800 pixels, its ERR extension 700")
    tab_mm = _fits_table_bytes({"WAVELENGTH": lw, "FLUX": f[:700]}, {"WAVELENGTH": "Angstrom"},
                               one_row=True)
    b.add("shape", "table_row_length_mismatch", "fits", tab_mm, "error",
          "one-row table: 800 wavelengths, 700 fluxes")
    b.add("shape", "ecsv_zero_rows", "ecsv",
          _ecsv_text({"wavelength": lw[:0], "flux": f[:0]}, {"wavelength": "Angstrom"}), "error",
          "ECSV with zero rows")
    b.add("shape", "int16_bscale", "fits",
          _int_image(f, fits), "fit", "BITPIX 16 with BSCALE/BZERO (scaled integers)",
          z_true=None)


def _int_image(flux, fits):
    hdu = fits.PrimaryHDU(np.asarray(flux, dtype="f8"))
    for k, v in _wcs_linear().items():
        hdu.header[k] = v
    hdu.scale("int16", bscale=1e-3, bzero=0.0)
    buf = io.BytesIO()
    hdu.writeto(buf)
    return buf.getvalue()


def _value_cases(b, rng):
    lg = _log_grid()
    f, s = _noisy(lg, rng)
    cols = ["wavelength", "flux", "error"]
    n = lg.size

    def csv_of(flux, sig=s, wave=lg):
        return _csv_text(cols, [["%.6f" % w, _fmt(v), _fmt(e)] for w, v, e in zip(wave, flux, sig)])

    hdr = {"CTYPE1": "WAVE-LOG", "CUNIT1": "Angstrom", "CRVAL1": lg[0],
           "CDELT1": lg[0] * np.log(10) * DLOG10, "CRPIX1": 1.0}
    for label, flux, expect, why in (
        ("all_nan", np.full(n, np.nan), "error", "every flux value NaN"),
        ("all_inf", np.full(n, np.inf), "error", "every flux value +inf"),
        ("all_zero", np.zeros(n), "either", "flux identically zero: nothing to measure"),
        ("some_inf", np.where(rng.random(n) < 0.05, np.inf, f), "fit", "5% of pixels +/-inf"),
        ("some_nan", np.where(rng.random(n) < 0.2, np.nan, f), "fit", "20% of pixels NaN"),
        ("nan_run", np.where((np.arange(n) > 500) & (np.arange(n) < 900), np.nan, f), "fit",
         "a run of 400 NaN pixels"),
        ("constant", np.full(n, 3.0), "either", "a flat spectrum with no features"),
        ("huge_values", f * 1e300, "fit", "flux of order 1e300 (squares overflow)"),
        ("tiny_values", f * 1e-300, "fit", "flux of order 1e-300 (squares underflow)"),
        ("cgs_scale", f * 1e-17, "fit", "flux in erg/s/cm2/A, of order 1e-17 (survey units)"),
        ("all_nan_but_one", np.where(np.arange(n) == 7, 1.0, np.nan), "reject",
         "a single finite pixel"),
    ):
        sig = s * {"huge_values": 1e300, "tiny_values": 1e-300, "cgs_scale": 1e-17}.get(label, 1.0)
        b.add("values", f"csv_{label}", "csv", csv_of(flux, sig), expect, why)
        b.add("values", f"image_{label}", "fits",
              _fits_image_bytes(flux, hdr, [("ERR", sig, None)]), expect, why)
    b.add("values", "csv_nan_wavelength", "csv",
          csv_of(f, s, np.where(np.arange(n) == 100, np.nan, lg)), "either",
          "one NaN wavelength (drop the row or refuse)")
    b.add("values", "csv_inf_wavelength", "csv",
          csv_of(f, s, np.where(np.arange(n) == n - 1, np.inf, lg)), "either",
          "last wavelength +inf")
    b.add("values", "table_all_nan_wavelength", "fits",
          _fits_table_bytes({"WAVELENGTH": np.full(n, np.nan), "FLUX": f},
                            {"WAVELENGTH": "Angstrom"}), "error", "every wavelength NaN")
    b.add("values", "csv_negative_wavelengths", "csv", csv_of(f, s, lg - 6000.0), "error",
          "wavelengths from -2200 to +3000")


def _fmt(v):
    return repr(float(v)) if np.isfinite(v) else ("nan" if np.isnan(v) else ("inf" if v > 0 else "-inf"))


def _wavelength_order_cases(b, rng):
    lg = _log_grid()
    f, s = _noisy(lg, rng)
    cols = ["wavelength", "flux", "error"]
    shuffled = lg.copy()
    seg = slice(1000, 1040)
    shuffled[seg] = rng.permutation(shuffled[seg])
    dup = lg.copy()
    dup[1201] = dup[1200]
    plateau = lg.copy()
    plateau[300:320] = plateau[300]
    zigzag = lg.copy()
    zigzag[::2], zigzag[1::2] = lg[1::2], lg[::2]
    for label, wave, expect, why, extra in (
        ("shuffled_segment", shuffled, "error", "40 wavelengths out of order", {}),
        ("one_duplicate", dup, "error", "one wavelength repeated", {}),
        ("plateau", plateau, "error", "20 pixels at one wavelength", {}),
        ("zigzag", zigzag, "error", "every pair of wavelengths swapped", {}),
    ):
        b.add("order", f"csv_{label}", "csv", _csv_text(cols, _rows(wave, f, s)), expect, why)
        b.add("order", f"table_{label}", "fits",
              _fits_table_bytes({"WAVELENGTH": wave, "FLUX": f, "ERROR": s},
                                {"WAVELENGTH": "Angstrom"}), expect, why)
    rev = dict(z_true=Z_TRUE)
    b.add("order", "csv_reversed", "csv", _csv_text(cols, _rows(lg[::-1], f[::-1], s[::-1])),
          "fit", "wavelengths strictly decreasing (legal)", **rev)
    b.add("order", "table_reversed", "fits",
          _fits_table_bytes({"WAVELENGTH": lg[::-1], "FLUX": f[::-1], "ERROR": s[::-1]},
                            {"WAVELENGTH": "Angstrom"}), "fit",
          "table with decreasing wavelengths (legal)", **rev)
    b.add("order", "table_one_row_reversed", "fits",
          _fits_table_bytes({"WAVELENGTH": lg[::-1], "FLUX": f[::-1], "ERROR": s[::-1]},
                            {"WAVELENGTH": "Angstrom"}, one_row=True), "fit",
          "one-row table with decreasing wavelengths (legal)", **rev)
    b.add("order", "ecsv_reversed", "ecsv",
          _ecsv_text({"wavelength": lg[::-1], "flux": f[::-1], "error": s[::-1]},
                     {"wavelength": "Angstrom"}), "fit", "ECSV with decreasing wavelengths", **rev)


def _uncertainty_cases(b, rng):
    lg = _log_grid()
    f, s = _noisy(lg, rng)
    n = lg.size
    cols = ["wavelength", "flux", "error"]
    some = rng.random(n) < 0.1
    hdr = {"CTYPE1": "WAVE-LOG", "CUNIT1": "Angstrom", "CRVAL1": lg[0],
           "CDELT1": lg[0] * np.log(10) * DLOG10, "CRPIX1": 1.0}
    for label, sig, expect, why in (
        ("some_negative", np.where(some, -s, s), "fit", "10% negative sigma (mask them)"),
        ("some_zero", np.where(some, 0.0, s), "fit", "10% zero sigma (mask them)"),
        ("some_nan", np.where(some, np.nan, s), "fit", "10% NaN sigma (mask them)"),
        ("all_negative", -s, "error", "every sigma negative: no usable pixel"),
        ("all_zero", np.zeros(n), "error", "every sigma zero: no usable pixel"),
        ("all_nan", np.full(n, np.nan), "error", "every sigma NaN: no usable pixel"),
        ("variance_as_sigma", s**2, "fit", "variance written in the sigma column"),
        ("sigma_huge", s * 1e6, "fit", "uncertainties a million times too large"),
    ):
        b.add("sigma", f"csv_{label}", "csv",
              _csv_text(cols, [["%.6f" % w, repr(float(v)), _fmt(e)] for w, v, e in zip(lg, f, sig)]),
              expect, why)
        b.add("sigma", f"image_{label}", "fits", _fits_image_bytes(f, hdr, [("ERR", sig, None)]),
              expect, why)
    ivar = 1.0 / s**2
    b.add("sigma", "image_ivar_ext", "fits", _fits_image_bytes(f, hdr, [("IVAR", ivar, None)]),
          "fit", "inverse variance in an IVAR extension", z_true=Z_TRUE)
    b.add("sigma", "image_ivar_zero", "fits",
          _fits_image_bytes(f, hdr, [("IVAR", np.zeros(n), None)]), "error",
          "inverse variance zero everywhere: no usable pixel")
    b.add("sigma", "csv_ivar_column", "csv",
          _csv_text(["wavelength", "flux", "ivar"], _rows(lg, f, ivar)), "fit",
          "CSV with an ivar column")


def _unit_cases(b, rng):
    lg = _log_grid()
    f, s = _noisy(lg, rng)
    true = (float(lg[0]), float(lg[-1]))
    for unit, factor in (("nm", 10.0), ("um", 1e4)):
        w = lg / factor
        b.add("units", f"csv_{unit}_no_unit", "csv",
              _csv_text(["wavelength", "flux", "error"], _rows(w, f, s, fmt="%.8g")), "either",
              f"wavelengths in {unit} with no unit given", wave_range=true)
        b.add("units", f"csv_{unit}_in_header", "csv",
              _csv_text([f"wavelength ({unit})", "flux", "error"], _rows(w, f, s, fmt="%.8g")),
              "either", f"wavelengths in {unit}, unit only in the column name", wave_range=true)
        b.add("units", f"ecsv_{unit}_unit", "ecsv",
              _ecsv_text({"wavelength": w, "flux": f, "error": s}, {"wavelength": unit}), "fit",
              f"ECSV with wavelength unit {unit}", wave_range=true, z_true=Z_TRUE)
        b.add("units", f"table_{unit}_tunit", "fits",
              _fits_table_bytes({"WAVELENGTH": w, "FLUX": f, "ERROR": s}, {"WAVELENGTH": unit}),
              "fit", f"binary table with TUNIT {unit}", wave_range=true, z_true=Z_TRUE)
        b.add("units", f"table_{unit}_no_tunit", "fits",
              _fits_table_bytes({"WAVELENGTH": w, "FLUX": f, "ERROR": s}), "either",
              f"binary table in {unit} without TUNIT", wave_range=true)
        lin = _lin_grid()
        fl, _ = _noisy(lin, rng)
        b.add("units", f"image_{unit}_cunit", "fits",
              _fits_image_bytes(fl, _wcs_linear(w0=3800.0 / factor, dw=DW / factor, cunit=unit)),
              "fit", f"image WCS with CUNIT1 = {unit}",
              wave_range=(3800.0, float(lin[-1])), z_true=Z_TRUE)
        b.add("units", f"image_{unit}_no_cunit", "fits",
              _fits_image_bytes(fl, _wcs_linear(w0=3800.0 / factor, dw=DW / factor, cunit=None)),
              "either", f"image WCS in {unit} without CUNIT1",
              wave_range=(3800.0, float(lin[-1])))
    b.add("units", "table_loglam", "fits",
          _fits_table_bytes({"loglam": np.log10(lg), "flux": f, "ivar": 1 / s**2}), "fit",
          "table with log10 wavelength column (loglam) and ivar", wave_range=true, z_true=Z_TRUE)


def _text_cases(b, rng):
    lg = _log_grid(1200)
    f, s = _noisy(lg, rng)
    rows = _rows(lg, f, s)
    head = ["wavelength", "flux", "error"]
    r = [list(x) for x in rows]
    r[600][1] = "abc"
    b.add("text", "word_in_flux", "csv", _csv_text(head, r), "either",
          "a word in the flux column (mask the pixel or refuse)")
    r = [list(x) for x in rows]
    r[10][0] = "n/a"
    b.add("text", "word_in_wavelength", "csv", _csv_text(head, r), "error",
          "a word in the wavelength column")
    r = [list(x) for x in rows]
    for i in range(0, len(r), 3):
        r[i][1] = "x"
    b.add("text", "words_everywhere", "csv", _csv_text(head, r), "either",
          "a third of the flux cells are words (mask them or refuse)")
    r = [list(x) for x in rows]
    r[300].append("99")
    b.add("text", "ragged_long_row", "csv", _csv_text(head, r), "error", "one row has 4 fields")
    r = [list(x) for x in rows]
    r[301] = r[301][:2]
    b.add("text", "ragged_short_row_sigma", "csv", _csv_text(head, r), "either",
          "one row lacks its uncertainty")
    r = [list(x) for x in rows]
    r[302] = r[302][:1]
    b.add("text", "ragged_short_row_flux", "csv", _csv_text(head, r), "error",
          "one row has only a wavelength")
    b.add("text", "semicolon_delimiter", "csv", _csv_text(head, rows, delimiter=";"), "either",
          "semicolon-separated values in a .csv")
    b.add("text", "tab_in_csv", "csv", _csv_text(head, rows, delimiter="\t"), "either",
          "tab-separated values in a .csv")
    b.add("text", "space_in_csv", "csv", _csv_text(head, rows, delimiter=" "), "either",
          "space-separated values in a .csv")
    comma = [[c.replace(".", ",") for c in row] for row in rows]
    b.add("text", "decimal_comma", "csv", _csv_text(head, comma, delimiter=";"), "either",
          "decimal commas, semicolon-separated")
    b.add("text", "comma_tsv", "tsv", _csv_text(head, rows, delimiter=","), "either",
          "comma-separated values in a .tsv")
    b.add("text", "no_header", "csv", _csv_text(None, rows), "either",
          "numbers without a header row")
    b.add("text", "unknown_columns", "csv", _csv_text(["alpha", "beta", "gamma"], rows), "error",
          "no recognisable wavelength/flux column names")
    b.add("text", "only_wavelength", "csv", _csv_text(["wavelength"], [[x[0]] for x in rows]),
          "error", "no flux column")
    b.add("text", "bom", "csv", "\ufeff" + _csv_text(head, rows), "fit",
          "UTF-8 byte-order mark before the header", z_true=None)
    b.add("text", "crlf", "csv", _csv_text(head, rows).replace("\n", "\r\n"), "fit",
          "Windows line ends")
    b.add("text", "utf16", "csv", _csv_text(head, rows), "either", "UTF-16 encoded CSV",
          encoding="utf-16")
    b.add("text", "nul_bytes", "csv", _csv_text(head, rows[:50]) + "\x00" * 64 +
          _csv_text(None, rows[50:]), "error", "NUL bytes in the middle of a CSV")
    b.add("text", "latin1_comment", "csv",
          "# objet: galaxie \xe9tudi\xe9e \xe0 Mont-Perrault\n" + _csv_text(head, rows), "either",
          "a latin-1 comment line (not UTF-8)", encoding="latin-1")
    b.add("text", "latin1_column_name", "csv",
          _csv_text(["wavelength (\xc5)", "flux", "error"], rows), "either",
          "a latin-1 \u00c5 in the wavelength column name", encoding="latin-1")
    b.add("text", "ecsv_bad_yaml", "ecsv",
          "# %ECSV 1.0\n# ---\n# datatype: [ {name: wavelength, datatype: float64\n" +
          _csv_text(["wavelength", "flux"], [x[:2] for x in rows]), "error",
          "ECSV whose YAML header does not parse")
    b.add("text", "ecsv_wrong_datatype", "ecsv",
          _ecsv_text({"wavelength": lg, "flux": f}).replace("wavelength flux\n", "wavelength flux\n"
                                                              "oops 1.0\n"), "error",
          "ECSV with a word in a float64 column")
    b.add("text", "very_long_line", "csv", _csv_text(head, rows[:100]) + "1" * 2_000_000 + "\n",
          "error", "a 2-million-digit number in one cell")
    b.add("text", "html_named_csv", "csv", "<!DOCTYPE html><html><body>404</body></html>\n",
          "error", "an HTML error page saved as .csv")


def _garbage_cases(b, rng):
    for size in (1, 79, 80, 2880, 2881, 10_000, 100_000):
        b.add("garbage", f"random_{size}", "fits", rng.integers(0, 256, size, dtype=np.uint8).tobytes(),
              "error", f"{size} random bytes named .fits")
    for size in (500, 50_000):
        b.add("garbage", f"random_csv_{size}", "csv",
              rng.integers(0, 256, size, dtype=np.uint8).tobytes(), "error",
              f"{size} random bytes named .csv")
    png = b"\x89PNG\r\n\x1a\n" + rng.integers(0, 256, 4000, dtype=np.uint8).tobytes()
    b.add("garbage", "png_named_fits", "fits", png, "error", "a PNG named .fits")
    fake = ("SIMPLE  =                    T".ljust(80)).encode() + rng.integers(
        0, 256, 5760, dtype=np.uint8).tobytes()
    b.add("garbage", "simple_then_noise", "fits", fake, "error", "SIMPLE card then noise")
    b.add("garbage", "text_named_fits", "fits", "this is not a spectrum\n" * 200, "error",
          "plain text named .fits")
    b.add("garbage", "no_end_card", "fits",
          b"".join(c.ljust(80).encode() for c in ("SIMPLE  =                    T",
                                                   "BITPIX  =                  -32",
                                                   "NAXIS   =                    1",
                                                   "NAXIS1  =                   10")) + b" " * 2560,
          "error", "a header without END")
    b.add("garbage", "gzip_garbage", "fits.gz", gzip.compress(b"\x00\x01\x02" * 1000), "error",
          "gzip of garbage")
    b.add("garbage", "bad_gzip", "fits.gz", b"\x1f\x8b\x08\x00" + b"\xff" * 300, "error",
          "a broken gzip stream")


def _header_text_cases(b, rng):
    """Untrusted OBJECT text: path separators, '..', control characters, non-ASCII, 10,000 chars."""
    lw = _lin_grid(1600)
    f, s = _noisy(lw, rng)
    hostile = {
        "slash_path": "../../../../tmp/zsieve-escape",
        "absolute_path": "/etc/passwd",
        "dotdot": "..",
        "dot": ".",
        "backslashes": "..\\..\\windows\\system32",
        "shell": "$(touch pwned); `rm -rf ~`",
        "html": "<script>alert('CDX')</script>&amp;",
        "empty": "",
        "spaces": "   ",
        "long_continue": "CDX-0042-" + "L" * 9991,
    }
    for label, text in hostile.items():
        hdr = _wcs_linear(OBJECT=text)
        b.add("object", f"fits_{label}", "fits", _fits_image_bytes(f, hdr, [("ERR", s, None)]),
              "fit", f"OBJECT = {text[:40]!r}", hostile_name=True, z_true=Z_TRUE)
    base = _fits_image_bytes(f, _wcs_linear(OBJECT="CDX-0042-PLACEHOLDER"), [("ERR", s, None)])
    raw_variants = {
        "control_chars": b"OBJECT  = 'CDX\x1b[31m\x07\x08\x7f/../x'",
        "newline": b"OBJECT  = 'CDX-00\n42/../../x'",
        "nul": b"OBJECT  = 'CDX\x00\x00-0042'",
        "latin1": "OBJECT  = 'Galaxie \xe9toil\xe9e \xc5'".encode("latin-1"),
        "utf8": "OBJECT  = 'Étoile'".encode("utf-8"),
        "high_bytes": b"OBJECT  = '" + bytes(range(0x80, 0xA0)) + b"'",
    }
    for label, raw in raw_variants.items():
        b.add("object", f"fits_raw_{label}", "fits", _set_card(base, "OBJECT", raw), "fit",
              f"OBJECT card with {label.replace('_', ' ')} (not valid FITS text)",
              hostile_name=True)
    b.add("header", "latin1_comment_card", "fits",
          _set_card(base, "OBJECT", "COMMENT Beobachter: J\xfcrgen M\xfcller".encode("latin-1")),
          "fit", "a latin-1 COMMENT card", z_true=Z_TRUE)
    b.add("header", "latin1_in_ctype", "fits",
          _set_card(base, "CTYPE1", "CTYPE1  = 'W\xc4VE    '".encode("latin-1")), "error",
          "CTYPE1 with a latin-1 byte (unknown axis type)")
    lg = _log_grid(1600)
    f2, s2 = _noisy(lg, rng)
    for label, text in (("slash_path", "../../../../tmp/zsieve-escape"),
                        ("control_chars", "CDX\x1b[2J\x07\r\n/../x"),
                        ("ten_thousand", "Q" * 10_000),
                        ("unicode", "Ĉ\u202eX-0042\u200b/\u2215..")):
        b.add("object", f"ecsv_{label}", "ecsv",
              _ecsv_text({"wavelength": lg, "flux": f2, "error": s2}, {"wavelength": "Angstrom"},
                         meta={"OBJECT": text, "object": text}), "fit",
              f"ECSV meta OBJECT {label}", hostile_name=True, z_true=Z_TRUE)
        b.add("object", f"csv_comment_{label}", "csv",
              _csv_text(["wavelength", "flux", "error"], _rows(lg, f2, s2),
                        comments=[f"OBJECT: {text.replace(chr(10), ' ').replace(chr(13), ' ')}"]),
              "fit", f"CSV comment OBJECT {label}", hostile_name=True, z_true=Z_TRUE)
        b.add("object", f"table_{label}", "fits",
              _fits_table_bytes({"WAVELENGTH": lg, "FLUX": f2, "ERROR": s2},
                                {"WAVELENGTH": "Angstrom"},
                                header={"OBJECT": _fits_safe(text)}), "fit",
              f"binary-table OBJECT {label}", hostile_name=True, z_true=Z_TRUE)


def _fits_safe(text):
    """What astropy lets us write: printable ASCII (the raw cases add the rest by hand)."""
    return "".join(c if 32 <= ord(c) < 127 else "?" for c in text)


def _bitflip_cases(b, rng):
    """Random bytes of a valid float32 image overwritten: data region (values become NaN, inf,
    huge or tiny; still a usable spectrum) or header region (anything may happen)."""
    lw = _lin_grid(1200)
    f, s = _noisy(lw, rng)
    good = _fits_image_bytes(f, _wcs_linear(), dtype="f4")
    hdr_end = _header_end(good)
    data_end = hdr_end + 4 * lw.size
    for i in range(8):
        arr = bytearray(good)
        pos = rng.integers(hdr_end, data_end, 4)
        for p in pos:
            arr[p] = int(rng.integers(0, 256))
        b.add("bitflip", f"data_{i:02d}", "fits", bytes(arr), "fit",
              "4 random bytes of the float32 data overwritten")
    for i in range(10):
        arr = bytearray(good)
        pos = rng.integers(0, hdr_end, 3)
        for p in pos:
            arr[p] = int(rng.integers(0, 256))
        b.add("bitflip", f"header_{i:02d}", "fits", bytes(arr), "either",
              "3 random bytes of the header overwritten")


def main(argv=None):  # pragma: no cover - a helper for looking at the corpus by hand
    argv = sys.argv[1:] if argv is None else argv
    out = Path(argv[0] if argv else "corpus")
    cases = build_corpus(out)
    for c in cases:
        print(f"{c.expect:6s} {c.filename}  -- {c.why}")
    tally = {k: sum(c.expect == k for c in cases) for k in ("fit", "error", "reject", "either")}
    print(len(cases), "cases", json.dumps(tally))
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "..", "src"))
    raise SystemExit(main())
