"""Frames and cosmology for one measured redshift, in the shape a fit result stores them.

:func:`describe_measurement` is the glue the batch and report layers need: it moves z (and
its bootstrap samples, by the same factor) to the most corrected frame available - CMB, or
cosmological after a known peculiar velocity - with :func:`~zsieve.cosmology.frames.frame_info`,
then describes that z in the chosen cosmology with
:func:`~zsieve.cosmology.distances.describe`. The returned ``frames`` and ``cosmology`` dicts
go into ``FitResult.frames`` and ``FitResult.cosmology``; ``cosmology["frame"]`` says which
frame's z the distances were computed from.

Examples
--------
>>> from zsieve.spectrum import SpectrumMeta
>>> meta = SpectrumMeta(ra_deg=150.0, dec_deg=2.2, frame="heliocentric")
>>> rec = describe_measurement(0.5, meta=meta, z_err=0.001, n_samples=500)
>>> rec["frames"]["frame_out"], rec["cosmology"]["frame"], round(rec["cosmology"]["z"], 5)
('cmb', 'cmb', 0.50174)
"""

from __future__ import annotations

import numpy as np

from .distances import describe

__all__ = ["describe_measurement", "describe_in_frame"]


def describe_in_frame(z, frames: dict | None, *, z_err=None, z_samples=None, cosmology=None,
                      n_samples: int = 2000, seed=0) -> dict:
    """:func:`~zsieve.cosmology.distances.describe` of z moved to the frame ``frames`` chose.

    ``frames`` is a :func:`~zsieve.cosmology.frames.frame_info` record (or ``None``: z as
    measured). A frame change multiplies 1+z by ``frames["factor_to_out"]``, so bootstrap samples
    (``None`` entries taken as NaN) and ``z_err`` move by the same factor. The record gets
    ``frame``: the frame of the z the distances were computed from.

    >>> describe_in_frame(0.5, None)["frame"]
    'as measured'
    >>> rec = describe_in_frame(0.5, {"factor_to_out": 1.2, "frame_out": "cmb"})
    >>> rec["frame"], round(rec["z"], 6)
    ('cmb', 0.8)
    """
    factor = float(frames["factor_to_out"]) if frames and frames.get("factor_to_out") is not None else 1.0
    samples = None
    if z_samples is not None and np.size(z_samples) > 0:
        s = np.asarray([np.nan if x is None else x for x in np.ravel(z_samples)], dtype=float)
        samples = (1.0 + s) * factor - 1.0
    err = None if z_err is None else float(z_err) * factor
    z_out = (1.0 + float(z)) * factor - 1.0
    record = describe(z_out, z_err=err, z_samples=samples, cosmology=cosmology, n_samples=n_samples, seed=seed)
    record["frame"] = frames.get("frame_out", "unknown") if frames else "as measured"
    return record


def describe_measurement(
    z,
    *,
    z_err=None,
    z_samples=None,
    meta=None,
    frame=None,
    peculiar_kms=None,
    site=None,
    cosmology=None,
    n_samples: int = 2000,
    seed=0,
) -> dict:
    """Frames, then distances and velocities, for a measured z.

    Parameters
    ----------
    z : float
        Redshift measured from the wavelengths, in the spectrum's frame.
    z_err, z_samples : optional
        Its 1-sigma error or bootstrap samples (samples preferred), see
        :func:`~zsieve.cosmology.distances.describe`. A frame change multiplies 1+z by a
        constant, so samples move by the same factor and z_err by it too.
    meta : SpectrumMeta, optional
        Coordinates, time, site and frame of the spectrum.
    frame, peculiar_kms, site : optional
        As for :func:`~zsieve.cosmology.frames.frame_info`.
    cosmology : optional
        As for :func:`~zsieve.cosmology.models.get_cosmology`.
    n_samples, seed : optional
        Sampling of z ± z_err.

    Returns
    -------
    dict
        ``{"frames": frame_info(...), "cosmology": describe(...) + {"frame": ...}}``.
    """
    from .frames import frame_info  # astropy.coordinates: slow to import, loaded on first use

    info = frame_info(meta, z, peculiar_kms=peculiar_kms, frame=frame, site=site)
    record = describe_in_frame(z, info, z_err=z_err, z_samples=z_samples, cosmology=cosmology,
                               n_samples=n_samples, seed=seed)
    if info["frame_out"] in ("topocentric", "unknown"):
        record["notes"].append(
            f"Distances use the {info['frame_out']} z: it could not be moved to the CMB frame "
            f"({info['correction_note']})."
        )
    return {"frames": info, "cosmology": record}
