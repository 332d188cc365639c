"""``zsieve fit`` on a Dask cluster: the batch's per-file tasks as Dask tasks.

The batch layer (:mod:`zsieve.batch`) decides, file by file and streamed, what to do (reuse a
record, skip a non-spectrum, draw a missing figure, or fit) and hands each piece of work to an
*executor* with the signature of its own process pool, ``executor(ctx, settings, tasks, take,
bar)``. :func:`run_tasks` is that executor for Dask:

* each task runs :func:`zsieve.batch.run_task` on a worker: read, measure, frames, cosmology,
  figure, and the JSON record written **by the worker** into ``DIR/objects`` with
  :func:`zsieve.report.atomic.write_atomic` (so ``DIR`` must be on a file system every worker
  and the client share); only the small summary rows travel back;
* submission is streamed: at most ``in_flight_per_job`` tasks per worker thread are in the
  cluster at a time (``distributed.as_completed`` plus a window), so the client's memory does
  not grow with the number of files; finished futures are released at once;
* a worker that dies mid-task (killed, out of memory) loses nothing: the scheduler runs its
  tasks again elsewhere (up to ``distributed.scheduler.allowed-failures`` deaths per task), a
  task that raises is retried ``retries`` times, and because every output file is named by the
  object's key and replaced atomically, a task that ran twice still leaves exactly one record;
  a file whose every attempt died becomes a ``failed`` record marked transient, which the next
  run measures again (as with the local pool);
* resume, hand decisions and the summary are the batch layer's own: the rows that come back
  go into the output folder's on-disk catalogue (:class:`zsieve.report.summary.Catalogue`, a
  cache of the records, checked against them on resume), from which the summary and index are
  streamed at checkpoints and at the end, so the client's memory stays flat however many files
  the folder holds.

Schedulers (:func:`parse_scheduler`): ``local:N`` starts a
``distributed.LocalCluster`` of ``N`` worker processes with one thread each on this machine
(``local`` alone: one per core); anything else is the address of a running scheduler
(``tcp://host:8786``) or the path of a scheduler file (``*.json``). Dask is imported only
inside these functions: ``import zsieve`` and the default local path never need it.

Examples
--------
>>> parse_scheduler("local:3")
('local', 3)
>>> parse_scheduler("tcp://10.1.2.3:8786")
('address', 'tcp://10.1.2.3:8786')
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import uuid
import warnings
from typing import Any, Callable, Iterable, Iterator

__all__ = ["parse_scheduler", "connect", "run_tasks", "run", "DASK_HINT"]

log = logging.getLogger(__name__)

#: What to do when Dask is missing (the message of the error raised then).
DASK_HINT = "running on a Dask scheduler needs dask.distributed: install zsieve[dask] (pip install 'zsieve[dask]')"

#: Loggers of Dask that are kept at WARNING or quieter while zsieve drives a cluster.
_DASK_LOGGERS = ("distributed", "dask", "tornado")


def _batch_error(message: str):
    from .batch import BatchError

    return BatchError(message)


def _distributed():
    """The ``distributed`` module, or a clear :class:`~zsieve.batch.BatchError` if it is missing."""
    try:
        import distributed
    except ImportError:
        raise _batch_error(DASK_HINT) from None
    return distributed


def _worker_malloc_defaults():
    """Dask config under which the nannies of a LocalCluster leave glibc's malloc at its defaults.

    Dask's nanny sets ``MALLOC_TRIM_THRESHOLD_=65536`` for the workers it spawns (to hand freed
    memory back to the system). A fixed threshold also switches off glibc's adaptive mmap
    threshold, so every large temporary array of the engine (the bootstrap's resample matrices,
    megabytes each) is a fresh ``mmap`` whose pages fault in again: measured on 40 mocks, one
    worker, 200 resamples: 3.0-3.1 s with the variable, 2.6 s without it, 2.4-2.6 s in a plain
    process. Setting a ``pre-spawn-environ`` entry to None unsets it (Dask's documented override).
    """
    import dask

    return dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None})


def parse_scheduler(text: str) -> tuple[str, Any]:
    """``('local', n_workers)`` for ``local`` / ``local:N``, else ``('address', text)``.

    Raises :class:`~zsieve.batch.BatchError` for an empty text or a bad worker count.

    >>> parse_scheduler("local")[0]
    'local'
    >>> parse_scheduler("cluster/scheduler.json")
    ('address', 'cluster/scheduler.json')
    """
    text = str(text).strip()
    if not text:
        raise _batch_error("--scheduler wants an address (tcp://host:port), a scheduler file or local:N")
    if text == "local":
        return "local", max(1, os.cpu_count() or 1)
    if text.startswith("local:"):
        count = text[len("local:"):]
        try:
            n = int(count)
        except ValueError:
            n = 0
        if n < 1:
            raise _batch_error(f"--scheduler local:N wants a whole number of workers >= 1, got {count!r}")
        return "local", n
    return "address", text


@contextlib.contextmanager
def _quiet_dask():
    """Dask's own loggers at WARNING (or quieter, if already so) while the block runs."""
    saved = {}
    for name in _DASK_LOGGERS:
        lg = logging.getLogger(name)
        saved[name] = lg.level
        if lg.getEffectiveLevel() < logging.WARNING:
            lg.setLevel(logging.WARNING)
    try:
        yield
    finally:
        for name, level in saved.items():
            logging.getLogger(name).setLevel(level)


@contextlib.contextmanager
def connect(scheduler, *, threads_per_worker: int = 1, memory_limit: str | int = "auto",
            connect_timeout_s: float = 30.0) -> Iterator[Any]:
    """A ``distributed.Client`` for ``scheduler`` (text as in :func:`parse_scheduler`, or a Client).

    ``local:N`` starts a LocalCluster on 127.0.0.1 (worker processes, ``threads_per_worker``
    threads each, no dashboard, Dask's logs at WARNING) and shuts it down on exit. An address
    or scheduler file connects to a running scheduler (left running on exit). A Client given
    is used as it is and not closed.
    """
    distributed = _distributed()
    if isinstance(scheduler, distributed.Client):
        yield scheduler
        return
    kind, value = parse_scheduler(scheduler)
    with _quiet_dask(), contextlib.ExitStack() as stack:
        if kind == "local":
            with warnings.catch_warnings():
                # the scheduler's small health endpoint falls back to a random local port
                # when 8787 is taken; that is expected here and not worth a warning
                warnings.filterwarnings("ignore", message=".*[Pp]ort .* already in use.*")
                stack.enter_context(_worker_malloc_defaults())
                cluster = stack.enter_context(distributed.LocalCluster(
                    n_workers=int(value), threads_per_worker=int(threads_per_worker), processes=True,
                    host="127.0.0.1", dashboard_address=None, memory_limit=memory_limit,
                    silence_logs=logging.WARNING))
            client = stack.enter_context(distributed.Client(cluster))
            log.info("started a local Dask cluster of %d worker(s) at %s", value, cluster.scheduler_address)
        else:
            try:
                if value.endswith(".json") and os.path.isfile(value):
                    client = distributed.Client(scheduler_file=value, timeout=connect_timeout_s)
                else:
                    client = distributed.Client(value, timeout=connect_timeout_s)
            except (OSError, TimeoutError, ValueError) as exc:
                raise _batch_error(f"cannot reach the Dask scheduler at {value} ({type(exc).__name__}: "
                                   f"{str(exc).strip().splitlines()[0] if str(exc).strip() else 'no answer'})") from None
            stack.enter_context(client)
            log.info("connected to the Dask scheduler at %s", value)
        yield client


def _work(ctx, task: tuple, level: int) -> list[dict[str, Any]]:
    """One batch task on a Dask worker (the same function the local pool runs)."""
    from . import batch

    batch.init_worker(ctx, level, pool_worker=False)  # tasks run in a worker thread: no signal handlers
    return batch.run_task(task)


def _threads(client) -> int:
    try:
        return max(1, sum(client.nthreads().values()))
    except Exception as exc:  # a scheduler that cannot say yet: start with a small window
        log.debug("worker threads unknown (%s)", exc)
        return 1


def run_tasks(ctx, settings, tasks: Iterable[tuple | None], take: Callable[[list[dict]], None], bar, *,
              client=None, retries: int = 2, wait_s: float = 120.0) -> None:
    """Run the batch's ``tasks`` on Dask; the executor :func:`zsieve.batch.run_batch` calls.

    ``tasks`` yields ``None`` (nothing to run: a reused or skipped file) or a task tuple
    ``(kind, InputFile, sha256, extra)``; every finished task's rows go to ``take`` (in the
    order tasks finish). The client is ``client`` if given, else ``settings.scheduler`` (an
    address, ``local:N`` or a Client). At most ``settings.in_flight_per_job`` tasks per
    worker thread are submitted at once (at least 2 in all). On Ctrl-C (KeyboardInterrupt)
    tasks not started are cancelled and those running are awaited (up to ``wait_s``) and taken,
    then the interrupt goes on to the batch layer, which writes the summary.
    """
    distributed = _distributed()
    from . import batch
    from .report.record import make_key

    if client is None:
        scheduler = getattr(settings, "scheduler", None)
        if scheduler is None:
            raise _batch_error("run_tasks needs a Dask client or settings.scheduler")
        with connect(scheduler) as c:
            return run_tasks(ctx, settings, tasks, take, bar, client=c, retries=retries, wait_s=wait_s)

    level = logging.getLogger("zsieve").getEffectiveLevel()
    limit = max(2, _threads(client) * max(1, int(settings.in_flight_per_job)))
    local = isinstance(getattr(client, "cluster", None), distributed.LocalCluster)
    run_id = uuid.uuid4().hex[:8]
    warned_relative = False
    pending: dict[Any, tuple] = {}
    ac = distributed.as_completed()

    def collect(fut) -> None:
        task = pending.pop(fut)
        kind, item, sha, _ = task
        if fut.status == "error" and isinstance(fut.exception(), distributed.KilledWorker):
            log.warning("%s: every Dask worker that tried it died; marked failed (retried next run)", item.path)
            take([batch.failure_row(ctx, item, sha, make_key(item.relpath),
                                    "every Dask worker that measured this file died", transient=True)])
        else:  # rows, or the batch layer's own handling of a task that raised
            batch.collect_result(ctx, fut, task, take)
        fut.release()
        bar.update(1)

    with _quiet_dask():
        try:
            for task in tasks:
                if task is None:
                    bar.update(1)
                    continue
                kind, item = task[0], task[1]
                if not local and not warned_relative and not os.path.isabs(item.path):
                    log.warning("input paths are relative (%s); remote workers resolve them from their own "
                                "working folder: give absolute paths on a shared file system", item.path)
                    warned_relative = True
                fut = client.submit(_work, ctx, task, level, key=f"zsieve-{kind}-{make_key(item.relpath)}-{run_id}",
                                    pure=False, retries=retries)
                pending[fut] = task
                ac.add(fut)
                while len(pending) >= limit:
                    collect(next(ac))
            for fut in ac:
                collect(fut)
        except KeyboardInterrupt:
            # as the local pool does: files not started are dropped, those being measured finish,
            # so the summary written next reflects every record on disk
            if pending:
                log.warning("interrupted: waiting for the files being measured to finish")
                _wind_down(client, distributed, pending, wait_s)
                for fut in list(pending):  # finished before or while winding down: their records exist
                    if fut.status in ("finished", "error"):
                        collect(fut)
            raise
        except BaseException:
            if pending:
                log.info("cancelling %d Dask task(s) still in flight", len(pending))
                _cancel(client, list(pending))
            raise


def _cancel(client, futures) -> None:
    try:
        client.cancel(futures)
    except Exception as exc:  # the scheduler may be gone already
        log.debug("cancel failed: %s", exc)


def _wind_down(client, distributed, pending: dict, wait_s: float) -> None:
    """Cancel the tasks no worker has taken; wait up to ``wait_s`` for those being run."""
    keys = [f.key for f in pending]

    def states(dask_scheduler=None):  # runs on the scheduler (pickled by value)
        return {k: dask_scheduler.tasks[k].state for k in keys if k in dask_scheduler.tasks}

    try:
        state = client.run_on_scheduler(states)
    except Exception as exc:  # cannot tell: cancel everything
        log.debug("task states unknown (%s)", exc)
        state = {}
    running = [f for f in pending if state.get(f.key) == "processing"]
    done = ("processing", "memory", "erred")  # being run, or finished and not yet taken
    _cancel(client, [f for f in pending if state.get(f.key) not in done])
    if running:
        try:
            distributed.wait(running, timeout=wait_s)
        except TimeoutError:
            log.warning("%d file(s) still being measured after %.0f s; their records may appear later",
                        sum(f.status == "pending" for f in running), wait_s)
            _cancel(client, running)


def run(paths: Iterable[str], out_dir, settings=None, *, scheduler="local:2", on_row=None,
        threads_per_worker: int = 1, memory_limit: str | int = "auto"):
    """:func:`zsieve.batch.run_batch` with the per-file work on a Dask cluster.

    Same arguments and result (a :class:`~zsieve.batch.BatchSummary`) as ``run_batch``, plus
    the scheduler (see :func:`connect`; ``threads_per_worker`` and ``memory_limit`` apply to
    ``local:N``). The outputs are those of a local run with the same settings, record for
    record (only ``provenance.time`` differs).

    Raises
    ------
    BatchError
        As ``run_batch``; also when Dask is missing or the scheduler cannot be reached.
    """
    from . import batch

    settings = settings or batch.BatchSettings()
    with connect(scheduler, threads_per_worker=threads_per_worker, memory_limit=memory_limit) as client:
        return batch.run_batch(paths, out_dir, dataclasses.replace(settings, scheduler=client), on_row=on_row)
