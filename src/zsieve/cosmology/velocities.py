"""Recession velocities, and the Doppler figures that are often mistaken for them.

A cosmological redshift is the stretch of the scale factor between emission and now,
1 + z = a(t_now)/a(t_emit); it is not a Doppler shift from motion through space. The
velocity that expansion gives a galaxy is the rate of change of its proper distance
D = a(t)·χ (Davis & Lineweaver 2004, PASA 21, 97):

* today, ``v_now = H0 · D_C(z)`` (D_C the line-of-sight comoving distance = proper distance now);
* at emission, ``v_emit = H(z) · D_C(z) / (1 + z)`` (the proper distance then was D_C/(1+z)).

Both exceed c at moderate z, and that is correct (see :data:`NOTE_FASTER_THAN_C`).

Two Doppler figures are also given, with their real names, because catalogues quote them:

* ``cz`` - the catalogue convention, a fair approximation of ``v_now`` only for z << 1;
* the special-relativistic figure ``c((1+z)^2 - 1)/((1+z)^2 + 1)`` - what a source moving
  through flat space would need to produce the shift; always below c, not a recession velocity.

All functions are pure numpy on plain floats (km/s, Mpc), vectorised over arrays.

Examples
--------
>>> round(float(relativistic_doppler_velocity(1.0) / C_KMS), 6)
0.6
>>> round(float(recession_velocity_now(1000.0, 70.0)), 1)
70000.0
>>> round(float(doppler_redshift(relativistic_doppler_velocity(0.5))), 12)
0.5
"""

from __future__ import annotations

import numpy as np
from astropy import constants as _const

__all__ = [
    "C_KMS",
    "recession_velocity_now",
    "recession_velocity_emission",
    "cz_velocity",
    "relativistic_doppler_velocity",
    "doppler_redshift",
    "relative_difference",
    "NOTE_FASTER_THAN_C",
    "NOTE_NOT_DOPPLER",
    "LABEL_CZ",
    "LABEL_RELATIVISTIC",
]

#: Speed of light in km/s (astropy.constants, CODATA).
C_KMS = float(_const.c.to_value("km/s"))

#: One line on why a recession velocity above c is right.
NOTE_FASTER_THAN_C = (
    "Recession velocities above c are correct: they are the rate at which proper distance "
    "grows as space expands, not motion through space, so the special-relativistic speed "
    "limit does not apply (Davis & Lineweaver 2004, PASA 21, 97)."
)
#: One line on why the Doppler figures are not recession velocities.
NOTE_NOT_DOPPLER = (
    "Why not Doppler: a cosmological redshift measures how much the universe stretched while "
    "the light travelled (1+z = a_now/a_emit); cz and the special-relativistic figure pretend "
    "it is motion through static space, so neither is a recession velocity."
)
#: Label carried beside ``cz``.
LABEL_CZ = "cz: catalogue convention, meaningful only at small z; not a recession velocity"
#: Label carried beside the special-relativistic figure.
LABEL_RELATIVISTIC = (
    "c((1+z)^2-1)/((1+z)^2+1): special-relativistic Doppler equivalent; not a recession velocity"
)


def recession_velocity_now(dc_mpc, h0_kms_mpc):
    """Recession velocity today, ``H0 · D_C`` in km/s (Davis & Lineweaver 2004, eq. 1).

    Parameters
    ----------
    dc_mpc : array_like
        Line-of-sight comoving distance (= proper distance today), Mpc.
    h0_kms_mpc : float
        Hubble constant, km/s/Mpc.

    >>> float(recession_velocity_now(np.array([0.0, 10.0]), 70.0)[1])
    700.0
    """
    return np.asarray(dc_mpc, dtype=float) * float(h0_kms_mpc)


def recession_velocity_emission(dc_mpc, hz_kms_mpc, z):
    """Recession velocity when the light left, ``H(z) · D_C / (1+z)`` in km/s.

    >>> float(recession_velocity_emission(1000.0, 140.0, 1.0))
    70000.0
    """
    z = np.asarray(z, dtype=float)
    return np.asarray(hz_kms_mpc, dtype=float) * np.asarray(dc_mpc, dtype=float) / (1.0 + z)


def cz_velocity(z):
    """The catalogue convention ``c·z`` in km/s (valid as a velocity only for z << 1).

    >>> round(float(cz_velocity(0.01)), 3)
    2997.925
    """
    return C_KMS * np.asarray(z, dtype=float)


def relativistic_doppler_velocity(z):
    """Special-relativistic line-of-sight velocity that would give the shift z, km/s.

    ``v = c((1+z)^2 - 1)/((1+z)^2 + 1)``; below c for every z > -1. For a star in the Milky Way
    this *is* its radial velocity; for a galaxy it is not a recession velocity.

    >>> v = relativistic_doppler_velocity(np.array([0.0, 3.0, 1e6]))
    >>> [round(float(x / C_KMS), 6) for x in v]
    [0.0, 0.882353, 1.0]
    """
    a = (1.0 + np.asarray(z, dtype=float)) ** 2
    return C_KMS * (a - 1.0) / (a + 1.0)


def doppler_redshift(v_kms):
    """Redshift of a special-relativistic line-of-sight velocity (inverse of the above).

    ``1 + z = sqrt((1 + v/c)/(1 - v/c))``; used for peculiar velocities.

    >>> round(float(doppler_redshift(-300.0)), 9)
    -0.001000192
    """
    beta = np.asarray(v_kms, dtype=float) / C_KMS
    return np.sqrt((1.0 + beta) / (1.0 - beta)) - 1.0


def relative_difference(value, reference):
    """``(value - reference) / reference``, NaN where the reference is 0 or not finite.

    >>> float(relative_difference(3.0, 2.0))
    0.5
    """
    value = np.asarray(value, dtype=float)
    reference = np.asarray(reference, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(reference != 0, (value - reference) / reference, np.nan)
    return out
