"""Figure benchmark: CPU seconds per per-object report figure, the current code beside a baseline.

The objects: ``--n`` mock spectra from :func:`zsieve.simulate.mock_set` (all classes, default z
and S/N ranges) measured with :func:`zsieve.engine.measure.measure`, plus the demo spectra in
``sample_spectra/``; each result is completed with frames and cosmology
(:func:`zsieve.report.complete_result`) as a batch does before it draws.

The routes, in the same process, on the same objects, alternating object by object:

* ``current`` - :func:`zsieve.report.figure.write_figure` of the working tree;
* ``baseline`` - the same function from the figure module as it was at git revision ``--rev``
  (default: the last revision before the figure was made cheap), loaded from ``git show`` into
  the ``zsieve.report`` package so that it runs against the same engine and helpers.

Printed: CPU seconds per figure (``time.process_time``, one thread: steadier than the wall clock
on a shared machine) for the PNG, and with ``--pdf`` for PNG + PDF as ``zsieve fit --pdf``
writes them; mean, median and the worst object per route, and the ratio baseline/current. Use
``--profile`` to print a cProfile of the current route.

Usage::

    python tests/benchmarks/figures.py [--n 20] [--seed 5] [--rev 2a0b91c] [--pdf] [--profile]

Target (issue 5): 0.2-0.4 CPU s per PNG figure on the development machine (the baseline took
about 1.3 CPU s).
"""

from __future__ import annotations

import argparse
import cProfile
import importlib.util
import os
import pstats
import subprocess
import sys
import tempfile
import time
from pathlib import Path

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
os.environ.setdefault("MPLBACKEND", "Agg")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
BASELINE_REV = "2a0b91c"  # figure.py before issue 5's changes


def load_baseline(rev: str):
    """The figure module as it was at ``rev`` (imported as ``zsieve.report._figure_baseline``)."""
    src = subprocess.run(["git", "-C", str(ROOT), "show", f"{rev}:src/zsieve/report/figure.py"],
                         check=True, capture_output=True, text=True).stdout
    import zsieve.report

    tmp = Path(tempfile.mkdtemp(prefix="zsieve-figbase-")) / "_figure_baseline.py"
    tmp.write_text(src)
    spec = importlib.util.spec_from_file_location("zsieve.report._figure_baseline", tmp)
    mod = importlib.util.module_from_spec(spec)
    mod.__package__ = "zsieve.report"
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    assert zsieve.report  # the package is imported first, so relative imports resolve
    return mod


def objects(n: int, seed: int, n_resamples: int):
    """``(label, result, spectrum)``: measured mocks and the demo spectra, completed."""
    from zsieve.engine.measure import MeasureConfig, measure
    from zsieve.io import read_spectrum
    from zsieve.report import complete_result
    from zsieve.simulate import mock_set

    cfg = MeasureConfig(n_resamples=n_resamples, seed=1)
    out = []
    for spec, truth in mock_set(n, seed):
        res = measure(spec, cfg)
        if res.status == "ok":
            res = res.replace(provenance={"key": f"mock-{truth['index']:03d}", "index": 0})
            out.append((f"mock {truth['index']:2d} {truth['kind']}", complete_result(res, spec), spec))
    for path in sorted((ROOT / "sample_spectra").glob("CDX-*")):
        spec = read_spectrum(path)
        res = measure(spec, cfg)
        if res.status == "ok":
            res = res.replace(provenance={"key": path.name, "index": 0})
            out.append((path.name, complete_result(res, spec), spec))
    return out


def cpu_seconds(fn, *args, **kw) -> float:
    t0 = time.process_time()
    fn(*args, **kw)
    return time.process_time() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=20, help="mock objects (default 20)")
    ap.add_argument("--seed", type=int, default=5)
    ap.add_argument("--resamples", type=int, default=200, help="bootstrap resamples of the fits (default 200)")
    ap.add_argument("--rev", default=BASELINE_REV, help="git revision of the baseline figure module")
    ap.add_argument("--no-baseline", action="store_true", help="time the current code only")
    ap.add_argument("--pdf", action="store_true", help="also write the PDF (as zsieve fit --pdf)")
    ap.add_argument("--profile", action="store_true", help="cProfile of the current route")
    args = ap.parse_args(argv)

    from zsieve.report import figure as current

    routes = {"current": current}
    if not args.no_baseline:
        routes["baseline"] = load_baseline(args.rev)
    t0 = time.process_time()
    objs = objects(args.n, args.seed, args.resamples)
    print(f"{len(objs)} objects measured in {time.process_time() - t0:.1f} CPU s; "
          f"timing {', '.join(routes)}{' (PNG + PDF)' if args.pdf else ' (PNG)'}")
    tmp = Path(tempfile.mkdtemp(prefix="zsieve-figbench-"))
    for mod in routes.values():  # warm up: fonts, caches and lazy imports are not per figure
        mod.write_figure(tmp / "warm.png", objs[0][1], objs[0][2])
    times = {k: [] for k in routes}
    prof = cProfile.Profile() if args.profile else None
    print(f"{'object':32s}" + "".join(f"{k:>10s}" for k in routes) + "   (CPU s per figure)")
    for i, (label, res, spec) in enumerate(objs):
        row = []
        for name, mod in routes.items():
            png = tmp / f"{name}-{i}.png"
            also = [tmp / f"{name}-{i}.pdf"] if args.pdf else []
            if prof is not None and name == "current":
                prof.enable()
            t = cpu_seconds(mod.write_figure, png, res, spec, also=also)
            if prof is not None and name == "current":
                prof.disable()
            times[name].append(t)
            row.append(t)
        print(f"{label[:32]:32s}" + "".join(f"{t:10.3f}" for t in row))
    print()
    for name, ts in times.items():
        ts = np.asarray(ts)
        print(f"{name:10s} mean {ts.mean():.3f}  median {np.median(ts):.3f}  worst {ts.max():.3f} CPU s per figure")
    if "baseline" in times:
        r = np.mean(times["baseline"]) / np.mean(times["current"])
        print(f"baseline / current (mean CPU s): {r:.2f}x")
    if prof is not None:
        print()
        pstats.Stats(prof).sort_stats("cumulative").print_stats(40)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
