"""zsieve.io: every format round-trips, WCS grids match astropy.wcs, bad input fails cleanly.

Outside references: astropy.wcs (FITS WCS Paper III grids), astropy.io.fits (raw data),
astropy.coordinates.EarthLocation (site), astropy.time (MJD), NIST air/vacuum wavelengths
(from memory), and FITS/IRAF conventions marked "common practice".
"""

from __future__ import annotations

import gzip
import os
import shutil

import numpy as np
import pytest
from astropy.io import fits

from zsieve.errors import LimitExceededError, SpectrumFileError
from zsieve.io import (
    is_spectrum_candidate,
    read_spectra,
    read_spectrum,
    write_fits_image,
    write_fits_table,
    write_text,
)
from zsieve.lines import air_to_vacuum, vacuum_to_air
from zsieve.spectrum import MAX_PIXELS, Spectrum, SpectrumMeta

N = 4000


def make_spectrum(grid="linear", n=N, seed=1, meta=None, masked=True):
    """A realistic spectrum on a linear or log grid with a few masked pixels."""
    rng = np.random.default_rng(seed)
    if grid == "linear":
        wave = 3800.0 + 1.35 * np.arange(n)
    else:
        wave = 3600.0 * 10 ** (1e-4 * np.arange(n))
    flux = 5.0 + np.sin(wave / 300.0) + rng.normal(0, 0.3, n)
    sigma = rng.uniform(0.2, 0.5, n)
    mask = np.zeros(n, bool)
    if masked:
        mask[[10, 500, 501, 3000]] = True
    return Spectrum(wave, flux, sigma, mask, meta or SpectrumMeta(object_name="CDX-0042", flux_unit="1e-17 erg/s/cm2/A"))


def assert_same(a, b, rtol=1e-12):
    np.testing.assert_allclose(b.wavelength, a.wavelength, rtol=rtol, atol=0)
    np.testing.assert_array_equal(b.flux, a.flux)
    good = a.good
    np.testing.assert_array_equal(b.mask, a.mask)
    np.testing.assert_allclose(b.sigma[good], a.sigma[good], rtol=1e-12)


# ---------------------------------------------------------------- round trips
@pytest.mark.parametrize("grid", ["linear", "log"])
@pytest.mark.parametrize("kind", ["sigma", "var", "ivar"])
def test_fits_image_round_trip(tmp_path, grid, kind):
    spec = make_spectrum(grid)
    path = tmp_path / f"img-{grid}-{kind}.fits"
    write_fits_image(spec, path, sampling=grid, uncertainty=kind)
    back = read_spectrum(path)
    assert_same(spec, back)
    assert back.meta.format == "fits-image" and back.meta.medium == "vacuum"
    assert back.meta.object_name == "CDX-0042"
    # The extension is recognised by name: check what was written (FITS Paper III CTYPE1).
    hdr = fits.getheader(path)
    assert hdr["CTYPE1"] == ("WAVE" if grid == "linear" else "WAVE-LOG")


@pytest.mark.parametrize("unit", ["Angstrom", "nm", "um"])
def test_fits_image_units_round_trip(tmp_path, unit):
    spec = make_spectrum("log")
    path = tmp_path / f"img-{unit}.fits"
    write_fits_image(spec, path, sampling="log", wave_unit=unit)
    back = read_spectrum(path)
    assert_same(spec, back, rtol=1e-11)
    assert back.meta.wave_unit == unit


def test_log_wcs_matches_astropy(tmp_path):
    # Reference: astropy.wcs implements FITS WCS Paper III (Greisen et al. 2006) -LOG axes.
    from astropy.wcs import WCS

    from zsieve.io.fits_image import wcs_wavelength

    hdr = fits.Header()
    hdr["NAXIS"] = 1
    hdr["NAXIS1"] = N
    hdr["CTYPE1"] = "WAVE-LOG"
    hdr["CUNIT1"] = "Angstrom"
    hdr["CRVAL1"] = 5123.4
    hdr["CDELT1"] = 1.18
    hdr["CRPIX1"] = 1234.5
    ours, unit, guessed, medium = wcs_wavelength("hdr", hdr, N)
    ref = WCS(hdr).spectral.pixel_to_world(np.arange(N)).to_value("Angstrom")
    np.testing.assert_allclose(ours, ref, rtol=1e-12)
    assert medium == "vacuum" and not guessed
    # The same header written as a file reads to the same grid.
    path = tmp_path / "wcs.fits"
    fits.PrimaryHDU(np.ones(N), header=hdr).writeto(path)
    np.testing.assert_allclose(read_spectrum(path).wavelength, ref, rtol=1e-12)
    # And a written log spectrum agrees with astropy.wcs reading our own header.
    spec = make_spectrum("log")
    write_fits_image(spec, tmp_path / "ours.fits", sampling="log")
    ref2 = WCS(fits.getheader(tmp_path / "ours.fits")).spectral.pixel_to_world(np.arange(N)).to_value("Angstrom")
    np.testing.assert_allclose(read_spectrum(tmp_path / "ours.fits").wavelength, ref2, rtol=1e-12)
    np.testing.assert_allclose(spec.wavelength, ref2, rtol=1e-12)


def test_linear_wcs_cd_matrix_and_reversed_axis(tmp_path):
    from astropy.wcs import WCS

    hdr = fits.Header()
    hdr["CTYPE1"] = "WAVE"
    hdr["CUNIT1"] = "nm"
    hdr["CRVAL1"] = 900.0
    hdr["CD1_1"] = -0.125  # decreasing wavelengths are legal
    hdr["CRPIX1"] = 1.0
    flux = np.linspace(1.0, 2.0, N)
    path = tmp_path / "rev.fits"
    fits.PrimaryHDU(flux, header=hdr).writeto(path)
    spec = read_spectrum(path)
    ref = WCS(hdr).spectral.pixel_to_world(np.arange(N)).to_value("Angstrom")  # astropy.wcs reference
    np.testing.assert_allclose(spec.wavelength, ref[::-1], rtol=1e-12)
    np.testing.assert_array_equal(spec.flux, flux[::-1])  # arrays reversed together
    assert spec.meta.wave_unit == "nm"


def test_iraf_linear_dcflag_log10(tmp_path):
    # Common practice (IRAF onedspec, SDSS): CTYPE1 'LINEAR' with DC-FLAG = 1 means log10 sampling.
    hdr = fits.Header()
    hdr["CTYPE1"] = "LINEAR"
    hdr["CRVAL1"] = 3.58
    hdr["CDELT1"] = 1e-4
    hdr["CRPIX1"] = 1
    hdr["DC-FLAG"] = 1
    path = tmp_path / "iraf.fits"
    fits.PrimaryHDU(np.ones(N, dtype=np.float32), header=hdr).writeto(path)
    spec = read_spectrum(path)
    np.testing.assert_allclose(spec.wavelength, 10 ** (3.58 + 1e-4 * np.arange(N)), rtol=1e-13)
    assert spec.meta.extra.get("wave_unit_assumed") is True


def test_air_file_becomes_vacuum(tmp_path):
    air = 4000.0 + 1.25 * np.arange(N)  # uniform air grid, as a ground-based file would have
    spec = Spectrum(air_to_vacuum(air), np.ones(N), np.full(N, 0.1))
    path = tmp_path / "air.fits"
    write_fits_image(spec, path, medium="air")
    hdr = fits.getheader(path)
    assert hdr["CTYPE1"] == "AWAV"
    written = hdr["CRVAL1"] + hdr["CDELT1"] * np.arange(N)
    back = read_spectrum(path)
    assert back.meta.medium == "air"
    np.testing.assert_allclose(back.wavelength, air_to_vacuum(written), rtol=0, atol=1e-8)
    # NIST (from memory): H-alpha 6562.80 A in air is 6564.61 A in vacuum.
    hdr2 = fits.Header({"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRVAL1": 6562.80, "CDELT1": 1.0, "CRPIX1": 1})
    fits.PrimaryHDU(np.ones(10), header=hdr2).writeto(tmp_path / "ha.fits")
    assert abs(read_spectrum(tmp_path / "ha.fits").wavelength[0] - 6564.61) < 0.02


def test_caller_medium_overrides_file(tmp_path):
    spec = make_spectrum("linear")
    path = tmp_path / "vac.csv"
    write_text(spec, path)
    as_air = read_spectrum(path, medium="air")
    assert as_air.meta.medium == "air" and as_air.meta.extra["medium_source"] == "caller"
    np.testing.assert_allclose(as_air.wavelength, air_to_vacuum(spec.wavelength), atol=1e-8)
    # A header keyword AIRORVAC = 'air' (common practice) is honoured without the caller.
    path2 = tmp_path / "air.txt"
    path2.write_text("# AIRORVAC = air\nwave flux\n" + "".join(f"{5006.84 + i:.2f} 1\n" for i in range(12)))
    # NIST (from memory): [O III] 5006.84 air = 5008.24 vacuum.
    assert abs(read_spectrum(path2).wavelength[0] - 5008.24) < 0.02


@pytest.mark.parametrize("log10", [False, True])
@pytest.mark.parametrize("kind", ["sigma", "ivar", "var"])
def test_fits_table_round_trip(tmp_path, log10, kind):
    spec = make_spectrum("log")
    path = tmp_path / f"tab-{log10}-{kind}.fits"
    write_fits_table(spec, path, log10=log10, uncertainty=kind)
    back = read_spectrum(path)
    assert_same(spec, back)
    assert back.meta.format == "fits-table"


def test_fits_table_one_spectrum_per_row(tmp_path):
    rng = np.random.default_rng(3)
    wave = np.tile(4000.0 + 2.0 * np.arange(500), (3, 1))
    flux = rng.normal(10, 1, (3, 500))
    ivar = rng.uniform(1, 4, (3, 500))
    cols = [
        fits.Column(name="WAVE", format="500D", unit="Angstrom", array=wave),
        fits.Column(name="FLUX", format="500E", array=flux.astype(np.float32)),
        fits.Column(name="IVAR", format="500E", array=ivar.astype(np.float32)),
        fits.Column(name="OBJID", format="10A", array=np.array(["a", "b", "c"])),
    ]
    path = tmp_path / "rows.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    spectra = read_spectra(path)
    assert len(spectra) == 3
    for r, s in enumerate(spectra):
        np.testing.assert_array_equal(s.flux, flux[r].astype(np.float32))
        np.testing.assert_allclose(s.ivar, ivar[r].astype(np.float32), rtol=1e-12)
        assert s.meta.index == r and s.meta.format == "fits-table-rows"
    assert read_spectrum(path, index=2).flux[0] == spectra[2].flux[0]


@pytest.mark.parametrize("fmt", ["csv", "tsv", "ecsv"])
@pytest.mark.parametrize("unit", ["Angstrom", "nm", "um"])
def test_text_round_trip(tmp_path, fmt, unit):
    site = dict(site_lon_deg=-70.7366, site_lat_deg=-30.2407, site_height_m=2700.0)
    meta = SpectrumMeta(object_name="CDX-0117", ra_deg=150.125, dec_deg=2.2, mjd=60123.25, frame="heliocentric", **site)
    spec = make_spectrum("linear", meta=meta)
    path = tmp_path / f"spec-{unit}.{fmt}"
    write_text(spec, path, wave_unit=unit)
    back = read_spectrum(path)
    assert_same(spec, back, rtol=1e-13)
    assert back.meta.format == fmt and back.meta.wave_unit == unit
    m = back.meta
    assert (m.object_name, m.ra_deg, m.dec_deg, m.mjd, m.frame) == ("CDX-0117", 150.125, 2.2, 60123.25, "heliocentric")
    # Site written as OBSGEO-X/Y/Z and read back through astropy EarthLocation.
    assert abs(m.site_lon_deg - site["site_lon_deg"]) < 1e-9 and abs(m.site_lat_deg - site["site_lat_deg"]) < 1e-9
    assert abs(m.site_height_m - 2700.0) < 1e-6


def test_handwritten_text_variants(tmp_path):
    w_um = np.linspace(0.40, 0.90, 300)
    flux = np.linspace(1, 2, 300)
    err = np.full(300, 0.1)
    lines = "\n".join(f"{a:.6f}  {b:.6f}  {c:.3f}" for a, b, c in zip(w_um, flux, err))
    p1 = tmp_path / "a.txt"
    p1.write_text("# OBJECT = CDX-0007\nwave (um)   flux   err\n" + lines + "\n")
    s1 = read_spectrum(p1)
    np.testing.assert_allclose(s1.wavelength, np.round(w_um, 6) * 1e4, rtol=1e-12)
    assert s1.meta.object_name == "CDX-0007" and s1.meta.wave_unit == "um"
    np.testing.assert_allclose(s1.sigma, 0.1)
    # Header in the last comment line and the unit in brackets (common practice).
    p2 = tmp_path / "b.dat"
    p2.write_text("# wavelength[nm] flux ivar\n" + "\n".join(f"{a * 1e3:.4f} {b} 100" for a, b in zip(w_um, flux)))
    s2 = read_spectrum(p2)
    np.testing.assert_allclose(s2.wavelength, np.round(w_um * 1e3, 4) * 10, rtol=1e-12)
    np.testing.assert_allclose(s2.sigma, 0.1)
    # No header at all: wavelength, flux, sigma; the unit comes from the caller.
    p3 = tmp_path / "c.txt"
    p3.write_text(lines + "\n")
    with pytest.raises(SpectrumFileError, match="um"):
        read_spectrum(p3)  # 0.4-0.9 read as Angstrom is refused, and the message suggests um
    s3 = read_spectrum(p3, wave_unit="um")
    np.testing.assert_allclose(s3.wavelength, np.round(w_um, 6) * 1e4, rtol=1e-12)


def test_negative_and_zero_uncertainties_are_masked(tmp_path):
    spec = make_spectrum("linear", masked=False)
    sigma = spec.sigma.copy()
    sigma[[5, 6]] = [0.0, -1.0]
    sigma[7] = np.nan
    path = tmp_path / "neg.fits"
    hdus = [fits.PrimaryHDU(spec.flux), fits.ImageHDU(sigma, name="ERR")]
    hdus[0].header.update({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": spec.wavelength[0], "CDELT1": 1.35, "CRPIX1": 1})
    fits.HDUList(hdus).writeto(path)
    back = read_spectrum(path)
    assert back.mask[[5, 6, 7]].all() and back.mask.sum() == 3


def test_mask_and_variance_extensions_by_name(tmp_path):
    spec = make_spectrum("linear", masked=False)
    flags = np.zeros(N, np.int16)
    flags[100:110] = 4
    hdr = fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": spec.wavelength[0], "CDELT1": 1.35, "CRPIX1": 1})
    hdus = [fits.PrimaryHDU(spec.flux, header=hdr), fits.ImageHDU(spec.sigma**2, name="VARIANCE"), fits.ImageHDU(flags, name="DQ")]
    fits.HDUList(hdus).writeto(tmp_path / "v.fits")
    back = read_spectrum(tmp_path / "v.fits")
    np.testing.assert_allclose(back.sigma[~back.mask], spec.sigma[flags == 0], rtol=1e-12)
    assert back.mask.sum() == 10


def test_metadata_from_header(tmp_path):
    from astropy.coordinates import EarthLocation
    from astropy.time import Time

    site = EarthLocation.from_geodetic(-17.8792, 28.7564, 2396.0)  # any site; astropy is the reference
    hdr = fits.Header()
    hdr.update({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 4000.0, "CDELT1": 1.0, "CRPIX1": 1})
    hdr["RA"] = "10:30:00.0"  # sexagesimal RA is in hours (common practice)
    hdr["DEC"] = "-05:15:00"
    hdr["DATE-OBS"] = "2021-03-04T05:06:07.5"
    hdr["EXPTIME"] = 1200.0
    hdr["SPECSYS"] = "BARYCENT"
    for axis, value in zip("XYZ", (site.x, site.y, site.z)):
        hdr[f"OBSGEO-{axis}"] = value.to_value("m")
    path = tmp_path / "meta.fits"
    hdr["OBJECT"] = "CDX-0042 " + "x" * 400  # astropy writes printable ASCII only: patch bytes below
    fits.PrimaryHDU(np.ones(100), header=hdr).writeto(path)
    raw = bytearray(path.read_bytes())
    i = raw.index(b"xxxxxxxx")
    raw[i : i + 4] = b"\x1b\xff\x07\xfe"  # control and non-UTF-8 bytes inside the value
    path.write_bytes(bytes(raw))
    m = read_spectrum(path).meta
    assert m.object_name.startswith("CDX-0042") and len(m.object_name) <= 200
    assert not any(ord(c) < 32 or 0x7F <= ord(c) < 0xA0 for c in m.object_name)
    assert abs(m.ra_deg - 157.5) < 1e-9 and abs(m.dec_deg + 5.25) < 1e-9
    ref = Time("2021-03-04T05:06:07.5", scale="utc").mjd + 600.0 / 86400.0  # mid-exposure
    assert abs(m.mjd - ref) < 1e-8
    assert abs(m.site_lon_deg - (-17.8792)) < 1e-7 and abs(m.site_lat_deg - 28.7564) < 1e-7
    assert abs(m.site_height_m - 2396.0) < 1e-3
    assert m.frame == "barycentric"


def test_tai_times_become_utc(tmp_path):
    from astropy.time import Time

    # SDSS convention (common practice): TAI-BEG/TAI-END are TAI seconds since MJD 0.
    beg, end = 4491449060.0, 4491453143.0
    hdr = fits.Header({"CTYPE1": "WAVE", "CRVAL1": 4000.0, "CDELT1": 1.0, "TAI-BEG": beg, "TAI-END": end})
    fits.PrimaryHDU(np.ones(50), header=hdr).writeto(tmp_path / "tai.fits")
    m = read_spectrum(tmp_path / "tai.fits").meta
    ref = Time((beg + end) / 2 / 86400.0, format="mjd", scale="tai").utc.mjd  # astropy reference
    assert abs(m.mjd - ref) < 1e-8


def test_fast_reader_agrees_with_astropy(tmp_path):
    """Scaled integers and a gzip copy (read through astropy) give the astropy values."""
    spec = make_spectrum("linear", masked=False)
    hdr = fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": spec.wavelength[0], "CDELT1": 1.35, "CRPIX1": 1})
    hdu = fits.PrimaryHDU(spec.flux, header=hdr)
    hdu.scale("int16", bzero=5.0, bscale=1e-3)
    path = tmp_path / "scaled.fits"
    hdu.writeto(path)
    # FITS Standard 4.0 sec. 5.3: physical = BZERO + BSCALE * stored (stored ints read by astropy).
    ref = 5.0 + 1e-3 * fits.getdata(path, do_not_scale_image_data=True).astype(float)
    np.testing.assert_allclose(read_spectrum(path).flux, ref, rtol=1e-12)
    gz = tmp_path / "scaled.fits.gz"
    with open(path, "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    np.testing.assert_allclose(read_spectrum(gz).flux, ref, rtol=1e-12)
    disguised = tmp_path / "gzipped-but-named.fits"  # gzip content without a .gz suffix
    shutil.copy(gz, disguised)
    np.testing.assert_allclose(read_spectrum(disguised).flux, ref, rtol=1e-12)
    # Unsigned table column stored with TZERO (FITS standard) and a string column beside it.
    cols = [
        fits.Column(name="lambda", format="D", unit="nm", array=spec.wavelength / 10),
        fits.Column(name="f", format="E", array=spec.flux),
        fits.Column(name="flags", format="I", bzero=32768, array=np.full(N, 40000, dtype=np.uint16)),
        fits.Column(name="note", format="3A", array=np.array(["ok"] * N)),
    ]
    fits.BinTableHDU.from_columns(cols).writeto(tmp_path / "t.fits")
    with pytest.raises(SpectrumFileError, match="no usable pixel"):
        read_spectrum(tmp_path / "t.fits")  # TZERO applied: every flag is 40000, so all masked
    cols[2] = fits.Column(name="flags", format="I", bzero=32768, array=np.r_[np.zeros(N - 5), np.full(5, 40000)].astype(np.uint16))
    fits.BinTableHDU.from_columns(cols).writeto(tmp_path / "t2.fits")
    s = read_spectrum(tmp_path / "t2.fits")
    assert s.mask.sum() == 5 and s.meta.wave_unit == "nm"
    np.testing.assert_allclose(s.wavelength, spec.wavelength, rtol=1e-12)


def test_is_spectrum_candidate(tmp_path):
    spec = make_spectrum("linear")
    write_fits_image(spec, tmp_path / "s.fits")
    write_text(spec, tmp_path / "s.csv")
    (tmp_path / "catalogue.csv").write_text("file,z,grade\na.fits,0.1,secure\n")
    (tmp_path / "notes.md").write_text("# notes\n")
    assert is_spectrum_candidate(tmp_path / "s.fits") and is_spectrum_candidate(tmp_path / "s.csv")
    assert not is_spectrum_candidate(tmp_path / "catalogue.csv")
    assert not is_spectrum_candidate(tmp_path / "notes.md")
    assert not is_spectrum_candidate(tmp_path)
    # A long comment block before the header does not hide a spectrum.
    long = tmp_path / "long.csv"
    long.write_text("# OBJECT: " + "Q" * 10_000 + "\nwave,flux\n" + "\n".join(f"{4000 + i},1" for i in range(20)))
    assert is_spectrum_candidate(long) and read_spectrum(long).n_pix == 20
    few = tmp_path / "few.csv"
    few.write_text("wave,flux\n4000,1\n4001,1\n4002,1\n")
    _expect(few, "usable pixel")


# ---------------------------------------------------------------- bad input
def _image_bytes(n=100, extra=None):
    hdr = fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 4000.0, "CDELT1": 1.0, "CRPIX1": 1})
    hdr.update(extra or {})
    hdu = fits.PrimaryHDU(np.ones(n, dtype=np.float32), header=hdr)
    import io

    buf = io.BytesIO()
    hdu.writeto(buf)
    return buf.getvalue()


def _expect(path, match, exc=SpectrumFileError, **kw):
    with pytest.raises(exc) as info:
        read_spectra(path, **kw)
    assert os.path.basename(str(path)) in str(info.value)  # the message names the file
    assert info.match(match)
    return info.value


def test_bad_files(tmp_path):
    _expect(tmp_path / "missing.fits", "no such file")
    (tmp_path / "empty.fits").write_bytes(b"")
    _expect(tmp_path / "empty.fits", "empty")
    (tmp_path / "garbage.fits").write_bytes(os.urandom(5000))
    _expect(tmp_path / "garbage.fits", "not a|unreadable|binary")
    (tmp_path / "page.fits").write_text("<html><body>404 not found</body></html>")
    _expect(tmp_path / "page.fits", "no wavelength|no spectrum|unreadable")
    good = _image_bytes(4000)
    (tmp_path / "trunc.fits").write_bytes(good[: 2880 + 5000])
    _expect(tmp_path / "trunc.fits", "truncated")
    (tmp_path / "halfheader.fits").write_bytes(good[:1000])
    _expect(tmp_path / "halfheader.fits", "not a readable FITS")
    (tmp_path / "binary.csv").write_bytes(b"wave,flux\n\x00\x01\x02" * 10)
    _expect(tmp_path / "binary.csv", "binary")


def test_absurd_sizes_refused_before_allocating(tmp_path):
    raw = _image_bytes(100)
    huge = raw.replace(b"NAXIS1  =                  100", b"NAXIS1  =          99999999999")
    assert huge != raw
    (tmp_path / "huge.fits").write_bytes(huge)
    _expect(tmp_path / "huge.fits", "NAXIS1", LimitExceededError)
    big = raw.replace(b"NAXIS1  =                  100", f"NAXIS1  = {MAX_PIXELS // 2:>20d}".encode())
    (tmp_path / "big.fits").write_bytes(big)  # under MAX_PIXELS, but more data than the file holds
    _expect(tmp_path / "big.fits", "holds only", LimitExceededError)
    cols = [fits.Column(name="wave", format="D", array=np.arange(10.0) + 4000), fits.Column(name="flux", format="D", array=np.ones(10))]
    tab = tmp_path / "tab.fits"
    fits.BinTableHDU.from_columns(cols).writeto(tab)
    traw = tab.read_bytes()
    i = traw.index(b"NAXIS2  =")
    patched = traw[:i] + f"NAXIS2  = {10**9:>20d}".encode() + traw[i + 30 :]
    (tmp_path / "tabhuge.fits").write_bytes(patched)
    _expect(tmp_path / "tabhuge.fits", "rows", LimitExceededError)


def _table_file(path, wave, flux, **more):
    cols = [fits.Column(name="wavelength", format="D", array=wave), fits.Column(name="flux", format="D", array=flux)]
    cols += [fits.Column(name=k, format="D", array=v) for k, v in more.items()]
    fits.BinTableHDU.from_columns(cols).writeto(path)
    return path


def test_bad_wavelengths_and_values(tmp_path):
    w = 4000.0 + np.arange(100.0)
    f = np.ones(100)
    w_nm = w.copy()
    w_nm[50] = w_nm[40]
    _expect(_table_file(tmp_path / "nonmono.fits", w_nm, f), "not monotonic")
    w_dup = w.copy()
    w_dup[51] = w_dup[50]
    _expect(_table_file(tmp_path / "dup.fits", w_dup, f), "duplicated")
    _expect(_table_file(tmp_path / "nan.fits", w, np.full(100, np.nan)), "NaN")
    _expect(_table_file(tmp_path / "nosig.fits", w, f, sigma=np.zeros(100)), "no usable pixel")
    bad_w = w.copy()
    bad_w[3] = np.nan
    _expect(_table_file(tmp_path / "nanwave.fits", bad_w, f), "not a finite")
    cols = [fits.Column(name="RA", format="D", array=np.ones(5)), fits.Column(name="Z", format="D", array=np.ones(5))]
    fits.BinTableHDU.from_columns(cols).writeto(tmp_path / "catalogue.fits")
    _expect(tmp_path / "catalogue.fits", "no spectrum found")
    (tmp_path / "mismatch.csv").write_text("wave,flux,err\n4000,1\n4001,2\n")
    _expect(tmp_path / "mismatch.csv", "length mismatch|unreadable")
    (tmp_path / "mismatch2.csv").write_text("wave,flux\n4000,1,3\n4001,2,3\n")
    _expect(tmp_path / "mismatch2.csv", "length mismatch")
    hdr = fits.Header({"CTYPE1": "WAVE", "CRVAL1": 4000.0, "CDELT1": 1.0})
    fits.HDUList([fits.PrimaryHDU(np.ones(100), header=hdr), fits.ImageHDU(np.arange(90.0) + 4000, name="WAVELENGTH")]).writeto(tmp_path / "wl.fits")
    _expect(tmp_path / "wl.fits", "length mismatch")
    fits.PrimaryHDU(np.ones(100), header=fits.Header({"CTYPE1": "FREQ", "CRVAL1": 1e14, "CDELT1": 1e10})).writeto(tmp_path / "freq.fits")
    _expect(tmp_path / "freq.fits", "not a wavelength axis")


def test_unit_guard(tmp_path):
    # A 380-980 grid labelled Angstrom is almost surely nm: refuse rather than shift z by x10.
    fits.PrimaryHDU(np.ones(4000), header=fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 380.0, "CDELT1": 0.15})).writeto(tmp_path / "nm.fits")
    err = _expect(tmp_path / "nm.fits", "unit is probably wrong")
    assert "nm" in str(err)
    (tmp_path / "big.csv").write_text("wave,flux\n" + "\n".join(f"{x},1" for x in np.linspace(3.8e5, 9.8e5, 50)))
    _expect(tmp_path / "big.csv", "unit is probably wrong")
    # The same numbers with the right unit read fine (nm: 3800-9800 Angstrom).
    (tmp_path / "ok.csv").write_text("wave[nm],flux\n" + "\n".join(f"{x},1" for x in np.linspace(380, 980, 50)))
    s = read_spectrum(tmp_path / "ok.csv")
    assert abs(s.wavelength[0] - 3800.0) < 1e-9


def test_writers_sanitise_untrusted_text(tmp_path):
    spec = make_spectrum("linear", meta=SpectrumMeta(object_name="CDX-0099\n# OBJECT: evil\x1b[2J Ångström"))
    for name in ("s.fits", "s.csv", "s.ecsv"):
        writer = write_fits_image if name.endswith("fits") else write_text
        writer(spec, tmp_path / name)
        got = read_spectrum(tmp_path / name).meta.object_name
        assert got.startswith("CDX-0099") and "\n" not in got and "\x1b" not in got


def test_writer_refuses_irregular_grid(tmp_path):
    wave = np.sort(np.random.default_rng(0).uniform(4000, 9000, 200))
    spec = Spectrum(wave, np.ones(200))
    with pytest.raises(ValueError, match="not uniform"):
        write_fits_image(spec, tmp_path / "x.fits")
    write_fits_table(spec, tmp_path / "x.fits")  # tables take any grid
    np.testing.assert_allclose(read_spectrum(tmp_path / "x.fits").wavelength, wave, rtol=1e-15)


def test_vacuum_to_air_writer_inverse(tmp_path):
    # Writing air and reading back recovers the vacuum grid (Morton 2000 both ways).
    air = 5000.0 * np.exp(1e-4 * np.arange(N))
    spec = Spectrum(air_to_vacuum(air), np.ones(N), np.full(N, 0.2))
    write_fits_image(spec, tmp_path / "a.fits", sampling="log", medium="air")
    assert fits.getheader(tmp_path / "a.fits")["CTYPE1"] == "AWAV-LOG"
    back = read_spectrum(tmp_path / "a.fits")
    np.testing.assert_allclose(back.wavelength, spec.wavelength, rtol=0, atol=1e-8)
    np.testing.assert_allclose(vacuum_to_air(back.wavelength), air, rtol=0, atol=1e-8)


def test_ecsv_reader_agrees_with_astropy_table(tmp_path):
    # astropy.table's ECSV reader is the reference for our fast path and is used as fallback.
    from astropy.table import Table

    spec = make_spectrum("log")
    path = tmp_path / "s.ecsv"
    write_text(spec, path, wave_unit="nm", uncertainty="ivar")
    ref = Table.read(path, format="ascii.ecsv")
    ours = read_spectrum(path)
    np.testing.assert_allclose(ours.wavelength, np.asarray(ref["wavelength"]) * 10.0, rtol=1e-15)
    np.testing.assert_array_equal(ours.flux, np.asarray(ref["flux"]))
    np.testing.assert_array_equal(ours.mask, np.asarray(ref["mask"]) != 0)
    # A string column and a missing value force the astropy path; same answer.
    t = Table({"wave": spec.wavelength[:50], "flux": spec.flux[:50], "note": ["x"] * 50})
    t["wave"].unit = "Angstrom"
    t.meta["OBJECT"] = "CDX-0300"
    t.write(tmp_path / "str.ecsv", format="ascii.ecsv")
    s = read_spectrum(tmp_path / "str.ecsv")
    np.testing.assert_array_equal(s.flux, spec.flux[:50])
    assert s.meta.object_name == "CDX-0300" and s.meta.format == "ecsv"


def test_extension_layout_with_named_uncertainty(tmp_path):
    # Common practice: empty primary, flux in a SCI extension carrying the WCS, then ERR/WEIGHT.
    spec = make_spectrum("linear", masked=False)
    hdr = fits.Header({"CTYPE1": "AWAV", "CUNIT1": "Angstrom", "CRVAL1": 3800.0, "CDELT1": 1.35, "CRPIX1": 1})
    prim = fits.PrimaryHDU()
    prim.header["OBJECT"] = "CDX-0611"
    hdus = [prim, fits.ImageHDU(spec.flux, header=hdr, name="SCI"), fits.ImageHDU(1 / spec.sigma**2, name="WEIGHT")]
    fits.HDUList(hdus).writeto(tmp_path / "ext.fits")
    s = read_spectrum(tmp_path / "ext.fits")
    assert s.meta.object_name == "CDX-0611" and s.meta.medium == "air"
    np.testing.assert_allclose(s.wavelength, air_to_vacuum(3800.0 + 1.35 * np.arange(N)), atol=1e-8)
    np.testing.assert_allclose(s.sigma, spec.sigma, rtol=1e-12)


def test_named_rows_and_unnamed_rows(tmp_path):
    # IRAF-style BANDIDn row names (common practice): spectrum, sky, sigma.
    spec = make_spectrum("linear", masked=False)
    rows = np.vstack([spec.flux, np.zeros(N), spec.sigma])
    hdr = fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 3800.0, "CDELT1": 1.35, "CRPIX1": 1,
                       "BANDID1": "spectrum - background fit", "BANDID2": "background", "BANDID3": "sigma"})
    fits.PrimaryHDU(rows, header=hdr).writeto(tmp_path / "bands.fits")
    [s] = read_spectra(tmp_path / "bands.fits")
    np.testing.assert_array_equal(s.flux, spec.flux)
    np.testing.assert_allclose(s.sigma, spec.sigma)
    # Rows without names are separate spectra on one grid.
    hdr2 = fits.Header({"CTYPE1": "WAVE", "CUNIT1": "Angstrom", "CRVAL1": 3800.0, "CDELT1": 1.35, "CRPIX1": 1})
    fits.PrimaryHDU(np.vstack([spec.flux, 2 * spec.flux]), header=hdr2).writeto(tmp_path / "two.fits")
    two = read_spectra(tmp_path / "two.fits")
    assert len(two) == 2 and two[1].meta.index == 1
    np.testing.assert_array_equal(two[1].flux, 2 * spec.flux)


def test_property_any_order_and_unit_reads_back(tmp_path_factory):
    # Property (hypothesis): a table in any unit and either order reads back sorted, in Angstrom.
    from hypothesis import given, settings
    from hypothesis import strategies as st

    folder = tmp_path_factory.mktemp("prop")

    @settings(max_examples=25, deadline=None)
    @given(
        start=st.floats(3000.0, 8000.0),
        step=st.floats(0.1, 5.0),
        n=st.integers(10, 300),
        unit=st.sampled_from([("Angstrom", 1.0), ("nm", 10.0), ("um", 1e4)]),
        reverse=st.booleans(),
    )
    def check(start, step, n, unit, reverse):
        wave = start + step * np.arange(n)
        flux = np.sin(wave)
        w, f = (wave[::-1], flux[::-1]) if reverse else (wave, flux)
        path = folder / "p.fits"
        cols = [fits.Column(name="lam", format="D", unit=unit[0], array=w / unit[1]), fits.Column(name="flux", format="D", array=f)]
        fits.BinTableHDU.from_columns(cols).writeto(path, overwrite=True)
        s = read_spectrum(path)
        np.testing.assert_allclose(s.wavelength, wave, rtol=1e-14)
        np.testing.assert_array_equal(s.flux, flux)

    check()


def test_text_size_limit_and_directory(tmp_path, monkeypatch):
    import zsieve.io.text as text_module

    spec = make_spectrum("linear")
    write_text(spec, tmp_path / "s.csv")
    monkeypatch.setattr(text_module, "MAX_TEXT_BYTES", 1000)  # the check runs before reading
    _expect(tmp_path / "s.csv", "larger than the limit", LimitExceededError)
    (tmp_path / "folder.fits").mkdir()
    _expect(tmp_path / "folder.fits", "directory")


def test_more_bad_fits_shapes(tmp_path):
    # FITS Standard 4.0 sec. 3.3: every HDU is padded to a multiple of 2880 bytes.
    spec = make_spectrum("linear", masked=False)
    write_fits_image(spec, tmp_path / "ok.fits", uncertainty="sigma", dtype=np.float32)
    raw = (tmp_path / "ok.fits").read_bytes()
    first_end = 2880 + -(-4 * N // 2880) * 2880
    (tmp_path / "pad.fits").write_bytes(raw[: first_end - 7])  # data intact, padding cut
    _expect(tmp_path / "pad.fits", "truncated")
    (tmp_path / "hdr2.fits").write_bytes(raw[: first_end + 1000])  # cut inside the 2nd header
    _expect(tmp_path / "hdr2.fits", "truncated")
    fits.PrimaryHDU(np.ones((3, 4, 50))).writeto(tmp_path / "cube.fits")
    _expect(tmp_path / "cube.fits", "not a 1-D spectrum")
    hdr = fits.Header({"CTYPE1": "WAVE", "CRVAL1": -500.0, "CDELT1": 5.0})
    fits.PrimaryHDU(np.ones(1000), header=hdr).writeto(tmp_path / "neg.fits")
    _expect(tmp_path / "neg.fits", "positive")
    k = raw.index(b"CDELT1  =")
    (tmp_path / "nan.fits").write_bytes(raw[:k] + b"CDELT1  =                  NAN".ljust(80) + raw[k + 80 :])
    _expect(tmp_path / "nan.fits", "CDELT1 = 'NAN' is not a finite number")
    sparse = tmp_path / "sparse.fits"
    sparse.write_bytes(raw)
    with open(sparse, "r+b") as fh:
        fh.truncate(3 * 1024**3)  # sparse: no disk used; refused by size before reading
    _expect(sparse, "larger than the limit", LimitExceededError)
