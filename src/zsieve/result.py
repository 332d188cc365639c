"""The result object that every stage of zsieve enriches, with a JSON round trip.

The engine fills the redshift fields, the cosmology stage adds ``cosmology`` and
``frames``, the batch adds ``provenance``, and a person's decision in the refit session
goes into ``hand``. Everything is plain Python data (floats, strings, lists, dicts), so
``FitResult.from_dict(result.to_dict()) == result``.

Examples
--------
>>> r = FitResult(file="a.fits", z=0.1234, z_err=2e-5, grade="likely", confidence=0.93)
>>> r2 = FitResult.from_json(r.to_json())
>>> r2 == r, r2.grade
(True, 'likely')
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["GRADES", "STATUSES", "LineMatch", "Candidate", "FitResult", "to_jsonable"]

#: Grades in order of trust.
GRADES = ("secure", "likely", "tentative", "none")
#: Outcome of one input file.
STATUSES = ("ok", "failed", "skipped")


def to_jsonable(obj):
    """Turn numpy scalars/arrays, dataclasses and non-finite floats into JSON-able values.

    Non-finite floats become ``None`` (JSON has no NaN).

    >>> to_jsonable({"a": np.float32(1.5), "b": np.array([1, 2]), "c": float("nan")})
    {'a': 1.5, 'b': [1, 2], 'c': None}
    """
    kind = type(obj)  # the common leaf types first: records hold thousands of them
    if kind is float:
        return obj if math.isfinite(obj) else None
    if kind is str or kind is int or kind is bool or obj is None:
        return obj
    if kind is list or kind is tuple:
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray) and obj.dtype.kind in "biuf":
        if obj.dtype.kind != "f" or np.isfinite(obj).all():
            return obj.tolist()
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: to_jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    return obj


@dataclass
class LineMatch:
    """One spectral line measured at the adopted redshift.

    Attributes
    ----------
    name : str
        Line name as in the line list (e.g. ``"H-alpha"``, ``"[O III] 5008"``).
    rest_wavelength : float
        Vacuum rest wavelength, Angstrom.
    observed_wavelength, observed_wavelength_err : float
        Fitted centroid and its 1-sigma error, vacuum Angstrom.
    sigma_A : float
        Gaussian sigma of the line, observed frame, Angstrom.
    flux, flux_err : float
        Integrated line flux (negative for absorption), in flux unit x Angstrom.
    ew : float
        Observed-frame equivalent width, Angstrom (positive for emission).
    snr : float
        Signal-to-noise of the line flux.
    kind : str
        ``"emission"`` or ``"absorption"``.
    z_line : float
        Redshift from this line alone.
    """

    name: str
    rest_wavelength: float
    observed_wavelength: float = math.nan
    observed_wavelength_err: float = math.nan
    sigma_A: float = math.nan
    flux: float = math.nan
    flux_err: float = math.nan
    ew: float = math.nan
    snr: float = math.nan
    kind: str = "emission"
    z_line: float = math.nan


@dataclass
class Candidate:
    """One possible redshift of an object.

    Attributes
    ----------
    z, z_err : float
        Redshift and its formal error.
    template : str
        Object class whose template or line set supports it (``"emission-galaxy"``,
        ``"absorption-galaxy"``, ``"quasar"``, ``"star"``).
    score : float
        Ranking score (larger is better; meaning documented by the engine).
    probability : float
        Fraction of bootstrap resamples that picked this candidate, in [0, 1].
    r_tdr : float
        Tonry & Davis (1979) r statistic of the correlation peak (NaN if not from correlation).
    n_lines : int
        Number of independent lines that agree with this z.
    lines : list of str
        Names of those lines.
    origin : str
        ``"lines"``, ``"xcorr"`` or ``"both"``.
    """

    z: float
    z_err: float = math.nan
    template: str = ""
    score: float = 0.0
    probability: float = 0.0
    r_tdr: float = math.nan
    n_lines: int = 0
    lines: list[str] = field(default_factory=list)
    origin: str = "lines"


@dataclass
class FitResult:
    """Everything zsieve says about one input spectrum.

    The fixed catalogue fields are ``file, z, z_err, grade, confidence, status, message``.
    ``confidence`` is the bootstrap probability of the adopted candidate, in [0, 1].
    """

    file: str = ""
    object_name: str | None = None
    status: str = "ok"
    message: str = ""
    # --- redshift
    z: float = math.nan
    z_err: float = math.nan
    z_p16: float = math.nan
    z_p50: float = math.nan
    z_p84: float = math.nan
    z_formal_err: float = math.nan
    z_bound: float = math.nan  # Cramer-Rao bound on sigma_z
    grade: str = "none"
    confidence: float = 0.0
    template: str = ""
    candidates: list[Candidate] = field(default_factory=list)
    lines: list[LineMatch] = field(default_factory=list)
    features: list[dict[str, Any]] = field(default_factory=list)  # detected, before identification
    flags: list[str] = field(default_factory=list)
    n_resamples: int = 0
    seed: int | None = None
    z_samples: list[float] = field(default_factory=list)  # bootstrap z values (for error propagation)
    systemic: dict[str, Any] | None = None  # quasar systemic-z details
    # --- data description
    medium: str = "vacuum"
    frame: str = "unknown"
    wave_min: float = math.nan
    wave_max: float = math.nan
    snr_median: float = math.nan
    # --- stages downstream
    frames: dict[str, Any] | None = None
    cosmology: dict[str, Any] | None = None
    provenance: dict[str, Any] = field(default_factory=dict)
    hand: dict[str, Any] | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    # ------------------------------------------------------------- helpers
    @property
    def best(self) -> Candidate | None:
        """The adopted candidate (first of ``candidates``), or ``None``."""
        return self.candidates[0] if self.candidates else None

    @property
    def runner_up(self) -> Candidate | None:
        """The second-ranked candidate, or ``None``."""
        return self.candidates[1] if len(self.candidates) > 1 else None

    @classmethod
    def failure(cls, file: str, message: str, status: str = "failed") -> "FitResult":
        """A result for a file that could not be read or fitted."""
        return cls(file=str(file), status=status, message=str(message), grade="none", confidence=0.0)

    def replace(self, **changes) -> "FitResult":
        return dataclasses.replace(self, **changes)

    # ---------------------------------------------------------- round trip
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dictionary (NaN becomes ``None``)."""
        return to_jsonable(self)

    def to_json(self, **kw) -> str:
        kw.setdefault("indent", 1)
        return json.dumps(self.to_dict(), **kw)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "FitResult":
        names = {f.name: f for f in dataclasses.fields(cls)}
        kw: dict[str, Any] = {}
        for k, v in d.items():
            if k not in names:
                continue
            if k == "candidates":
                v = [_fill(Candidate, c) for c in (v or [])]
            elif k == "lines":
                v = [_fill(LineMatch, m) for m in (v or [])]
            elif v is None and names[k].type in ("float", float):
                v = math.nan
            kw[k] = v
        return _nan_floats(cls(**kw))

    @classmethod
    def from_json(cls, text: str) -> "FitResult":
        return cls.from_dict(json.loads(text))

    def __eq__(self, other):
        if not isinstance(other, FitResult):
            return NotImplemented
        return _canon(self.to_dict()) == _canon(other.to_dict())


def _fill(kind, d):
    names = {f.name for f in dataclasses.fields(kind)}
    return _nan_floats(kind(**{k: v for k, v in d.items() if k in names}))


def _nan_floats(obj):
    """Put NaN back where JSON carried None into a float field."""
    for f in dataclasses.fields(obj):
        if f.type in ("float", float) and getattr(obj, f.name) is None:
            setattr(obj, f.name, math.nan)
    return obj


def _canon(d):
    return json.dumps(d, sort_keys=True)
