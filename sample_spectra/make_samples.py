#!/usr/bin/env python
"""Regenerate the demo spectra of the (invented) Corvid Deep Field Survey.

Usage::

    python sample_spectra/make_samples.py            # writes into sample_spectra/

Every spectrum is a :func:`zsieve.simulate.mock_spectrum` with a fixed seed, written with the
writers of :mod:`zsieve.io` in a different layout, then read back with
:func:`zsieve.io.read_spectrum` and compared with what was written. The scenario (survey,
telescope, observatory, site, objects) is invented; see ``README.md`` beside this file.
The answers are written to ``truth.csv`` (no wavelength or flux columns, so it is not
taken for a spectrum).
"""

from __future__ import annotations

import argparse
import csv
import logging
import math
import os
from pathlib import Path

import numpy as np

log = logging.getLogger("make_samples")

SEED = 20260302
HERE = Path(__file__).resolve().parent

#: The invented Mount Perrault Observatory (geodetic, WGS84).
SITE = dict(lon_deg=-112.8720, lat_deg=38.3190, height_m=2874.0)
#: Centre of the invented Corvid Deep Field.
FIELD = (163.420, 41.870)
FLUX_UNIT = "1e-17 erg / (s cm2 Angstrom)"
C_KMS = 299792.458

# object, class, z (in the file's frame), S/N, file, layout, options
OBJECTS = [
    dict(obj="CDX-0042", kind="emission-galaxy", z=0.0823, snr=40.0, file="CDX-0042.fits",
         layout="image-linear", unc="sigma", sim=dict(dlambda=1.5),
         note="star-forming galaxy; H-alpha, [N II], [S II], [O III], H-beta"),
    dict(obj="CDX-0107", kind="emission-galaxy", z=0.3471, snr=25.0, file="CDX-0107.fits",
         layout="image-log", unc="ivar", gap=(6010.0, 6060.0),
         note="emission-line galaxy; chip gap 6010-6060 A (zero ivar)"),
    dict(obj="CDX-0215", kind="emission-galaxy", z=0.7702, snr=18.0, file="CDX-0215_air.fits",
         layout="image-linear", unc="var", medium="air", sim=dict(dlambda=1.6, medium="air"),
         note="[O II], H-beta, [O III] at z~0.77; air wavelengths (CTYPE1 AWAV), variance extension"),
    dict(obj="CDX-0388", kind="emission-galaxy", z=1.1803, snr=15.0, file="CDX-0388.fits",
         layout="table-loglam", unc="ivar",
         note="[O II] doublet near 8126 A, little else in range"),
    dict(obj="CDX-0451", kind="emission-galaxy", z=0.5204, snr=6.0, file="CDX-0451.csv",
         layout="csv-nm", unc="sigma",
         note="faint galaxy, low S/N; CSV with wavelengths in nm"),
    dict(obj="CDX-0533", kind="absorption-galaxy", z=0.2875, snr=12.0, file="CDX-0533.fits",
         layout="image-log", unc="var", cosmic=7302.0,
         note="passive galaxy: 4000 A break, Ca II H&K, G band, Mg b, Na D; one unflagged cosmic ray"),
    dict(obj="CDX-0560", kind="absorption-galaxy", z=0.6127, snr=8.0, file="CDX-0560_table.fits",
         layout="table-wave", unc="var",
         note="passive galaxy at z~0.61; binary table with a variance column"),
    dict(obj="CDX-0619", kind="quasar", z=2.4120, snr=10.0, file="CDX-0619_air.fits",
         layout="image-log", unc="ivar", medium="air", sim=dict(medium="air"),
         note="quasar: Ly-alpha forest, Ly-alpha, N V, Si IV, C IV (blueshifted), C III]; air, log WCS"),
    dict(obj="CDX-0702", kind="quasar", z=1.0460, snr=15.0, file="CDX-0702.ecsv",
         layout="ecsv", unc="sigma",
         note="quasar: C III], Mg II, narrow [O II]"),
    dict(obj="CDX-0777", kind="star", z=-93.0 / C_KMS, snr=25.0, file="CDX-0777.fits",
         layout="image-linear", unc="ivar", frame="barycentric", site_keys="latlon",
         sim=dict(dlambda=1.5),
         note="field star, v = -93 km/s barycentric; SPECSYS BARYCENT, site as LATITUDE/LONGITUD"),
    dict(obj="CDX-0815", kind="noise", z=float("nan"), snr=0.5, file="CDX-0815.fits",
         layout="image-log", unc="sigma",
         note="junk: no source (pure noise on a sloped faint level)"),
    dict(obj="CDX-0904", kind="single-line", z=0.2281, snr=12.0, file="CDX-0904.tsv",
         layout="tsv", unc="var", sim=dict(line="[O III] 5008"),
         note="one emission line near 6150 A and nothing else: ambiguous"),
]


def _barycentric_kms(ra, dec, mjd) -> float:
    """Barycentric correction (km/s) at the invented site, from astropy (offline ephemeris)."""
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    loc = EarthLocation.from_geodetic(SITE["lon_deg"] * u.deg, SITE["lat_deg"] * u.deg, SITE["height_m"] * u.m)
    coord = SkyCoord(ra * u.deg, dec * u.deg)
    corr = coord.radial_velocity_correction(kind="barycentric", obstime=Time(mjd, format="mjd", scale="utc"),
                                            location=loc)
    return float(corr.to_value(u.km / u.s))


def _mjd_to_iso(mjd: float) -> str:
    from astropy.time import Time

    return Time(mjd, format="mjd", scale="utc").isot[:19]


def _fits_extras(path: Path, spec_meta, exptime: float, site_keys: str) -> None:
    """Add the survey's own header cards: telescope, times, site as LATITUDE/LONGITUD."""
    from astropy.io import fits

    with fits.open(path, mode="update") as hdul:
        h = hdul[0].header
        h["TELESCOP"] = ("Halcyon 3.1m", "invented")
        h["OBSERVAT"] = ("Mount Perrault", "invented observatory")
        h["INSTRUME"] = ("HALOS", "invented spectrograph")
        h["SURVEY"] = ("CDFS-X", "Corvid Deep Field Survey, invented")
        start = spec_meta.mjd - exptime / 2.0 / 86400.0
        h["DATE-OBS"] = (_mjd_to_iso(start), "UTC start of exposure")
        h["MJD-OBS"] = (round(start, 6), "[d] UTC start of exposure")
        h["EXPTIME"] = (exptime, "[s] exposure time")
        h["DATE-AVG"] = (_mjd_to_iso(spec_meta.mjd), "UTC mid-exposure")
        if site_keys == "latlon":
            for k in ("OBSGEO-X", "OBSGEO-Y", "OBSGEO-Z"):
                h.remove(k, ignore_missing=True)
            h["LATITUDE"] = (SITE["lat_deg"], "[deg] geodetic latitude")
            h["LONGITUD"] = (SITE["lon_deg"], "[deg] longitude, east positive")
            h["ALTITUDE"] = (SITE["height_m"], "[m] height above ellipsoid")
        hdul.flush()


def make(outdir: Path) -> list[dict]:
    from zsieve.io import read_spectrum, write_fits_image, write_fits_table, write_text
    from zsieve.simulate import mock_spectrum
    from zsieve.spectrum import SpectrumMeta

    outdir.mkdir(parents=True, exist_ok=True)
    children = np.random.SeedSequence(SEED).spawn(len(OBJECTS))
    rows = []
    for item, child in zip(OBJECTS, children):
        rng = np.random.default_rng(child)
        ra = FIELD[0] + rng.uniform(-0.25, 0.25)
        dec = FIELD[1] + rng.uniform(-0.2, 0.2)
        night = 61110 + int(rng.integers(0, 25))  # March-April 2026, the field is up all night
        mjd = night + 0.15 + rng.uniform(0.0, 0.25)  # 03:36-09:36 UTC, i.e. local night
        exptime = float(rng.choice([1800.0, 2700.0, 3600.0]))
        frame = item.get("frame", "topocentric")
        meta = SpectrumMeta(
            source=item["file"], object_name=item["obj"], ra_deg=round(ra, 6), dec_deg=round(dec, 6),
            mjd=round(mjd, 6), site_lon_deg=SITE["lon_deg"], site_lat_deg=SITE["lat_deg"],
            site_height_m=SITE["height_m"], flux_unit=FLUX_UNIT, frame="topocentric",
        )
        z_file = item["z"]
        v_bary = _barycentric_kms(ra, dec, mjd) if frame == "barycentric" else 0.0
        # the mock is made as observed (topocentric); a barycentric file is shifted afterwards
        z_topo = z_file if frame == "topocentric" else (1 + z_file) / (1 + v_bary / C_KMS) - 1
        spec, truth = mock_spectrum(item["kind"], z_topo, item["snr"], rng, meta=meta, **item.get("sim", {}))
        wave, flux, sigma = spec.wavelength, spec.flux.copy(), spec.sigma.copy()
        mask = spec.mask.copy()
        if "gap" in item:  # a chip gap: zero flux, unusable uncertainty
            lo, hi = item["gap"]
            gap = (wave > lo) & (wave < hi)
            flux[gap], sigma[gap], mask[gap] = 0.0, np.inf, True
        if "cosmic" in item:  # a cosmic-ray hit that the reduction missed (not masked)
            k = int(np.argmin(np.abs(wave - item["cosmic"])))
            flux[k] += 25.0 * sigma[k]
        if frame == "barycentric":
            wave = wave * (1 + v_bary / C_KMS)
            meta = meta.replace(frame="barycentric")
        spec = spec.replace(wavelength=wave, flux=flux, sigma=sigma, mask=mask, meta=meta)

        path = outdir / item["file"]
        medium = item.get("medium", "vacuum")
        layout = item["layout"]
        if layout in ("image-linear", "image-log"):
            sampling = "linear" if layout == "image-linear" else "log"
            write_fits_image(spec, path, sampling=sampling, uncertainty=item["unc"], medium=medium,
                             dtype=np.float32)
        elif layout == "table-loglam":
            write_fits_table(spec, path, log10=True, uncertainty=item["unc"], medium=medium)
        elif layout == "table-wave":
            write_fits_table(spec, path, uncertainty=item["unc"], medium=medium)
        elif layout == "csv-nm":
            write_text(spec, path, fmt="csv", uncertainty=item["unc"], medium=medium, wave_unit="nm")
        elif layout in ("ecsv", "tsv"):
            write_text(spec, path, fmt=layout, uncertainty=item["unc"], medium=medium)
        else:
            raise ValueError(f"unknown layout {layout}")
        if path.suffix == ".fits":
            _fits_extras(path, meta, exptime, item.get("site_keys", "obsgeo"))

        back = read_spectrum(path)
        tol = 2e-7 if layout.startswith("image") else 1e-9  # float32 images
        if not np.allclose(back.wavelength, spec.wavelength, rtol=1e-9, atol=1e-6):
            raise RuntimeError(f"{path}: wavelengths do not read back")
        good = ~spec.mask
        if not np.allclose(back.flux[good], spec.flux[good], rtol=tol * 10, atol=tol * np.abs(spec.flux).max()):
            raise RuntimeError(f"{path}: flux does not read back")
        if not np.array_equal(back.mask, spec.mask):
            raise RuntimeError(f"{path}: mask does not read back")
        if back.meta.medium != medium:
            raise RuntimeError(f"{path}: medium {back.meta.medium} read back, {medium} written")
        rows.append(dict(
            file=item["file"], object=item["obj"], kind=item["kind"],
            z_true=("" if math.isnan(z_file) else f"{z_file:.6f}"), frame=frame,
            z_topocentric=("" if math.isnan(z_topo) else f"{z_topo:.6f}"),
            snr=item["snr"], snr_definition=("strongest line, matched filter"
                                             if item["kind"] in ("emission-galaxy", "single-line")
                                             else "median per pixel"),
            z_bound=("" if not math.isfinite(truth["z_bound"]) else f"{truth['z_bound']:.2e}"),
            layout=layout, uncertainty=item["unc"], medium=medium, note=item["note"],
        ))
        os.chmod(path, 0o644)
        log.info("wrote %s (%s, z=%s, %d pixels)", path.name, item["kind"], rows[-1]["z_true"], spec.n_pix)
    with open(outdir / "truth.csv", "w", newline="") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    return rows


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(HERE), help="output folder (default: beside this script)")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    rows = make(Path(args.out))
    total = sum(os.path.getsize(Path(args.out) / r["file"]) for r in rows)
    log.info("%d spectra, %.2f MB", len(rows), total / 1e6)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
