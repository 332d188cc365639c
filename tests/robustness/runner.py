"""Run corpus cases through the loader and the engine, one JSON line per case.

Used by ``test_corpus.py`` as a *subprocess* (so a case that blows up memory or hangs in C
code cannot take pytest with it): the parent sets ``RLIMIT_AS`` and an overall timeout, this
script puts a per-case time limit on each case with ``setitimer`` and writes

    {"event": "start", "name": ...}
    {"event": "done", "name": ..., "outcome": ..., ...}

so the parent knows which case was running if the process dies.

Usage: ``python runner.py CORPUS_DIR CASES_JSON RESULTS_JSONL [--timeout S] [--resamples N]``
"""

from __future__ import annotations

import argparse
import json
import logging
import signal
import sys
import time
import tracemalloc
import traceback
import warnings
from pathlib import Path


class CaseTimeout(BaseException):
    """Raised by the alarm handler (a BaseException so library ``except Exception`` lets it pass)."""


def _alarm(signum, frame):
    raise CaseTimeout()


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.records: list[str] = []

    def emit(self, record):
        try:
            self.records.append(record.getMessage()[:500])
        except Exception:  # a record that cannot format is still a record
            self.records.append(str(record.msg)[:500])


def run_case(corpus_dir: Path, case: dict, *, timeout: float, resamples: int, measure_it: bool = True) -> dict:
    from zsieve.errors import LimitExceededError, SpectrumFileError
    from zsieve.io import read_spectra

    path = str(corpus_dir / case["filename"])
    out = {"event": "done", "name": case["name"], "path": path}
    handler = _Collect()
    zlog = logging.getLogger("zsieve")
    zlog.addHandler(handler)
    trace = bool(case.get("limit"))
    t0 = time.perf_counter()
    stage = "read"
    signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, timeout)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if trace:
                tracemalloc.start()
            try:
                specs = read_spectra(path)
            finally:
                if trace:
                    out["peak_mb"] = tracemalloc.get_traced_memory()[1] / 2**20
                    tracemalloc.stop()
            out["n_spectra"] = len(specs)
            if specs:
                w = specs[0].wavelength
                out["wave_min"] = float(w[0]) if w.size else None
                out["wave_max"] = float(w[-1]) if w.size else None
                out["n_pix"] = int(w.size)
                out["object_name"] = specs[0].meta.object_name
            out["outcome"] = "fit" if specs else "empty"
            out["measured"] = measure_it
            if measure_it:
                stage = "measure"
                from zsieve.engine.measure import MeasureConfig, measure

                cfg = MeasureConfig(n_resamples=resamples, seed=1)
                results = [measure(s, cfg) for s in specs]
                if results:
                    r = results[0]
                    out.update(status=r.status, z=_f(r.z), z_err=_f(r.z_err), grade=r.grade,
                               message=r.message, confidence=_f(r.confidence))
                out["statuses"] = [r.status for r in results]
    except CaseTimeout:
        out["outcome"] = "timeout"
        out["stage"] = stage
    except SpectrumFileError as exc:
        out["outcome"] = "error" if stage == "read" else "measure-raised"
        out["exc_type"] = type(exc).__name__
        out["is_limit"] = isinstance(exc, LimitExceededError)
        out["message"] = str(exc)
        out["exc_path"] = getattr(exc, "path", None)
    except BaseException as exc:  # noqa: BLE001 - everything else is what we are hunting
        out["outcome"] = "other" if stage == "read" else "measure-raised"
        out["exc_type"] = f"{type(exc).__module__}.{type(exc).__name__}"
        out["message"] = str(exc)[:1000]
        out["traceback"] = traceback.format_exc()[-3000:]
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        zlog.removeHandler(handler)
    out["stage"] = stage
    out["seconds"] = time.perf_counter() - t0
    out["log_warnings"] = handler.records
    out["py_warnings"] = [str(w.message)[:300] for w in caught] if "caught" in locals() else []
    return out


def _f(v):
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if v == v and abs(v) != float("inf") else None


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("corpus_dir", type=Path)
    ap.add_argument("cases", type=Path)
    ap.add_argument("results", type=Path)
    ap.add_argument("--timeout", type=float, default=20.0)
    ap.add_argument("--resamples", type=int, default=10)
    ap.add_argument("--measure-families", default="all",
                    help="comma-separated corpus families whose spectra are also measured, or 'all'")
    args = ap.parse_args(argv)
    # offline, as the whole suite (tests/conftest.py does the same in-process)
    from astropy.utils import iers
    from astropy.utils.data import conf as data_conf

    data_conf.allow_internet = False
    iers.conf.auto_download = False
    cases = json.loads(args.cases.read_text())
    with open(args.results, "a", encoding="utf-8") as fh:
        for case in cases:
            fh.write(json.dumps({"event": "start", "name": case["name"]}) + "\n")
            fh.flush()
            fams = args.measure_families.split(",")
            res = run_case(args.corpus_dir, case, timeout=args.timeout, resamples=args.resamples,
                           measure_it="all" in fams or case["family"] in fams
                           or case["expect"] == "reject")
            fh.write(json.dumps(res, default=str) + "\n")
            fh.flush()
    return 0


if __name__ == "__main__":
    sys.exit(main())
