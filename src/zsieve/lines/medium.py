"""Air <-> vacuum wavelength conversion (IAU standard).

The refractive index of standard dry air is that of Morton (2000, ApJS 130, 403, eq. 8,
after Edlen 1966 with the Birch & Downs 1994 update), as adopted by the IAU. With
``s = 1e4 / lambda_vac`` (inverse micron),

    n - 1 = 8.34254e-5 + 2.406147e-2 / (130 - s**2) + 1.5998e-4 / (38.9 - s**2)

and ``lambda_air = lambda_vac / n``. Air to vacuum inverts that relation by Newton
iteration, so a round trip is exact to well below 1e-6 Angstrom. The convention applies
above 2000 Angstrom; shorter wavelengths are always vacuum and are returned unchanged.

Examples
--------
>>> round(float(air_to_vacuum(6562.80)), 2)   # H-alpha (NIST: 6564.61 vacuum; from memory)
6564.61
>>> round(float(vacuum_to_air(air_to_vacuum(5006.84))), 6)
5006.84
"""

from __future__ import annotations

import numpy as np

__all__ = ["refractive_index_air", "vacuum_to_air", "air_to_vacuum", "AIR_CUTOFF_A"]

#: Below this wavelength (Angstrom) wavelengths are vacuum by convention and left unchanged.
AIR_CUTOFF_A = 2000.0


def refractive_index_air(wave_vac):
    """Refractive index of standard air at vacuum wavelength ``wave_vac`` (Angstrom)."""
    s2 = (1e4 / np.asarray(wave_vac, dtype=float)) ** 2
    return 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - s2) + 1.5998e-4 / (38.9 - s2)


def vacuum_to_air(wave_vac):
    """Vacuum wavelength(s) in Angstrom to air (unchanged below 2000 Angstrom)."""
    w = np.asarray(wave_vac, dtype=float)
    out = np.where(w >= AIR_CUTOFF_A, w / refractive_index_air(np.maximum(w, AIR_CUTOFF_A)), w)
    return out if out.ndim else out[()]


def air_to_vacuum(wave_air):
    """Air wavelength(s) in Angstrom to vacuum (unchanged below the air image of 2000 A vacuum)."""
    a = np.asarray(wave_air, dtype=float)
    # the air image of the 2000 A vacuum cutoff, so that both directions agree at the edge
    cut_air = AIR_CUTOFF_A / refractive_index_air(AIR_CUTOFF_A)
    safe = np.maximum(a, cut_air)
    v = safe * refractive_index_air(safe)  # first guess
    for _ in range(4):  # Newton on f(v) = v / n(v) - a; converges to machine precision
        n = refractive_index_air(v)
        eps = 1e-3
        dn = (refractive_index_air(v + eps) - refractive_index_air(v - eps)) / (2 * eps)
        f = v / n - safe
        fp = (n - v * dn) / n**2
        v = v - f / fp
    out = np.where(a >= cut_air, v, a)
    return out if out.ndim else out[()]
