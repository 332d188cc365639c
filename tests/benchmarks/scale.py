"""Benchmark of the batch on Dask against local processes (prints figures; not a test).

    python tests/benchmarks/scale.py                 # 2,000 mock spectra (long on 2 cores)
    python tests/benchmarks/scale.py --quick         # 200 spectra
    python tests/benchmarks/scale.py --n 500 --resamples 50 --configs jobs1 dask2

Mock spectra come from ``zsieve.simulate.mock_set`` (a realistic class mix), written as FITS
binary tables into a temporary folder (deleted afterwards, never committed). Every
configuration runs in a fresh Python process so that its peak memory is its own:

* ``jobs1`` / ``jobs2``: ``zsieve.batch.run_batch`` with 1 and 2 local worker processes;
* ``dask1`` / ``dask2``: ``zsieve.cluster.run`` on ``local:1`` / ``local:2`` (worker processes
  with one thread each);
* ``dask1x2``: one Dask worker with two threads (are two threads in one process as good as two
  processes? numpy's FFTs release the GIL only part of the time);
* ``dask2-small`` / ``jobs2-small``: ``local:2`` / 2 local processes on the first tenth of the
  files (``--small N``: the first N), for the client's memory growth from the small to the full
  set (the summary is formatted 2,000 rows at a time, so sets smaller than that use less);
* ``dask2ext`` / ``dask2ext-small``: as on a cluster, a ``dask scheduler`` process and a
  ``dask worker --nworkers 2 --nthreads 1`` process of their own (with the worker-node Dask
  configuration of the README, :data:`DASK_WORKER_YAML`), the client connecting through
  the scheduler file: the client's memory is then zsieve's alone (in a LocalCluster the
  scheduler, whose task records grow with the number of tasks, lives in the client process).

Printed per configuration: wall time of the batch (cluster start-up apart), spectra per second,
the ratio to ``jobs1``, the client's peak resident memory (``VmHWM`` of /proc/self/status; for a
LocalCluster the scheduler runs inside the client process and is included), the scheduler's peak
(Dask runs; the same process as the client for a LocalCluster) and the largest worker's peak
(Dask workers: read on each worker at the end; local processes: the largest child,
``getrusage(RUSAGE_CHILDREN)``). Figures are off; the seed is fixed.
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

_CHILD = r"""
import json, logging, sys, time
logging.basicConfig(level=logging.WARNING)
from zsieve.batch import BatchSettings, run_batch
from zsieve.engine.measure import MeasureConfig

def vmhwm_kb():
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
    return -1

def main():
    conf = json.loads(sys.argv[1])
    s = BatchSettings(config=MeasureConfig(n_resamples=conf["resamples"], seed=1), figures=False,
                      progress=False, jobs=conf.get("jobs", 1))
    out = {"startup_s": 0.0, "worker_peak_kb": None, "scheduler_peak_kb": None}
    if conf.get("workers"):
        from zsieve import cluster
        t0 = time.perf_counter()
        procs = []
        if conf.get("external"):
            # a scheduler and a worker command of their own, as on a cluster; the client
            # (this process) connects through the scheduler file
            import os, subprocess
            sfile = conf["out"] + ".scheduler.json"
            if os.path.exists(sfile):
                os.unlink(sfile)
            quiet = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host",
                                           "127.0.0.1", "--port", "0", "--no-dashboard", "--scheduler-file", sfile], **quiet))
            while not os.path.exists(sfile):
                time.sleep(0.1)
            procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", "--scheduler-file", sfile,
                                           "--nworkers", str(conf["workers"]), "--nthreads", str(conf.get("threads", 1)),
                                           "--no-dashboard"], env=dict(os.environ, DASK_CONFIG=conf["dask_config"]), **quiet))
            target = sfile
        else:
            target = f"local:{conf['workers']}"
        try:
            with cluster.connect(target, threads_per_worker=conf.get("threads", 1)) as client:
                client.wait_for_workers(conf["workers"], timeout=120)
                out["startup_s"] = time.perf_counter() - t0
                t0 = time.perf_counter()
                summary = cluster.run([conf["data"]], conf["out"], s, scheduler=client)
                out["elapsed_s"] = time.perf_counter() - t0
                out["worker_peak_kb"] = max(client.run(vmhwm_kb).values())
                out["scheduler_peak_kb"] = client.run_on_scheduler(vmhwm_kb)
        finally:
            for p in reversed(procs):
                p.terminate()
                p.wait(timeout=60)
    else:
        t0 = time.perf_counter()
        summary = run_batch([conf["data"]], conf["out"], s)
        out["elapsed_s"] = time.perf_counter() - t0
        if conf.get("jobs", 1) > 1:  # the pool's worker processes, joined by now
            import resource
            out["worker_peak_kb"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    out.update(client_peak_kb=vmhwm_kb(), rows=summary.rows, fitted=summary.n_fitted_now,
               failed=summary.counts.get("failed", 0))
    print("RESULT " + json.dumps(out))

if __name__ == "__main__":
    main()
"""

CONFIGS = {
    "jobs1": {"jobs": 1},
    "jobs2": {"jobs": 2},
    "dask1": {"workers": 1},
    "dask2": {"workers": 2},
    "dask1x2": {"workers": 1, "threads": 2},
    "dask2-small": {"workers": 2, "small": True},
    "jobs2-small": {"jobs": 2, "small": True},
    "dask2ext": {"workers": 2, "external": True},
    "dask2ext-small": {"workers": 2, "external": True, "small": True},
}


#: The worker-node Dask configuration of the README's cluster section.
DASK_WORKER_YAML = """distributed:
  nanny:
    pre-spawn-environ:
      MALLOC_TRIM_THRESHOLD_: null
"""


def make_set(folder: str, n: int, seed: int) -> None:
    from zsieve.io import write_fits_table
    from zsieve.simulate import mock_set

    os.makedirs(folder, exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (spec, _) in enumerate(mock_set(n, seed=seed)):
            spec = spec.replace(meta=spec.meta.replace(object_name=f"CDX-{i:06d}"))
            write_fits_table(spec, os.path.join(folder, f"cdx-{i:06d}.fits"))


def run_config(name: str, data: str, small: str, work: str, resamples: int) -> dict:
    conf = dict(CONFIGS[name])
    conf.update(data=small if conf.pop("small", False) else data, out=os.path.join(work, f"out-{name}"),
                resamples=resamples)
    env = dict(os.environ, MPLBACKEND="Agg")
    # the Dask configuration the README gives for worker nodes (glibc's malloc left adaptive)
    conf["dask_config"] = os.path.join(work, "dask-config")
    script = os.path.join(work, "child.py")
    if not os.path.exists(script):
        os.makedirs(conf["dask_config"], exist_ok=True)
        with open(os.path.join(conf["dask_config"], "zsieve.yaml"), "w") as fh:
            fh.write(DASK_WORKER_YAML)
        with open(script, "w") as fh:
            fh.write(_CHILD)
    proc = subprocess.run([sys.executable, script, json.dumps(conf)], capture_output=True, text=True, env=env)
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            return json.loads(line[len("RESULT "):])
    raise RuntimeError(f"{name} failed (exit {proc.returncode}):\n{proc.stderr[-3000:]}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2000, help="number of mock spectra (default 2000)")
    ap.add_argument("--quick", action="store_true", help="200 spectra")
    ap.add_argument("--resamples", type=int, default=200, help="bootstrap resamples (engine default 200)")
    ap.add_argument("--configs", nargs="+", default=list(CONFIGS), choices=list(CONFIGS))
    ap.add_argument("--seed", type=int, default=2026)
    ap.add_argument("--small", type=int, default=None,
                    help="size of the small set of the *-small runs (default: a tenth of --n)")
    ap.add_argument("--keep", metavar="DIR", help="work in DIR and keep it (default: a temporary folder)")
    args = ap.parse_args(argv)
    n = 200 if args.quick else args.n
    work = args.keep or tempfile.mkdtemp(prefix="zsieve-bench-scale-")
    try:
        data, small = os.path.join(work, "set"), os.path.join(work, "set-small")
        t0 = time.perf_counter()
        if not os.path.isdir(data):
            make_set(data, n, args.seed)
        if not os.path.isdir(small):  # the first tenth, as hard links
            os.makedirs(small)
            for name in sorted(os.listdir(data))[: max(1, args.small or n // 10)]:
                os.link(os.path.join(data, name), os.path.join(small, name))
        print(f"{n} mock spectra (seed {args.seed}) written in {time.perf_counter() - t0:.1f} s; "
              f"resamples {args.resamples}, figures off, {os.cpu_count()} cores, "
              f"load average {os.getloadavg()[0]:.1f} at start", flush=True)
        results = {}
        for name in args.configs:
            r = run_config(name, data, small, work, args.resamples)
            results[name] = r
            print(f"  {name:12s} done in {r['elapsed_s']:.1f} s", flush=True)
        base = results.get("jobs1")
        print()
        print(f"{'run':14s} {'spectra':>8s} {'start s':>8s} {'batch s':>8s} {'spec/s':>8s} {'vs jobs1':>8s} "
              f"{'client MB':>10s} {'sched MB':>9s} {'worker MB':>10s} {'failed':>6s}")
        for name, r in results.items():
            rate = r["rows"] / r["elapsed_s"]
            ratio = f"{rate / (base['rows'] / base['elapsed_s']):.2f}" if base else "-"
            wk = f"{r['worker_peak_kb'] / 1024:.0f}" if r["worker_peak_kb"] else "-"
            sk = f"{r['scheduler_peak_kb'] / 1024:.0f}" if r.get("scheduler_peak_kb") else "-"
            print(f"{name:14s} {r['rows']:8d} {r['startup_s']:8.1f} {r['elapsed_s']:8.1f} {rate:8.2f} {ratio:>8s} "
                  f"{r['client_peak_kb'] / 1024:10.0f} {sk:>9s} {wk:>10s} {r['failed']:6d}")
        print()
        for big, little, what in (("dask2", "dask2-small", "Dask local:2 (scheduler inside the client)"),
                                  ("dask2ext", "dask2ext-small", "Dask scheduler and workers of their own"),
                                  ("jobs2", "jobs2-small", "2 local processes")):
            if big in results and little in results:
                a, b = results[little], results[big]
                print(f"client peak memory, {a['rows']} -> {b['rows']} spectra, {what}: "
                      f"{a['client_peak_kb'] / 1024:.0f} -> {b['client_peak_kb'] / 1024:.0f} MB "
                      f"({100 * (b['client_peak_kb'] / a['client_peak_kb'] - 1):+.1f}%)")
                if big == "dask2ext" and a.get("scheduler_peak_kb") and b.get("scheduler_peak_kb"):
                    print(f"  the separate scheduler's peak: {a['scheduler_peak_kb'] / 1024:.0f} -> "
                          f"{b['scheduler_peak_kb'] / 1024:.0f} MB "
                          f"({100 * (b['scheduler_peak_kb'] / a['scheduler_peak_kb'] - 1):+.1f}%; Dask's own task records)")
        print(f"load average {os.getloadavg()[0]:.1f} at the end (other work on the machine slows every run alike)")
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
