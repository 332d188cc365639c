"""The human-readable table of :func:`zsieve.cosmology.describe` records.

One block per redshift, grouped as distances, times, scales, recession velocities and Doppler
figures, each row with its unit and - when an uncertainty was propagated - the asymmetric
interval to the 16th and 84th percentiles (to two significant figures). Notes shared by all blocks are printed once.

Examples
--------
>>> from zsieve.cosmology import describe
>>> text = format_table([describe(0.5, cosmology={"H0": 70, "Om0": 0.3})])
>>> print(text.splitlines()[0])
Cosmology: custom FlatLambdaCDM: H0 = 70 km/s/Mpc, Om0 = 0.3, Ode0 = 0.7, Ok0 = 0, w0 = -1, Tcmb0 = 0 K
>>> [" ".join(line.split()) for line in text.splitlines() if line.strip().startswith("luminosity")]
['luminosity distance 2832.9 Mpc']
"""

from __future__ import annotations

import math

from .models import describe_cosmology

__all__ = ["format_table", "ROWS"]

#: (section title, [(key, label, unit shown, decimals or None for adaptive)]) in display order.
ROWS = (
    (
        "Distances",
        [
            ("comoving_distance_mpc", "comoving distance (line of sight)", "Mpc", 1),
            ("transverse_comoving_distance_mpc", "comoving distance (transverse)", "Mpc", 1),
            ("angular_diameter_distance_mpc", "angular-diameter distance", "Mpc", 1),
            ("luminosity_distance_mpc", "luminosity distance", "Mpc", 1),
            ("distance_modulus_mag", "distance modulus", "mag", 3),
        ],
    ),
    (
        "Times",
        [
            ("lookback_time_gyr", "lookback time", "Gyr", 3),
            ("age_at_z_gyr", "age of the universe at z", "Gyr", 3),
            ("age_now_gyr", "age of the universe now", "Gyr", 3),
        ],
    ),
    (
        "Scales and expansion rate",
        [
            ("kpc_per_arcsec_proper", "proper scale", "kpc/arcsec", 3),
            ("kpc_per_arcsec_comoving", "comoving scale", "kpc/arcsec", 3),
            ("hubble_parameter_kms_mpc", "H(z)", "km/s/Mpc", 2),
        ],
    ),
    (
        "Recession velocities (rate of change of proper distance)",
        [
            ("recession_velocity_now_kms", "now, H0*D_C", "km/s", None),
            ("recession_velocity_emission_kms", "at emission, H(z)*D_C/(1+z)", "km/s", None),
        ],
    ),
    (
        "Doppler figures - NOT recession velocities",
        [
            ("cz_kms", "cz (catalogue convention, small z only)", "km/s", None),
            ("relativistic_doppler_velocity_kms", "special-relativistic c((1+z)^2-1)/((1+z)^2+1)", "km/s", None),
        ],
    ),
)

_IN_C = {
    "recession_velocity_now_kms": "recession_velocity_now_c",
    "recession_velocity_emission_kms": "recession_velocity_emission_c",
    "cz_kms": "cz_c",
    "relativistic_doppler_velocity_kms": "relativistic_doppler_velocity_c",
}
_REL_DIFF = {
    "cz_kms": "cz_relative_difference_from_v_now",
    "relativistic_doppler_velocity_kms": "relativistic_doppler_relative_difference_from_v_now",
}
_LABEL_WIDTH = 48


def _num(value, decimals: int | None) -> str:
    if value is None:
        return "undefined"
    if decimals is None:  # velocities: whole km/s when large, to 10 m/s for stars
        decimals = 0 if abs(value) >= 1000 else 2
    return f"{value:,.{decimals}f}" if decimals == 0 else f"{value:.{decimals}f}"


def _interval(rec: dict, key: str, decimals: int) -> str:
    value, lo, hi = rec.get(key), rec.get(f"{key}_p16"), rec.get(f"{key}_p84")
    if value is None or lo is None or hi is None:
        return ""
    up, down = hi - value, value - lo
    small = min(abs(up), abs(down))
    if small > 0 and math.isfinite(small):  # two significant figures of the smaller side
        decimals = int(min(8, max(0, 1 - math.floor(math.log10(small)))))
    return f"  +{_num(up, decimals)} / -{_num(down, decimals)}"


def _z_header(rec: dict) -> str:
    z = rec["z"]
    unc = rec.get("uncertainty")
    if not unc:
        return f"z = {z:g}"
    if unc["method"] == "gaussian":
        return f"z = {z:g} +/- {unc['z_err_input']:g}  (uncertainties from {unc['n_samples']} draws of z +/- sigma)"
    return f"z = {z:g}  (uncertainties from {unc['n_samples']} bootstrap z samples)"


def format_table(records: list[dict]) -> str:
    """Readable text for one or more :func:`~zsieve.cosmology.describe` records.

    Parameters
    ----------
    records : list of dict
        Records of one cosmology (the first record's cosmology heads the table).

    Returns
    -------
    str
        Lines separated by newlines, no trailing newline.
    """
    if not records:
        return ""
    cosmo = records[0]["cosmology"]
    lines = [f"Cosmology: {describe_cosmology(cosmo)}"]
    notes: list[str] = []
    for rec in records:
        lines.append("")
        lines.append(_z_header(rec))
        for title, rows in ROWS:
            lines.append(f"  {title}")
            for key, label, unit, decimals in rows:
                value = rec.get(key)
                row = f"    {label:<{_LABEL_WIDTH}}{_num(value, decimals):>12}  {unit}"
                row += _interval(rec, key, decimals)
                if key in _IN_C and value is not None and rec.get(_IN_C[key]) is not None:
                    row += f"  = {rec[_IN_C[key]]:.4f} c"
                if key in _REL_DIFF and rec.get(_REL_DIFF[key]) is not None:
                    row += f"  ({100.0 * rec[_REL_DIFF[key]]:+.1f}% vs v_now)"
                lines.append(row.rstrip())
        for note in rec.get("notes", []):
            if note not in notes:
                notes.append(note)
    if notes:
        lines.append("")
        lines.extend(f"Note: {n}" for n in notes)
    return "\n".join(lines)
