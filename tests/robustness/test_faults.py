"""Fault tests on the batch: SIGKILL at random points then resume; unwritable and full outputs.

* ``zsieve fit`` runs in a subprocess (its own process group, so the kill reaches its worker
  processes too, as a kill of a job by a scheduler would) on 30 mock spectra and is killed
  with SIGKILL at seeded random moments - some by time, some when a seeded number of records
  exist - several times; then it is run to completion. Afterwards: one summary row per input,
  every JSON record parses, no temporary ``.part`` file is left, the hand decisions appended
  to ``decisions.log`` between the kills are intact byte for byte and in force in the
  records and the summary, and no record that was complete at some moment is missing or
  unreadable later ("records lost" = 0).
* An output folder that cannot be written (a path below a regular file; a read-only folder:
  ``chmod`` as a normal user, the immutable attribute as root, for whom ``chmod`` is no
  barrier) and a full disk (ENOSPC from ``os.fsync`` in the process; EFBIG from the kernel
  under ``RLIMIT_FSIZE``) each give a one-line error and no traceback.
"""

from __future__ import annotations

import csv
import errno
import json
import os
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from helpers import MEMORY_LIMIT_BYTES, limit_memory, run_zsieve, subprocess_env, zsieve_command

N_SPECTRA = 30
KILL_SEED = 20261202
N_KILLS = 4
RUN_TIMEOUT_S = 300.0
FIT_ARGS = ["--resamples", "5", "--no-figures", "--jobs", "2", "--seed", "3", "--no-progress"]


def _write_mocks(folder: Path, n: int = N_SPECTRA, seed: int = 11) -> list[Path]:
    from zsieve.io import write_fits_image, write_fits_table, write_text
    from zsieve.simulate import mock_set

    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    kinds = ("emission-galaxy", "absorption-galaxy", "quasar", "star")
    for i, (spec, truth) in enumerate(mock_set(n, seed, kinds=kinds, dlog10=3e-4, wave_range=(3800.0, 9200.0))):
        stem = folder / f"cdx-{i:04d}"
        if i % 3 == 0:
            p = stem.with_suffix(".fits")
            write_fits_image(spec, p, sampling="log")
        elif i % 3 == 1:
            p = stem.with_name(stem.name + "-t.fits")
            write_fits_table(spec, p)
        else:
            p = stem.with_suffix(".csv")
            write_text(spec, p)
        paths.append(p)
    return paths


@pytest.fixture(scope="module")
def mocks(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fault_inputs") / "night1"
    return folder, _write_mocks(folder)


def _records(out: Path) -> dict[str, str]:
    """Complete (parseable) records now in OUT/objects: key -> text."""
    found = {}
    objects = out / "objects"
    if not objects.is_dir():
        return found
    for p in objects.glob("*.json"):
        try:
            text = p.read_text(encoding="utf-8")
            json.loads(text)
        except (OSError, ValueError):
            continue
        found[p.stem] = text
    return found


def _start(data: Path, out: Path, cwd: Path) -> subprocess.Popen:
    return subprocess.Popen(
        zsieve_command() + ["fit", str(data), "--out", str(out)] + FIT_ARGS,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=cwd,
        preexec_fn=_group_and_limit, env=subprocess_env(),
    )


def _group_and_limit():
    os.setsid()  # own process group: the kill takes the workers too
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY_LIMIT_BYTES, MEMORY_LIMIT_BYTES))


def _kill_group(proc: subprocess.Popen) -> None:
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.communicate(timeout=60)


def _wait_for(proc, out: Path, *, seconds: float | None = None, n_records: int | None = None,
              limit_s: float = RUN_TIMEOUT_S) -> bool:
    """Wait until the trigger; return False if the run ended by itself first."""
    t0 = time.monotonic()
    while proc.poll() is None:
        if seconds is not None and time.monotonic() - t0 >= seconds:
            return True
        if n_records is not None and len(_records(out)) >= n_records:
            return True
        if time.monotonic() - t0 > limit_s:
            return True
        time.sleep(0.02)
    return False


def kill_and_resume(data: Path, paths, root: Path, *, n_kills: int = N_KILLS, seed: int = KILL_SEED,
                    n_inputs: int = N_SPECTRA) -> dict:
    """Kill ``zsieve fit`` ``n_kills`` times at seeded random points, then let it finish.

    Returns the output folder, the final CompletedProcess, the tally (killed, resumed, lost),
    the lost keys and the decision lines appended between kills.
    """
    from zsieve.refit.decisions import append_decision, make_decision

    out, cwd = root / "out", root / "cwd"
    cwd.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    tally = {"killed": 0, "finished_before_kill": 0, "resumed": 0, "lost": 0}
    lost: list[str] = []
    seen: dict[str, str] = {}
    decision_lines: list[bytes] = []
    for i in range(n_kills):
        tally["resumed"] += int(i > 0)  # every run after the first resumes a killed one
        proc = _start(data, out, cwd)
        have = len(_records(out))
        if i == 0:
            killed = _wait_for(proc, out, seconds=float(rng.uniform(0.2, 2.0)))  # start-up
        else:
            target = min(n_inputs - 1, have + int(rng.integers(1, 7)))
            killed = _wait_for(proc, out, n_records=target)
            time.sleep(float(rng.uniform(0.0, 0.3)))  # somewhere inside the next write
        if proc.poll() is None:
            _kill_group(proc)
            tally["killed"] += 1
        else:
            proc.communicate()
            tally["finished_before_kill"] += int(not killed)
        recs = _records(out)
        lost.extend(k for k in seen if k not in recs)  # complete before, gone now
        seen.update(recs)
        if i >= 1 and recs:  # a hand decision between kills, on an object already fitted
            key = sorted(recs)[int(rng.integers(0, len(recs)))]
            rec = json.loads(recs[key])
            dec = make_decision(key=key, file=rec.get("file", ""), action="type-z",
                                z=round(0.1 + 0.01 * i, 5), grade="secure",
                                previous_z=rec.get("z"), previous_grade=rec.get("grade"),
                                comment=f"fault test decision {i}", user="tester",
                                time=f"2026-12-02T04:0{i}:00Z")
            append_decision(out, dec)
            decision_lines.append((out / "decisions.log").read_bytes().splitlines()[-1])
    final = run_zsieve(["fit", data, "--out", out] + FIT_ARGS, timeout=RUN_TIMEOUT_S, cwd=cwd)
    tally["resumed"] += 1
    recs = _records(out)
    for key in seen:
        if key not in recs:
            lost.append(key)
    tally["lost"] = len(set(lost))
    return dict(out=out, data=data, paths=paths, final=final, tally=tally, lost=sorted(set(lost)),
                decision_lines=decision_lines, cwd=cwd)


@pytest.fixture(scope="module")
def fault_run(mocks, tmp_path_factory):
    data, paths = mocks
    return kill_and_resume(data, paths, tmp_path_factory.mktemp("fault_out"))


def test_kills_happened_mid_run(fault_run):
    assert fault_run["tally"]["killed"] >= N_KILLS - 1, fault_run["tally"]


def test_resumed_run_completes(fault_run):
    final = fault_run["final"]
    assert "Traceback" not in final.stderr, final.stderr[-3000:]
    assert final.returncode == 0, final.stderr[-3000:]


def test_one_row_per_input_after_kills(fault_run):
    with open(fault_run["out"] / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    files = sorted(Path(r["file"]).name for r in rows)
    assert files == sorted(p.name for p in fault_run["paths"])
    assert len({r["key"] for r in rows}) == len(rows) == N_SPECTRA
    assert all(r["status"] == "ok" for r in rows), [r for r in rows if r["status"] != "ok"]
    from astropy.table import Table

    t = Table.read(fault_run["out"] / "summary.ecsv", format="ascii.ecsv")
    assert len(t) == N_SPECTRA


def test_every_record_parses_and_none_lost(fault_run):
    out = fault_run["out"]
    records = sorted((out / "objects").glob("*.json"))
    assert len(records) == N_SPECTRA
    for p in records:
        rec = json.loads(p.read_text(encoding="utf-8"))
        assert rec["status"] == "ok"
    assert fault_run["lost"] == [], fault_run["lost"]


def test_no_temporary_files_left(fault_run):
    out = fault_run["out"]
    leftovers = [str(p.relative_to(out)) for p in out.rglob("*")
                 if p.name.endswith(".part") or (p.name.startswith(".") and p.name != ".zsieve-fit.lock")]
    assert not leftovers, leftovers


def test_hand_decisions_intact(fault_run):
    from zsieve.refit.decisions import in_force, read_decisions

    out = fault_run["out"]
    lines = (out / "decisions.log").read_bytes().splitlines()
    assert lines == fault_run["decision_lines"], "decisions.log was rewritten"
    assert len(lines) >= 2
    force = in_force(read_decisions(out))
    with open(out / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = {r["key"]: r for r in csv.DictReader(fh)}
    for key, dec in force.items():
        rec = json.loads((out / "objects" / f"{key}.json").read_text(encoding="utf-8"))
        assert rec.get("hand") and rec["hand"]["z"] == dec["z"], (key, rec.get("hand"), dec)
        assert float(rows[key]["z"]) == pytest.approx(dec["z"]), (key, rows[key]["z"], dec["z"])


# -------------------------------------------------------------- unwritable and full outputs
def _one_line_error(proc) -> str:
    assert "Traceback" not in proc.stderr and "Traceback" not in proc.stdout, proc.stderr[-3000:]
    assert proc.returncode != 0, (proc.returncode, proc.stdout[-500:], proc.stderr[-500:])
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert lines, "no error message at all"
    return lines[-1]


@pytest.fixture(scope="module")
def few_mocks(tmp_path_factory):
    folder = tmp_path_factory.mktemp("few") / "night2"
    return folder, _write_mocks(folder, n=3, seed=5)


def test_output_below_a_regular_file(few_mocks, tmp_path):
    data, _ = few_mocks
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    proc = run_zsieve(["fit", data, "--out", blocker / "out"] + FIT_ARGS, timeout=RUN_TIMEOUT_S)
    line = _one_line_error(proc)
    assert "a-file" in line
    assert blocker.read_text() == "not a folder"


def _make_read_only(folder: Path):
    """Make ``folder`` unwritable for this user; returns an undo function, or None."""
    if os.geteuid() != 0:
        folder.chmod(0o555)
        return lambda: folder.chmod(0o755)
    # root ignores permission bits; the immutable attribute (ext2/3/4, xfs, btrfs) binds root too
    chattr = shutil.which("chattr")
    if chattr is None:
        return None
    if subprocess.run([chattr, "+i", str(folder)], capture_output=True).returncode != 0:
        return None
    return lambda: subprocess.run([chattr, "-i", str(folder)], capture_output=True)


def test_read_only_output_folder(few_mocks, tmp_path):
    data, _ = few_mocks
    out = tmp_path / "ro"
    out.mkdir()
    undo = _make_read_only(out)
    if undo is None:
        pytest.skip("running as root on a file system without the immutable attribute: "
                    "no way to make a folder read-only for root here")
    try:
        probe = out / "probe"
        try:
            probe.write_text("x")
            probe.unlink()
            pytest.skip("the folder stayed writable despite chmod/chattr")
        except OSError:
            pass
        proc = run_zsieve(["fit", data, "--out", out] + FIT_ARGS, timeout=RUN_TIMEOUT_S)
    finally:
        undo()
    line = _one_line_error(proc)
    assert str(out) in line or "ro" in line
    assert list(out.iterdir()) == []


_ENOSPC_WRAPPER = r"""
import errno, os, sys
LIMIT = int(sys.argv[1])
_real = os.fsync
calls = [0]
def fsync(fd):
    calls[0] += 1
    if calls[0] > LIMIT:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    return _real(fd)
os.fsync = fsync
from zsieve.cli import main
sys.exit(main(sys.argv[2:]))
"""


@pytest.mark.parametrize("after", [0, 6])
def test_disk_full_enospc(few_mocks, tmp_path, after):
    """The disk fills up at the start (after=0) or in the middle of the run (after some writes)."""
    data, _ = few_mocks
    out = tmp_path / "full"
    args = ["fit", str(data), "--out", str(out), "--resamples", "5", "--no-figures", "--jobs", "1",
            "--no-progress"]
    proc = subprocess.run([sys.executable, "-c", _ENOSPC_WRAPPER, str(after)] + args,
                          capture_output=True, text=True, timeout=RUN_TIMEOUT_S,
                          preexec_fn=limit_memory(), env=subprocess_env())
    line = _one_line_error(proc)
    assert os.strerror(errno.ENOSPC) in line, line
    leftovers = [p for p in out.rglob("*.part")] if out.exists() else []
    assert not leftovers


def test_disk_full_file_size_limit(few_mocks, tmp_path):
    """Real kernel failure (EFBIG) for every write past 4 kB, in the installed command."""
    data, _ = few_mocks
    out = tmp_path / "fsize"

    def limits():
        limit_memory()()
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (4096, 4096))

    proc = run_zsieve(["fit", data, "--out", out, "--resamples", "5", "--no-figures", "--jobs", "1",
                       "--no-progress"], timeout=RUN_TIMEOUT_S, preexec_fn=limits)
    line = _one_line_error(proc)
    assert os.strerror(errno.EFBIG) in line, line
