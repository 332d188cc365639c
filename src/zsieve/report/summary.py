"""The catalogue: one row per record, as ``summary.csv`` and ``summary.ecsv``.

:func:`row_from_record` turns one JSON record into a flat row; :func:`write_summary` writes
both tables (atomically) from rows, sorted by input file and spectrum index, streaming them in
chunks when they come sorted. The rows are always derived from the records, so
:func:`rebuild_summary` can regenerate the tables from ``DIR/objects`` alone (as the refit
session does after a decision). :class:`Catalogue` keeps the rows of a folder on disk (a
rebuildable SQLite cache beside the records) so that runs of any size write their tables in
bounded memory.

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

import hashlib
import io
import json
import logging
import math
import os
import re
import time
from pathlib import Path
from typing import Any, Iterable, Iterator

from ..result import to_jsonable
from .atomic import open_atomic
from .record import OBJECTS, is_key, read_record

__all__ = ["COLUMNS", "row_from_record", "write_summary", "rebuild_summary", "clean_text", "tally", "Catalogue",
           "StoredRows", "record_facts", "row_with_facts", "open_atomic", "read_meta", "CATALOGUE_NAME"]

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
    """An :class:`astropy.table.Table` of the rows with units and descriptions (in memory)."""
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


# ------------------------------------------------------------------ streamed, atomic writers
#: Rows formatted per astropy call when the tables are streamed (memory per chunk, not per run).
CHUNK_ROWS = 2000


def _table_text(rows: list[dict[str, Any]], meta, fmt: str) -> str:
    buf = io.StringIO()
    build_table(rows, meta).write(buf, format=fmt)
    return buf.getvalue()


def _data_part(text: str, fmt: str) -> str:
    """What astropy wrote after the header: ECSV's ``#`` lines and the names line, CSV's names line."""
    pos = 0
    if fmt == "ascii.ecsv":
        while text.startswith("#", pos):
            pos = text.index("\n", pos) + 1
    return text[text.index("\n", pos) + 1:]


def _chunks(rows: Iterable[dict[str, Any]], size: int) -> Iterator[list[dict[str, Any]]]:
    chunk: list[dict[str, Any]] = []
    for r in rows:
        chunk.append(r)
        if len(chunk) >= size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def write_summary(out_dir: str | os.PathLike, rows: Iterable[dict[str, Any]], meta: dict[str, Any] | None = None,
                  *, presorted: bool = False) -> tuple[str, str]:
    """Write ``DIR/summary.ecsv`` (units and ``meta`` in the header) and ``DIR/summary.csv``.

    The rows are sorted by (file, index, key) unless ``presorted`` says they already come in that
    order (as from :meth:`Catalogue.rows`); then they are streamed: astropy writes the header
    (from an empty table with the same columns and metadata) and the rows :data:`CHUNK_ROWS` at
    a time, so the text is what astropy writes for the whole table and memory stays bounded by
    one chunk. Both files are replaced atomically.
    """
    out_dir = Path(out_dir)
    if not presorted:
        rows = sorted(rows, key=_sort_key)
    fmts = (("ascii.ecsv", out_dir / "summary.ecsv"), ("ascii.csv", out_dir / "summary.csv"))
    n = 0
    with open_atomic(fmts[0][1]) as ecsv, open_atomic(fmts[1][1]) as csv:
        files = {"ascii.ecsv": ecsv, "ascii.csv": csv}
        for fmt, fh in files.items():
            fh.write(_table_text([], meta, fmt))  # the header (and nothing else) of an empty table
        for chunk in _chunks(rows, CHUNK_ROWS):
            n += len(chunk)
            for fmt, fh in files.items():
                fh.write(_data_part(_table_text(chunk, None, fmt), fmt))
    log.debug("summary of %d rows written to %s", n, out_dir)
    return str(fmts[1][1]), str(fmts[0][1])


def read_meta(out_dir: str | os.PathLike) -> dict[str, Any]:
    """The metadata of an existing ``summary.ecsv`` (``{}`` if there is none); reads the header only."""
    path = Path(out_dir) / "summary.ecsv"
    if not path.exists():
        return {}
    from astropy.table.meta import get_header_from_yaml

    try:
        lines = []
        with open(path, encoding="utf-8") as fh:
            first = fh.readline()
            if not first.startswith("# %ECSV"):
                raise ValueError("not an ECSV file")
            for line in fh:
                if not line.startswith("#"):
                    break
                lines.append(line[2:].rstrip("\n") if line.startswith("# ") else line[1:].rstrip("\n"))
        return dict(get_header_from_yaml(lines).get("meta") or {})
    except Exception as exc:  # a damaged summary is rebuilt, not fatal
        log.warning("could not read %s (%s); its settings are not carried over", path, exc)
        return {}


class StoredRows:
    """The rows of an output folder's :class:`Catalogue`, sorted by (file, index, key), read lazily.

    Re-iterable (each pass reads the catalogue again) and sized; :func:`zsieve.report.index.write_index`
    streams from it (with the outputs the catalogue knows) instead of holding the rows.
    """

    def __init__(self, out_dir: str | os.PathLike):
        self.out_dir = Path(out_dir)

    def __iter__(self) -> Iterator[dict[str, Any]]:
        with Catalogue(self.out_dir) as cat:
            yield from cat.rows()

    def with_outputs(self) -> Iterator[tuple[dict[str, Any], set[str]]]:
        with Catalogue(self.out_dir) as cat:
            yield from cat.rows(outputs=True)

    def tally(self) -> dict[str, int]:
        with Catalogue(self.out_dir) as cat:
            return cat.tally()

    def __len__(self) -> int:
        with Catalogue(self.out_dir) as cat:
            return len(cat)


def rebuild_summary(out_dir: str | os.PathLike, meta: dict[str, Any] | None = None) -> StoredRows:
    """Regenerate both summary tables from the records in ``DIR/objects``; returns the rows.

    The folder's :class:`Catalogue` is first brought in line with the records (only records
    changed since it last saw them are read), so the tables always say what the records say.
    ``meta`` defaults to the metadata of the existing ``summary.ecsv``. The rows come back as a
    lazy, re-iterable :class:`StoredRows` (``list(...)`` it for a list).
    """
    meta = read_meta(out_dir) if meta is None else meta
    with Catalogue(out_dir) as cat:
        cat.sync()
        cat.commit()
        write_summary(out_dir, cat.rows(), meta, presorted=True)
        if cat.in_memory:  # the folder would not take the catalogue: the rows as a list
            return list(cat.rows())
    return StoredRows(out_dir)


# ------------------------------------------------------------------ the catalogue (a cache)
#: File name of the catalogue inside an output folder: a cache, safe to delete (the next run or
#: :func:`rebuild_summary` fills it again from the records). Not hidden: a hidden file in ``DIR``
#: would pass for a temporary left by a killed writer.
CATALOGUE_NAME = "zsieve-cache.sqlite"
_SCHEMA_VERSION = 1
#: Key of the resume facts a worker attaches to a row (taken off by :meth:`Catalogue.put`).
FACTS_KEY = "_facts"
_NAMES = [c[0] for c in COLUMNS]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS objects(
    key TEXT PRIMARY KEY, sort_file BLOB NOT NULL, idx INTEGER NOT NULL,
    status TEXT, grade TEXT, message TEXT, row TEXT NOT NULL,
    sha TEXT, settings TEXT, n INTEGER, transient INTEGER, hand TEXT, src_path TEXT,
    ino INTEGER, size INTEGER, mtime INTEGER, png INTEGER NOT NULL DEFAULT 0, pdf INTEGER NOT NULL DEFAULT 0,
    seen INTEGER);
CREATE INDEX IF NOT EXISTS objects_order ON objects(sort_file, idx, key);
CREATE INDEX IF NOT EXISTS objects_source ON objects(src_path, idx);
CREATE TABLE IF NOT EXISTS state(name TEXT PRIMARY KEY, value TEXT);
CREATE TABLE IF NOT EXISTS scan(key TEXT NOT NULL, ext TEXT NOT NULL, ino INTEGER, size INTEGER, mtime INTEGER,
    PRIMARY KEY(key, ext));
CREATE TABLE IF NOT EXISTS todo(key TEXT PRIMARY KEY);
CREATE TABLE IF NOT EXISTS inputs(path BLOB PRIMARY KEY);
"""


def _blob(text: str) -> bytes:
    """Sort key of a text as stored: UTF-8 bytes sort in code-point order, like Python strings."""
    return str(text).encode("utf-8", "surrogatepass")


def record_facts(rec: dict[str, Any], path: str | os.PathLike | None = None) -> dict[str, Any]:
    """What a rerun needs to know of a record without reading it again (and the record file's identity).

    >>> f = record_facts({"status": "ok", "provenance": {"input_sha256": "ab", "n_spectra": 2}})
    >>> f["sha"], f["n"], f["transient"], f["ino"]
    ('ab', 2, False, None)
    """
    prov = rec.get("provenance") or {}
    out = {
        "sha": prov.get("input_sha256"),
        "settings": prov.get("settings_hash"),
        "n": int(prov.get("n_spectra") or 1),
        "transient": bool(prov.get("transient")),
        "hand": rec.get("hand") or None,
        "path": prov.get("path"),
        "ino": None, "size": None, "mtime": None, "png": False, "pdf": False,
    }
    if path is not None:
        p = Path(path)
        try:
            st = os.stat(p)
            out.update(ino=st.st_ino, size=st.st_size, mtime=st.st_mtime_ns)
        except OSError:
            pass
        out["png"] = p.with_suffix(".png").exists()
        out["pdf"] = p.with_suffix(".pdf").exists()
    return out


def row_with_facts(rec: dict[str, Any], path: str | os.PathLike | None = None) -> dict[str, Any]:
    """:func:`row_from_record` plus the record's facts under :data:`FACTS_KEY` (what workers send back)."""
    row = row_from_record(rec)
    row[FACTS_KEY] = record_facts(rec, path)
    return row


class Catalogue:
    """The rows and resume facts of an output folder, on disk (SQLite), for runs of any size.

    A cache, never the only copy of anything: the JSON records in ``DIR/objects`` are the
    truth and :meth:`sync` brings the catalogue in line with them (a record is read again when
    its file's inode, size or modification time differ from what the catalogue saw; rows of
    records that are gone are dropped). A missing, damaged or foreign-version catalogue file is
    replaced by an empty one and filled from the records. Memory does not grow with the number
    of objects: rows go in as they come and come out sorted by (file, index, key) from an index.

    >>> import tempfile
    >>> d = tempfile.mkdtemp()
    >>> with Catalogue(d) as cat:
    ...     cat.put({"file": "b.fits", "index": 0, "key": "b.fits", "status": "ok", "grade": "likely"})
    ...     cat.put({"file": "a.fits", "index": 0, "key": "a.fits", "status": "failed", "grade": "none"})
    ...     [r["key"] for r in cat.rows()], cat.tally()["failed"], len(cat)
    (['a.fits', 'b.fits'], 1, 2)
    """

    def __init__(self, out_dir: str | os.PathLike):
        self.out_dir = Path(out_dir)
        self.path = self.out_dir / CATALOGUE_NAME
        self.in_memory = False
        self.changes = 0
        self._changes_counted = 0
        self.run = 0
        self._last_commit = time.monotonic()
        self.con = self._open()

    # ---- opening, repair
    def _connect(self, where=None):
        import sqlite3

        con = sqlite3.connect(where or self.path, timeout=60.0)
        try:
            con.execute("PRAGMA synchronous=NORMAL")
            version = con.execute("PRAGMA user_version").fetchone()[0]
            tables = con.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
            if version == _SCHEMA_VERSION and tables:
                return con  # opening an existing catalogue writes nothing (a run may be writing it)
            if tables:
                raise sqlite3.DatabaseError(f"catalogue version {version}, not {_SCHEMA_VERSION}")
            con.executescript(_SCHEMA)
            con.execute(f"PRAGMA user_version={_SCHEMA_VERSION}")
            con.commit()
        except BaseException:
            con.close()
            raise
        return con

    def _open(self):
        import sqlite3

        try:
            return self._connect()
        except sqlite3.OperationalError as exc:
            if "locked" in str(exc) or "busy" in str(exc):
                raise
            self._discard(exc)
        except sqlite3.DatabaseError as exc:
            self._discard(exc)
        try:
            return self._connect()
        except sqlite3.OperationalError as exc:  # the folder takes no database (full, quota, odd file system)
            if "locked" in str(exc) or "busy" in str(exc):
                raise
            log.warning("catalogue cannot be kept in %s (%s); keeping it in memory for this run", self.out_dir, exc)
            self.in_memory = True
            return self._connect(":memory:")

    def _discard(self, exc) -> None:
        if self.in_memory:
            return
        log.warning("catalogue %s unusable (%s); rebuilding it from the records", self.path, exc)
        for suffix in ("", "-journal", "-wal", "-shm"):
            try:
                os.unlink(f"{self.path}{suffix}")
            except FileNotFoundError:
                pass

    def rebuild(self) -> None:
        """Throw the catalogue away and fill it again from the records."""
        import sqlite3

        try:
            self.con.close()
        finally:
            self._discard(sqlite3.DatabaseError("asked to rebuild"))
        self.con = self._connect(":memory:" if self.in_memory else None)
        self.sync()

    def close(self) -> None:
        if self.con is not None:
            self.con.commit()
            self.con.close()
            self.con = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self.con is not None:
            if exc[0] is None:
                self.con.commit()
            self.con.close()
            self.con = None
        return False

    def commit(self, *, every_s: float = 0.0) -> None:
        """Commit (at most every ``every_s`` seconds)."""
        now = time.monotonic()
        if now - self._last_commit >= every_s:
            if self.changes != self._changes_counted:  # rows changed: the written tables are out of date
                self._bump("generation")
                self._changes_counted = self.changes
            self.con.commit()
            self._last_commit = now

    # ---- state
    def get_state(self, name: str, default=None):
        row = self.con.execute("SELECT value FROM state WHERE name=?", (name,)).fetchone()
        return json.loads(row[0]) if row else default

    def set_state(self, name: str, value) -> None:
        self.con.execute("INSERT OR REPLACE INTO state(name, value) VALUES(?, ?)", (name, json.dumps(value)))

    def _bump(self, name: str) -> int:
        n = int(self.get_state(name, 0)) + 1
        self.set_state(name, n)
        return n

    def begin_run(self) -> int:
        """A new run number: rows a run touches carry it (see :meth:`mark_seen`)."""
        self.run = self._bump("run")
        self.con.execute("DELETE FROM inputs")
        self.con.commit()
        return self.run

    # ---- rows
    def put(self, row: dict[str, Any], facts: dict[str, Any] | None = None, *, src_path: str | None = None) -> None:
        """Insert or replace one row (its facts from ``facts`` or ``row[FACTS_KEY]``).

        ``src_path`` is the absolute path of the input it came from (default: the record's, else
        the row's file); records of the same input spectrum under another key are superseded.
        """
        row = dict(row)
        facts = facts or row.pop(FACTS_KEY, None) or {}
        row.pop(FACTS_KEY, None)
        key = str(row.get("key") or "")
        if src_path is None:
            src_path = facts.get("path") or os.path.abspath(str(row.get("file") or ""))
        src = src_path or None  # "": the record does not say which input it came from
        hand = facts.get("hand")
        self.con.execute(
            "INSERT OR REPLACE INTO objects(key, sort_file, idx, status, grade, message, row, sha, settings, n,"
            " transient, hand, src_path, ino, size, mtime, png, pdf, seen) VALUES"
            " (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (key, _blob(row.get("file") or ""), int(row.get("index") or 0), row.get("status"), row.get("grade"),
             row.get("message"), json.dumps([row.get(n) for n in _NAMES]), facts.get("sha"), facts.get("settings"),
             int(facts.get("n") or 1), int(bool(facts.get("transient"))),
             json.dumps(hand) if hand else None, src, facts.get("ino"), facts.get("size"), facts.get("mtime"),
             int(bool(facts.get("png"))), int(bool(facts.get("pdf"))), self.run or None))
        self.changes += 1

    def mark_seen(self, keys: Iterable[str]) -> None:
        """Note that this run accounted for these keys (reused, re-measured or re-skipped)."""
        self.con.executemany("UPDATE objects SET seen=? WHERE key=?", [(self.run, k) for k in keys])

    def facts(self, key: str) -> dict[str, Any] | None:
        """The resume facts of one key (``None`` if the catalogue has no such row)."""
        r = self.con.execute("SELECT sha, settings, n, transient, hand, status, message, src_path, idx, png, pdf"
                             " FROM objects WHERE key=?", (key,)).fetchone()
        if r is None:
            return None
        return {"sha": r[0], "settings": r[1], "n": r[2], "transient": bool(r[3]),
                "hand": json.loads(r[4]) if r[4] else None, "status": r[5], "message": r[6] or "",
                "path": r[7], "index": r[8], "png": bool(r[9]), "pdf": bool(r[10])}

    def drop(self, key: str) -> None:
        self.con.execute("DELETE FROM objects WHERE key=?", (key,))
        self.changes += 1

    def rows(self, *, outputs: bool = False) -> Iterator[Any]:
        """Every row, sorted by (file, index, key); with ``outputs``, ``(row, {"json", "png", ...})``."""
        cur = self.con.cursor()  # its own cursor: writes on the connection meanwhile are not expected
        cur.execute("SELECT row, png, pdf FROM objects ORDER BY sort_file, idx, key")
        while True:
            batch = cur.fetchmany(max(1, CHUNK_ROWS))
            if not batch:
                break
            for text, png, pdf in batch:
                row = dict(zip(_NAMES, json.loads(text)))
                if outputs:
                    files = {"json"} | ({"png"} if png else set()) | ({"pdf"} if pdf else set())
                    yield row, files
                else:
                    yield row

    def __len__(self) -> int:
        return self.con.execute("SELECT count(*) FROM objects").fetchone()[0]

    def tally(self) -> dict[str, int]:
        """:func:`tally` of every row, counted by the database."""
        out = _tally_zero()
        for status, grade, n in self.con.execute("SELECT status, grade, count(*) FROM objects GROUP BY status, grade"):
            _tally_add(out, status, grade, n)
        return out

    def superseded(self) -> list[tuple[str, str]]:
        """``(old key, new key)`` pairs: rows of an input spectrum this run wrote under another key."""
        return self.con.execute(
            "SELECT old.key, new.key FROM objects AS new JOIN objects AS old"
            " ON old.src_path = new.src_path AND old.idx = new.idx"
            " WHERE new.seen = ? AND (old.seen IS NULL OR old.seen != ?) AND old.key != new.key",
            (self.run, self.run)).fetchall()

    # ---- discovery bookkeeping (the set of inputs seen this run, on disk)
    def add_input(self, real: str) -> bool:
        """Remember an input path for this run; ``False`` if it was seen already."""
        cur = self.con.execute("INSERT OR IGNORE INTO inputs(path) VALUES(?)", (_blob(real),))
        return cur.rowcount == 1

    # ---- keeping up with the records
    def sync(self) -> int:
        """Bring the rows in line with ``DIR/objects``; returns how many rows changed.

        One pass over the folder listing (a ``stat`` per record): records that are new or whose
        file changed are read, rows whose record is gone are dropped, figure flags are refreshed.
        A damaged catalogue is rebuilt from the records.
        """
        import sqlite3

        try:
            return self._sync()
        except sqlite3.OperationalError as exc:
            if "locked" in str(exc) or "busy" in str(exc):
                raise
            self.rebuild()
            return self.changes
        except sqlite3.DatabaseError:
            self.rebuild()
            return self.changes

    def _sync(self) -> int:
        from .record import object_path

        con = self.con
        folder = self.out_dir / OBJECTS
        before = self.changes
        con.execute("DELETE FROM scan")
        con.execute("DELETE FROM todo")
        if folder.is_dir():
            batch = []
            with os.scandir(folder) as it:
                for e in it:
                    stem, dot, ext = e.name.rpartition(".")
                    if not dot or ext not in ("json", "png", "pdf") or not is_key(stem):
                        continue
                    if ext == "json":
                        try:
                            st = e.stat()
                        except OSError:
                            continue
                        batch.append((stem, ext, st.st_ino, st.st_size, st.st_mtime_ns))
                    else:
                        batch.append((stem, ext, None, None, None))
                    if len(batch) >= 5000:
                        con.executemany("INSERT OR REPLACE INTO scan VALUES(?,?,?,?,?)", batch)
                        batch = []
            con.executemany("INSERT OR REPLACE INTO scan VALUES(?,?,?,?,?)", batch)
        cur = con.execute("DELETE FROM objects WHERE key NOT IN (SELECT key FROM scan WHERE ext='json')")
        self.changes += max(cur.rowcount, 0)
        for ext in ("png", "pdf"):
            cur = con.execute(
                f"UPDATE objects SET {ext} = EXISTS(SELECT 1 FROM scan WHERE scan.key=objects.key AND ext='{ext}')"
                f" WHERE {ext} != EXISTS(SELECT 1 FROM scan WHERE scan.key=objects.key AND ext='{ext}')")
            self.changes += max(cur.rowcount, 0)
        con.execute(
            "INSERT INTO todo(key) SELECT s.key FROM scan AS s LEFT JOIN objects AS o ON o.key = s.key"
            " WHERE s.ext='json' AND (o.key IS NULL OR o.ino IS NOT s.ino OR o.size IS NOT s.size"
            " OR o.mtime IS NOT s.mtime)")
        last = ""
        while True:
            keys = [k for (k,) in con.execute("SELECT key FROM todo WHERE key > ? ORDER BY key LIMIT 500", (last,))]
            if not keys:
                break
            last = keys[-1]
            for key in keys:
                path = object_path(self.out_dir, key, ".json")
                rec = read_record(path)
                if rec is None:  # unreadable: no row (the batch measures it again)
                    cur = con.execute("DELETE FROM objects WHERE key=?", (key,))
                    self.changes += max(cur.rowcount, 0)
                    continue
                row = row_from_record(rec)
                row["key"] = key
                seen = con.execute("SELECT seen FROM objects WHERE key=?", (key,)).fetchone()
                facts = record_facts(rec, path)
                self.put(row, facts, src_path=facts["path"] or "")
                if seen and seen[0] is not None:
                    con.execute("UPDATE objects SET seen=? WHERE key=?", (seen[0], key))
        con.execute("DELETE FROM scan")
        con.execute("DELETE FROM todo")
        changed = self.changes - before
        if changed:
            log.info("catalogue of %s: %d row(s) brought in line with the records", self.out_dir, changed)
        return changed

    # ---- whether the written tables are current
    def _signature(self, meta, title: str) -> str:
        text = json.dumps([self.get_state("generation", 0), to_jsonable(meta), title], sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()

    def _file_ids(self) -> dict[str, Any]:
        out = {}
        for name in ("summary.csv", "summary.ecsv", "index.html"):
            try:
                st = os.stat(self.out_dir / name)
                out[name] = [st.st_ino, st.st_size, st.st_mtime_ns]
            except OSError:
                out[name] = None
        return out

    def tables_current(self, meta, title: str) -> bool:
        """Whether the summary tables and index page on disk were written from these rows and ``meta``."""
        written = self.get_state("written")
        return bool(written) and written.get("signature") == self._signature(meta, title) \
            and written.get("files") == self._file_ids() and all(written["files"].values())

    def note_tables_written(self, meta, title: str) -> None:
        self.set_state("written", {"signature": self._signature(meta, title), "files": self._file_ids()})
        self.con.commit()


def tally(rows: Iterable[dict[str, Any]]) -> dict[str, int]:
    """Counts for the closing line: fitted, each grade among fitted, failed, skipped.

    >>> tally([{"status": "ok", "grade": "secure"}, {"status": "failed", "grade": "none"}])
    {'fitted': 1, 'secure': 1, 'likely': 0, 'tentative': 0, 'none': 0, 'failed': 1, 'skipped': 0}
    """
    out = _tally_zero()
    for r in rows:
        _tally_add(out, r.get("status"), r.get("grade"), 1)
    return out


def _tally_zero() -> dict[str, int]:
    return {"fitted": 0, "secure": 0, "likely": 0, "tentative": 0, "none": 0, "failed": 0, "skipped": 0}


def _tally_add(out: dict[str, int], status, grade, n: int) -> None:
    if status == "ok":
        out["fitted"] += n
        out[grade if grade in ("secure", "likely", "tentative") else "none"] += n
    elif status == "failed":
        out["failed"] += n
    else:
        out["skipped"] += n
