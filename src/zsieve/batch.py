"""Many spectra: discovery, parallel workers, resume, and the output folder.

:func:`run_batch` measures every spectrum found under some paths and writes the output folder
described in :mod:`zsieve.report.record`:

* **Discovery** (:func:`discover`) streams files from plain paths, folders (recursively, in
  sorted order, hidden entries and the output folder itself left out) and glob patterns. Files
  named explicitly are always tried; files found in folders or by patterns that do not look
  like spectra (:func:`zsieve.io.is_spectrum_candidate`) get a ``skipped`` row saying so.
* **Keys** come from each file's path relative to the common root of the arguments
  (:func:`zsieve.report.record.make_key`), so resuming needs the same arguments. A file with
  several spectra gives one row per spectrum (keys ``<key>``, ``<key>@1``, ``<key>@2`` ...).
* **Workers**: ``jobs=1`` runs in this process; more uses a
  :class:`~concurrent.futures.ProcessPoolExecutor` fed a bounded number of files at a time, so
  memory stays flat however large the folder; ``scheduler`` hands the same tasks to a Dask
  cluster instead (:mod:`zsieve.cluster`, optional). Each worker reads, measures, adds frames and
  cosmology, draws the figure and writes the JSON record itself (atomically); it sends back
  only the small summary rows.
* **Resume**: a record is reused when the SHA-256 of its input file and the hash of the
  settings (engine configuration, medium option, cosmology, line lists, tool version) are
  unchanged; ``force=True`` refits. A missing figure is drawn from the stored record without
  refitting. Every input is checksummed on every run; the records themselves are not read
  again: their facts (checksum, settings hash, spectrum count, status, hand decision) are
  looked up per file in the folder's catalogue.
* **Flat memory**: the client keeps no per-object state in memory. Rows and resume facts live
  in :class:`zsieve.report.summary.Catalogue`, a SQLite cache in ``DIR`` (the file
  ``zsieve-cache.sqlite``, safe to delete) that is brought in line with ``DIR/objects/*.json`` at the
  start of each run (one ``stat`` per record; changed or new records are read) and rebuilt from
  the records if missing or damaged: the JSON records stay the only truth. Inputs seen (for
  de-duplication) are kept there too. The summary tables and the index are streamed from it
  in (file, index) order, atomically, every ``checkpoint_s`` seconds (the interval grows so
  that writing them costs at most about 5% of the run), at the end and on interruption; a
  rerun that changed nothing leaves them as they are.
* **Hand decisions** in ``DIR/decisions.log`` (:mod:`zsieve.refit.decisions`) are never
  overwritten: a refitted record carries the decision in force in its ``hand`` field and the
  summary shows the hand z/grade. With ``keep_hand=False`` objects carrying a decision are
  measured again and show the engine's answer; the log itself is left as it is.
* **Failures** are isolated: an unreadable file or a fit that raises becomes a ``failed`` record
  with a one-line message (the traceback goes to the debug log).

Executors (the local pool here, :mod:`zsieve.cluster` for Dask) run tasks with
:func:`init_worker` and :func:`run_task`, hand finished ones back with :func:`collect_result`,
and record a file they gave up on with :func:`failure_row`.
"""

from __future__ import annotations

import concurrent.futures as cf
import dataclasses
import datetime as _dt
import glob
import hashlib
import json
import logging
import os
import sqlite3
import stat
import sys
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator

from .errors import SpectrumFileError, ZsieveError
from .result import FitResult, to_jsonable

__all__ = [
    "BatchError",
    "BatchSettings",
    "BatchSummary",
    "InputFile",
    "discover",
    "common_root",
    "run_batch",
    "settings_hash",
    "init_worker",
    "run_task",
    "collect_result",
    "failure_row",
]

log = logging.getLogger(__name__)

_LOCK_NAME = ".zsieve-fit.lock"


class BatchError(ZsieveError):
    """The batch cannot start: unusable arguments or an output folder that cannot be written."""


# ----------------------------------------------------------------------------- discovery
@dataclass(frozen=True)
class InputFile:
    """One file found by :func:`discover`."""

    path: str  # as found (relative to the working directory if the argument was)
    relpath: str  # relative to the common root: the basis of the output key
    explicit: bool  # named on the command line (always tried) rather than found in a folder


def _root_of(arg: str) -> str:
    """The folder an argument's files are reckoned from (a glob's fixed leading part)."""
    if glob.has_magic(arg):
        fixed = []
        for part in Path(arg).parts:
            if glob.has_magic(part):
                break
            fixed.append(part)
        return os.path.abspath(os.path.join(*fixed)) if fixed else os.path.abspath(".")
    a = os.path.abspath(arg)
    return a if os.path.isdir(a) else os.path.dirname(a)


def common_root(args: Iterable[str]) -> str:
    """The deepest folder containing every argument's files (absolute).

    >>> common_root(["/data/n1/a.fits", "/data/n2", "/data/n3/*.fits"])
    '/data'
    """
    roots = [_root_of(a) for a in args]
    if not roots:
        raise BatchError("no input paths given")
    return os.path.commonpath(roots)


def _hidden(name: str) -> bool:
    return name.startswith(".")


def discover(args: Iterable[str], *, exclude: Iterable[str] = (), root: str | None = None,
             seen=None) -> Iterator[InputFile]:
    """Stream the files named by ``args`` (files, folders, glob patterns), each once.

    Folders are walked recursively in sorted order without following symbolic links to folders;
    hidden files and folders and everything under ``exclude`` (the output folder) are left out.
    ``seen`` remembers the real paths already given (anything with ``in`` and ``add``; default a
    set): the batch passes one kept on disk, so discovery holds no per-file state in memory
    beyond one folder's sorted listing.

    Raises
    ------
    BatchError
        If a plain path does not exist.
    """
    args = [os.fspath(a) for a in args]
    root = root or common_root(args)
    excl = [os.path.realpath(e) for e in exclude]
    seen = set() if seen is None else seen

    def inside_excluded(real: str) -> bool:
        return any(real == e or real.startswith(e + os.sep) for e in excl)

    def emit(path: str, explicit: bool, real: str | None = None):
        real = real or os.path.realpath(path)
        if real in seen or inside_excluded(real):
            return None
        seen.add(real)
        rel = os.path.relpath(os.path.abspath(path), root)
        return InputFile(path=path, relpath=rel, explicit=explicit)

    for arg in args:
        if glob.has_magic(arg):
            matches = sorted(glob.glob(arg, recursive=True))
            if not matches:
                log.warning("pattern %s matches no files", arg)
            for m in matches:
                if os.path.isdir(m):
                    yield from _walk(m, emit, inside_excluded)
                elif os.path.isfile(m) and not _hidden(os.path.basename(m)):
                    item = emit(m, False)
                    if item:
                        yield item
        elif os.path.isdir(arg):
            yield from _walk(arg, emit, inside_excluded)
        elif os.path.isfile(arg):
            item = emit(arg, True)
            if item:
                yield item
        elif os.path.exists(arg):
            raise BatchError(f"{arg}: neither a file nor a folder")
        else:
            raise BatchError(f"{arg}: no such file or folder")


def _walk(top: str, emit, inside_excluded) -> Iterator[InputFile]:
    for dirpath, dirnames, filenames in os.walk(top, followlinks=False):
        real_dir = os.path.realpath(dirpath)
        if inside_excluded(real_dir):
            dirnames[:] = []
            continue
        dirnames[:] = sorted(d for d in dirnames if not _hidden(d))
        for name in sorted(filenames):
            if _hidden(name):
                continue
            p = os.path.join(dirpath, name)
            try:
                st = os.lstat(p)
            except OSError:
                continue
            if stat.S_ISLNK(st.st_mode):  # a link to a file: followed (and de-duplicated by target)
                if os.path.isfile(p):
                    item = emit(p, False)
                    if item:
                        yield item
            elif stat.S_ISREG(st.st_mode):  # no link: the real path is the folder's plus the name
                item = emit(p, False, os.path.join(real_dir, name))
                if item:
                    yield item


# ----------------------------------------------------------------------------- settings
@dataclass
class BatchSettings:
    """What a run is asked to do (everything except the input paths and the output folder)."""

    config: Any = None  # zsieve.engine.measure.MeasureConfig (None: the engine's defaults)
    medium: str | None = None  # override of the files' wavelength medium
    cosmology: Any = None  # anything zsieve.cosmology.get_cosmology accepts
    jobs: int = 1
    figures: bool = True
    figure_format: str = "png"
    dpi: int = 100
    force: bool = False
    keep_hand: bool = True
    checkpoint_s: float = 30.0
    progress: bool | None = None  # None: a bar only on a terminal
    in_flight_per_job: int = 4
    scheduler: Any = None  # a Dask scheduler (address, local:N or Client): see zsieve.cluster

    def config_dict(self) -> dict[str, Any]:
        cfg = self.config
        if cfg is None:
            from .engine.config import MeasureConfig

            cfg = MeasureConfig()
        return to_jsonable(dataclasses.asdict(cfg))


def _linelist_info(config: dict[str, Any]) -> dict[str, Any]:
    """Name, version and checksum of the line lists (and sky list) the engine will use."""
    from .lines import catalog
    from .report.record import file_sha256

    name = config.get("linelist")
    if name is None or name == "default":
        paths = [catalog.bundled_path(n) for n in catalog.BUNDLED_LISTS]
    elif name in catalog.BUNDLED_LISTS:
        paths = [catalog.bundled_path(name)]
    else:
        paths = [Path(name)]
    paths.append(catalog.bundled_path("sky"))
    digest = hashlib.sha256()
    for p in paths:
        digest.update(file_sha256(p).encode())
    version = None
    try:
        version = catalog.load_linelist(name).meta.get("version")
    except Exception as exc:  # the engine will report the same problem per object
        log.debug("line list %s not loadable: %s", name, exc)
    return {"name": str(name or "default"), "files": [os.path.basename(str(p)) for p in paths],
            "version": version, "sha256": digest.hexdigest()}


def _cosmology_record(spec) -> dict[str, Any]:
    from .cosmology import cosmology_record, get_cosmology

    return cosmology_record(get_cosmology(spec))


def settings_hash(settings: dict[str, Any]) -> str:
    """Hash of the settings that change a fit's answer (canonical JSON, SHA-256, 16 hex digits).

    >>> settings_hash({"a": 1, "b": [1, 2]}) == settings_hash({"b": [1, 2], "a": 1})
    True
    """
    text = json.dumps(to_jsonable(settings), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


@dataclass
class _Context:
    """What every worker needs, built once per process (picklable)."""

    out_dir: str
    config: Any
    config_dict: dict[str, Any]
    medium: str | None
    cosmology: Any
    cosmology_record: dict[str, Any]
    linelist: dict[str, Any]
    settings: dict[str, Any]
    settings_hash: str
    figures: bool
    figure_format: str
    dpi: int
    tool_version: str


# ----------------------------------------------------------------------------- one file
def _utc() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else ""


def _provenance(ctx: _Context, item: InputFile, sha: str | None, key: str, index: int, n: int) -> dict[str, Any]:
    return {
        "key": key,
        "index": index,
        "n_spectra": n,
        "input": item.path,
        "path": os.path.abspath(item.path),
        "relpath": item.relpath,
        "input_sha256": sha,
        "settings_hash": ctx.settings_hash,
        "config": ctx.config_dict,
        "medium_option": ctx.medium,
        "cosmology_spec": ctx.cosmology_record,
        "linelist": ctx.linelist,
        "tool": "zsieve",
        "tool_version": ctx.tool_version,
        "python": sys.version.split()[0],
        "time": _utc(),
        "figure_format": ctx.figure_format,
    }


def _finish(ctx: _Context, result: FitResult, spectrum, key: str, hand: dict | None) -> dict[str, Any]:
    """Frames, cosmology, hand decision, figure and record of one result; returns its row."""
    from .report import complete_result, hand_cosmology
    from .report.record import write_record
    from .report.summary import row_with_facts

    if result.status == "ok":
        result = complete_result(result, spectrum, ctx.cosmology)
    if hand:
        result = result.replace(hand=hand_cosmology(hand, ctx.cosmology))
    if ctx.figures and result.status == "ok" and spectrum is not None:
        try:
            _draw(ctx, key, result, spectrum)
        except Exception as exc:  # a figure problem must not lose the measurement
            log.warning("%s: figure not drawn (%s: %s)", result.file, type(exc).__name__, _one_line(exc))
            log.debug("figure traceback for %s", key, exc_info=True)
    rec = result.to_dict()
    return row_with_facts(rec, write_record(ctx.out_dir, key, rec))


def _draw(ctx: _Context, key: str, result: FitResult, spectrum) -> None:
    """The object's figure: PNG (the index page's thumbnail), plus PDF when asked for."""
    from .report.figure import write_figure
    from .report.record import object_path

    png = object_path(ctx.out_dir, key, ".png")
    also = [object_path(ctx.out_dir, key, ".pdf")] if ctx.figure_format == "pdf" else []
    write_figure(png, result, spectrum, dpi=ctx.dpi, also=also)


def failure_row(ctx, item, sha, key, message, *, index=0, n=1, status="failed", transient=False) -> dict[str, Any]:
    """Write the ``failed`` (or ``skipped``) record of one input and return its summary row.

    ``transient=True`` marks a failure that is not the file's fault (a worker process died while
    measuring it): the next run measures the file again instead of reusing the record.
    """
    res = FitResult.failure(item.path, message, status=status)
    prov = _provenance(ctx, item, sha, key, index, n)
    if transient:
        prov["transient"] = True
    return _finish(ctx, res.replace(provenance=prov), None, key, None)


def _fit_file(ctx: _Context, item: InputFile, sha: str, hands: dict[str, dict]) -> list[dict[str, Any]]:
    """Read, measure and report every spectrum of one file; returns the summary rows."""
    from .engine.measure import measure
    from .io import read_spectra
    from .report.record import make_key

    base = make_key(item.relpath)
    try:
        spectra = read_spectra(item.path, medium=ctx.medium)
    except SpectrumFileError as exc:
        return [failure_row(ctx, item, sha, base, exc.problem)]
    except Exception as exc:  # an unexpected reader problem: isolated to this file
        log.debug("reading %s failed", item.path, exc_info=True)
        return [failure_row(ctx, item, sha, base, f"{type(exc).__name__}: {_one_line(exc)}")]
    if not spectra:
        return [failure_row(ctx, item, sha, base, "the file holds no spectrum")]
    n = len(spectra)
    rows = []
    for i, spec in enumerate(spectra):
        key = make_key(item.relpath, i)
        prov = _provenance(ctx, item, sha, key, i, n)
        try:
            res = measure(spec, ctx.config)
        except SpectrumFileError as exc:
            rows.append(failure_row(ctx, item, sha, key, exc.problem, index=i, n=n))
            continue
        except Exception as exc:
            log.debug("fit of %s failed:\n%s", key, traceback.format_exc())
            rows.append(failure_row(ctx, item, sha, key, f"fit failed: {type(exc).__name__}: {_one_line(exc)}",
                                 index=i, n=n))
            continue
        res = res.replace(file=item.path, object_name=res.object_name or spec.meta.object_name, provenance=prov)
        rows.append(_finish(ctx, res, spec, key, hands.get(key)))
    _remove_extra_indices(ctx.out_dir, item.relpath, n)
    return rows


def _remove_extra_indices(out_dir: str, relpath: str, n: int) -> None:
    """Delete records and figures of spectrum indices a file no longer has."""
    from .report.record import make_key, object_path

    i = n
    while True:
        key = make_key(relpath, i)
        paths = [object_path(out_dir, key, s) for s in (".json", ".png", ".pdf")]
        if not any(p.exists() for p in paths):
            break
        for p in paths:
            if p.exists():
                p.unlink()
        i += 1


def _figure_only(ctx: _Context, item: InputFile, keys: list[str]) -> list[dict[str, Any]]:
    """Draw missing figures of reused records (the spectrum is read again, not refitted)."""
    from .io import read_spectra
    from .report.record import object_path, read_record
    from .report.summary import row_with_facts

    rows = []
    spectra = None
    for key in keys:
        path = object_path(ctx.out_dir, key, ".json")
        rec = read_record(path)
        if rec is None:
            continue
        res = FitResult.from_dict(rec)
        if res.status == "ok":
            try:
                if spectra is None:
                    spectra = read_spectra(item.path, medium=ctx.medium)
                idx = int((res.provenance or {}).get("index") or 0)
                _draw(ctx, key, res, spectra[idx])
            except Exception as exc:
                log.warning("%s: figure not drawn (%s: %s)", item.path, type(exc).__name__, _one_line(exc))
        rows.append(row_with_facts(rec, path))
    return rows


# -------------------------------------------------------------------- worker processes
_CTX: _Context | None = None


def init_worker(ctx: _Context, level: int, pool_worker: bool = True) -> None:
    """Prepare this process (or thread) to run :func:`run_task`: the run's context and log level.

    ``pool_worker=True`` (a local pool's worker process) also ignores SIGINT, so that Ctrl-C,
    which reaches the whole process group, is handled by the parent alone. Tasks that run in a
    thread (Dask workers, ``--jobs 1``) pass ``False``: signal handlers belong to the main thread.
    """
    global _CTX
    _CTX = ctx
    logging.getLogger("zsieve").setLevel(level)
    os.environ.setdefault("MPLBACKEND", "Agg")
    if pool_worker:  # Ctrl-C reaches the whole process group: the parent alone winds the run down
        import signal

        signal.signal(signal.SIGINT, signal.SIG_IGN)


def run_task(task: tuple) -> list[dict[str, Any]]:
    """Do one task of a run in a prepared worker (see :func:`init_worker`); returns its summary rows.

    ``task`` is ``("fit", InputFile, sha256, hand decisions of its keys)``: read, measure, frames,
    cosmology, figure and record of every spectrum in the file; or ``("figure", InputFile,
    sha256, keys)``: draw the missing figures of reused records. Each row carries the record's
    resume facts under :data:`zsieve.report.summary.FACTS_KEY` for the client's catalogue.
    """
    kind, item, sha, extra = task
    ctx = _CTX
    assert ctx is not None, "worker not initialised"
    if kind == "fit":
        return _fit_file(ctx, item, sha, extra)
    return _figure_only(ctx, item, extra)


# ----------------------------------------------------------------------------- the run
@dataclass
class BatchSummary:
    """What a run did, for the closing line."""

    out_dir: str
    counts: dict[str, int] = field(default_factory=dict)
    n_files: int = 0
    n_fitted_now: int = 0
    n_reused: int = 0
    elapsed_s: float = 0.0
    interrupted: bool = False
    rows: int = 0

    def line(self) -> str:
        c = self.counts
        text = (f"{c.get('fitted', 0)} fitted ({c.get('secure', 0)} secure, {c.get('likely', 0)} likely, "
                f"{c.get('tentative', 0)} tentative, {c.get('none', 0)} none), {c.get('failed', 0)} failed, "
                f"{c.get('skipped', 0)} skipped; {self.n_fitted_now} measured now, {self.n_reused} reused "
                f"in {self.elapsed_s:.1f} s; outputs in {self.out_dir}")
        return ("interrupted: " + text) if self.interrupted else text


class _Lock:
    """An exclusive lock on the output folder for the length of a run (flock, released on exit)."""

    def __init__(self, out_dir: Path):
        self.path = out_dir / _LOCK_NAME
        self.fd = None

    def __enter__(self):
        import fcntl

        self.fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(self.fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(self.fd)
            raise BatchError(f"{self.path.parent}: another zsieve fit is writing this folder") from None
        return self

    def __exit__(self, *exc):
        os.close(self.fd)
        return False


def _prepare_out_dir(out_dir: Path) -> None:
    from .report.record import OBJECTS

    try:
        (out_dir / OBJECTS).mkdir(parents=True, exist_ok=True)
        # create the lock file in place (never replace it: another run may hold a lock on it)
        os.close(os.open(out_dir / _LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644))
    except OSError as exc:
        raise _unwritable(out_dir, exc) from None


def _same_decision(a: dict | None, b: dict | None) -> bool:
    if not a and not b:
        return True
    if not a or not b:
        return False
    return all(a.get(k) == b.get(k) for k in ("time", "action", "z", "grade", "user"))


def _is_candidate(path: str) -> tuple[bool, str]:
    from .io import is_spectrum_candidate

    try:
        ok = bool(is_spectrum_candidate(path))
    except OSError as exc:
        return False, f"not readable ({exc.strerror or exc})"
    return ok, "" if ok else "not a spectrum file (format not recognised from its name or first bytes)"


def run_batch(paths: Iterable[str], out_dir: str | os.PathLike, settings: BatchSettings | None = None,
              *, on_row: Callable[[dict], None] | None = None) -> BatchSummary:
    """Measure every spectrum under ``paths`` into ``out_dir``; see the module description.

    Raises
    ------
    BatchError
        For unusable arguments (a path that does not exist, nothing found) or an output folder
        that cannot be written. Problems with single files never raise.
    """
    from . import __version__
    from .report.atomic import write_atomic

    settings = settings or BatchSettings()
    t0 = time.perf_counter()
    paths = [os.fspath(p) for p in paths]
    if not paths:
        raise BatchError("no input paths given")
    out_dir = Path(out_dir).absolute()
    if out_dir.exists() and not out_dir.is_dir():
        raise BatchError(f"{out_dir}: exists and is not a folder")
    root = common_root(paths)
    for p in paths:  # fail on a missing plain path before anything is written
        if not glob.has_magic(p) and not os.path.exists(p):
            raise BatchError(f"{p}: no such file or folder")

    config_dict = settings.config_dict()
    if settings.config is None:
        from .engine.config import MeasureConfig

        settings = dataclasses.replace(settings, config=MeasureConfig())
    try:
        cosmo_rec = _cosmology_record(settings.cosmology)
    except Exception as exc:
        raise BatchError(f"cosmology: {_one_line(exc)}") from None
    try:
        linelist = _linelist_info(config_dict)
    except Exception as exc:
        raise BatchError(f"line list: {_one_line(exc)}") from None
    answer_settings = {
        "config": config_dict,
        "medium": settings.medium,
        "cosmology": cosmo_rec,
        "linelist": linelist["sha256"],
        "tool_version": __version__,
    }
    shash = settings_hash(answer_settings)
    ctx = _Context(
        out_dir=str(out_dir), config=settings.config, config_dict=config_dict, medium=settings.medium,
        cosmology=settings.cosmology, cosmology_record=cosmo_rec, linelist=linelist, settings=answer_settings,
        settings_hash=shash, figures=settings.figures, figure_format=settings.figure_format, dpi=settings.dpi,
        tool_version=__version__,
    )
    meta = {
        "tool": "zsieve",
        "tool_version": __version__,
        "settings": answer_settings,
        "settings_hash": shash,
        "linelist": linelist,
        "inputs": paths,
        "root": root,
        "cosmology": cosmo_rec,
    }

    _prepare_out_dir(out_dir)
    with _Lock(out_dir):
        # no other run writes here while we hold the lock: whatever temporary a killed writer
        # left is stale, however young (a run killed a second ago leaves one)
        from .report.atomic import remove_stale_parts
        from .report.record import OBJECTS
        from .report.summary import Catalogue

        for folder in (out_dir, out_dir / OBJECTS):
            remove_stale_parts(folder, older_than_s=0.0)
        try:
            write_atomic(out_dir / "run.json", json.dumps(to_jsonable({**meta, "started": _utc()}), indent=1))
            cat = Catalogue(out_dir)
        except OSError as exc:
            raise _unwritable(out_dir, exc) from None
        except sqlite3.Error as exc:
            raise _unwritable(out_dir, exc) from None
        try:
            return _run_locked(ctx, settings, paths, root, out_dir, meta, cat, on_row, t0)
        except sqlite3.Error as exc:  # the catalogue's disk refused (full, read-only, I/O error)
            raise _unwritable(out_dir, exc) from None
        finally:
            try:
                cat.close()
            except sqlite3.Error as exc:
                log.warning("catalogue not closed cleanly (%s); the next run rebuilds what it lacks", exc)


def _run_locked(ctx: _Context, settings: BatchSettings, paths: list[str], root: str, out_dir: Path, meta: dict,
                cat, on_row, t0: float) -> BatchSummary:
    """The run proper, with the folder locked and its catalogue open."""
    from .report.index import write_index
    from .report.record import file_sha256, make_key
    from .report.summary import FACTS_KEY, write_summary

    cat.sync()  # the records are the truth: take in what changed since the catalogue saw them
    run_no = cat.begin_run()
    hands: dict[str, dict] = {}
    if settings.keep_hand:
        from .refit.decisions import in_force, read_decisions

        hands = in_force(read_decisions(out_dir))

    summary = BatchSummary(out_dir=str(out_dir))
    last_checkpoint = [time.monotonic()]
    interval = [settings.checkpoint_s]
    title = f"zsieve results: {out_dir.name}"

    def checkpoint(final: bool = False):
        t = time.monotonic()
        cat.commit()
        if final and cat.tables_current(meta, title):
            log.info("summary and index are current; not rewritten")
            return
        write_summary(out_dir, cat.rows(), meta, presorted=True)
        write_index(out_dir, cat, title=title)
        cat.note_tables_written(meta, title)
        last_checkpoint[0] = time.monotonic()
        # big folders: keep the checkpoints' share of the run time small (about 5% at most)
        interval[0] = max(settings.checkpoint_s, 20.0 * (last_checkpoint[0] - t))
        if not final:
            log.info("checkpoint: %d rows in %s", len(cat), out_dir)

    def take(new_rows: list[dict], fitted: bool = False):
        summary.n_fitted_now += bool(fitted)
        for r in new_rows:
            facts = r.pop(FACTS_KEY, None)
            cat.put(r, facts, src_path=os.path.abspath(r["file"]))
            if on_row:
                on_row(r)
        cat.commit(every_s=2.0)
        if time.monotonic() - last_checkpoint[0] > interval[0]:
            checkpoint()

    def tasks() -> Iterator[tuple]:
        """Decide per file: reuse, skip, draw figures only, or fit (streamed)."""
        for item in discover(paths, exclude=[str(out_dir)], root=root, seen=_InputSet(cat)):
            summary.n_files += 1
            base = make_key(item.relpath)
            f = cat.facts(base)
            sha = None
            if f is not None and f["sha"] and f["status"] != "skipped":
                # measured before: if the bytes are the same it was a candidate then and is now
                try:
                    sha = file_sha256(item.path)
                except OSError:
                    sha = None
            if not item.explicit and not (sha and sha == f["sha"]):
                ok, why = _is_candidate(item.path)
                if not ok:
                    if f and f["status"] == "skipped" and not settings.force and f["message"] == why:
                        cat.mark_seen([base])
                    else:
                        take([failure_row(ctx, item, None, base, why, status="skipped")])
                    yield None
                    continue
            try:
                sha = sha or file_sha256(item.path)
            except OSError as exc:
                take([failure_row(ctx, item, None, base, f"not readable ({exc.strerror or exc})")])
                yield None
                continue
            if f and not settings.force and not f["transient"] and f["sha"] == sha and f["settings"] == ctx.settings_hash:
                keys = [base] + [make_key(item.relpath, i) for i in range(1, f["n"])]
                fk = {base: f}
                for k in keys[1:]:
                    fk[k] = cat.facts(k)
                dropping = not settings.keep_hand and any(v and v["hand"] for v in fk.values())
                if all(fk.values()) and not dropping:
                    if settings.keep_hand and any(not _same_decision(fk[k]["hand"], hands.get(k)) for k in keys):
                        take(_update_hands(ctx, keys, hands))
                    need_fig = [k for k in keys if settings.figures and fk[k]["status"] == "ok"
                                and not (fk[k]["png"] and (fk[k]["pdf"] or settings.figure_format != "pdf"))
                                and not _figures_exist(out_dir, k, settings.figure_format)]
                    cat.mark_seen(keys)
                    summary.n_reused += len(keys)
                    if need_fig:
                        yield ("figure", item, sha, need_fig)
                    else:
                        yield None
                    continue
            yield ("fit", item, sha, {k: v for k, v in hands.items() if k.split("@")[0] == base})

    bar = _progress_bar(settings.progress, lambda: sum(1 for _ in discover(paths, exclude=[str(out_dir)], root=root,
                                                                           seen=_NoSet())))
    try:  # an OSError that reaches here is the output folder failing (full disk, quota, ...)
        try:
            if settings.scheduler is not None:
                from .cluster import run_tasks

                run_tasks(ctx, settings, tasks(), take, bar)
            elif settings.jobs <= 1:
                init_worker(ctx, logging.getLogger("zsieve").getEffectiveLevel(), pool_worker=False)
                for task in tasks():
                    if task is not None:
                        take(run_task(task), fitted=task[0] == "fit")
                    bar.update(1)
            else:
                _run_pool(ctx, settings, tasks(), take, bar)
        except KeyboardInterrupt:
            summary.interrupted = True
            log.warning("interrupted: writing the summary of the records made so far")
        finally:
            bar.close()
            _drop_superseded(out_dir, cat)
            checkpoint(final=True)
    except OSError as exc:
        raise _unwritable(out_dir, exc) from None
    summary.counts = cat.tally()
    summary.rows = len(cat)
    summary.elapsed_s = time.perf_counter() - t0
    log.debug("run %d of %s done", run_no, out_dir)
    if summary.n_files == 0 and not summary.interrupted:
        raise BatchError("no input files found in " + ", ".join(paths))
    return summary


class _InputSet:
    """The inputs a run has seen, kept in its catalogue (``in`` and ``add``, like a set)."""

    def __init__(self, cat):
        self.cat = cat
        self._last = None

    def __contains__(self, real: str) -> bool:
        # add-and-test in one statement; ``add`` that follows a miss is then a no-op
        new = self.cat.add_input(real)
        self._last = real if new else None
        return not new

    def add(self, real: str) -> None:
        if self._last != real:
            self.cat.add_input(real)
        self._last = None


class _NoSet:
    """A set that forgets: the progress bar's quick count does not dedupe (it is an estimate)."""

    def __contains__(self, item) -> bool:
        return False

    def add(self, item) -> None:
        pass


def _figures_exist(out_dir: Path, key: str, figure_format: str) -> bool:
    from .report.record import object_path

    suffixes = (".png", ".pdf") if figure_format == "pdf" else (".png",)
    return all(object_path(out_dir, key, x).exists() for x in suffixes)


def _unwritable(out_dir, exc: Exception) -> BatchError:
    """The one-line error for an output folder that stopped taking writes."""
    return BatchError(f"{out_dir}: output folder cannot be written ({getattr(exc, 'strerror', None) or exc})")


def _update_hands(ctx: _Context, keys: list[str], hands: dict[str, dict]) -> list[dict]:
    """Apply the decisions in force to reused records (the refit session appended new ones)."""
    from .report import hand_cosmology
    from .report.record import object_path, read_record, write_record
    from .report.summary import row_with_facts

    out = []
    for k in keys:
        rec = read_record(object_path(ctx.out_dir, k, ".json"))
        if rec is None:
            continue
        hand = rec.get("hand")
        if isinstance(hand, dict) and "auto" in hand and hands.get(k) and _same_decision(hand, hands[k]):
            continue
        rec["hand"] = to_jsonable(hand_cosmology(hands.get(k), ctx.cosmology)) if hands.get(k) else None
        out.append(row_with_facts(rec, write_record(ctx.out_dir, k, rec)))
    return out


def _drop_superseded(out_dir: Path, cat) -> None:
    """Remove records of the same input spectrum made under another key (another root)."""
    from .report.record import object_path

    for old, new in cat.superseded():
        log.info("record %s is superseded by %s (same input); removed", old, new)
        for s in (".json", ".png", ".pdf"):
            p = object_path(out_dir, old, s)
            if p.exists():
                p.unlink()
        cat.drop(old)


class _NoBar:
    def update(self, n=1):
        pass

    def close(self):
        pass


def _progress_bar(progress: bool | None, count: Callable[[], int]):
    """tqdm on a terminal (rate and ETA over a quick count of the files), else nothing."""
    show = sys.stderr.isatty() if progress is None else progress
    if not show:
        return _NoBar()
    from tqdm import tqdm

    return tqdm(total=count(), unit="file", desc="zsieve fit", dynamic_ncols=True, smoothing=0.1)


def _run_pool(ctx: _Context, settings: BatchSettings, tasks: Iterator, take, bar) -> None:
    """Feed tasks to worker processes, at most ``jobs * in_flight_per_job`` at a time.

    If a worker process dies (killed, out of memory), the files in flight become ``failed``
    records marked transient (retried by the next run) and a fresh pool carries on.
    """
    limit = max(1, settings.jobs * settings.in_flight_per_job)
    level = logging.getLogger("zsieve").getEffectiveLevel()

    def new_pool():
        return cf.ProcessPoolExecutor(max_workers=settings.jobs, initializer=init_worker, initargs=(ctx, level))

    pool = new_pool()
    pending: dict[cf.Future, tuple] = {}

    def drain(until: int):
        nonlocal pool
        while len(pending) > until:
            done, _ = cf.wait(pending, return_when=cf.FIRST_COMPLETED)
            broken = False
            for fut in done:
                broken |= collect_result(ctx, fut, pending.pop(fut), take)
                bar.update(1)
            if broken:  # every file in flight shares the dead pool's fate; the next run retries them
                for fut, task in list(pending.items()):
                    pending.pop(fut)
                    collect_result(ctx, fut, task, take)
                    bar.update(1)
                pool.shutdown(wait=False, cancel_futures=True)
                pool = new_pool()

    try:
        for task in tasks:
            if task is None:
                bar.update(1)
                continue
            pending[pool.submit(run_task, task)] = task
            drain(limit - 1)
        drain(0)
    except KeyboardInterrupt:
        # files not started are dropped; those being measured finish (a second or so), so the
        # summary written next reflects every record on disk
        log.warning("interrupted: waiting for the files being measured to finish")
        pool.shutdown(wait=True, cancel_futures=True)
        for fut, task in pending.items():
            if fut.done() and not fut.cancelled():
                collect_result(ctx, fut, task, take)
        raise
    except BaseException:
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    else:
        pool.shutdown(wait=True)


def collect_result(ctx: _Context, fut, task: tuple, take) -> bool:
    """Hand a finished task's rows to ``take``; returns True if the pool broke (a worker died).

    ``fut`` is a finished :class:`concurrent.futures.Future` (or anything with ``result()``, such
    as a ``distributed.Future``). A task whose worker died, or that raised, becomes a transient
    ``failed`` record (the next run measures the file again); the batch goes on.
    """
    from .report.record import make_key

    kind, item, sha, _ = task
    try:
        take(fut.result(), fitted=kind == "fit")
        return False
    except cf.process.BrokenProcessPool:
        log.warning("%s: a worker process died while measuring it; marked failed (retried next run)", item.path)
        take([failure_row(ctx, item, sha, make_key(item.relpath), "worker process died while measuring this file",
                       transient=True)])
        return True
    except Exception as exc:  # the worker itself failed (e.g. unpicklable result): isolate the file
        log.debug("task for %s failed", item.path, exc_info=True)
        take([failure_row(ctx, item, sha, make_key(item.relpath), f"{type(exc).__name__}: {_one_line(exc)}",
                       transient=True)])
        return False
