"""Atomic file writes: a reader sees the old file or the new one, never half of one.

The data go to a temporary file in the destination's own folder (so the final rename stays on
one file system), are flushed and synced, then :func:`os.replace` puts the file in place in one
step. A run killed at any moment leaves either the previous complete file or the new complete
file, plus at most a stray temporary file whose name starts with ``.`` and ends with ``.part``
(see :func:`remove_stale_parts`).

Examples
--------
>>> import tempfile, os
>>> d = tempfile.mkdtemp()
>>> p = write_atomic(os.path.join(d, "a.txt"), "first")
>>> _ = write_atomic(p, b"second")
>>> open(p).read(), sorted(os.listdir(d))
('second', ['a.txt'])
"""

from __future__ import annotations

import contextlib
import logging
import os
import tempfile
import time
from pathlib import Path
from typing import Any, Iterator

__all__ = ["open_atomic", "write_atomic", "remove_stale_parts", "PART_SUFFIX"]

log = logging.getLogger(__name__)

#: Ending of the temporary files :func:`write_atomic` creates (and removes on failure).
PART_SUFFIX = ".part"


@contextlib.contextmanager
def open_atomic(path: str | os.PathLike, mode: str = "w", *, fsync: bool = True) -> Iterator[Any]:
    """A file to write in pieces that replaces ``path`` in one step when the block ends.

    ``mode`` is ``"w"`` (UTF-8 text, newlines as written) or ``"wb"``. Data go to a hidden
    temporary file beside ``path`` (named so :func:`remove_stale_parts` clears what a killed
    writer leaves), which is synced and renamed over ``path`` only if the block finishes; on any
    error it is removed and ``path`` is untouched. The parent folder must exist.

    >>> d = tempfile.mkdtemp()
    >>> with open_atomic(os.path.join(d, "t.txt")) as fh:
    ...     _ = fh.write("a"); _ = fh.write("b")
    >>> open(os.path.join(d, "t.txt")).read(), os.listdir(d)
    ('ab', ['t.txt'])
    """
    if mode not in ("w", "wb"):
        raise ValueError(f"mode must be 'w' or 'wb', not {mode!r}")
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name[:80]}.", suffix=PART_SUFFIX, dir=path.parent)
    try:
        text = dict(encoding="utf-8", newline="") if mode == "w" else {}
        with os.fdopen(fd, mode, **text) as fh:
            yield fh
            fh.flush()
            if fsync:
                os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)  # from here on ``tmp`` names nothing
    finally:
        if os.path.lexists(tmp):  # the block or the writes failed: the destination is untouched
            os.unlink(tmp)


def write_atomic(path: str | os.PathLike, data: str | bytes, *, fsync: bool = True) -> str:
    """Write ``data`` (text as UTF-8, or bytes) to ``path`` atomically; returns the path.

    The parent folder must exist. On any error the temporary file is removed and the error
    propagates; the destination is then untouched.
    """
    payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with open_atomic(path, "wb", fsync=fsync) as fh:
        fh.write(payload)
    return str(Path(path))


def remove_stale_parts(folder: str | os.PathLike, older_than_s: float = 600.0) -> int:
    """Delete temporary files left in ``folder`` by killed writers; returns how many.

    Only files named like :func:`write_atomic`'s temporaries and not modified for
    ``older_than_s`` seconds are removed, so a writer that is still busy is left alone.
    """
    folder = Path(folder)
    if not folder.is_dir():
        return 0
    now = time.time()
    n = 0
    with os.scandir(folder) as it:
        for entry in it:
            name = entry.name
            if not (name.startswith(".") and name.endswith(PART_SUFFIX)) or not entry.is_file():
                continue
            try:
                if now - entry.stat().st_mtime >= older_than_s:
                    os.unlink(entry.path)
                    n += 1
            except OSError:  # gone meanwhile
                continue
    if n:
        log.info("removed %d stale temporary file(s) from %s", n, folder)
    return n
