"""What a redshift means in a cosmology: distances, times, scales and velocities.

:func:`quantities` is the vectorised core (arrays of z in, astropy Quantities out);
:func:`describe` is the record for one measured z - plain JSON-able floats, the cosmology
used (name + parameters), uncertainties propagated from bootstrap samples or from z ± σ, and
notes that say what the velocity figures are and are not.

Every distance and time comes from :mod:`astropy.cosmology` (the comoving distance integrals
of the FLRW model); the rest follows from them:

* angular-diameter distance D_A = D_M/(1+z), luminosity distance D_L = (1+z)·D_M, distance
  modulus 5·log10(D_L / 10 pc) (Hogg 1999, astro-ph/9905116);
* kpc per arcsec: D_A (proper) or D_M (comoving) times one arcsecond in radians;
* recession velocities and Doppler figures: see :mod:`zsieve.cosmology.velocities`.

Redshifts in -1 < z < 0 (blueshifted stars, mostly) have no cosmological distance: those
quantities are NaN (``None`` in :func:`describe`), while the Doppler figures, which are then
the object's real line-of-sight velocity, are kept. At z = 0 every distance is 0 and the
distance modulus is -inf (``None`` in JSON, with a note).

Examples
--------
>>> q = quantities([0.5, 1.0], "Planck18")
>>> q["luminosity_distance_mpc"].unit, [round(float(v), 1) for v in q["luminosity_distance_mpc"].value]
(Unit("Mpc"), [2919.6, 6791.3])
>>> d = describe(1.0, cosmology={"H0": 70, "Om0": 1.0, "Ode0": 0.0})
>>> round(d["recession_velocity_now_c"], 6), round(d["recession_velocity_emission_c"], 6)
(0.585786, 0.828427)
>>> d["cosmology"]["class"], round(d["age_now_gyr"], 4)
('FlatLambdaCDM', 9.3123)
"""

from __future__ import annotations

import logging
import math

import numpy as np

from .models import CosmologyError, cosmology_record, finite_number, get_cosmology
from .uncertainty import draw_z_samples, summarise
from .velocities import (
    C_KMS,
    LABEL_CZ,
    LABEL_RELATIVISTIC,
    NOTE_FASTER_THAN_C,
    NOTE_NOT_DOPPLER,
    cz_velocity,
    recession_velocity_emission,
    recession_velocity_now,
    relative_difference,
    relativistic_doppler_velocity,
)

__all__ = ["UNITS", "QUANTITY_KEYS", "quantities", "describe", "check_redshift"]

log = logging.getLogger(__name__)

#: Unit of every key of :func:`describe` / :func:`quantities` (astropy unit strings; "" = none).
UNITS = {
    "z": "",
    "comoving_distance_mpc": "Mpc",
    "transverse_comoving_distance_mpc": "Mpc",
    "angular_diameter_distance_mpc": "Mpc",
    "luminosity_distance_mpc": "Mpc",
    "distance_modulus_mag": "mag",
    "lookback_time_gyr": "Gyr",
    "age_at_z_gyr": "Gyr",
    "kpc_per_arcsec_proper": "kpc / arcsec",
    "kpc_per_arcsec_comoving": "kpc / arcsec",
    "hubble_parameter_kms_mpc": "km / (Mpc s)",
    "recession_velocity_now_kms": "km / s",
    "recession_velocity_now_c": "",
    "recession_velocity_emission_kms": "km / s",
    "recession_velocity_emission_c": "",
    "cz_kms": "km / s",
    "cz_c": "",
    "relativistic_doppler_velocity_kms": "km / s",
    "relativistic_doppler_velocity_c": "",
    "cz_relative_difference_from_v_now": "",
    "relativistic_doppler_relative_difference_from_v_now": "",
}
#: The z-dependent keys, in report order.
QUANTITY_KEYS = tuple(UNITS)

_ARCSEC_RAD = math.pi / (180.0 * 3600.0)

_LABELS = {
    "recession_velocity_now_kms": "H0*D_C: rate of change of proper distance today",
    "recession_velocity_emission_kms": "H(z)*D_C/(1+z): rate of change of proper distance at emission",
    "cz_kms": LABEL_CZ,
    "relativistic_doppler_velocity_kms": LABEL_RELATIVISTIC,
}


def check_redshift(z) -> float:
    """``z`` as a float, or :class:`CosmologyError` if it is not a finite number above -1.

    >>> check_redshift("0.25")
    0.25
    >>> check_redshift(-1)
    Traceback (most recent call last):
    ...
    zsieve.cosmology.models.CosmologyError: redshift must be > -1 (1+z is a ratio of wavelengths), got -1
    """
    value = finite_number(z, "redshift")
    if value <= -1.0:
        raise CosmologyError(f"redshift must be > -1 (1+z is a ratio of wavelengths), got {z!r}")
    return value


def _core(z: np.ndarray, cosmo) -> dict:
    """astropy's integrals at z >= 0 (NaN where z < 0): D_C, D_M (Mpc), lookback, age (Gyr)."""
    z = np.asarray(z, dtype=float)
    out = {k: np.full(z.shape, np.nan) for k in ("dc", "dm", "lookback", "age")}
    ok = z >= 0
    if ok.any():
        zz = z[ok]
        out["dc"][ok] = cosmo.comoving_distance(zz).to_value("Mpc")
        out["dm"][ok] = cosmo.comoving_transverse_distance(zz).to_value("Mpc")
        out["lookback"][ok] = cosmo.lookback_time(zz).to_value("Gyr")
        out["age"][ok] = cosmo.age(zz).to_value("Gyr")
    return out


#: Nodes and weights of the Gauss-Legendre rule applied between consecutive redshifts.
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(8)
#: Longest step in z of the cumulative quadrature (extra nodes are added where samples are sparse).
_MAX_STEP = 0.05


def cumulative_integral(z_sorted: np.ndarray, integrand) -> np.ndarray:
    """``integral_0^z integrand(x) dx`` at every ``z`` of a sorted array of distinct z >= 0.

    One vectorised pass: 8-point Gauss-Legendre on each interval between consecutive nodes (the
    z themselves plus a grid of step <= ``_MAX_STEP``), summed cumulatively; ``integrand`` is
    called once, on all nodes. For the smooth FLRW integrands this agrees with adaptive
    quadrature to ~1e-12 relative.

    >>> out = cumulative_integral(np.array([0.5, 1.0, 2.0]), np.exp)
    >>> bool(np.allclose(out, np.exp([0.5, 1.0, 2.0]) - 1, rtol=1e-13))
    True
    """
    z_sorted = np.asarray(z_sorted, dtype=float)
    if z_sorted.size == 0:
        return z_sorted.copy()
    top = float(z_sorted[-1])
    grid = np.union1d(np.concatenate(([0.0], z_sorted)), np.linspace(0.0, top, int(np.ceil(top / _MAX_STEP)) + 1))
    half = 0.5 * np.diff(grid)
    mid = 0.5 * (grid[1:] + grid[:-1])
    x = mid[:, None] + half[:, None] * _GL_NODES
    vals = np.asarray(integrand(x.ravel()), dtype=float).reshape(x.shape)
    cum = np.concatenate(([0.0], np.cumsum(half * (vals @ _GL_WEIGHTS))))
    return cum[np.searchsorted(grid, z_sorted)]


def _core_fast(z: np.ndarray, cosmo) -> dict:
    """As :func:`_core`, for many redshifts at once (bootstrap samples): one cumulative
    quadrature of astropy's own integrands (``inv_efunc``, ``lookback_time_integrand``) over
    the sorted distinct z instead of one adaptive integral per z. The age is age(0) minus the
    lookback time, and D_M follows from D_C and Omega_k (Hogg 1999, eq. 16)."""
    z = np.asarray(z, dtype=float)
    out = {k: np.full(z.shape, np.nan) for k in ("dc", "dm", "lookback", "age")}
    ok = z >= 0
    if not ok.any():
        return out
    uz, where = np.unique(z[ok], return_inverse=True)
    dh = float(cosmo.hubble_distance.to_value("Mpc"))
    th = float(cosmo.hubble_time.to_value("Gyr"))
    dc = dh * cumulative_integral(uz, lambda x: cosmo.inv_efunc(x))
    lookback = th * cumulative_integral(uz, lambda x: cosmo.lookback_time_integrand(x))
    ok0 = float(cosmo.Ok0)
    if ok0 > 0:
        dm = dh / np.sqrt(ok0) * np.sinh(np.sqrt(ok0) * dc / dh)
    elif ok0 < 0:
        dm = dh / np.sqrt(-ok0) * np.sin(np.sqrt(-ok0) * dc / dh)
    else:
        dm = dc
    age0 = float(cosmo.age(0).to_value("Gyr"))
    for key, val in (("dc", dc), ("dm", dm), ("lookback", lookback), ("age", age0 - lookback)):
        out[key][ok] = val[where]
    return out


def _arrays(z, cosmo, fast: bool = False) -> dict:
    """Every quantity of :data:`UNITS` as float arrays (in those units) for an array of z."""
    z = np.asarray(z, dtype=float)
    core = (_core_fast if fast else _core)(z, cosmo)
    dc, dm = core["dc"], core["dm"]
    h0 = float(cosmo.H0.to_value("km / (Mpc s)"))
    opz = 1.0 + z
    cosmological = z >= 0
    with np.errstate(invalid="ignore", divide="ignore"):
        hz = np.where(cosmological, h0 * np.asarray(cosmo.efunc(np.where(cosmological, z, 0.0))), np.nan)
        da = dm / opz
        dl = dm * opz
        mu = 5.0 * np.log10(dl) + 25.0  # D_L in Mpc; 10 pc = 1e-5 Mpc
    v_now = recession_velocity_now(dc, h0)
    v_emit = recession_velocity_emission(dc, hz, z)
    v_cz = cz_velocity(z)
    v_sr = relativistic_doppler_velocity(z)
    return {
        "z": z,
        "comoving_distance_mpc": dc,
        "transverse_comoving_distance_mpc": dm,
        "angular_diameter_distance_mpc": da,
        "luminosity_distance_mpc": dl,
        "distance_modulus_mag": mu,
        "lookback_time_gyr": core["lookback"],
        "age_at_z_gyr": core["age"],
        "kpc_per_arcsec_proper": da * 1e3 * _ARCSEC_RAD,
        "kpc_per_arcsec_comoving": dm * 1e3 * _ARCSEC_RAD,
        "hubble_parameter_kms_mpc": hz,
        "recession_velocity_now_kms": v_now,
        "recession_velocity_now_c": v_now / C_KMS,
        "recession_velocity_emission_kms": v_emit,
        "recession_velocity_emission_c": v_emit / C_KMS,
        "cz_kms": v_cz,
        "cz_c": v_cz / C_KMS,
        "relativistic_doppler_velocity_kms": v_sr,
        "relativistic_doppler_velocity_c": v_sr / C_KMS,
        "cz_relative_difference_from_v_now": relative_difference(v_cz, v_now),
        "relativistic_doppler_relative_difference_from_v_now": relative_difference(v_sr, v_now),
    }


def quantities(z, cosmology=None) -> dict:
    """Every distance, time, scale and velocity for an array of redshifts, as Quantities.

    Parameters
    ----------
    z : float or array_like
        Redshifts, each > -1. Where z < 0 the cosmological quantities are NaN.
    cosmology : anything :func:`~zsieve.cosmology.models.get_cosmology` accepts
        Default ``Planck18``.

    Returns
    -------
    dict of astropy.units.Quantity
        Keys and units as in :data:`UNITS`, each the shape of ``z``.

    Raises
    ------
    CosmologyError
        If any z is not finite or is <= -1, or the cosmology is not usable.

    Examples
    --------
    >>> q = quantities(np.array([0.1, 2.0]), {"H0": 70, "Om0": 0.3})
    >>> q["age_at_z_gyr"].unit, [round(float(v), 3) for v in q["age_at_z_gyr"].value]
    (Unit("Gyr"), [12.166, 3.227])
    >>> bool(q["recession_velocity_now_c"][1] > 1)
    True
    """
    import astropy.units as u

    cosmo = get_cosmology(cosmology)
    zarr = np.asarray(z, dtype=float)
    if not np.all(np.isfinite(zarr)) or np.any(zarr <= -1.0):
        bad = zarr[~(np.isfinite(zarr) & (zarr > -1.0))].ravel()[0]
        check_redshift(bad)
    arrays = _arrays(zarr.ravel(), cosmo)
    return {k: (v.reshape(zarr.shape) * u.Unit(UNITS[k])) for k, v in arrays.items()}


def _float_or_none(value) -> float | None:
    value = float(value)
    return value if math.isfinite(value) else None


def describe(z, *, z_err=None, z_samples=None, cosmology=None, n_samples: int = 2000, seed=0) -> dict:
    """The full physical description of one measured redshift, JSON-able.

    Parameters
    ----------
    z : float
        The redshift (> -1), in whatever frame it was measured (see
        :func:`zsieve.cosmology.frames.frame_info` to move it to the CMB frame first).
    z_err : float, optional
        1-sigma uncertainty; used by drawing ``n_samples`` values of a Gaussian z ± z_err
        truncated at z > -1 when no ``z_samples`` are given.
    z_samples : array_like, optional
        Bootstrap redshifts of the fit (preferred over ``z_err``).
    cosmology : optional
        Anything :func:`~zsieve.cosmology.models.get_cosmology` accepts (default ``Planck18``).
    n_samples : int
        Number of draws when sampling z ± z_err.
    seed : int or numpy Generator
        Random state of those draws.

    Returns
    -------
    dict
        Every key of :data:`UNITS` (value at ``z``; ``None`` where undefined), ``age_now_gyr``,
        ``cosmology`` (:func:`~zsieve.cosmology.models.cosmology_record`), ``units``,
        ``labels`` (what each velocity is), ``uncertainty`` (how errors were obtained, or
        ``None``) and ``notes``. With ``z_err`` or ``z_samples`` every quantity key also has
        ``<key>_err`` (half the 16-84 percentile range), ``<key>_p16`` and ``<key>_p84``.

    Examples
    --------
    >>> d = describe(1.42, z_err=0.01, cosmology="Planck18")
    >>> round(d["luminosity_distance_mpc"]), round(d["luminosity_distance_mpc_err"])
    (10463, 91)
    >>> d["uncertainty"]["method"], d["uncertainty"]["n_samples"]
    ('gaussian', 2000)
    >>> star = describe(-0.0001)
    >>> star["comoving_distance_mpc"] is None, round(star["relativistic_doppler_velocity_kms"], 2)
    (True, -29.98)
    """
    z = check_redshift(z)
    cosmo = get_cosmology(cosmology)
    central = _arrays(np.array([z]), cosmo)
    out: dict = {k: _float_or_none(v[0]) for k, v in central.items()}
    out["age_now_gyr"] = float(cosmo.age(0).to_value("Gyr"))
    notes: list[str] = []

    samples = None
    method = None
    if z_samples is not None and np.size(z_samples) > 0:
        raw = np.asarray(z_samples, dtype=float).ravel()
        samples = raw[np.isfinite(raw) & (raw > -1.0)]
        method = "samples"
        if samples.size < raw.size:
            notes.append(f"{raw.size - samples.size} of {raw.size} z samples were not finite or <= -1 and were dropped.")
        if samples.size == 0:
            raise CosmologyError("none of the z samples is a finite number above -1")
        if z_err is not None:
            notes.append("Both z samples and z_err were given; the samples were used.")
    elif z_err is not None:
        sigma = finite_number(z_err, "z uncertainty", lo=0.0)
        samples = draw_z_samples(z, sigma, int(n_samples), seed=seed)
        method = "gaussian"

    if samples is not None:
        log.debug("propagating z=%g through %d %s samples", z, samples.size, method)
        sampled = _arrays(samples, cosmo, fast=True)
        for key in QUANTITY_KEYS:
            s = summarise(sampled[key])
            out[f"{key}_err"] = _float_or_none(s["err"])
            out[f"{key}_p16"] = _float_or_none(s["p16"])
            out[f"{key}_p84"] = _float_or_none(s["p84"])
        n_neg = int(np.count_nonzero(samples < 0))
        if n_neg and z >= 0:
            notes.append(
                f"{n_neg} of {samples.size} z samples are below 0, where distances are undefined; "
                "percentiles of distances use the others."
            )
        out["uncertainty"] = {
            "method": method,
            "n_samples": int(samples.size),
            "z_err_input": None if method != "gaussian" else float(z_err),
            "description": (
                "16th/84th percentiles of each quantity over the bootstrap z samples"
                if method == "samples"
                else "16th/84th percentiles over draws of a Gaussian z +/- z_err truncated at z > -1"
            )
            + "; <key>_err is half the 16-84 range",
        }
    else:
        out["uncertainty"] = None

    if z < 0:
        notes.append(
            "z < 0 is a blueshift (a star or local object moving towards us): cosmological "
            "distances, times and recession velocities are not meaningful and are null; the "
            "special-relativistic figure is then the object's line-of-sight velocity in the "
            "spectrum's frame."
        )
    elif z == 0:
        notes.append("At z = 0 every distance is 0 and the distance modulus is -infinity (null).")
    if z > 0:
        notes.append(NOTE_FASTER_THAN_C)
        notes.append(NOTE_NOT_DOPPLER)
    out["cosmology"] = cosmology_record(cosmo)
    out["units"] = dict(UNITS, age_now_gyr="Gyr")
    out["labels"] = dict(_LABELS)
    out["notes"] = notes
    return out
