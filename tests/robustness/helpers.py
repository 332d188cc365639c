"""Shared bits of the robustness tests: running the ``zsieve`` command in a bounded subprocess."""

from __future__ import annotations

import os
import resource
import shutil
import subprocess
import sys
from pathlib import Path

#: Address-space limit of every subprocess these tests start (a memory blow-up fails fast).
MEMORY_LIMIT_BYTES = 4 * 1024**3


def zsieve_command() -> list[str]:
    """The installed console script (next to this interpreter), else ``python -c`` on the CLI."""
    exe = Path(sys.executable).with_name("zsieve")
    if exe.exists():
        return [str(exe)]
    found = shutil.which("zsieve")
    if found:
        return [found]
    return [sys.executable, "-c", "import sys; from zsieve.cli import main; sys.exit(main())"]


def limit_memory(limit: int = MEMORY_LIMIT_BYTES):
    """``preexec_fn`` for subprocess: cap the address space (inherited by worker processes)."""

    def _apply():
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))

    return _apply


_OFFLINE_CFG: list[str] = []


def offline_config_home() -> str:
    """An XDG config folder whose astropy.cfg forbids downloads (for child processes, which
    tests/conftest.py does not reach): ``allow_internet = False``, ``auto_download = False``."""
    if not _OFFLINE_CFG:
        import atexit
        import tempfile

        d = tempfile.mkdtemp(prefix="zsieve-offline-cfg-")
        os.mkdir(os.path.join(d, "astropy"))
        with open(os.path.join(d, "astropy", "astropy.cfg"), "w") as fh:
            fh.write("[utils.data]\nallow_internet = False\n[utils.iers.iers]\nauto_download = False\n")
        atexit.register(shutil.rmtree, d, True)
        _OFFLINE_CFG.append(d)
    return _OFFLINE_CFG[0]


def subprocess_env(**extra) -> dict:
    """The environment of child processes: offline astropy, Agg backend, unbuffered output."""
    env = dict(os.environ)
    env["XDG_CONFIG_HOME"] = offline_config_home()
    env.setdefault("MPLBACKEND", "Agg")
    env["PYTHONUNBUFFERED"] = "1"
    env.update(extra)
    return env


def run_zsieve(args, *, timeout: float, cwd=None, preexec_fn=None, env=None, **kw):
    """Run ``zsieve ARGS`` to completion under the memory cap; returns CompletedProcess."""
    return subprocess.run(
        zsieve_command() + [str(a) for a in args],
        capture_output=True,
        text=True,
        timeout=timeout,
        cwd=cwd,
        preexec_fn=preexec_fn or limit_memory(),
        env=env or subprocess_env(),
        **kw,
    )


def snapshot(root: Path, exclude: Path | None = None) -> dict[str, tuple[int, float]]:
    """Every file under ``root`` (not following symlinks, skipping ``exclude``) -> (size, mtime)."""
    root = Path(root)
    out = {}
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        if exclude is not None and Path(dirpath).resolve() == Path(exclude).resolve():
            dirnames[:] = []
            continue
        for name in filenames + [d for d in dirnames if os.path.islink(os.path.join(dirpath, d))]:
            p = os.path.join(dirpath, name)
            st = os.lstat(p)
            out[os.path.relpath(p, root)] = (st.st_size, st.st_mtime)
    return out
