"""Every corpus case ends cleanly: a fitted result, or one clear SpectrumFileError naming the file.

Two routes over the same corpus (``corpus.py``, at least 200 files made at test time):

* ``runner.py`` in a subprocess under a 4 GiB address-space cap with a per-case time limit:
  ``zsieve.io.read_spectra`` then ``zsieve.engine.measure.measure`` on each case, classified
  case by case (fit / clean error / anything else);
* the real command, ``zsieve fit CORPUS --out OUT --resamples 10 --no-figures``, in a
  subprocess under the same cap and a timeout: exit 0, exactly one summary row per input
  file, failed rows with a message, and nothing written outside OUT.

The expectations are those of the loader contract (issue 2's list of bad inputs: unreadable
or truncated files, no spectrum, non-monotonic or duplicated wavelengths, length mismatch,
all-NaN flux, bad uncertainties masked, absurd declared sizes refused before allocating) and
of the batch contract (failure isolation, sanitised names).
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

import corpus as corpus_mod
from helpers import limit_memory, run_zsieve, snapshot, subprocess_env

RUNNER = Path(__file__).with_name("runner.py")
#: Per-case time limit (s) inside the runner; generous: a bound against hangs, not a target.
CASE_TIMEOUT_S = 30.0
#: The whole runner pass / the whole CLI pass may not take longer than this (s).
PASS_TIMEOUT_S = 600.0
RESAMPLES = 10
#: Families whose spectra the runner also measures in-process (odd numbers: NaN/inf runs, huge
#: and tiny values, bad uncertainties, reversed grids, clean baselines). Every case is measured
#: by the ``zsieve fit`` pass below; this keeps the two passes inside CI time.
MEASURE_FAMILIES = ("base", "values", "sigma", "order")
#: Memory a limit case may trace while being refused (MiB): nothing near the declared size.
LIMIT_PEAK_MB = 64.0
#: z tolerance of the clean cases: 0.002 (1+z), far above the engine's error for 11 strong
#: lines and far below any line confusion (common practice for a "correct" redshift is
#: |dz| < 0.001-0.003 (1+z)).
Z_TOL = 0.002

FAMILIES = ("base", "trunc", "wcs", "limit", "shape", "values", "order", "sigma", "units", "text",
            "garbage", "object", "header", "bitflip")


@pytest.fixture(scope="session")
def corpus(tmp_path_factory):
    root = tmp_path_factory.mktemp("robust_corpus")
    cdir = root / "corpus"
    cases = corpus_mod.build_corpus(cdir)
    return cdir, cases


def _run_runner(cdir: Path, cases, workdir: Path) -> dict:
    """Run every case in the runner subprocess; restart after a crash, marking the culprit."""
    results: dict[str, dict] = {}
    todo = [c.to_dict() for c in cases]
    attempt = 0
    while todo and attempt < 20:
        attempt += 1
        cases_json = workdir / f"cases_{attempt}.json"
        out_jsonl = workdir / f"results_{attempt}.jsonl"
        cases_json.write_text(json.dumps(todo))
        cmd = [sys.executable, str(RUNNER), str(cdir), str(cases_json), str(out_jsonl),
               "--timeout", str(CASE_TIMEOUT_S), "--resamples", str(RESAMPLES),
               "--measure-families", ",".join(MEASURE_FAMILIES)]
        try:
            proc = subprocess.run(cmd, capture_output=True, text=True, timeout=PASS_TIMEOUT_S,
                                  preexec_fn=limit_memory(), env=subprocess_env())
            died = proc.returncode != 0
            tail = (proc.stderr or "")[-2000:]
        except subprocess.TimeoutExpired as exc:
            died, tail = True, f"runner timed out after {PASS_TIMEOUT_S} s: {exc}"
        running = None
        if out_jsonl.exists():
            for line in out_jsonl.read_text().splitlines():
                rec = json.loads(line)
                if rec["event"] == "start":
                    running = rec["name"]
                else:
                    results[rec["name"]] = rec
                    running = None
        if died and running is not None:
            results[running] = {"name": running, "outcome": "crash", "message": tail}
        todo = [c for c in todo if c["name"] not in results]
        if died and running is None:  # died outside any case (e.g. at import): give up
            for c in todo:
                results[c["name"]] = {"name": c["name"], "outcome": "crash", "message": tail}
            todo = []
    return results


@pytest.fixture(scope="module")
def runner_results(corpus, tmp_path_factory):
    cdir, cases = corpus
    return _run_runner(cdir, cases, tmp_path_factory.mktemp("runner"))


def _clean_error_problems(case, rec) -> list[str]:
    msg = rec.get("message") or ""
    probs = []
    path = rec.get("path", "")
    if not msg.startswith(f"{path}: ") or len(msg) <= len(path) + 5:
        probs.append(f"error message does not name the file and a problem: {msg[:200]!r}")
    if "\n" in msg or "\r" in msg:
        probs.append(f"error message is not one line: {msg[:200]!r}")
    if len(msg) > len(path) + 600:
        probs.append(f"error message is {len(msg)} characters long")
    if case.limit:
        if not rec.get("is_limit"):
            probs.append(f"expected LimitExceededError, got {rec.get('exc_type')}: {msg[:160]!r}")
        peak = rec.get("peak_mb")
        if peak is not None and peak > LIMIT_PEAK_MB:
            probs.append(f"refusal allocated {peak:.0f} MiB first")
    return probs


def _fit_problems(case, rec, strict: bool) -> list[str]:
    probs = []
    statuses = rec.get("statuses") or []
    if not rec.get("n_spectra"):
        probs.append("read_spectra returned no spectrum and raised nothing")
    elif rec.get("measured") and len(statuses) != rec.get("n_spectra"):
        probs.append(f"measured {len(statuses)} of {rec.get('n_spectra')} spectra")
    elif strict and any(s != "ok" for s in statuses):
        probs.append(f"usable data but measure() gave status {statuses}: {rec.get('message')!r}")
    if case.wave_range is not None and rec.get("wave_min"):
        lo, hi = case.wave_range
        off = max(abs(rec["wave_min"] / lo - 1), abs(rec["wave_max"] / hi - 1))
        if off > 0.005:
            warned = bool(rec.get("log_warnings"))
            if strict or not warned:
                probs.append(
                    f"wavelengths read as {rec['wave_min']:.6g}-{rec['wave_max']:.6g} A, truly "
                    f"{lo:.6g}-{hi:.6g} A" + ("" if warned else ", and no warning was logged")
                )
    if strict and case.z_true is not None and statuses:
        z = rec.get("z")
        if z is None or abs(z - case.z_true) > Z_TOL * (1 + case.z_true):
            probs.append(f"z = {z} (grade {rec.get('grade')}), the spectrum is at z = {case.z_true}")
    return probs


def case_problems(case, rec) -> list[str]:
    """Why a case did not end as its declaration says (empty list: it did)."""
    if rec is None:
        return ["was not run"]
    outcome = rec.get("outcome")
    if outcome not in ("fit", "error"):
        where = rec.get("stage", "?")
        return [f"{outcome} during {where}: {rec.get('exc_type', '')} {str(rec.get('message'))[:300]!r}"]
    if case.expect == "fit":
        if outcome != "fit":
            return [f"usable data refused: {rec.get('message', '')[:200]!r}"]
        return _fit_problems(case, rec, strict=True)
    if case.expect == "reject":
        if outcome == "error":
            return _clean_error_problems(case, rec)
        statuses = rec.get("statuses") or []
        # clean: a failed result, or an "ok" result that claims no redshift (z NaN, grade none)
        # and says why
        claims = any(s == "ok" for s in statuses) and (rec.get("z") is not None or rec.get("grade") != "none")
        if not statuses or claims or len((rec.get("message") or "").strip()) < 5:
            return [f"too little data, yet neither refused nor failed cleanly (statuses {statuses}, "
                    f"z={rec.get('z')}, message {rec.get('message')!r})"]
        return []
    if case.expect == "error":
        if outcome != "error":
            return [f"unusable data accepted (status {rec.get('statuses')}, z={rec.get('z')})"]
        return _clean_error_problems(case, rec)
    # either
    if outcome == "error":
        return _clean_error_problems(case, rec)
    return _fit_problems(case, rec, strict=False)


def test_corpus_is_large_and_mixed(corpus):
    cdir, cases = corpus
    assert len(cases) >= 200
    exts = {c.filename.split(".", 1)[1] for c in cases}
    assert {"fits", "csv"} <= exts
    assert {c.family for c in cases} == set(FAMILIES)
    assert all(c.expect in ("fit", "error", "reject", "either") for c in cases)
    # the files are really there (the sparse ones report their full size)
    assert all((cdir / c.filename).exists() for c in cases)
    assert sum(c.limit for c in cases) >= 6


@pytest.mark.parametrize("family", FAMILIES)
def test_family_ends_cleanly(family, corpus, runner_results):
    cdir, cases = corpus
    bad = []
    for case in (c for c in cases if c.family == family):
        for p in case_problems(case, runner_results.get(case.name)):
            bad.append(f"{case.filename} [{case.expect}: {case.why}]: {p}")
    assert not bad, f"{len(bad)} problem(s):\n" + "\n".join(bad)


def test_no_case_is_slow(corpus, runner_results):
    """Each case finished inside its own time bound (hangs are caught as 'timeout' above)."""
    cdir, cases = corpus
    slow = {n: r.get("seconds") for n, r in runner_results.items()
            if (r.get("seconds") or 0) > CASE_TIMEOUT_S}
    assert not slow


# ----------------------------------------------------------------- the real command
@pytest.fixture(scope="module")
def cli_run(corpus, tmp_path_factory):
    cdir, cases = corpus
    root = tmp_path_factory.mktemp("cli_corpus")
    out = root / "out"
    cwd = root / "cwd"
    cwd.mkdir()
    before_corpus = snapshot(cdir)
    before_root = snapshot(root)
    escape = Path("/tmp/zsieve-escape")
    escape_before = escape.exists()
    proc = run_zsieve(["fit", cdir, "--out", out, "--resamples", RESAMPLES, "--no-figures",
                       "--jobs", 2, "--seed", 1], timeout=PASS_TIMEOUT_S, cwd=cwd)
    return dict(proc=proc, out=out, cwd=cwd, root=root, cdir=cdir, cases=cases,
                before_corpus=before_corpus, before_root=before_root,
                escape_created=escape.exists() and not escape_before)


def _summary_rows(out: Path):
    with open(out / "summary.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_cli_exits_zero_without_traceback(cli_run):
    proc = cli_run["proc"]
    assert "Traceback" not in proc.stderr, proc.stderr[-3000:]
    assert proc.returncode == 0, proc.stderr[-3000:]


def test_cli_one_summary_row_per_input(cli_run):
    """One row per input file (a file holding several spectra adds rows with index 1, 2, ...)."""
    cases = cli_run["cases"]
    rows = _summary_rows(cli_run["out"])
    firsts = [Path(r["file"]).name for r in rows if int(r.get("index") or 0) == 0]
    wanted = {c.filename for c in cases}
    missing = sorted(wanted - set(firsts))
    doubled = sorted(n for n in wanted if firsts.count(n) > 1)
    extra = sorted(set(Path(r["file"]).name for r in rows) - wanted)
    assert not missing and not doubled and not extra, dict(missing=missing, doubled=doubled, extra=extra)
    pairs = [(r["file"], r.get("index")) for r in rows]
    assert len(set(pairs)) == len(pairs), "a spectrum appears twice"
    assert len({r["key"] for r in rows}) == len(rows), "two rows share an output key"


def test_cli_rows_say_what_happened(cli_run):
    cases = {c.filename: c for c in cli_run["cases"]}
    bad = []
    for row in _summary_rows(cli_run["out"]):
        case = cases.get(Path(row["file"]).name)
        if case is None:
            continue
        status, msg = row["status"], (row.get("message") or "")
        if status not in ("ok", "failed", "skipped"):
            bad.append(f"{case.filename}: status {status!r}")
        if status != "ok" and len(msg.strip()) < 5:
            bad.append(f"{case.filename}: status {status} without a message")
        if "Traceback" in msg or "\n" in msg:
            bad.append(f"{case.filename}: message is not one line: {msg[:200]!r}")
        if case.expect == "fit" and status != "ok":
            bad.append(f"{case.filename} (usable): {status}: {msg[:200]}")
        if case.expect in ("error", "reject") and status == "ok" and _finite(row.get("z")):
            bad.append(f"{case.filename} (unusable: {case.why}): a redshift was claimed, z={row.get('z')}")
        if case.expect == "fit" and status == "ok" and case.z_true is not None:
            z = float(row["z"]) if row.get("z") not in (None, "") else float("nan")
            if not abs(z - case.z_true) <= Z_TOL * (1 + case.z_true):
                bad.append(f"{case.filename}: z = {row.get('z')} (grade {row.get('grade')}), "
                           f"the spectrum is at z = {case.z_true}")
        if row.get("grade") not in ("secure", "likely", "tentative", "none"):
            bad.append(f"{case.filename}: grade {row.get('grade')!r}")
        conf = row.get("confidence")
        if conf not in (None, "") and not (0.0 <= float(conf) <= 1.0):
            bad.append(f"{case.filename}: confidence {conf}")
    assert not bad, "\n".join(bad)


def _finite(text) -> bool:
    try:
        v = float(text)
    except (TypeError, ValueError):
        return False
    return v == v and abs(v) != float("inf")


def test_cli_writes_nothing_outside_out(cli_run):
    out, root, cdir = cli_run["out"], cli_run["root"], cli_run["cdir"]
    assert snapshot(cdir) == cli_run["before_corpus"], "the input folder was modified"
    assert list(cli_run["cwd"].iterdir()) == [], "files appeared in the working directory"
    after = snapshot(root, exclude=out)
    new = set(after) - set(cli_run["before_root"])
    assert not new, f"written outside OUT: {sorted(new)[:10]}"
    assert not cli_run["escape_created"], "a hostile OBJECT name escaped to /tmp"
    real_out = out.resolve()
    for dirpath, dirnames, filenames in os.walk(out):
        for name in filenames + dirnames:
            p = Path(dirpath) / name
            assert not p.is_symlink(), p
            assert real_out in p.resolve().parents, p
            assert all(32 <= ord(ch) != 127 for ch in name), f"control character in {name!r}"
            assert len(name.encode()) <= 255


def test_cli_records_parse(cli_run):
    out = cli_run["out"]
    rows = _summary_rows(out)
    n_ok = sum(r["status"] == "ok" for r in rows)
    records = list((out / "objects").glob("*.json"))
    assert len(records) >= n_ok
    for p in records:
        json.loads(p.read_text(encoding="utf-8"))
    leftovers = [p for p in out.rglob("*") if p.name.endswith(".part")]
    assert not leftovers
