"""Robustness figures: the bad-input corpus tally and the kill-and-resume tally.

Run: ``python tests/benchmarks/robustness.py [--kills N] [--seed K] [--skip-faults]``

1. Builds the corpus of tests/robustness/corpus.py in a temporary folder, reads *and measures*
   every case in the bounded subprocess runner (4 GiB address-space cap, per-case time limit)
   and prints the corpus size and the tally of outcomes: fitted / clear error (a
   SpectrumFileError naming the file, or a clean failed result for too-little data) /
   other (any other exception, a timeout or a crash), plus the cases whose outcome
   differs from what the case declares.
2. Writes 30 mock spectra, kills ``zsieve fit`` with SIGKILL at seeded random points, resumes
   to completion and prints runs killed, runs resumed and records lost (must be 0).
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "robustness"))

import corpus as corpus_mod  # noqa: E402
import test_corpus as tc  # noqa: E402
import test_faults as tf  # noqa: E402


def corpus_tally(workdir: Path) -> dict:
    cdir = workdir / "corpus"
    t0 = time.perf_counter()
    cases = corpus_mod.build_corpus(cdir)
    t_build = time.perf_counter() - t0
    saved = tc.MEASURE_FAMILIES
    tc.MEASURE_FAMILIES = ("all",)
    try:
        t0 = time.perf_counter()
        results = tc._run_runner(cdir, cases, workdir)
        t_run = time.perf_counter() - t0
    finally:
        tc.MEASURE_FAMILIES = saved
    outcome = Counter()
    mismatches = []
    for case in cases:
        rec = results.get(case.name) or {}
        o = rec.get("outcome")
        statuses = rec.get("statuses") or []
        if o == "fit" and statuses and all(s == "ok" for s in statuses):
            outcome["fitted"] += 1
        elif o == "error" or (o == "fit" and statuses and rec.get("message")):
            outcome["clear error"] += 1
        else:
            outcome["other"] += 1
        probs = tc.case_problems(case, rec)
        if probs:
            mismatches.append((case.filename, case.expect, probs[0]))
    return dict(n=len(cases), declared=Counter(c.expect for c in cases), outcome=outcome,
                mismatches=mismatches, t_build=t_build, t_run=t_run)


def fault_tally(workdir: Path, kills: int, seed: int) -> dict:
    data = workdir / "night1"
    paths = tf._write_mocks(data)
    t0 = time.perf_counter()
    res = tf.kill_and_resume(data, paths, workdir / "fault", n_kills=kills, seed=seed)
    res["seconds"] = time.perf_counter() - t0
    import csv

    with open(res["out"] / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    res["rows"] = len(rows)
    res["inputs"] = len(paths)
    res["records"] = len(list((res["out"] / "objects").glob("*.json")))
    return res


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kills", type=int, default=tf.N_KILLS)
    ap.add_argument("--seed", type=int, default=tf.KILL_SEED)
    ap.add_argument("--skip-faults", action="store_true")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="zsieve-robust-") as tmp:
        work = Path(tmp)
        c = corpus_tally(work)
        print(f"corpus: {c['n']} cases (declared: {dict(c['declared'])}); built in {c['t_build']:.1f} s, "
              f"read+measured in {c['t_run']:.1f} s")
        o = c["outcome"]
        print(f"outcomes: fitted {o['fitted']} / clear error {o['clear error']} / other {o['other']}")
        print(f"cases not ending as declared: {len(c['mismatches'])}")
        for name, expect, prob in c["mismatches"]:
            print(f"  {name} [{expect}]: {prob[:160]}")
        if not args.skip_faults:
            f = fault_tally(work, args.kills, args.seed)
            t = f["tally"]
            print(f"faults: {f['inputs']} inputs, runs killed {t['killed']}, runs resumed {t['resumed']}, "
                  f"records lost {t['lost']}; final exit {f['final'].returncode}, summary rows {f['rows']}, "
                  f"records {f['records']}, hand decisions kept {len(f['decision_lines'])}; "
                  f"{f['seconds']:.1f} s")
            if f["lost"]:
                print("  lost:", json.dumps(f["lost"]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
