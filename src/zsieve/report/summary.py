"""The catalogue: one row per record, as ``summary.csv`` and ``summary.ecsv``.

:func:`row_from_record` turns one JSON record into a flat row; :func:`write_summary` writes
both tables (atomically) from rows, sorted by input file and spectrum index. The rows are
always derived from the records, so :func:`rebuild_summary` can regenerate the tables from
``DIR/objects`` alone (as the refit session does after a decision).

Where a person decided (the record's ``hand`` field), ``z``, ``z_err`` and ``grade`` are the
person's values, ``hand`` is ``True``, and the engine's answer stays in ``z_engine`` and
``grade_engine``; the cosmology columns then follow the hand redshift if the record carries a
cosmology for it (``hand["cosmology"]``).

Columns (units in the ECSV header): see :data:`COLUMNS`. Header-derived text (the object
name) has control characters replaced by ``?`` and is cut to 200 characters in the tables; the
JSON record keeps it whole.

Examples
--------
>>> row = row_from_record({"file": "a.fits", "z": 0.5, "z_err": 1e-4, "grade": "likely",
...     "confidence": 0.9, "status": "ok", "provenance": {"key": "a.fits"}})
>>> row["z"], row["grade"], row["hand"], row["n_lines"]
(0.5, 'likely', False, 0)
"""

from __future__ import annotations

import io
import logging
import math
import os
import re
from pathlib import Path
from typing import Any, Iterable

from .atomic import write_atomic
from .record import iter_records

__all__ = ["COLUMNS", "row_from_record", "write_summary", "rebuild_summary", "clean_text", "tally"]

log = logging.getLogger(__name__)

# name, kind ('s' text, 'f' float, 'i' int, 'b' bool), unit, description
COLUMNS: tuple[tuple[str, str, str | None, str], ...] = (
    ("file", "s", None, "input file as found"),
    ("index", "i", None, "spectrum index inside the file (0-based)"),
    ("key", "s", None, "output key: DIR/objects/<key>.json"),
    ("object", "s", None, "object name from the header (cleaned for display)"),
    ("status", "s", None, "ok, failed or skipped"),
    ("message", "s", None, "why a file failed or was skipped"),
    ("z", "f", "", "adopted redshift (the hand value where a person decided)"),
    ("z_err", "f", "", "1-sigma uncertainty of z (bootstrap)"),
    ("grade", "s", None, "secure, likely, tentative or none"),
    ("confidence", "f", "", "bootstrap probability of the adopted candidate"),
    ("hand", "b", None, "True where z/grade were decided by a person"),
    ("z_engine", "f", "", "the engine's redshift"),
    ("grade_engine", "s", None, "the engine's grade"),
    ("z_p16", "f", "", "16th percentile of the bootstrap redshifts"),
    ("z_p50", "f", "", "median of the bootstrap redshifts"),
    ("z_p84", "f", "", "84th percentile of the bootstrap redshifts"),
    ("z_formal_err", "f", "", "formal error of the joint line fit"),
    ("z_bound", "f", "", "Cramer-Rao bound on the z uncertainty"),
    ("template", "s", None, "object class of the adopted candidate"),
    ("n_lines", "i", None, "number of matched lines"),
    ("runner_up_z", "f", "", "redshift of the second-ranked candidate"),
    ("runner_up_template", "s", None, "class of the second-ranked candidate"),
    ("runner_up_prob", "f", "", "bootstrap probability of the second-ranked candidate"),
    ("medium", "s", None, "wavelength medium of the input file"),
    ("frame", "s", None, "velocity frame of the input wavelengths"),
    ("z_helio", "f", "", "heliocentric redshift where a correction could be made"),
    ("z_cmb", "f", "", "redshift in the CMB frame"),
    ("flags", "s", None, "warning flags, separated by ';'"),
    ("snr_median", "f", "", "median S/N per pixel"),
    ("wave_min", "f", "Angstrom", "first good wavelength (vacuum)"),
    ("wave_max", "f", "Angstrom", "last good wavelength (vacuum)"),
    ("lum_distance", "f", "Mpc", "luminosity distance"),
    ("lum_distance_err", "f", "Mpc", "its uncertainty from the z distribution"),
    ("ang_distance", "f", "Mpc", "angular-diameter distance"),
    ("lookback_time", "f", "Gyr", "lookback time"),
    ("v_recession_now", "f", "km / s", "recession velocity today, H0 D_C"),
    ("v_recession_emit", "f", "km / s", "recession velocity at emission, H(z) D_C/(1+z)"),
)

_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def clean_text(text: Any, limit: int = 200) -> str:
    """Untrusted header text made safe for one table cell: no control characters, bounded length.

    >>> clean_text("CDX\\n0042\\x1b[31m")
    'CDX?0042?[31m'
    >>> len(clean_text("x" * 10_000))
    200
    """
    if text is None:
        return ""
    s = _CONTROL.sub("?", str(text))
    return s if len(s) <= limit else s[: limit - 1] + "\u2026"


def _f(value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return math.nan
    return v


def _cosmo_value(cosmo: dict | None, key: str) -> float:
    return _f((cosmo or {}).get(key))


def row_from_record(rec: dict[str, Any]) -> dict[str, Any]:
    """One summary row (plain Python values) from one record dictionary."""
    prov = rec.get("provenance") or {}
    hand = rec.get("hand") or None
    cands = rec.get("candidates") or []
    runner = cands[1] if len(cands) > 1 else {}
    frames = rec.get("frames") or {}
    cosmo = rec.get("cosmology")
    z_engine = _f(rec.get("z"))
    z, z_err, grade = z_engine, _f(rec.get("z_err")), rec.get("grade") or "none"
    grade_engine = grade
    auto = (hand or {}).get("auto")
    if isinstance(auto, dict):  # the record itself carries the hand answer; the engine's is kept here
        z_engine, grade_engine = _f(auto.get("z")), auto.get("grade") or "none"
    if hand:
        z = _f(hand.get("z"))
        if hand.get("z_err") is not None:
            z_err = _f(hand.get("z_err"))
        elif not (math.isfinite(z) and math.isfinite(z_engine) and abs(z - z_engine) <= max(3 * z_err, 1e-6)
                  ) and not isinstance(auto, dict):
            z_err = math.nan  # the engine's error does not describe a different redshift
        grade = hand.get("grade") or grade
        if hand.get("cosmology"):
            cosmo = hand["cosmology"]
    return {
        "file": str(rec.get("file") or ""),
        "index": int(prov.get("index") or 0),
        "key": str(prov.get("key") or ""),
        "object": clean_text(rec.get("object_name")),
        "status": rec.get("status") or "ok",
        "message": clean_text(rec.get("message"), 500),
        "z": z,
        "z_err": z_err,
        "grade": grade,
        "confidence": _f(rec.get("confidence")) if rec.get("status", "ok") == "ok" else 0.0,
        "hand": bool(hand),
        "z_engine": z_engine,
        "grade_engine": grade_engine,
        "z_p16": _f(rec.get("z_p16")),
        "z_p50": _f(rec.get("z_p50")),
        "z_p84": _f(rec.get("z_p84")),
        "z_formal_err": _f(rec.get("z_formal_err")),
        "z_bound": _f(rec.get("z_bound")),
        "template": str(rec.get("template") or ""),
        "n_lines": len(rec.get("lines") or []),
        "runner_up_z": _f(runner.get("z")),
        "runner_up_template": str(runner.get("template") or ""),
        "runner_up_prob": _f(runner.get("probability")),
        "medium": str(rec.get("medium") or ""),
        "frame": str(frames.get("frame_out") or rec.get("frame") or ""),
        "z_helio": _f(frames.get("z_helio")),
        "z_cmb": _f(frames.get("z_cmb")),
        "flags": ";".join(str(f) for f in rec.get("flags") or []),
        "snr_median": _f(rec.get("snr_median")),
        "wave_min": _f(rec.get("wave_min")),
        "wave_max": _f(rec.get("wave_max")),
        "lum_distance": _cosmo_value(cosmo, "luminosity_distance_mpc"),
        "lum_distance_err": _cosmo_value(cosmo, "luminosity_distance_mpc_err"),
        "ang_distance": _cosmo_value(cosmo, "angular_diameter_distance_mpc"),
        "lookback_time": _cosmo_value(cosmo, "lookback_time_gyr"),
        "v_recession_now": _cosmo_value(cosmo, "recession_velocity_now_kms"),
        "v_recession_emit": _cosmo_value(cosmo, "recession_velocity_emission_kms"),
    }


def _sort_key(row):
    return (row["file"], row["index"], row["key"])


def build_table(rows: Iterable[dict[str, Any]], meta: dict[str, Any] | None = None):
    """An :class:`astropy.table.Table` of the rows with units and descriptions."""
    import numpy as np
    from astropy.table import Column, Table

    rows = sorted(rows, key=_sort_key)
    cols = []
    for name, kind, unit, desc in COLUMNS:
        values = [r.get(name) for r in rows]
        if kind == "f":
            data = np.array([_f(v) for v in values], dtype=float)
        elif kind == "i":
            data = np.array([int(v or 0) for v in values], dtype=np.int64)
        elif kind == "b":
            data = np.array([bool(v) for v in values], dtype=bool)
        else:
            data = np.array([str(v if v is not None else "") for v in values], dtype=object)
            data = data.astype(str) if len(data) else np.array([], dtype="U1")
        cols.append(Column(data, name=name, unit=unit or None, description=desc))
    return Table(cols, meta=dict(meta or {}))


def write_summary(out_dir: str | os.PathLike, rows: Iterable[dict[str, Any]], meta: dict[str, Any] | None = None) -> tuple[str, str]:
    """Write ``DIR/summary.ecsv`` (units and ``meta`` in the header) and ``DIR/summary.csv``."""
    table = build_table(rows, meta)
    out_dir = Path(out_dir)
    buf = io.StringIO()
    table.write(buf, format="ascii.ecsv")
    ecsv = write_atomic(out_dir / "summary.ecsv", buf.getvalue())
    buf = io.StringIO()
    table.write(buf, format="ascii.csv")
    csv = write_atomic(out_dir / "summary.csv", buf.getvalue())
    log.debug("summary of %d rows written to %s", len(table), out_dir)
    return csv, ecsv


def read_meta(out_dir: str | os.PathLike) -> dict[str, Any]:
    """The metadata of an existing ``summary.ecsv`` (``{}`` if there is none)."""
    path = Path(out_dir) / "summary.ecsv"
    if not path.exists():
        return {}
    from astropy.table import Table

    try:
        return dict(Table.read(path, format="ascii.ecsv").meta)
    except Exception as exc:  # a damaged summary is rebuilt, not fatal
        log.warning("could not read %s (%s); its settings are not carried over", path, exc)
        return {}


def rebuild_summary(out_dir: str | os.PathLike, meta: dict[str, Any] | None = None) -> list[dict[str, Any]]:
    """Regenerate both summary tables from the records in ``DIR/objects``; returns the rows.

    ``meta`` defaults to the metadata of the existing ``summary.ecsv``.
    """
    rows = [row_from_record(rec) for _, rec in iter_records(out_dir)]
    write_summary(out_dir, rows, read_meta(out_dir) if meta is None else meta)
    return rows


def tally(rows: Iterable[dict[str, Any]]) -> dict[str, int]:
    """Counts for the closing line: fitted, each grade among fitted, failed, skipped.

    >>> tally([{"status": "ok", "grade": "secure"}, {"status": "failed", "grade": "none"}])
    {'fitted': 1, 'secure': 1, 'likely': 0, 'tentative': 0, 'none': 0, 'failed': 1, 'skipped': 0}
    """
    out = {"fitted": 0, "secure": 0, "likely": 0, "tentative": 0, "none": 0, "failed": 0, "skipped": 0}
    for r in rows:
        status = r.get("status")
        if status == "ok":
            out["fitted"] += 1
            g = r.get("grade") if r.get("grade") in ("secure", "likely", "tentative") else "none"
            out[g] += 1
        elif status == "failed":
            out["failed"] += 1
        else:
            out["skipped"] += 1
    return out
