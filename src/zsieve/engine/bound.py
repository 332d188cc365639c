"""The Cramer-Rao bound on a redshift: the information limit of a spectrum.

For a noiseless model m(lambda; z) observed with independent Gaussian noise sigma_i, the
Fisher information on z is F = sum_i (dm_i/dz)^2 / sigma_i^2, and no unbiased estimator has
a smaller standard deviation than 1/sqrt(F) (Cramer 1946; Rao 1945).

Examples
--------
A Gaussian line of amplitude A, width s (Angstrom), on pixels of width d with noise sn: the
centroid bound is sigma_mu^2 = 2 sn^2 d s / (A^2 sqrt(pi)) (Fisher information of a Gaussian
centroid, common practice), and sigma_z = sigma_mu / lambda_rest.

>>> import numpy as np
>>> wave = np.arange(6000.0, 7000.0, 1.0)
>>> model = lambda z: 10 * np.exp(-0.5 * ((wave - 6564.61 * (1 + z)) / 3.0) ** 2)
>>> sz = cramer_rao_sigma_z(model, 0.0, np.ones_like(wave))
>>> expect = np.sqrt(2 * 1.0 * 1.0 * 3.0 / (100 * np.sqrt(np.pi))) / 6564.61
>>> bool(abs(sz / expect - 1) < 1e-3)
True
"""

from __future__ import annotations

import numpy as np

__all__ = ["cramer_rao_sigma_z"]


def cramer_rao_sigma_z(model, z: float, sigma, mask=None, dz: float | None = None) -> float:
    """Cramer-Rao bound on sigma_z for ``model(z) -> flux array`` and per-pixel ``sigma``.

    Parameters
    ----------
    model : callable
        Noiseless model flux on the data pixels as a function of z.
    z : float
        Redshift at which to evaluate the information.
    sigma : array_like
        1-sigma noise per pixel; non-finite or non-positive values carry no information.
    mask : array_like of bool, optional
        ``True`` for pixels to leave out.
    dz : float, optional
        Step of the central difference (default ``1e-6 * (1 + z)``).

    Returns
    -------
    float
        The bound on the standard deviation of z (``inf`` if the model carries no information).
    """
    sigma = np.asarray(sigma, dtype=float)
    step = 1e-6 * (1.0 + z) if dz is None else dz
    deriv = (np.asarray(model(z + step)) - np.asarray(model(z - step))) / (2.0 * step)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(np.isfinite(sigma) & (sigma > 0), 1.0 / sigma**2, 0.0)
    if mask is not None:
        w = np.where(np.asarray(mask, dtype=bool), 0.0, w)
    info = float(np.sum(deriv**2 * w))
    return float(1.0 / np.sqrt(info)) if info > 0 else float("inf")
