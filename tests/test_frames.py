"""Checks of zsieve.cosmology.frames against astropy.coordinates and facts of the trade.

Everything runs with astropy downloads switched off (astropy.utils.data.conf.allow_internet
False, IERS auto_download False): a correction that needed the network would raise here.
"""

from __future__ import annotations

import astropy.units as u
import numpy as np
import pytest
from astropy import constants as const
from astropy.coordinates import EarthLocation, GeocentricMeanEcliptic, SkyCoord
from astropy.time import Time
from astropy.utils import iers
from astropy.utils.data import conf as data_conf

from zsieve.cosmology.frames import (
    CMB_DIPOLE,
    cmb_parallel_velocity_kms,
    frame_info,
    remove_peculiar_velocity,
    site_location,
    to_cmb_frame,
    velocity_correction_kms,
)
from zsieve.spectrum import SpectrumMeta

C_KMS = const.c.to_value("km/s")
# Invented demo site (Mount Perrault Observatory) given as numbers, never looked up by name.
SITE = (-68.92, -24.61, 2905.0)
EQUINOX_2024 = 60389.5  # 2024 March 20, 12h UTC; the equinox was at 03:06 UTC (from memory)


@pytest.fixture(autouse=True)
def _offline():
    with data_conf.set_temp("allow_internet", False), iers.conf.set_temp("auto_download", False):
        yield


def _radec_of_ecliptic(lon_deg, lat_deg, mjd):
    c = SkyCoord(lon=lon_deg * u.deg, lat=lat_deg * u.deg, frame=GeocentricMeanEcliptic(equinox=Time(mjd, format="mjd")))
    icrs = c.icrs
    return float(icrs.ra.deg), float(icrs.dec.deg)


def test_barycentric_correction_matches_astropy_and_is_applied_multiplicatively():
    ra, dec, mjd, z = 53.1, -27.8, 60310.25, 0.6473
    meta = SpectrumMeta(ra_deg=ra, dec_deg=dec, mjd=mjd, site_lon_deg=SITE[0], site_lat_deg=SITE[1],
                        site_height_m=SITE[2], frame="topocentric")
    info = frame_info(meta, z)
    # astropy.coordinates directly (reference library)
    loc = EarthLocation.from_geodetic(SITE[0] * u.deg, SITE[1] * u.deg, SITE[2] * u.m)
    sc = SkyCoord(ra=ra * u.deg, dec=dec * u.deg)
    t = Time(mjd, format="mjd", scale="utc")
    with iers.conf.set_temp("iers_degraded_accuracy", "warn"):
        vb = sc.radial_velocity_correction("barycentric", obstime=t, location=loc).to_value(u.km / u.s)
        vh = sc.radial_velocity_correction("heliocentric", obstime=t, location=loc).to_value(u.km / u.s)
    assert info["v_bary_kms"] == pytest.approx(vb, abs=1e-6)
    assert info["v_helio_kms"] == pytest.approx(vh, abs=1e-6)
    # astropy's documented application: rv_bary = rv + v_corr + rv*v_corr/c with rv = cz
    rv = z * C_KMS
    assert info["z_bary"] * C_KMS == pytest.approx(rv + vb + rv * vb / C_KMS, rel=1e-12)
    assert info["correction_applied"] is True and info["frame_in"] == "topocentric"
    assert info["frame_out"] == "cmb" and info["z_cmb"] is not None
    assert info["factor_to_out"] == pytest.approx((1 + info["z_cmb"]) / (1 + z), rel=1e-14)


@pytest.mark.parametrize(
    "ecl_lon, ecl_lat, expected, tol",
    [
        # At the March equinox the Sun is at ecliptic longitude 0, the Earth moves toward
        # longitude 270 deg at ~29.8 km/s (common practice): a target there is blueshifted, so
        # the correction is +29.8 km/s; the opposite point gets -29.8; the ecliptic pole ~0.
        (270.0, 0.0, 29.8, 0.8),
        (90.0, 0.0, -29.8, 0.8),
        (0.0, 90.0, 0.0, 0.5),
    ],
)
def test_barycentric_correction_hand_checks(ecl_lon, ecl_lat, expected, tol):
    ra, dec = _radec_of_ecliptic(ecl_lon, ecl_lat, EQUINOX_2024)
    v = velocity_correction_kms(ra, dec, EQUINOX_2024, site_location(site=SITE))
    assert v == pytest.approx(expected, abs=tol)


def test_annual_amplitude_bounded_by_earth_orbital_speed():
    # Earth's orbital speed 29.3-30.3 km/s (mean 29.8, common practice) plus at most
    # 0.47 km/s of rotation: the annual swing of a target on the ecliptic stays within that.
    ra, dec = _radec_of_ecliptic(45.0, 0.0, EQUINOX_2024)
    mjd = EQUINOX_2024 + np.linspace(0.0, 365.25, 49)
    v = velocity_correction_kms(ra, dec, mjd, site_location(site=SITE))
    assert v.shape == mjd.shape
    amplitude = 0.5 * (v.max() - v.min())
    assert 29.0 < amplitude < 30.8
    assert np.max(np.abs(v)) < 30.8


def test_works_offline_beyond_bundled_earth_orientation_tables(caplog):
    # 2051: beyond any bundled IERS table; must warn and compute, never download
    v = velocity_correction_kms(150.0, 2.0, 69000.0, site_location(site=SITE))
    assert np.isfinite(v) and abs(v) < 31.0
    assert any("IERS" in r.getMessage() for r in caplog.records)  # said, not hidden


def test_cmb_frame_shift_at_apex_and_at_ninety_degrees():
    apex = SkyCoord(l=CMB_DIPOLE["l_deg"] * u.deg, b=CMB_DIPOLE["b_deg"] * u.deg, frame="galactic").icrs
    ra, dec = float(apex.ra.deg), float(apex.dec.deg)
    # Planck 2018 dipole (from memory): +369.8 km/s at the apex to first order in v/c
    for z_h in (0.0, 0.1):
        dz = to_cmb_frame(z_h, ra, dec) - z_h
        assert C_KMS * dz / (1 + z_h) == pytest.approx(369.82, abs=0.6)  # second order: v^2/c = 0.46
    assert C_KMS * to_cmb_frame(0.0, (ra + 180) % 360, -dec) == pytest.approx(-369.82, abs=0.6)
    side = apex.directional_offset_by(30 * u.deg, 90 * u.deg)
    assert to_cmb_frame(0.2, side.ra.deg, side.dec.deg) == pytest.approx(0.2, abs=1e-12)
    # the parallel component follows cos(separation) computed by astropy
    other = SkyCoord(ra=10.0 * u.deg, dec=-40.0 * u.deg)
    cosang = np.cos(other.separation(apex).rad)
    assert cmb_parallel_velocity_kms(10.0, -40.0) == pytest.approx(369.82 * cosang, abs=1e-6)


def test_frame_already_heliocentric_or_barycentric_is_not_corrected_twice():
    base = SpectrumMeta(ra_deg=53.1, dec_deg=-27.8, mjd=60310.25, site_lon_deg=SITE[0],
                        site_lat_deg=SITE[1], site_height_m=SITE[2], frame="topocentric")
    topo = frame_info(base, 0.3)
    again = frame_info(base.replace(frame="barycentric"), topo["z_bary"])
    assert again["correction_applied"] is False and "not corrected again" in again["correction_note"]
    assert again["z_bary"] == topo["z_bary"]
    helio = frame_info(base.replace(frame="heliocentric"), 0.3)
    assert helio["z_helio"] == 0.3 and helio["correction_applied"] is False
    # heliocentric and barycentric differ by the Sun's motion about the barycentre, ~0.01 km/s
    assert abs(helio["z_bary"] - 0.3) * C_KMS < 0.05 * 1.3
    # a user flag wins over the file
    flagged = frame_info(base.replace(frame="unknown"), 0.3, frame="topocentric")
    assert flagged["correction_applied"] is True and flagged["frame_source"] == "user"


def test_unknown_frame_and_missing_facts_are_said_not_guessed():
    unknown = frame_info(SpectrumMeta(ra_deg=10.0, dec_deg=5.0, mjd=60000.0), 0.5)
    assert unknown["frame_in"] == "unknown" and unknown["correction_applied"] is False
    assert unknown["z_cmb"] is None and unknown["frame_out"] == "unknown" and unknown["z_out"] == 0.5
    no_time = frame_info(SpectrumMeta(ra_deg=10.0, dec_deg=5.0, frame="topocentric"), 0.5)
    assert no_time["correction_applied"] is False and "time" in no_time["correction_note"]
    assert no_time["frame_out"] == "topocentric"
    no_site = frame_info(SpectrumMeta(ra_deg=10.0, dec_deg=5.0, mjd=60000.0, frame="topocentric"), 0.5)
    assert no_site["site"] == "geocentre" and any("geocentre" in n for n in no_site["notes"])
    with pytest.raises(ValueError):
        frame_info(SpectrumMeta(), 0.5, frame="galactocentric")


def test_site_from_meta_or_config_never_by_name():
    meta = SpectrumMeta(site_lon_deg=SITE[0], site_lat_deg=SITE[1], site_height_m=SITE[2])
    loc = site_location(meta)
    assert loc.lat.deg == pytest.approx(SITE[1]) and loc.height.to_value(u.m) == pytest.approx(SITE[2])
    cfg = site_location(meta, {"lon_deg": 10.0, "lat_deg": 45.0})
    assert cfg.lon.deg == pytest.approx(10.0)
    with pytest.raises(ValueError):
        site_location(site="Mount Perrault")
    with pytest.raises(ValueError):
        site_location(site=(0.0, 95.0))


def test_peculiar_velocity_removed_multiplicatively():
    meta = SpectrumMeta(ra_deg=200.0, dec_deg=-10.0, frame="heliocentric")
    info = frame_info(meta, 0.02, peculiar_kms=400.0)
    beta = 400.0 / C_KMS
    z_pec = np.sqrt((1 + beta) / (1 - beta)) - 1  # special-relativistic Doppler (common practice)
    assert (1 + info["z_cmb"]) == pytest.approx((1 + info["z_cosmological"]) * (1 + z_pec), rel=1e-14)
    assert info["frame_out"] == "cosmological"
    # first order: c * dz = v (1 + z)
    assert C_KMS * (info["z_cmb"] - info["z_cosmological"]) == pytest.approx(400.0 * 1.02, rel=1e-3)
    assert remove_peculiar_velocity(0.1, 0.0) == pytest.approx(0.1, abs=1e-15)


def test_measurement_record_moves_samples_with_the_frame():
    from zsieve.cosmology import describe, describe_measurement

    meta = SpectrumMeta(ra_deg=53.1, dec_deg=-27.8, mjd=60310.25, site_lon_deg=SITE[0],
                        site_lat_deg=SITE[1], site_height_m=SITE[2], frame="topocentric")
    samples = 1.42 + 0.0005 * np.random.default_rng(5).standard_normal(200)
    rec = describe_measurement(1.42, z_samples=samples, meta=meta)
    fr, cos = rec["frames"], rec["cosmology"]
    assert cos["frame"] == "cmb" and cos["z"] == fr["z_cmb"]
    # a frame change multiplies 1+z by one factor (design section 2), so samples move with it
    moved = (1 + samples) * (1 + fr["z_cmb"]) / (1 + 1.42) - 1
    direct = describe(fr["z_cmb"], z_samples=moved)
    assert cos["luminosity_distance_mpc_p84"] == pytest.approx(direct["luminosity_distance_mpc_p84"], rel=1e-12)
    unknown = describe_measurement(0.3, meta=SpectrumMeta())
    assert unknown["cosmology"]["frame"] == "unknown" and any("could not be moved" in n for n in unknown["cosmology"]["notes"])


# ----------------------------------------------------------------- real survey headers
REALDATA = __import__("pathlib").Path(__file__).resolve().parents[2] / "shared" / "realdata"
APO = (-105.820417, 32.780361, 2788.0)  # SDSS 2.5-m, Apache Point Observatory (from memory)


@pytest.mark.parametrize(
    "name, survey",
    [
        ("spSpec-51630-0266-638.fit", "SDSS DR7"),
        ("spSpec-51984-0296-001.fit", "SDSS DR7"),
        ("dr6spec-52199-0659-338.fit", "SDSS DR6"),
        ("dr10spec_sdss-0266-51602-0003.fits", "SDSS Legacy, DR10 files"),
        ("spec-55862-B6212_sp06-020.fits", "LAMOST DR1"),
        ("spec-55862-B6212_sp06-129.fits", "LAMOST DR1"),
    ],
)
def test_heliocentric_correction_matches_survey_header(name, survey):
    """The surveys' pipelines record the heliocentric correction they applied (HELIO_RV).

    Outside check against SDSS (DR6/DR7/DR10 files) and LAMOST DR1 headers in
    ../shared/realdata. In these files HELIO_RV has the opposite sign to astropy's
    correction (observed here: |sum| < 0.5 km/s while each is 5-27 km/s); the size agrees
    within 0.5 km/s, the slack covering the pipelines' own choices of time, pointing
    (plate centre) and Earth-rotation term, which the headers do not state.
    """
    from astropy.io import fits

    path = REALDATA / name
    if not path.exists():
        pytest.skip(f"optional real data {name} ({survey}) absent")
    h = fits.getheader(path)
    if "TAI" in h:  # SDSS: mid-exposure TAI seconds, plate centre RA/DEC, APO
        mjd = Time(h["TAI"] / 86400.0, format="mjd", scale="tai").utc.mjd
        site = APO
    else:  # LAMOST: DATE-OBS (UTC) + half the exposure, site from LONGITUD/LATITUDE
        mjd = Time(h["DATE-OBS"], scale="utc").mjd + 0.5 * h["EXPTIME"] / 86400.0
        site = (h["LONGITUD"], h["LATITUDE"], 960.0)  # Xinglong height, from memory
    meta = SpectrumMeta(ra_deg=h["RA"], dec_deg=h["DEC"], mjd=mjd, site_lon_deg=site[0],
                        site_lat_deg=site[1], site_height_m=site[2], frame="topocentric")
    info = frame_info(meta, 0.0)
    assert 4.0 < abs(h["HELIO_RV"]) < 30.0
    assert info["v_helio_kms"] == pytest.approx(-h["HELIO_RV"], abs=0.5)
