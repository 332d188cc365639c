"""Systemic redshift of a quasar from its broad lines.

Broad emission lines of quasars do not sit at the systemic (host-galaxy) redshift: the
high-ionisation lines are blueshifted, C IV by several hundred km/s on average, and Mg II and
the Balmer lines much less (Shen et al. 2016, ApJ 831, 7; Vanden Berk et al. 2001, AJ 122, 549;
from memory). The line list carries each line's mean offset ``v`` (``qso_offset_kms``), and a
line observed at redshift ``z_line`` implies

    1 + z_sys = (1 + z_line) / (1 + v / c)

(velocities compose multiplicatively). The engine's quasar model already places every line at
its offset, so its joint fit *is* a systemic estimate; :func:`systemic_summary` reports it with
the per-line values, an inverse-variance mean of those, and which lines set it.

Examples
--------
>>> rows = [dict(name="C IV 1549", z_line=2.0, observed_wavelength_err=1.0, rest_wavelength=1549.06,
...              offset_kms=-360.0, snr=30.0, broad=True)]
>>> s = systemic_summary(rows, z_fit=2.0036, z_err=3e-4)
>>> s["set_by"], round(s["z_lines_mean"], 4)
(['C IV 1549'], 2.0036)
"""

from __future__ import annotations

import math

import numpy as np

from .prepare import C_KMS

__all__ = ["systemic_from_line", "systemic_summary", "systemic_scatter", "REFERENCE", "OFFSET_SCATTER_KMS"]

#: Object-to-object scatter of a broad line's offset about its mean (a few hundred km/s;
#: Shen et al. 2016, ApJ 831, 7; from memory). It limits a systemic z however high the S/N.
OFFSET_SCATTER_KMS = 250.0

REFERENCE = "mean broad-line offsets: Shen et al. 2016, ApJ 831, 7; Vanden Berk et al. 2001, AJ 122, 549 (from memory)"


def systemic_from_line(z_line, offset_kms):
    """Systemic z implied by a line at ``z_line`` with mean offset ``offset_kms`` from systemic.

    >>> round(float(systemic_from_line(1.0, -299.792458)), 6)   # blueshift of 0.001 c
    1.002002
    """
    return (1.0 + np.asarray(z_line, dtype=float)) / (1.0 + np.asarray(offset_kms, dtype=float) / C_KMS) - 1.0


def systemic_scatter(rows, z_fit: float, min_snr: float = 5.0) -> float:
    """Error of the systemic z from the scatter of the line offsets (in z units).

    The joint fit weighs each broad line by its information ``w_i = 1 / err_i^2``; with an
    independent offset scatter ``s`` per line the weighted mean carries
    ``sqrt(sum w_i^2 s^2) / sum w_i``.

    >>> rows = [dict(snr=50.0, observed_wavelength_err=0.5, broad=True)] * 4
    >>> round(systemic_scatter(rows, 0.0) * C_KMS, 1)   # four equal lines: 250 / 2
    125.0
    """
    w = np.array([1.0 / r["observed_wavelength_err"] ** 2 for r in rows
                  if r.get("broad") and r.get("snr", 0.0) >= min_snr and r["observed_wavelength_err"] > 0])
    if w.size == 0:
        return float(OFFSET_SCATTER_KMS / C_KMS * (1 + z_fit))
    return float(np.sqrt(np.sum(w**2)) / np.sum(w) * OFFSET_SCATTER_KMS / C_KMS * (1 + z_fit))


def systemic_summary(rows, z_fit: float, z_err: float, min_snr: float = 3.0) -> dict:
    """The ``FitResult.systemic`` record from the per-line table of a quasar fit."""
    per_line = []
    zs, ws = [], []
    for r in rows:  # over measured lines (a handful)
        if not (r.get("snr", 0.0) >= min_snr) or not math.isfinite(r.get("z_line", math.nan)):
            continue
        zsys = float(systemic_from_line(r["z_line"], r.get("offset_kms", 0.0)))
        ez = r["observed_wavelength_err"] / r["rest_wavelength"]
        per_line.append(dict(name=r["name"], z_line=float(r["z_line"]), offset_kms=float(r.get("offset_kms", 0.0)),
                             z_systemic=zsys, z_err=float(ez)))
        if math.isfinite(ez) and ez > 0:
            zs.append(zsys)
            ws.append(1.0 / ez**2)
    zmean = float(np.average(zs, weights=ws)) if zs else math.nan
    zmean_err = float(1.0 / math.sqrt(sum(ws))) if ws else math.nan
    return dict(z=float(z_fit), z_err=float(z_err), method="joint fit of broad lines at their mean offsets",
                set_by=[p["name"] for p in per_line], lines=per_line, z_lines_mean=zmean,
                z_lines_mean_err=zmean_err, reference=REFERENCE)
