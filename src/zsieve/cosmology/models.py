"""Choosing the cosmology every physical quantity is computed in.

One entry point, :func:`get_cosmology`, turns what a user can reasonably say into an
:class:`astropy.cosmology.FLRW` instance:

* nothing (``None``) -> the default, astropy's ``Planck18`` realization (flat ΛCDM with the
  Planck 2018 parameters, radiation and one massive neutrino included);
* a realization **name** known to astropy (``"Planck18"``, ``"WMAP9"``, ... case-insensitive);
* an astropy FLRW **instance** (used as is);
* a **dict of parameters** ``H0`` (km/s/Mpc), ``Om0``, optional ``Ode0``, ``w0``, ``Tcmb0`` (K),
  ``name``. The class is chosen from what is given:

  ==========================  =====================  ===================
  given                        ``w0`` absent or -1    ``w0`` other
  ==========================  =====================  ===================
  no ``Ode0``, or Om0+Ode0=1   ``FlatLambdaCDM``      ``FlatwCDM``
  Om0+Ode0 != 1                ``LambdaCDM``          ``wCDM``
  ==========================  =====================  ===================

  **Tcmb0**: a custom model defaults to ``Tcmb0 = 0 K``, i.e. no radiation term (astropy's own
  default for these classes), so that textbook closed forms such as Einstein-de Sitter hold
  exactly. Pass ``Tcmb0=2.7255`` to include photons and (massless) neutrinos; a flat class then
  takes ΩΛ = 1 − Ωm − Ωr, so ``Ode0`` is re-derived and not the value you typed.

:func:`cosmology_record` gives the JSON-able name + parameters that every zsieve output carries.

Examples
--------
>>> cosmo = get_cosmology()
>>> cosmo.name, float(cosmo.H0.value)
('Planck18', 67.66)
>>> type(get_cosmology({"H0": 70, "Om0": 0.3})).__name__
'FlatLambdaCDM'
>>> type(get_cosmology({"H0": 70, "Om0": 0.3, "Ode0": 0.6, "w0": -0.9})).__name__
'wCDM'
>>> rec = cosmology_record(get_cosmology({"H0": 70, "Om0": 1.0, "Ode0": 0.1}))
>>> rec["class"], rec["H0_kms_mpc"], rec["Om0"], rec["Ode0"], rec["Tcmb0_K"]
('LambdaCDM', 70.0, 1.0, 0.1, 0.0)
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping

import numpy as np

from ..errors import ZsieveError

__all__ = ["CosmologyError", "DEFAULT_COSMOLOGY", "get_cosmology", "cosmology_record", "describe_cosmology",
           "available_names", "finite_number"]

log = logging.getLogger(__name__)

#: Name of the astropy realization used when nothing is chosen.
DEFAULT_COSMOLOGY = "Planck18"

#: Keys a parameter dict may carry.
_PARAM_KEYS = ("H0", "Om0", "Ode0", "w0", "Tcmb0", "name")

#: Redshifts at which a custom model must have H(z)^2 > 0 (a big bang, no bounce) - up to
#: beyond recombination, which covers every spectrum.
_CHECK_Z = np.concatenate([np.linspace(0.0, 20.0, 401), np.geomspace(20.0, 1.2e3, 60)])


class CosmologyError(ZsieveError, ValueError):
    """A cosmology or a redshift that cannot be used (unknown name, inconsistent parameters)."""


def finite_number(value, what: str, *, lo: float = -math.inf, hi: float = math.inf, error=CosmologyError) -> float:
    """``value`` as a finite float within [lo, hi], or ``error`` with one sentence saying why.

    >>> finite_number("2.5", "H0")
    2.5
    >>> finite_number("x", "redshift")
    Traceback (most recent call last):
    ...
    zsieve.cosmology.models.CosmologyError: redshift must be a number, got 'x'
    """
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise error(f"{what} must be a number, got {value!r}") from None
    if not math.isfinite(out):
        raise error(f"{what} must be finite, got {value!r}")
    if not lo <= out <= hi:
        raise error(f"{what} must be within [{lo:g}, {hi:g}], got {value!r}")
    return out


def available_names() -> tuple[str, ...]:
    """Names of the astropy cosmology realizations that can be chosen by name.

    >>> "Planck18" in available_names()
    True
    """
    from astropy.cosmology import realizations

    return tuple(realizations.available)


def _from_name(name: str):
    from astropy.cosmology import realizations

    names = available_names()
    lookup = {n.lower(): n for n in names}
    key = name.strip().lower()
    if key not in lookup:
        raise CosmologyError(f"unknown cosmology {name!r}; choose one of {', '.join(names)}")
    return getattr(realizations, lookup[key])


def _number(params: Mapping, key: str, default=None) -> float | None:
    value = params.get(key, default)
    if value is None:
        return None
    if hasattr(value, "unit"):  # an astropy Quantity
        import astropy.units as u

        unit = {"H0": u.km / u.s / u.Mpc, "Tcmb0": u.K}.get(key, u.dimensionless_unscaled)
        value = value.to_value(unit)
    return finite_number(value, f"cosmology parameter {key}")


def _from_params(params: Mapping):
    from astropy.cosmology import FlatLambdaCDM, FlatwCDM, LambdaCDM, wCDM

    unknown = sorted(set(params) - set(_PARAM_KEYS))
    if unknown:
        raise CosmologyError(
            f"unknown cosmology parameter(s) {', '.join(unknown)}; use {', '.join(_PARAM_KEYS)}"
        )
    h0 = _number(params, "H0")
    om0 = _number(params, "Om0")
    if h0 is None or om0 is None:
        raise CosmologyError("a custom cosmology needs at least H0 and Om0")
    ode0 = _number(params, "Ode0")
    w0 = _number(params, "w0")
    tcmb0 = _number(params, "Tcmb0", 0.0)
    given = {k: v for k, v in (("H0", h0), ("Om0", om0), ("Ode0", ode0), ("w0", w0)) if v is not None}
    if h0 <= 0:
        raise CosmologyError(f"H0 must be positive (km/s/Mpc), got {h0:g}")
    if om0 < 0:
        raise CosmologyError(f"Om0 must be >= 0, got {om0:g}")
    if tcmb0 < 0:
        raise CosmologyError(f"Tcmb0 must be >= 0 K, got {tcmb0:g}")
    flat = ode0 is None or abs(om0 + ode0 - 1.0) < 1e-12
    if flat and om0 > 1.0:
        raise CosmologyError(f"a flat model needs Om0 <= 1 (got {om0:g}); give Ode0 for a curved one")
    lam = w0 is None or w0 == -1.0
    name = params.get("name")
    kw = dict(H0=h0, Om0=om0, Tcmb0=tcmb0, name=None if name is None else str(name))
    if flat:
        cosmo = FlatLambdaCDM(**kw) if lam else FlatwCDM(w0=w0, **kw)
    else:
        cosmo = LambdaCDM(Ode0=ode0, **kw) if lam else wCDM(Ode0=ode0, w0=w0, **kw)
    with np.errstate(invalid="ignore", divide="ignore"):
        e = np.asarray(cosmo.efunc(_CHECK_Z), dtype=float)
    bad = ~(np.isfinite(e) & (e > 0))
    if bad.any():
        zbad = float(_CHECK_Z[np.argmax(bad)])
        raise CosmologyError(
            f"inconsistent parameters ({', '.join(f'{k}={v:g}' for k, v in given.items())}): "
            f"H(z)^2 <= 0 at z = {zbad:g}, i.e. no big bang in that model"
        )
    return cosmo


def get_cosmology(spec=None):
    """The astropy FLRW cosmology for a user's choice.

    Parameters
    ----------
    spec : None, str, astropy FLRW instance, or mapping
        ``None`` for the default (``Planck18``), a realization name, an instance (returned
        unchanged), or a mapping with ``H0`` and ``Om0`` and optionally ``Ode0``, ``w0``,
        ``Tcmb0`` (K, default 0) and ``name`` (see the module docstring for the class chosen).

    Returns
    -------
    astropy.cosmology.FLRW

    Raises
    ------
    CosmologyError
        Unknown name, missing or non-numeric parameters, H0 <= 0, Om0 < 0, or parameters
        for which H(z)^2 <= 0 somewhere in 0 <= z <= 1200.

    Examples
    --------
    >>> get_cosmology("wmap9").name
    'WMAP9'
    >>> c = get_cosmology({"H0": 70, "Om0": 0.3, "Ode0": 0.7, "w0": -0.8})
    >>> type(c).__name__, float(c.w0)
    ('FlatwCDM', -0.8)

    A record written by :func:`cosmology_record` (as stored in every output) comes back as
    the same model:

    >>> get_cosmology(cosmology_record(get_cosmology("WMAP9"))).name
    'WMAP9'
    >>> get_cosmology({"H0": 70, "Om0": -0.1})
    Traceback (most recent call last):
    ...
    zsieve.cosmology.models.CosmologyError: Om0 must be >= 0, got -0.1
    """
    from astropy.cosmology import FLRW

    if spec is None:
        spec = DEFAULT_COSMOLOGY
    if isinstance(spec, FLRW):
        return spec
    if isinstance(spec, str):
        return _from_name(spec)
    if isinstance(spec, Mapping):
        if "H0_kms_mpc" in spec or "class" in spec:
            spec = _params_from_record(spec)
            if isinstance(spec, str):
                return _from_name(spec)
        if set(spec) <= {"name"} and spec.get("name"):
            return _from_name(str(spec["name"]))
        return _from_params(spec)
    raise CosmologyError(
        f"cannot make a cosmology from {type(spec).__name__}; give a name, an astropy FLRW "
        "instance or a dict of H0/Om0/Ode0/w0"
    )


def _params_from_record(record: Mapping):
    """The choice :func:`get_cosmology` takes for a :func:`cosmology_record`: the realization's
    name where it has one, else its parameters."""
    if record.get("name"):
        return str(record["name"])
    choice = {"H0": record.get("H0_kms_mpc"), "Om0": record.get("Om0")}
    for mine, theirs in (("Ode0", "Ode0"), ("w0", "w0"), ("Tcmb0", "Tcmb0_K")):
        if record.get(theirs) is not None:
            choice[mine] = record[theirs]
    return choice


def cosmology_record(cosmo) -> dict:
    """Name and parameters of a cosmology as plain JSON-able values.

    Keys: ``name`` (``None`` for an unnamed custom model), ``class``, ``H0_kms_mpc``, ``Om0``,
    ``Ode0``, ``Ok0``, ``w0`` (-1 for a cosmological constant), ``Tcmb0_K``, ``Neff``,
    ``m_nu_ev`` (list, empty without massive neutrinos), ``Ob0``.

    >>> rec = cosmology_record(get_cosmology("Planck18"))
    >>> rec["name"], rec["class"], rec["H0_kms_mpc"], rec["Om0"], rec["m_nu_ev"]
    ('Planck18', 'FlatLambdaCDM', 67.66, 0.30966, [0.0, 0.0, 0.06])
    """
    m_nu = getattr(cosmo, "m_nu", None)
    if m_nu is None or not cosmo.has_massive_nu:
        m_nu_list: list[float] = []
    else:
        m_nu_list = [float(v) for v in np.atleast_1d(m_nu.to_value("eV"))]
    w0 = getattr(cosmo, "w0", None)
    ob0 = getattr(cosmo, "Ob0", None)
    return {
        "name": cosmo.name,
        "class": type(cosmo).__name__,
        "H0_kms_mpc": float(cosmo.H0.to_value("km / (Mpc s)")),
        "Om0": float(cosmo.Om0),
        "Ode0": float(cosmo.Ode0),
        "Ok0": float(cosmo.Ok0),
        "w0": -1.0 if w0 is None else float(w0),
        "Tcmb0_K": float(cosmo.Tcmb0.to_value("K")),
        "Neff": float(cosmo.Neff),
        "m_nu_ev": m_nu_list,
        "Ob0": None if ob0 is None else float(ob0),
    }


def describe_cosmology(cosmo) -> str:
    """One line naming a cosmology and its main parameters, for human-readable output.

    ``cosmo`` is an astropy FLRW instance or a :func:`cosmology_record` dict.

    >>> describe_cosmology(get_cosmology({"H0": 70, "Om0": 1.0, "Ode0": 0.0}))
    'custom FlatLambdaCDM: H0 = 70 km/s/Mpc, Om0 = 1, Ode0 = 0, Ok0 = 0, w0 = -1, Tcmb0 = 0 K'
    """
    rec = cosmo if isinstance(cosmo, Mapping) else cosmology_record(cosmo)
    label = rec["name"] or "custom"
    parts = [
        f"H0 = {rec['H0_kms_mpc']:g} km/s/Mpc",
        f"Om0 = {rec['Om0']:.6g}",
        f"Ode0 = {rec['Ode0']:.6g}",
        f"Ok0 = {0.0 if abs(rec['Ok0']) < 1e-15 else rec['Ok0']:.3g}",
        f"w0 = {rec['w0']:g}",
        f"Tcmb0 = {rec['Tcmb0_K']:g} K",
    ]
    if rec["m_nu_ev"]:
        parts.append("m_nu = [" + ", ".join(f"{m:g}" for m in rec["m_nu_ev"]) + "] eV")
    return f"{label} {rec['class']}: " + ", ".join(parts)
