"""Benchmark of ``zsieve fit`` over folders of mock spectra (prints figures; not a test).

    python tests/benchmarks/batch.py            # 1,000 and 10,000 spectra (long: hours on 2 cores)
    python tests/benchmarks/batch.py --quick    # 100 and 1,000 spectra, fewer configurations
    python tests/benchmarks/batch.py --sizes 200 2000 --resamples 50
    python tests/benchmarks/batch.py --sizes 1000 10000 --full-matrix-at 1000 --reduced
        # every configuration at 1,000, only jobs 2 without figures at 10,000 (the budget run)

Mock spectra come from ``zsieve.simulate.mock_set`` (a realistic class mix) and are written as
FITS binary tables into a temporary folder (deleted afterwards, never committed); the smaller
set is made of hard links to the first files of the larger one. Every measured run is a fresh
``zsieve fit`` process:

* spectra per second with ``--jobs 1`` and ``--jobs 2``, figures off and on;
* peak memory: of the client process itself (its ``VmHWM``: discovery, catalogue, summary),
  of the largest worker process (``getrusage(RUSAGE_CHILDREN)`` of the client), and the peak of
  the summed resident memory of the process tree (sampled from ``/proc`` every 0.2 s);
* the time of a rerun with nothing to do (resume);
* the engine's own rate on the same spectra in one process (read + ``measure``), for the ratio.

Targets (batch issue): memory flat from the small to the large set (within 20%); a no-op rerun
under 5% of the first run; batch throughput with figures off within 20% of the engine's own rate
(``--jobs 1`` against one engine process; ``--jobs 2`` against twice that).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import warnings

HERE = os.path.dirname(os.path.abspath(__file__))

#: Runs ``zsieve fit`` in this process (the client), then reports its own peak resident memory
#: (VmHWM) apart from that of its worker processes (the largest waited-for child, getrusage).
_CLIENT = (
    "import json, resource, sys\n"
    "from zsieve.cli import main\n"
    "rc = main(sys.argv[2:])\n"
    "hwm = [int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM:')][0]\n"
    "me, ch = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)\n"
    "json.dump({'rc': rc, 'client_kb': hwm, 'worker_kb': ch.ru_maxrss,\n"
    "           'cpu_s': me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime}, open(sys.argv[1], 'w'))\n"
)


def _tree_rss_kb(root_pid: int) -> int:
    """Summed resident memory (kB) of ``root_pid`` and all its descendants, from /proc."""
    parent = {}
    rss = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as fh:
                stat = fh.read()
            ppid = int(stat[stat.rindex(")") + 2:].split()[1])
            with open(f"/proc/{name}/statm") as fh:
                pages = int(fh.read().split()[1])
        except (OSError, ValueError, IndexError):
            continue
        parent[int(name)] = ppid
        rss[int(name)] = pages * (os.sysconf("SC_PAGE_SIZE") // 1024)
    total = 0
    for pid in rss:
        p = pid
        while p and p != root_pid:
            p = parent.get(p, 0)
        if p == root_pid:
            total += rss[pid]
    return total


def _run_fit(data: str, out: str, jobs: int, figures: bool, resamples: int) -> dict:
    report = out.rstrip("/") + ".run.json"
    cmd = [sys.executable, "-c", _CLIENT, report,
           "fit", data, "--out", out, "--jobs", str(jobs), "--resamples", str(resamples), "--seed", "1",
           "--no-progress"]
    if not figures:
        cmd.append("--no-figures")
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL)
    peak = 0
    while proc.poll() is None:
        peak = max(peak, _tree_rss_kb(proc.pid))
        time.sleep(0.2)
    elapsed = time.perf_counter() - t0
    with open(report) as fh:
        info = json.load(fh)
    os.unlink(report)
    if info["rc"] != 0:
        raise SystemExit(f"zsieve fit exited with {info['rc']}")
    return {"seconds": elapsed, "client_mb": info["client_kb"] / 1024, "worker_mb": info["worker_kb"] / 1024,
            "tree_peak_mb": peak / 1024, "cpu_s": info["cpu_s"]}


def _generate(folder: str, n: int, seed: int) -> None:
    from zsieve.io import write_fits_table
    from zsieve.simulate import mock_set

    os.makedirs(folder, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (spec, truth) in enumerate(mock_set(n, seed)):
            sub = os.path.join(folder, f"night{i // 500:03d}")
            os.makedirs(sub, exist_ok=True)
            name = f"CDX-{i:05d}"
            write_fits_table(spec.replace(meta=spec.meta.replace(object_name=name)), os.path.join(sub, name + ".fits"))


def _link_subset(src: str, dst: str, n: int) -> None:
    files = sorted(os.path.join(d, f) for d, _, fs in os.walk(src) for f in fs)[:n]
    for f in files:
        target = os.path.join(dst, os.path.relpath(f, src))
        os.makedirs(os.path.dirname(target), exist_ok=True)
        os.link(f, target)


def _engine_rate(folder: str, n: int, resamples: int) -> tuple[float, float]:
    """(spectra per wall second, CPU seconds per spectrum) of read + measure in this process."""
    from zsieve.engine.measure import MeasureConfig, measure
    from zsieve.io import read_spectra

    files = sorted(os.path.join(d, f) for d, _, fs in os.walk(folder) for f in fs)[: n + 1]
    cfg = MeasureConfig(n_resamples=resamples, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        measure(read_spectra(files[0])[0], cfg)  # warm-up: caches of line sets and templates
        t0, c0 = time.perf_counter(), time.process_time()
        for f in files[1:]:
            for s in read_spectra(f):
                measure(s, cfg)
        n_done = len(files) - 1
        return n_done / (time.perf_counter() - t0), (time.process_time() - c0) / n_done


#: Configurations: (jobs, figures). ``j2`` (2 jobs, figures off) runs at every size: the memory
#: comparison and the no-op rerun of the largest set use it.
CONFIGS = {"j1": (1, False), "j2": (2, False), "j1f": (1, True), "j2f": (2, True)}


def plan(sizes: list[int], full_at: list[int] | None, reduced: list[str]) -> list[tuple[int, str]]:
    """(size, configuration) pairs: every configuration at the sizes in ``full_at`` (default: all
    sizes), ``reduced`` (plus ``j2``) at the others.

    >>> plan([100, 1000], [100], ["j1"])
    [(100, 'j1'), (100, 'j2'), (100, 'j1f'), (100, 'j2f'), (1000, 'j1'), (1000, 'j2')]
    """
    full = set(sizes if full_at is None else full_at)
    out = []
    for n in sizes:
        names = list(CONFIGS) if n in full else [c for c in CONFIGS if c in set(reduced) | {"j2"}]
        out += [(n, c) for c in names]
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="100 and 1,000 spectra, all configurations at 100 only")
    ap.add_argument("--sizes", type=int, nargs="+", metavar="N", help="set sizes, smallest first (default 1000 10000)")
    ap.add_argument("--full-matrix-at", type=int, nargs="*", metavar="N",
                    help="sizes that run every configuration (jobs 1/2, figures off/on); default: every size")
    ap.add_argument("--reduced", nargs="*", default=["j1"], choices=list(CONFIGS),
                    help="configurations at the other sizes (j2 always runs; default j1 j2)")
    ap.add_argument("--resamples", type=int, default=200, help="bootstrap resamples (default 200)")
    ap.add_argument("--engine-sample", type=int, default=100, help="spectra timed in-process for the engine rate")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args(argv)
    sizes = sorted(args.sizes or ([100, 1000] if args.quick else [1000, 10000]))
    full_at = args.full_matrix_at if args.full_matrix_at is not None else ([sizes[0]] if args.quick else None)
    runs = plan(sizes, full_at, args.reduced)
    small, large = sizes[0], sizes[-1]
    tmp = tempfile.mkdtemp(prefix="zsieve-bench-batch-")
    try:
        t0 = time.perf_counter()
        sets = {large: os.path.join(tmp, f"set{large}")}
        _generate(sets[large], large, seed=2026)
        for n in sizes[:-1]:
            sets[n] = os.path.join(tmp, f"set{n}")
            _link_subset(sets[large], sets[n], n)
        print(f"generated {large} mock spectra (FITS tables) in {time.perf_counter() - t0:.1f} s; "
              f"resamples={args.resamples}; runs: {', '.join(f'{n}:{c}' for n, c in runs)}")
        eng, eng_cpu = _engine_rate(sets[small], min(args.engine_sample, small - 1), args.resamples)
        print(f"engine alone (read + measure, one process): {eng:.2f} spectra/s, {eng_cpu:.3f} CPU s per spectrum")
        print()
        header = f"{'set':>6} {'jobs':>4} {'figures':>7} {'first run s':>11} {'spectra/s':>9} {'vs engine':>9} " \
                 f"{'CPU s/spec':>10} {'rerun s':>8} {'rerun %':>7} {'client MB':>9} {'worker MB':>9} {'tree MB':>8}"
        print(header)
        print("-" * len(header))
        results = {}
        for n, name in runs:
            jobs, figs = CONFIGS[name]
            out = os.path.join(tmp, f"out-{n}-{name}")
            first = _run_fit(sets[n], out, jobs, figs, args.resamples)
            rerun = _run_fit(sets[n], out, jobs, figs, args.resamples)
            rate = n / first["seconds"]
            ref = eng * jobs
            results[(n, jobs, figs)] = (first, rerun, rate)
            wk = f"{first['worker_mb']:>9.0f}" if jobs > 1 else f"{'-':>9}"
            print(f"{n:>6} {jobs:>4} {'on' if figs else 'off':>7} {first['seconds']:>11.1f} {rate:>9.2f} "
                  f"{rate / ref:>9.2f} {first['cpu_s'] / n:>10.3f} {rerun['seconds']:>8.2f} "
                  f"{100 * rerun['seconds'] / first['seconds']:>6.1f}% "
                  f"{first['client_mb']:>9.0f} {wk} {first['tree_peak_mb']:>8.0f}", flush=True)
            shutil.rmtree(out, ignore_errors=True)
        print()
        a, b = results[(small, 2, False)][0], results[(large, 2, False)][0]
        growth = b["tree_peak_mb"] / a["tree_peak_mb"] - 1
        growth_c = b["client_mb"] / a["client_mb"] - 1
        print(f"memory {small} -> {large} spectra (jobs 2, figures off): client {a['client_mb']:.0f} -> "
              f"{b['client_mb']:.0f} MB ({100 * growth_c:+.1f}%), largest worker {a['worker_mb']:.0f} -> "
              f"{b['worker_mb']:.0f} MB, process tree {a['tree_peak_mb']:.0f} -> {b['tree_peak_mb']:.0f} MB "
              f"({100 * growth:+.1f}%)  target within 20%: "
              f"{'met' if abs(growth) <= 0.2 and abs(growth_c) <= 0.2 else 'MISSED'}")
        big_runs = [r for (n, _, _), r in results.items() if n == large]
        worst = max(r[1]["seconds"] / r[0]["seconds"] for r in big_runs)
        print(f"no-op rerun of the {large}-spectrum set: {100 * worst:.1f}% of the first run (worst configuration)  "
              f"target < 5%: {'met' if worst < 0.05 else 'MISSED'}")
        # a fresh process pays a fixed start-up (imports of scipy/astropy, line lists): the no-op
        # rerun of the small set measures it; the rate without it is the batch's steady state
        startup = results[(small, 2, False)][1]["seconds"]
        startup_cpu = results[(small, 2, False)][1]["cpu_s"]
        print(f"start-up of a zsieve fit process (no-op rerun of {small} spectra, checksums included): {startup:.1f} s")
        for (n, jobs, figs), (first, _, rate) in sorted(results.items()):
            if figs:
                continue
            steady = n / max(first["seconds"] - startup, 1e-9)
            cpu_ratio = eng_cpu / max((first["cpu_s"] - startup_cpu) / n, 1e-9)
            print(f"throughput {n} spectra, jobs {jobs}, figures off: {rate:.2f}/s overall, {steady:.2f}/s after start-up "
                  f"= {100 * steady / (eng * jobs):.0f}% of {'the engine' if jobs == 1 else f'{jobs} x the engine'} "
                  f"(wall clock); CPU per spectrum after start-up at {100 * cpu_ratio:.0f}% of the engine's efficiency  "
                  f"target >= 80%: {'met' if cpu_ratio >= 0.8 else 'MISSED'} (CPU), "
                  f"{'met' if steady >= 0.8 * eng * jobs else 'MISSED'} (wall)")
        fig_on, fig_off = results.get((small, 2, True)), results.get((small, 2, False))
        if fig_on and fig_off:
            extra = (fig_on[0]["cpu_s"] - fig_off[0]["cpu_s"]) / small
            print(f"figures cost {extra:.2f} CPU s per spectrum")
        print(f"(machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} at the end)")
    finally:
        if args.keep:
            print(f"kept {tmp}")
        else:
            shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
