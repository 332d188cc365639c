"""What a measured redshift means physically: cosmology, distances, velocities, frames.

* :func:`get_cosmology` - choose the cosmology (astropy realization by name, default
  ``Planck18``; an astropy instance; or H0/Om0/Ode0/w0 parameters);
* :func:`quantities` - every distance, time, scale and velocity, vectorised over arrays of z;
* :func:`describe` - the JSON-able record for one z, with uncertainties from bootstrap samples
  or z ± σ;
* :mod:`zsieve.cosmology.frames` - barycentric/heliocentric correction, CMB-frame redshift and
  peculiar-velocity removal (``frames.frame_info``);
* :func:`describe_measurement` (:mod:`zsieve.cosmology.measurement`) - both for a fit: the
  ``frames`` and ``cosmology`` records of a result, distances from the CMB-frame z;
* :mod:`zsieve.cosmology.text` - the human-readable table.

Examples
--------
>>> from zsieve.cosmology import describe
>>> d = describe(0.05)
>>> d["cosmology"]["name"], round(d["cz_kms"], 1)
('Planck18', 14989.6)
"""

from .distances import QUANTITY_KEYS, UNITS, check_redshift, describe, quantities
from .models import (
    DEFAULT_COSMOLOGY,
    CosmologyError,
    available_names,
    cosmology_record,
    describe_cosmology,
    get_cosmology,
)

__all__ = [
    "get_cosmology",
    "quantities",
    "describe",
    "describe_measurement",
    "check_redshift",
    "cosmology_record",
    "describe_cosmology",
    "available_names",
    "CosmologyError",
    "DEFAULT_COSMOLOGY",
    "UNITS",
    "QUANTITY_KEYS",
]


def __getattr__(name):
    # describe_measurement needs astropy.coordinates (slow to import): load it on first use
    if name == "describe_measurement":
        from .measurement import describe_measurement

        return describe_measurement
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
