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
from .frames import frame_info

__all__ = ["describe_measurement"]


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
    info = frame_info(meta, z, peculiar_kms=peculiar_kms, frame=frame, site=site)
    factor = info["factor_to_out"]
    samples = None
    if z_samples is not None and np.size(z_samples) > 0:
        samples = (1.0 + np.asarray(z_samples, dtype=float)) * factor - 1.0
    err = None if z_err is None else float(z_err) * factor
    record = describe(info["z_out"], z_err=err, z_samples=samples, cosmology=cosmology, n_samples=n_samples, seed=seed)
    record["frame"] = info["frame_out"]
    if info["frame_out"] in ("topocentric", "unknown"):
        record["notes"].append(
            f"Distances use the {info['frame_out']} z: it could not be moved to the CMB frame "
            f"({info['correction_note']})."
        )
    return {"frames": info, "cosmology": record}
