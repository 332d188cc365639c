"""Velocity frames of a measured redshift: topocentric, heliocentric, barycentric, CMB.

Frames compose multiplicatively (design §2): every shift multiplies 1 + z,

    (1 + z_obs) = (1 + z_cosmological)(1 + z_peculiar)(1 + z_observer).

* **Barycentric / heliocentric**: astropy's
  :meth:`~astropy.coordinates.SkyCoord.radial_velocity_correction` returns the velocity
  v_corr to *add* to an observed velocity; its documentation gives the exact application as
  rv + v_corr + rv·v_corr/c, which for rv = c·z is

      1 + z_bary = (1 + z_topo)(1 + v_corr/c).

  It needs RA/Dec, the time and the site (from :class:`~zsieve.spectrum.SpectrumMeta`, filled
  by the readers from OBSGEO-X/Y/Z or latitude/longitude/height keywords, or given by the
  user). It runs **offline**: no site-name lookup, and Earth-orientation data only from the
  tables bundled with astropy (downloads are switched off inside :func:`offline_earth_orientation`;
  a time outside the bundled tables gives a warning and a degraded - still sub-m/s for this
  purpose - Earth rotation, never a network call).
* **Respecting the input frame**: a spectrum already heliocentric or barycentric (FITS
  SPECSYS, a survey convention, or the user's ``frame=``) is never corrected again; an
  ``"unknown"`` frame is not guessed at. Every result names the frame of each z it gives.
* **CMB frame**: the Sun moves at 369.82 km/s toward l = 264.021°, b = 48.253° (Planck 2018
  results I; from memory). With v_∥ the component of that velocity toward the object,

      1 + z_CMB = (1 + z_helio) / (1 − v_∥/c),

  so an object at the apex, blueshifted by our motion, gets a larger z_CMB (c·Δz ≈ +369.8 km/s).
  (The exact special-relativistic factor γ(1 + β cos θ) differs from this at order β² ≈ 1.5e-6,
  i.e. by < 0.5 km/s.)
* **Peculiar velocity** (optional, in the CMB frame): (1 + z_CMB) = (1 + z_cos)(1 + z_pec) with
  1 + z_pec = sqrt((1 + v/c)/(1 − v/c)).

Examples
--------
>>> round(float(cmb_parallel_velocity_kms(*CMB_APEX_RADEC)), 2)
369.82
>>> z = to_cmb_frame(0.0, *CMB_APEX_RADEC)  # c*z = v + v^2/c + ...: 369.8 to first order
>>> round(float(z * C_KMS), 1)
370.3
>>> round(float(apply_velocity_correction(0.1, 10.0)), 9)
0.100036692
"""

from __future__ import annotations

import contextlib
import logging
import math
import warnings

import numpy as np

from .models import finite_number
from .velocities import C_KMS, doppler_redshift

__all__ = [
    "FRAMES",
    "CMB_DIPOLE",
    "CMB_APEX_RADEC",
    "offline_earth_orientation",
    "site_location",
    "velocity_correction_kms",
    "apply_velocity_correction",
    "cmb_parallel_velocity_kms",
    "to_cmb_frame",
    "remove_peculiar_velocity",
    "frame_info",
]

log = logging.getLogger(__name__)

#: Frames a spectrum's wavelengths can be in.
FRAMES = ("topocentric", "heliocentric", "barycentric", "unknown")

#: The solar dipole relative to the CMB (Planck 2018 results I, from memory).
CMB_DIPOLE = {
    "speed_kms": 369.82,
    "l_deg": 264.021,
    "b_deg": 48.253,
    "source": "Planck 2018 results I (solar dipole: 369.82 +/- 0.11 km/s toward l=264.021, b=48.253)",
}


def _apex_radec() -> tuple[float, float]:
    from astropy.coordinates import SkyCoord

    apex = SkyCoord(l=CMB_DIPOLE["l_deg"], b=CMB_DIPOLE["b_deg"], unit="deg", frame="galactic").icrs
    return float(apex.ra.deg), float(apex.dec.deg)


#: ICRS RA/Dec (deg) of the dipole apex.
CMB_APEX_RADEC = _apex_radec()


@contextlib.contextmanager
def offline_earth_orientation():
    """Context in which astropy never downloads Earth-orientation or any other data.

    Inside it ``astropy.utils.iers.conf.auto_download`` and
    ``astropy.utils.data.conf.allow_internet`` are False, ``auto_max_age`` is None (old
    predictions are accepted rather than refreshed) and ``iers_degraded_accuracy`` is
    ``"warn"``: the bundled IERS tables are used, and a time beyond them warns instead of
    failing (Earth-rotation angle errors of a fraction of a second of time change the
    correction by well under 1 m/s). The previous settings come back on exit.

    >>> from astropy.utils import iers
    >>> with offline_earth_orientation():
    ...     iers.conf.auto_download
    False
    """
    from astropy.utils import iers
    from astropy.utils.data import conf as data_conf

    with (
        iers.conf.set_temp("auto_download", False),
        iers.conf.set_temp("iers_degraded_accuracy", "warn"),
        iers.conf.set_temp("auto_max_age", None),
        data_conf.set_temp("allow_internet", False),
    ):
        yield


def site_location(meta=None, site=None):
    """The observatory as an :class:`~astropy.coordinates.EarthLocation`, or ``None``.

    Parameters
    ----------
    meta : SpectrumMeta, optional
        Its ``site_lon_deg``, ``site_lat_deg``, ``site_height_m`` (height 0 if absent).
    site : EarthLocation, mapping or sequence, optional
        The user's configuration, which wins over the file: an EarthLocation, a mapping with
        ``lon_deg``, ``lat_deg`` and optional ``height_m``, or a (lon_deg, lat_deg[, height_m])
        sequence. Never a site *name* (that would need a download).

    >>> loc = site_location(site=(-70.73, -29.26, 2400.0))
    >>> round(float(loc.lat.deg), 2), round(float(loc.height.to_value("m")))
    (-29.26, 2400)
    >>> site_location() is None
    True
    """
    import astropy.units as u
    from astropy.coordinates import EarthLocation

    if isinstance(site, EarthLocation):
        return site
    lon = lat = None
    height = 0.0
    if site is not None:
        if isinstance(site, str):
            raise ValueError("give the site as longitude/latitude/height, not a name (names need a download)")
        if hasattr(site, "keys"):
            lon, lat, height = site.get("lon_deg"), site.get("lat_deg"), site.get("height_m", 0.0)
        else:
            vals = list(site)
            if len(vals) not in (2, 3):
                raise ValueError(f"site must be (lon_deg, lat_deg[, height_m]), got {site!r}")
            lon, lat = vals[0], vals[1]
            height = vals[2] if len(vals) == 3 else 0.0
    elif meta is not None and meta.site_lon_deg is not None and meta.site_lat_deg is not None:
        lon, lat = meta.site_lon_deg, meta.site_lat_deg
        height = meta.site_height_m if meta.site_height_m is not None else 0.0
    if lon is None or lat is None:
        return None
    lon = finite_number(lon, "site longitude", lo=-360.0, hi=360.0, error=ValueError)
    lat = finite_number(lat, "site latitude", lo=-90.0, hi=90.0, error=ValueError)
    height = finite_number(height if height is not None else 0.0, "site height", lo=-1.2e4, hi=1e5, error=ValueError)
    return EarthLocation.from_geodetic(lon * u.deg, lat * u.deg, height * u.m)


def velocity_correction_kms(ra_deg, dec_deg, mjd, location=None, kind: str = "barycentric"):
    """astropy's radial-velocity correction (km/s, to be *added*), computed offline.

    Parameters
    ----------
    ra_deg, dec_deg : float
        ICRS position of the target.
    mjd : float or array_like
        Time(s) of the observation, MJD (UTC).
    location : EarthLocation, optional
        The site; ``None`` gives the geocentric value (ignores Earth's rotation, <= 0.47 km/s).
    kind : {"barycentric", "heliocentric"}

    Returns
    -------
    float or numpy.ndarray
        v_corr in km/s, the shape of ``mjd``.

    Examples
    --------
    A target on the ecliptic 90° west of the Sun at the March equinox lies where the Earth is
    heading, so its light is blueshifted by ~29.8 km/s and the correction is positive:

    >>> v = velocity_correction_kms(270.0, -23.44, 60389.5)
    >>> bool(29.0 < v < 30.7)
    True
    """
    import astropy.units as u
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    if kind not in ("barycentric", "heliocentric"):
        raise ValueError(f"kind must be 'barycentric' or 'heliocentric', got {kind!r}")
    coord = SkyCoord(ra=float(ra_deg) * u.deg, dec=float(dec_deg) * u.deg, frame="icrs")
    t = Time(np.asarray(mjd, dtype=float), format="mjd", scale="utc")
    if location is None:
        # astropy's barycentric correction includes the gravitational potential at the site,
        # which diverges at the geocentre itself; the mean over two antipodal points on the
        # equator is the geocentric value (their rotation velocities cancel).
        sites = [EarthLocation.from_geodetic(lon * u.deg, 0.0 * u.deg, 0.0 * u.m) for lon in (0.0, 180.0)]
    else:
        sites = [location]
    with offline_earth_orientation(), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        vs = [coord.radial_velocity_correction(kind=kind, obstime=t, location=s) for s in sites]
    for message in dict.fromkeys(str(w.message) for w in caught):
        log.warning("radial velocity correction: %s", message)
    out = np.mean([v.to_value(u.km / u.s) for v in vs], axis=0)
    return float(out) if np.ndim(out) == 0 else np.asarray(out)


def apply_velocity_correction(z, v_corr_kms):
    """``(1 + z)(1 + v_corr/c) - 1``: a redshift moved by astropy's correction velocity.

    >>> float(apply_velocity_correction(0.0, 0.0))
    0.0
    """
    return (1.0 + np.asarray(z, dtype=float)) * (1.0 + np.asarray(v_corr_kms, dtype=float) / C_KMS) - 1.0


def _unit_vector(ra_deg, dec_deg) -> np.ndarray:
    ra = np.radians(np.asarray(ra_deg, dtype=float))
    dec = np.radians(np.asarray(dec_deg, dtype=float))
    return np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)


def cmb_parallel_velocity_kms(ra_deg, dec_deg, dipole=None):
    """Component of the Sun's velocity relative to the CMB toward the object, km/s.

    Positive when the object lies in the hemisphere of the apex (we move toward it).

    >>> ra, dec = CMB_APEX_RADEC
    >>> round(float(cmb_parallel_velocity_kms((ra + 180.0) % 360.0, -dec)), 2)
    -369.82
    """
    d = CMB_DIPOLE if dipole is None else dipole
    apex = _unit_vector(*_apex_from(d))
    return d["speed_kms"] * (_unit_vector(ra_deg, dec_deg) @ apex)


def _apex_from(dipole) -> tuple[float, float]:
    if dipole is CMB_DIPOLE or (dipole["l_deg"], dipole["b_deg"]) == (CMB_DIPOLE["l_deg"], CMB_DIPOLE["b_deg"]):
        return CMB_APEX_RADEC
    from astropy.coordinates import SkyCoord

    apex = SkyCoord(l=dipole["l_deg"], b=dipole["b_deg"], unit="deg", frame="galactic").icrs
    return float(apex.ra.deg), float(apex.dec.deg)


def to_cmb_frame(z_helio, ra_deg, dec_deg, dipole=None):
    """CMB-frame redshift, ``(1 + z_helio)/(1 − v_∥/c) − 1``, vectorised over z.

    >>> round(float(to_cmb_frame(0.05, 0.0, 0.0)), 6)
    0.048744
    """
    v_par = cmb_parallel_velocity_kms(ra_deg, dec_deg, dipole)
    return (1.0 + np.asarray(z_helio, dtype=float)) / (1.0 - v_par / C_KMS) - 1.0


def remove_peculiar_velocity(z, peculiar_kms):
    """Cosmological redshift after removing a known line-of-sight peculiar velocity.

    ``(1 + z) = (1 + z_cos)(1 + z_pec)``, ``z_pec`` the special-relativistic Doppler shift of
    ``peculiar_kms`` (positive = receding).

    >>> round(float(remove_peculiar_velocity(0.01, 300.0)), 7)
    0.0089898
    """
    return (1.0 + np.asarray(z, dtype=float)) / (1.0 + doppler_redshift(peculiar_kms)) - 1.0


def _scalar(x) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def frame_info(meta, z, *, peculiar_kms=None, frame=None, site=None) -> dict:
    """Move a measured redshift between frames, saying which frame each figure is in.

    Parameters
    ----------
    meta : SpectrumMeta or None
        Where the coordinates (``ra_deg``, ``dec_deg``), time (``mjd``), site and ``frame``
        of the spectrum come from.
    z : float
        The redshift as measured from the wavelengths (> -1).
    peculiar_kms : float, optional
        A known line-of-sight peculiar velocity (CMB frame) to remove.
    frame : str, optional
        The user's statement of the input frame (one of :data:`FRAMES`); wins over ``meta.frame``.
    site : optional
        Site configuration for :func:`site_location` (wins over the file's site).

    Returns
    -------
    dict
        JSON-able: ``z_input``, ``frame_in`` and ``frame_source``; ``v_bary_kms`` and
        ``v_helio_kms`` (astropy's corrections, when computed), ``site``, ``correction_applied``
        and ``correction_note`` (what was done or why not); ``z_topo``, ``z_helio``, ``z_bary``,
        ``z_cmb``, ``v_cmb_parallel_kms``, ``cmb_dipole``, ``z_cosmological`` and
        ``peculiar_kms``; ``z_out``/``frame_out`` (the most corrected z and its frame) and
        ``factor_to_out`` = (1+z_out)/(1+z_input), which moves bootstrap samples the same way;
        ``notes``.

    Examples
    --------
    >>> from zsieve.spectrum import SpectrumMeta
    >>> m = SpectrumMeta(ra_deg=150.0, dec_deg=2.2, frame="heliocentric")
    >>> info = frame_info(m, 0.5)
    >>> info["correction_applied"], info["z_helio"], info["frame_out"]
    (False, 0.5, 'cmb')
    >>> round(info["z_cmb"], 6)
    0.50174
    """
    from .distances import check_redshift

    z = check_redshift(z)
    notes: list[str] = []
    frame_source = "user" if frame is not None else "file"
    frame_in = (frame if frame is not None else getattr(meta, "frame", None)) or "unknown"
    frame_in = str(frame_in).strip().lower()
    if frame_in not in FRAMES:
        raise ValueError(f"frame must be one of {', '.join(FRAMES)}, got {frame_in!r}")
    ra = getattr(meta, "ra_deg", None)
    dec = getattr(meta, "dec_deg", None)
    mjd = getattr(meta, "mjd", None)
    have_pos = ra is not None and dec is not None
    if have_pos:
        ra = finite_number(ra, "RA", lo=-360.0, hi=360.0, error=ValueError)
        dec = finite_number(dec, "Dec", lo=-90.0, hi=90.0, error=ValueError)
    have_time = mjd is not None and math.isfinite(float(mjd))

    out = {
        "z_input": z,
        "frame_in": frame_in,
        "frame_source": frame_source,
        "ra_deg": ra,
        "dec_deg": dec,
        "mjd": None if mjd is None else float(mjd),
        "site": None,
        "v_bary_kms": None,
        "v_helio_kms": None,
        "correction_applied": False,
        "correction_note": "",
        "z_topo": z if frame_in == "topocentric" else None,
        "z_helio": z if frame_in == "heliocentric" else None,
        "z_bary": z if frame_in == "barycentric" else None,
        "z_cmb": None,
        "v_cmb_parallel_kms": None,
        "cmb_dipole": dict(CMB_DIPOLE),
        "z_cosmological": None,
        "peculiar_kms": None if peculiar_kms is None else float(peculiar_kms),
    }

    def corrections():
        loc = site_location(meta, site)
        if loc is None:
            out["site"] = "geocentre"
            notes.append("Site unknown: corrections computed at the geocentre (Earth's rotation, <= 0.47 km/s, ignored).")
        else:
            out["site"] = {
                "lon_deg": float(loc.lon.deg),
                "lat_deg": float(loc.lat.deg),
                "height_m": float(loc.height.to_value("m")),
            }
        vb = velocity_correction_kms(ra, dec, mjd, loc, "barycentric")
        vh = velocity_correction_kms(ra, dec, mjd, loc, "heliocentric")
        out["v_bary_kms"], out["v_helio_kms"] = vb, vh
        return vb, vh

    if frame_in == "topocentric":
        if have_pos and have_time:
            vb, vh = corrections()
            out["z_bary"] = float(apply_velocity_correction(z, vb))
            out["z_helio"] = float(apply_velocity_correction(z, vh))
            out["correction_applied"] = True
            out["correction_note"] = (
                f"topocentric z corrected with astropy's radial_velocity_correction: "
                f"barycentric {vb:+.3f} km/s, heliocentric {vh:+.3f} km/s, applied as "
                "(1+z)(1+v/c)"
            )
        else:
            missing = [n for n, ok in (("RA/Dec", have_pos), ("time", have_time)) if not ok]
            out["correction_note"] = (
                f"topocentric z not corrected: {' and '.join(missing)} missing from the file"
            )
    elif frame_in in ("heliocentric", "barycentric"):
        out["correction_note"] = f"already {frame_in}: not corrected again"
        if have_pos and have_time:
            # Heliocentric and barycentric differ by the Sun's motion about the barycentre
            # (~0.01 km/s); the site's contribution cancels in the ratio.
            vb, vh = corrections()
            ratio = (1.0 + vb / C_KMS) / (1.0 + vh / C_KMS)
            if frame_in == "heliocentric":
                out["z_bary"] = float((1.0 + z) * ratio - 1.0)
            else:
                out["z_helio"] = float((1.0 + z) / ratio - 1.0)
    else:
        out["correction_note"] = (
            "frame of the wavelengths unknown (no SPECSYS, survey convention or user flag): "
            "no correction applied and no CMB-frame z; state the frame to get them"
        )

    z_sun = out["z_helio"] if out["z_helio"] is not None else out["z_bary"]
    if z_sun is not None and have_pos:
        out["v_cmb_parallel_kms"] = float(cmb_parallel_velocity_kms(ra, dec))
        out["z_cmb"] = float(to_cmb_frame(z_sun, ra, dec))
    elif z_sun is not None:
        notes.append("No RA/Dec: CMB-frame z not computed.")

    if peculiar_kms is not None:
        if out["z_cmb"] is not None:
            out["z_cosmological"] = float(remove_peculiar_velocity(out["z_cmb"], float(peculiar_kms)))
        else:
            notes.append("Peculiar velocity not removed: it is defined in the CMB frame, which is not available.")

    for key, name in (
        ("z_cosmological", "cosmological"),
        ("z_cmb", "cmb"),
        ("z_bary", "barycentric"),
        ("z_helio", "heliocentric"),
        ("z_topo", "topocentric"),
    ):
        if out[key] is not None:
            out["z_out"], out["frame_out"] = out[key], name
            break
    else:
        out["z_out"], out["frame_out"] = z, "unknown"
    out["factor_to_out"] = (1.0 + out["z_out"]) / (1.0 + z)
    for key in ("z_topo", "z_helio", "z_bary", "z_cmb", "z_cosmological", "z_out", "v_bary_kms", "v_helio_kms"):
        out[key] = _scalar(out[key])
    out["notes"] = notes
    return out
