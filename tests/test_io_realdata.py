"""Every real survey file in ../shared/realdata loads, with the format detected from content.

Reference: ../shared/realdata/manifest.csv and README.md (SDSS DR6/DR7 spSpec, SDSS-III
BOSS DR9/DR10, SDSS DR12/DR14 files incl. Legacy re-reductions and SEQUELS/eBOSS, LAMOST DR1):
npix, wave_min_A/wave_max_A, and "each file has more than 3,600 good pixels" (README, "Checks
done"). specutils' SDSS-III/IV spec loader is an independent reader of the same files.
"""

from __future__ import annotations

import csv
import warnings
from pathlib import Path

import numpy as np
import pytest

from zsieve.io import is_spectrum_candidate, read_spectra

REALDATA = Path(__file__).resolve().parents[2] / "shared" / "realdata"
pytestmark = pytest.mark.skipif(
    not (REALDATA / "manifest.csv").is_file(),
    reason=f"optional real survey spectra not present at {REALDATA}",
)


def _manifest():
    if not (REALDATA / "manifest.csv").is_file():
        return []
    with open(REALDATA / "manifest.csv", newline="") as fh:
        return list(csv.DictReader(fh))


ROWS = _manifest()


def _surveys():
    """file -> survey and data release, from truth.csv column 'survey' (e.g. 'SDSS DR7')."""
    if not (REALDATA / "truth.csv").is_file():
        return {}
    with open(REALDATA / "truth.csv", newline="") as fh:
        return {r["file"]: r["survey"] for r in csv.DictReader(fh)}


SURVEY = _surveys()
# manifest.csv 'format' column -> the layout zsieve must detect (names never used to decide).
EXPECTED_FORMAT = {"SDSS spec": "sdss-spec", "SDSS spSpec": "sdss-spspec", "LAMOST DR1": "lamost-dr1"}


def _expected_format(row):
    return next(v for k, v in EXPECTED_FORMAT.items() if row["format"].startswith(k))


@pytest.mark.parametrize("row", ROWS, ids=[f"{r['file']} ({SURVEY.get(r['file'], '?')})" for r in ROWS])
def test_every_realdata_file_loads(row):
    # Survey and data release of each file: truth.csv 'survey' (in the test id), README.md table.
    path = REALDATA / row["file"]
    assert is_spectrum_candidate(path)
    spectra = read_spectra(path)
    assert len(spectra) == 1
    s = spectra[0]
    assert s.meta.format == _expected_format(row)
    assert s.n_pix == int(row["npix"])
    # manifest.csv wave_min_A / wave_max_A, within 0.5 Angstrom
    assert abs(s.wavelength[0] - float(row["wave_min_A"])) < 0.5
    assert abs(s.wavelength[-1] - float(row["wave_max_A"])) < 0.5
    assert int(s.good.sum()) > 3600  # README "Checks done"
    # README: all these files are vacuum (VACUUM = T) and heliocentric (SDSS convention, LAMOST HELIO = T).
    assert s.meta.medium == "vacuum" and s.meta.frame == "heliocentric"
    assert s.meta.ra_deg is not None and s.meta.dec_deg is not None and s.meta.mjd is not None
    assert np.all(np.isfinite(s.sigma[s.good])) and np.all(s.sigma[s.good] > 0)


def test_sdss_spec_matches_specutils_loader():
    # SDSS-III BOSS DR9 spec-3851-55302-0530: specutils' "SDSS-III/IV spec" reader as reference.
    from specutils import Spectrum

    path = REALDATA / "spec-3851-55302-0530.fits"
    ours = read_spectra(path)[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = Spectrum.read(path, format="SDSS-III/IV spec")
    np.testing.assert_array_equal(ours.flux, ref.flux.value.astype(float))
    np.testing.assert_allclose(ours.wavelength, ref.spectral_axis.to_value("Angstrom"), rtol=2e-7)
    ivar_ref = ref.uncertainty.array.astype(float)
    np.testing.assert_allclose(ours.ivar, ivar_ref, rtol=1e-6)
    assert np.array_equal(ours.mask, ivar_ref <= 0)  # ivar = 0 marks bad pixels (README)


def test_spspec_wavelengths_follow_coeff0():
    # SDSS DR7 spSpec-51984-0296-001: README formula lambda = 10**(COEFF0 + COEFF1*i), i 0-based.
    from astropy.io import fits

    path = REALDATA / "spSpec-51984-0296-001.fit"
    hdr = fits.getheader(path)
    s = read_spectra(path)[0]
    np.testing.assert_allclose(s.wavelength, 10 ** (hdr["COEFF0"] + hdr["COEFF1"] * np.arange(hdr["NAXIS1"])), rtol=1e-13)
    data = fits.getdata(path)
    np.testing.assert_array_equal(s.flux, data[0].astype(float))  # row 0 = flux
    good = data[2] > 0  # row 2 = 1-sigma, 0 = bad
    np.testing.assert_allclose(s.sigma[good], data[2][good].astype(float))
    assert np.array_equal(s.good, good & np.isfinite(data[0]))


def test_lamost_rows_and_header_facts():
    # LAMOST DR1 spec-55862-B6212_sp06-114: EXTEN0 row names, row 1 = inverse variance.
    from astropy.io import fits
    from astropy.time import Time

    path = REALDATA / "spec-55862-B6212_sp06-114.fits"
    data = fits.getdata(path)
    hdr = fits.getheader(path)
    s = read_spectra(path)[0]
    np.testing.assert_array_equal(s.flux, data[0].astype(float))
    np.testing.assert_allclose(s.ivar[s.good], data[1][s.good].astype(float), rtol=1e-6)
    assert np.array_equal(s.good, data[1] > 0)
    assert s.meta.object_name == hdr["DESIG"]
    assert (s.meta.site_lat_deg, s.meta.site_lon_deg) == (hdr["LATITUDE"], hdr["LONGITUD"])
    # DATE-OBS is the median UTC of the exposures (its header comment); astropy Time as reference.
    assert abs(s.meta.mjd - Time(hdr["DATE-OBS"], scale="utc").mjd) < 1e-8
