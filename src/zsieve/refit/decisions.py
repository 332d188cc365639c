"""The decisions log: an append-only, human-readable record of what a person decided.

Every decision made in the refit session becomes one line of ``DIR/decisions.log``: a JSON
object with the keys in a fixed, readable order (when, who, which object, what action, the
redshift and grade before and after, the comment, and what else changed). Lines are only
ever appended, never rewritten, so the file is the full history; the decision in force for
an object is its last line (an ``"undo"`` line withdraws the person's decision and returns
the object to the automatic answer).

Writing is one ``write`` of one complete line on a file opened for appending, followed by
``fsync``; a reader skips (and logs) a torn last line rather than failing.

Examples
--------
>>> import tempfile, os
>>> d = tempfile.mkdtemp()
>>> rec = make_decision(key="cdx-0042", file="cdx-0042.fits", action="name-line",
...                     z=0.31234, grade="likely", previous_z=0.9, previous_grade="tentative",
...                     comment="H-alpha clear", user="observer", time="2026-01-01T00:00:00Z")
>>> path = append_decision(d, rec)
>>> os.path.basename(path)
'decisions.log'
>>> in_force(read_decisions(path))["cdx-0042"]["z"]
0.31234
"""

from __future__ import annotations

import datetime as _dt
import getpass
import json
import logging
import os
from pathlib import Path
from typing import Any, Iterable

from ..result import GRADES, to_jsonable

__all__ = [
    "LOG_NAME",
    "ACTIONS",
    "make_decision",
    "append_decision",
    "read_decisions",
    "in_force",
    "login_name",
    "utc_now",
]

log = logging.getLogger(__name__)

#: File name of the log inside an output folder.
LOG_NAME = "decisions.log"

#: What a decision line may say was done. ``undo`` withdraws earlier decisions for the object.
ACTIONS = (
    "approve",  # the answer shown (automatic or edited) is endorsed as it stands
    "adopt-candidate",  # one of the ranked candidates was chosen
    "name-line",  # a feature was named as a rest line, z derived from it
    "type-z",  # z typed by hand
    "grade",  # grade (and comment) set by hand
    "refit",  # z range, class or masks changed and the fit rerun
    "bootstrap",  # the bootstrap rerun for the current choice
    "edit",  # several of the above in one save
    "undo",  # back to the automatic answer
)

#: Order of the keys on a line (the rest follow alphabetically).
_ORDER = (
    "time",
    "user",
    "key",
    "file",
    "index",
    "action",
    "z",
    "z_err",
    "grade",
    "template",
    "previous_z",
    "previous_grade",
    "previous_template",
    "comment",
    "changes",
)


def utc_now() -> str:
    """The current UTC time as ISO 8601 with a ``Z`` (seconds precision).

    >>> utc_now().endswith("Z") and len(utc_now()) == 20
    True
    """
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def login_name() -> str:
    """The login name of the person at the keyboard (``getpass.getuser``), or ``"unknown"``."""
    try:
        return getpass.getuser()
    except Exception:  # no passwd entry and no LOGNAME/USER in a container
        return "unknown"


def make_decision(
    *,
    key: str,
    file: str,
    action: str,
    z: float | None,
    grade: str,
    previous_z: float | None = None,
    previous_grade: str | None = None,
    comment: str = "",
    user: str | None = None,
    time: str | None = None,
    **more: Any,
) -> dict[str, Any]:
    """One decision as a plain dictionary, checked and in the log's key order.

    Extra keyword arguments (``z_err``, ``template``, ``changes`` ...) are kept.

    Raises
    ------
    ValueError
        On an unknown action or grade.
    """
    if action not in ACTIONS:
        raise ValueError(f"unknown action {action!r}; expected one of {', '.join(ACTIONS)}")
    if grade not in GRADES:
        raise ValueError(f"unknown grade {grade!r}; expected one of {', '.join(GRADES)}")
    rec: dict[str, Any] = dict(
        time=time or utc_now(),
        user=user or login_name(),
        key=str(key),
        file=str(file),
        action=action,
        z=z,
        grade=grade,
        previous_z=previous_z,
        previous_grade=previous_grade,
        comment=" ".join(str(comment).split()),  # one line, whatever was typed
    )
    rec.update(more)
    return _ordered(to_jsonable(rec))


def _ordered(rec: dict[str, Any]) -> dict[str, Any]:
    head = [k for k in _ORDER if k in rec]
    tail = sorted(k for k in rec if k not in _ORDER)
    return {k: rec[k] for k in head + tail}


def append_decision(folder: str | os.PathLike, record: dict[str, Any]) -> str:
    """Append one decision to ``folder/decisions.log`` (created if absent); returns the path.

    The line is written with a single ``os.write`` on a descriptor opened with ``O_APPEND``
    and synced, so concurrent sessions never interleave within a line; if the file ends in a
    torn line (a crash mid-write), the new line starts on a line of its own.
    """
    path = Path(folder) / LOG_NAME
    path.parent.mkdir(parents=True, exist_ok=True)
    line = (json.dumps(_ordered(to_jsonable(record)), ensure_ascii=False) + "\n").encode("utf-8")
    fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        size = os.fstat(fd).st_size
        if size and os.pread(fd, 1, size - 1) != b"\n":  # a torn last line stays on its own line
            line = b"\n" + line
        os.write(fd, line)
        os.fsync(fd)
    finally:
        os.close(fd)
    log.info("decision for %s recorded in %s: %s", record.get("key"), path, record.get("action"))
    return str(path)


def read_decisions(path: str | os.PathLike) -> list[dict[str, Any]]:
    """All decisions of a log, oldest first; an absent log gives ``[]``.

    Lines that are not complete JSON objects (a torn write) are skipped with a warning.
    """
    path = Path(path)
    if path.is_dir():
        path = path / LOG_NAME
    if not path.exists():
        return []
    out = []
    with open(path, encoding="utf-8") as fh:
        for n, line in enumerate(fh, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError:
                log.warning("%s line %d is not a complete decision; skipped", path, n)
                continue
            if isinstance(rec, dict) and "key" in rec:
                out.append(rec)
            else:
                log.warning("%s line %d has no object key; skipped", path, n)
    return out


def in_force(decisions: Iterable[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The decision in force per object key: the last one, unless it was an ``undo``.

    >>> recs = [dict(key="a", action="type-z", z=1.0), dict(key="a", action="undo"),
    ...         dict(key="b", action="grade", z=0.5), dict(key="b", action="type-z", z=0.6)]
    >>> {k: v["z"] for k, v in in_force(recs).items()}
    {'b': 0.6}
    """
    out: dict[str, dict[str, Any]] = {}
    for rec in decisions:
        if rec.get("action") == "undo":
            out.pop(rec["key"], None)
        else:
            out[rec["key"]] = rec
    return out
