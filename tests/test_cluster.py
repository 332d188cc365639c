"""The batch on a Dask cluster (zsieve.cluster): same records as a local run, resume, hand
decisions, a worker killed mid-run, streamed submission, and Dask kept off the default path.

Outside references: the local run of zsieve.batch with the same seed (the catalogue the Dask
path must reproduce record for record), hashlib's SHA-256 of each input (FIPS 180-4), astropy's
ECSV reader, POSIX SIGKILL on a worker process, and dask.distributed's own LocalCluster,
Client.run and scheduler state. Small: 6 mock spectra, 10 resamples, no figures, 2 workers of
one thread each.
"""

import difflib
import hashlib
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed", reason="the optional zsieve[dask] extra is not installed")

from zsieve import cluster  # noqa: E402
from zsieve.batch import BatchError, BatchSettings, run_batch  # noqa: E402
from zsieve.engine.measure import MeasureConfig  # noqa: E402

N_SPECTRA = 6
#: The only record fields that may differ between two runs of the same inputs and settings: the
#: wall-clock time the record was written (found by diffing two local runs of the same folder).
TIMING_FIELD = re.compile(r'"time": "\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ"')


def _settings(**kw) -> BatchSettings:
    return BatchSettings(config=MeasureConfig(n_resamples=10, seed=1), figures=False, progress=False, **kw)


@pytest.fixture(scope="module")
def data(tmp_path_factory) -> Path:
    from zsieve.io import write_fits_table
    from zsieve.simulate import mock_set

    folder = tmp_path_factory.mktemp("cluster") / "data"
    folder.mkdir()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (spec, _) in enumerate(mock_set(N_SPECTRA, seed=8)):
            spec = spec.replace(meta=spec.meta.replace(object_name=f"CDX-{i + 101:04d}"))
            write_fits_table(spec, folder / f"cdx-{i + 101:04d}.fits")
    (folder / "damaged.csv").write_text("wavelength,flux,error\n5000,1.0,0.1\nabc,def,ghi\n")
    (folder / "night-notes.txt").write_text("thin cirrus after 02:00\n")
    return folder


@pytest.fixture(scope="module")
def reference(data, tmp_path_factory) -> Path:
    """The local run (this process, --jobs 1) that the Dask runs must reproduce."""
    out = tmp_path_factory.mktemp("ref") / "out"
    run_batch([str(data)], out, _settings(jobs=1))
    return out


@pytest.fixture(scope="module")
def local_cluster():
    """``local:2`` as zsieve starts it (2 worker processes, 1 thread each, 127.0.0.1, no dashboard);
    the tests reach into it (worker pids, scheduler state) and pass it on by address."""
    with cluster.connect("local:2") as client:
        lc = client.cluster
        assert isinstance(lc, distributed.LocalCluster) and lc.scheduler_address.startswith("tcp://127.0.0.1:")
        assert sorted(client.nthreads().values()) == [1, 1]
        yield lc, client


def _records(out: Path) -> dict[str, str]:
    return {p.name: p.read_text() for p in sorted((out / "objects").glob("*.json"))}


def _assert_same_records(out: Path, ref: Path, only=None):
    """Byte-for-byte the same JSON records, apart from the write time (once per record)."""
    a, b = _records(ref), _records(out)
    if only is not None:
        a = {k: v for k, v in a.items() if k in only}
    assert set(b) == set(a)
    for name in a:
        ta, na = TIMING_FIELD.subn('"time": "-"', a[name])
        tb, nb = TIMING_FIELD.subn('"time": "-"', b[name])
        assert na == nb == 1, name
        if ta != tb:
            diff = [ln for ln in difflib.ndiff(ta.splitlines(), tb.splitlines()) if ln[:2] in ("- ", "+ ")]
            raise AssertionError((name, [ln[:300] for ln in diff[:4]]))


def _table(out: Path):
    from astropy.table import Table

    return Table.read(out / "summary.ecsv", format="ascii.ecsv")


def test_dask_run_gives_the_local_catalogue(data, reference, local_cluster, tmp_path):
    lc, client = local_cluster
    out = tmp_path / "out"
    in_cluster = []

    def watch(row):  # streamed submission: the scheduler never holds more than the window
        in_cluster.append(client.run_on_scheduler(lambda dask_scheduler: len(dask_scheduler.tasks)))

    summary = cluster.run([str(data)], out, _settings(in_flight_per_job=1), scheduler=lc.scheduler_address,
                          on_row=watch)
    assert summary.n_fitted_now == N_SPECTRA + 1 and summary.rows == N_SPECTRA + 2
    assert max(in_cluster) <= 2  # 2 worker threads x 1 task each
    _assert_same_records(out, reference)
    # the summary tables are assembled from the records: the CSV is identical, the ECSV reads
    # back with astropy with the same rows and units
    assert (out / "summary.csv").read_bytes() == (reference / "summary.csv").read_bytes()
    t, t0 = _table(out), _table(reference)
    assert list(t["key"]) == list(t0["key"]) and str(t["lum_distance"].unit) == "Mpc"
    by_status = {str(s): int(np.sum(t["status"] == s)) for s in set(t["status"])}
    assert by_status == {"ok": N_SPECTRA, "failed": 1, "skipped": 1}
    for r in t[t["status"] == "ok"]:  # FIPS 180-4 SHA-256 of each input, via hashlib
        rec = json.loads((out / "objects" / f"{r['key']}.json").read_text())
        assert rec["provenance"]["input_sha256"] == hashlib.sha256(Path(r["file"]).read_bytes()).hexdigest()


def test_resume_and_hand_decisions_through_a_scheduler_address(data, reference, local_cluster, tmp_path):
    from zsieve.refit.decisions import append_decision, make_decision

    lc, _ = local_cluster
    out = tmp_path / "out"
    shutil.copytree(reference, out)
    before = {p.name: p.stat().st_mtime_ns for p in (out / "objects").glob("*.json")}
    s = cluster.run([str(data)], out, _settings(), scheduler=lc.scheduler_address)
    assert s.n_fitted_now == 0 and s.n_reused == N_SPECTRA + 1  # the local run's records are reused
    assert {p.name: p.stat().st_mtime_ns for p in (out / "objects").glob("*.json")} == before
    key = str(_table(out)["key"][0])
    append_decision(out, make_decision(key=key, file="x", action="type-z", z=0.5123, grade="likely",
                                       comment="[O II] doublet by eye", user="observer"))
    cluster.run([str(data)], out, _settings(), scheduler=lc.scheduler_address)
    row = _table(out)[0]
    assert row["key"] == key and row["z"] == pytest.approx(0.5123) and row["grade"] == "likely"
    # a refit under other settings (of that file only) keeps the decision, as a local run does
    s = cluster.run([str(row["file"])], out, BatchSettings(config=MeasureConfig(n_resamples=6, seed=1), figures=False,
                                                            progress=False), scheduler=lc.scheduler_address)
    assert s.n_fitted_now == 1 and _table(out)[0]["z"] == pytest.approx(0.5123)
    rec = json.loads((out / "objects" / f"{key}.json").read_text())
    assert rec["hand"]["z"] == pytest.approx(0.5123) and len(rec["z_samples"]) == 6


def test_cli_scheduler_option(data, reference, local_cluster, tmp_path, capsys):
    from zsieve.cli import main

    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    if "--scheduler" not in capsys.readouterr().out:
        pytest.skip("needs --scheduler patch")
    lc, _ = local_cluster
    out = tmp_path / "out"
    files = [str(data / "cdx-0101.fits"), str(data / "cdx-0102.fits")]
    rc = main(["fit", *files, "--out", str(out), "--scheduler", lc.scheduler_address, "--resamples", "10",
               "--seed", "1", "--no-figures", "--no-progress"])
    assert rc == 0
    _assert_same_records(out, reference, only={"cdx-0101.fits.json", "cdx-0102.fits.json"})
    assert main(["fit", *files, "--out", str(out), "--scheduler", "local:zero"]) == 2


def test_interrupted_dask_run_keeps_its_records_and_resumes(data, reference, local_cluster, tmp_path):
    lc, _ = local_cluster
    out = tmp_path / "out"
    files = [str(p) for p in sorted(data.glob("cdx-*.fits"))]

    pressed = []

    def ctrl_c(row):  # Ctrl-C, once, as the first measurement comes back
        if row["status"] == "ok" and not pressed:
            pressed.append(row["key"])
            raise KeyboardInterrupt

    # a window of one task per worker thread, so that work remains however fast the workers
    # are against this process (with the default window all 6 can finish before the first
    # row is taken)
    s = cluster.run(files, out, _settings(in_flight_per_job=1), scheduler=lc.scheduler_address, on_row=ctrl_c)
    assert s.interrupted
    made = _records(out)
    assert 0 < len(made) < len(files)
    time.sleep(2.0)  # tasks not started were cancelled, those running were awaited: nothing comes late
    assert _records(out) == made and len(_table(out)) == len(made)
    s = cluster.run(files, out, _settings(), scheduler=lc.scheduler_address)
    assert not s.interrupted and s.n_reused == len(made) and s.n_fitted_now == len(files) - len(made)
    _assert_same_records(out, reference, only={os.path.basename(f) + ".json" for f in files})


def test_killed_worker_loses_and_duplicates_nothing(data, reference, local_cluster, tmp_path):
    lc, client = local_cluster
    out = tmp_path / "out"
    killed = {}

    def kill_one(row):
        if killed or row["status"] != "ok":
            return
        busy = [w for w, keys in client.processing().items() if keys]
        if not busy:
            return
        pid = client.run(os.getpid, workers=[busy[0]])[busy[0]]
        os.kill(pid, signal.SIGKILL)  # POSIX: no chance to clean up or report
        killed["pid"] = pid

    files = [str(p) for p in sorted(data.glob("cdx-*.fits"))[:4]]
    s = cluster.run(files, out, _settings(), scheduler=lc.scheduler_address, on_row=kill_one)
    assert killed, "no worker was busy when the first result came back"
    assert killed["pid"] not in client.run(os.getpid).values()  # gone (its nanny may be restarting it)
    t = _table(out)
    assert len(t) == len(files) and len(set(t["key"])) == len(t) and len(set(t["file"])) == len(t)
    assert s.rows == len(t)
    assert len(list((out / "objects").glob("*.json"))) == len(t)  # exactly one record per input
    assert not any("died" in str(m) for m in t["message"])  # retried at once, not left for the next run
    _assert_same_records(out, reference, only={os.path.basename(f) + ".json" for f in files})


def test_dask_stays_off_the_default_path(data, tmp_path):
    code = (
        "import sys, zsieve, zsieve.batch, zsieve.cluster, zsieve.cli.fit\n"
        "from zsieve.batch import BatchSettings, run_batch\n"
        f"s = run_batch([{str(data / 'damaged.csv')!r}], {str(tmp_path / 'o')!r}, BatchSettings(progress=False))\n"
        "assert s.rows == 1, s.line()\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed'))\n"
        "assert not bad, bad\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr


def test_missing_dask_says_what_to_install(data, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if the extra were not installed
    with pytest.raises(BatchError, match=r"install zsieve\[dask\]"):
        cluster.run([str(data)], tmp_path / "out", _settings(), scheduler="local:2")
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("text", ["", "local:0", "local:two", "local:-3"])
def test_bad_scheduler_text(text):
    with pytest.raises(BatchError, match="scheduler"):
        cluster.parse_scheduler(text)


def test_unreachable_scheduler_is_a_clear_error():
    with pytest.raises(BatchError, match="cannot reach the Dask scheduler"):
        with cluster.connect("tcp://127.0.0.1:9", connect_timeout_s=1.0):
            pass
