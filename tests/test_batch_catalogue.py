"""The batch's on-disk catalogue and streamed tables: flat client memory, a rebuildable cache,
and tables identical to what astropy writes for the whole table at once.

Outside references: Python's tracemalloc (peak of the client's Python allocations), astropy's
ECSV 1.0 reader (units and metadata read back) and astropy's own whole-table ECSV/CSV writers
(the bytes the streamed writer must reproduce), Python's html.parser (the index page), and
SQLite's own file header check (a damaged catalogue file is refused by sqlite3 and rebuilt).
Inputs are zsieve.simulate mocks written with zsieve.io, plus plain-text files that are not
spectra (each is a real ``skipped`` row with a record, read and written like any other).
"""

import json
import os
import shutil
import tracemalloc
import warnings
from pathlib import Path

import numpy as np
import pytest

from zsieve.batch import BatchSettings, run_batch
from zsieve.engine.measure import MeasureConfig
from zsieve.report import summary as summ
from zsieve.report.summary import CATALOGUE_NAME, Catalogue, build_table, rebuild_summary

SETTINGS = dict(config=MeasureConfig(n_resamples=5, seed=3), figures=False, progress=False, jobs=1)


def _spectra(folder: Path, n: int = 2, seed: int = 4) -> None:
    from zsieve.io import write_fits_table
    from zsieve.simulate import mock_spectrum

    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i in range(n):
            spec, _ = mock_spectrum("emission-galaxy", 0.2 + 0.3 * i, 12.0, rng)
            write_fits_table(spec.replace(meta=spec.meta.replace(object_name=f"CDX-{i + 301:04d}")),
                             folder / f"cdx-{i + 301:04d}.fits")


def _notes(folder: Path, n: int, per_folder: int = 50) -> None:
    """``n`` observing notes (not spectra) in sub-folders of ``per_folder`` files."""
    for i in range(n):
        sub = folder / f"night{i // per_folder:03d}"
        sub.mkdir(parents=True, exist_ok=True)
        (sub / f"note-{i:05d}.txt").write_text(f"seeing {1 + i % 7 / 10:.1f} arcsec\n")


def _peak_kb(data: Path, out: Path, on_row=None) -> tuple[float, object]:
    tracemalloc.start()
    try:
        s = run_batch([str(data)], out, BatchSettings(**SETTINGS), on_row=on_row)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / 1024, s


def test_client_memory_does_not_grow_with_the_folder(tmp_path, monkeypatch):
    n = 80
    small, large = tmp_path / "small", tmp_path / "large"
    for d, k in ((small, n), (large, 4 * n)):
        _spectra(d / "spectra", n=1)
        _notes(d / "notes", k)
    # chunks smaller than the small run, so that both runs stream (a chunk is held at a time)
    monkeypatch.setattr(summ, "CHUNK_ROWS", 40)
    # records still written atomically, without waiting for the disk (fsync allocates nothing)
    import functools

    from zsieve.report import atomic, record

    monkeypatch.setattr(record, "write_atomic", functools.partial(atomic.write_atomic, fsync=False))
    _spectra(tmp_path / "warm", n=1)
    _notes(tmp_path / "warm", 2)
    run_batch([str(tmp_path / "warm")], tmp_path / "o-warm", BatchSettings(**SETTINGS))  # imports, caches
    a, sa = _peak_kb(small, tmp_path / "o-small")
    b, sb = _peak_kb(large, tmp_path / "o-large")
    assert sa.rows == n + 1 and sb.rows == 4 * n + 1 and sb.counts["skipped"] == 4 * n
    kept = []
    c, _ = _peak_kb(small, tmp_path / "o-kept", on_row=kept.append)  # what holding every row costs
    per_row = (c - a) / len(kept)
    # 240 more rows must not cost more than a quarter of holding them (about 1 kB each in a list)
    assert per_row > 0.5, f"holding the rows should show ({per_row:.2f} kB/row): the check would be blind"
    print(f"peak {a:.0f} -> {b:.0f} kB; holding rows {c:.0f} kB ({per_row:.2f} kB/row)")
    assert b - a < 0.25 * per_row * 3 * n, f"peak {a:.0f} kB -> {b:.0f} kB for {n} -> {4 * n} rows"


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    base = tmp_path_factory.mktemp("catalogue")
    data = base / "data"
    _spectra(data, n=3)
    _notes(data / "log", 3)
    (data / "damaged.csv").write_text("wavelength,flux,error\n5000,1.0,0.1\nabc,def,ghi\n")
    out = base / "out"
    run_batch([str(data)], out, BatchSettings(**SETTINGS))
    return data, out


def _snapshot(out: Path) -> dict[str, bytes]:
    return {name: (out / name).read_bytes() for name in ("summary.csv", "summary.ecsv")}


def test_streamed_tables_equal_astropys_whole_table(run_dir, tmp_path, monkeypatch):
    from astropy.table import Table

    data, out = run_dir
    rows = list(rebuild_summary(out))
    assert len(rows) == 7
    meta = summ.read_meta(out)
    assert meta["settings"]["config"]["n_resamples"] == 5
    monkeypatch.setattr(summ, "CHUNK_ROWS", 3)  # several chunks, one of them short
    summ.write_summary(tmp_path, rows, meta)
    table = build_table(rows, meta)  # astropy writes the whole table in one call: the reference
    for fmt, name in (("ascii.ecsv", "summary.ecsv"), ("ascii.csv", "summary.csv")):
        ref = tmp_path / f"ref-{name}"
        table.write(ref, format=fmt)
        assert (tmp_path / name).read_bytes() == ref.read_bytes(), name
    t = Table.read(tmp_path / "summary.ecsv", format="ascii.ecsv")  # ECSV 1.0, as astropy reads it
    assert len(t) == 7 and str(t["lum_distance"].unit) == "Mpc" and t.meta["settings"] == meta["settings"]
    assert list(t["file"]) == sorted(t["file"])


def test_streamed_index_equals_the_page_of_a_list(run_dir, tmp_path):
    from html.parser import HTMLParser

    from zsieve.report.index import existing_outputs, render_index, write_index

    _, out = run_dir
    work = tmp_path / "out"
    shutil.copytree(out, work)
    rows = rebuild_summary(work)
    write_index(work, rows, title="t")  # streamed from the catalogue
    page = (work / "index.html").read_text()
    ref = render_index(list(rows), existing_outputs(work), title="t")

    def timeless(text):
        return [ln for ln in text.splitlines() if "Written" not in ln]

    assert timeless(page) == timeless(ref)
    n_rows = []

    class P(HTMLParser):
        def handle_starttag(self, tag, attrs):
            if tag == "tr" and dict(attrs).get("data-status"):
                n_rows.append(dict(attrs)["data-status"])

    P().feed(page)
    assert sorted(n_rows) == sorted(r["status"] for r in rows) and len(n_rows) == 7


def test_catalogue_is_rebuilt_when_deleted_or_damaged(run_dir, tmp_path):
    data, out0 = run_dir
    out = tmp_path / "out"
    shutil.copytree(out0, out)
    before = _snapshot(out)
    records = {p.name: p.stat().st_mtime_ns for p in (out / "objects").glob("*.json")}
    (out / CATALOGUE_NAME).unlink()
    s = run_batch([str(data)], out, BatchSettings(**SETTINGS))
    assert s.n_fitted_now == 0 and s.rows == 7 and (out / CATALOGUE_NAME).exists()
    assert _snapshot(out) == before
    assert {p.name: p.stat().st_mtime_ns for p in (out / "objects").glob("*.json")} == records
    (out / CATALOGUE_NAME).write_bytes(b"this is not a database" * 100)  # sqlite3 refuses the header
    s = run_batch([str(data)], out, BatchSettings(**SETTINGS))
    assert s.n_fitted_now == 0 and s.rows == 7 and _snapshot(out) == before
    with Catalogue(out) as cat:
        assert len(cat) == 7 and cat.facts("cdx-0301.fits")["sha"]


def test_catalogue_follows_records_changed_behind_its_back(run_dir, tmp_path):
    from zsieve.report.record import object_path

    data, out0 = run_dir
    out = tmp_path / "out"
    shutil.copytree(out0, out)
    key = "cdx-0302.fits"
    path = object_path(out, key, ".json")
    rec = json.loads(path.read_text())
    rec["hand"] = {"z": 0.777, "grade": "likely", "action": "type-z", "user": "observer", "time": "t"}
    path.write_text(json.dumps(rec))  # as another tool would: the catalogue never saw it
    object_path(out, "damaged.csv", ".json").unlink()  # a record removed by hand: measured again
    s = run_batch([str(data)], out, BatchSettings(**SETTINGS, keep_hand=False))
    assert s.n_fitted_now == 2  # the record with a hand answer (keep_hand off) and the removed one
    from astropy.table import Table

    t = Table.read(out / "summary.ecsv", format="ascii.ecsv")
    row = t[t["key"] == key][0]
    assert not row["hand"] and row["z"] != pytest.approx(0.777) and len(t) == 7
    # the refit layer's path: a record rewritten, then the tables rebuilt from the records
    rec = json.loads(path.read_text())
    rec["hand"] = {"z": 0.555, "grade": "secure", "action": "type-z", "user": "observer", "time": "t2"}
    path.write_text(json.dumps(rec))
    rows = rebuild_summary(out)
    assert [r["z"] for r in rows if r["key"] == key] == [pytest.approx(0.555)]
    t = Table.read(out / "summary.ecsv", format="ascii.ecsv")
    assert float(t[t["key"] == key]["z"][0]) == pytest.approx(0.555)


def test_noop_rerun_leaves_tables_alone_but_rewrites_them_when_gone(run_dir, tmp_path):
    data, out0 = run_dir
    out = tmp_path / "out"
    shutil.copytree(out0, out)
    run_batch([str(data)], out, BatchSettings(**SETTINGS))  # the copy's files have new identities
    ids = {n: (out / n).stat().st_mtime_ns for n in ("summary.csv", "summary.ecsv", "index.html")}
    s = run_batch([str(data)], out, BatchSettings(**SETTINGS))
    assert s.n_fitted_now == 0 and s.n_reused == 4
    assert {n: (out / n).stat().st_mtime_ns for n in ids} == ids  # nothing changed: not rewritten
    (out / "index.html").unlink()
    run_batch([str(data)], out, BatchSettings(**SETTINGS))
    assert (out / "index.html").exists() and (out / "summary.csv").stat().st_mtime_ns != ids["summary.csv"]
    # a changed input is measured again and the tables follow
    p = data / "cdx-0303.fits"
    keep = p.read_bytes()
    try:
        with open(p, "ab") as fh:
            fh.write(b"\0" * 2880)  # one more (empty) FITS block: same spectrum, other checksum
        s = run_batch([str(data)], out, BatchSettings(**SETTINGS))
        assert s.n_fitted_now == 1
    finally:
        p.write_bytes(keep)


def test_discovery_dedupes_through_the_catalogue(run_dir, tmp_path):
    data, _ = run_dir
    out = tmp_path / "out"
    one = str(data / "cdx-0301.fits")
    s = run_batch([str(data), one, str(data / "*.fits")], out, BatchSettings(**SETTINGS))
    assert s.n_files == 7 and s.rows == 7
    with Catalogue(out) as cat:
        assert cat.con.execute("SELECT count(*) FROM inputs").fetchone()[0] == 7
    assert os.path.isfile(out / CATALOGUE_NAME)


def test_a_folder_that_takes_no_database_still_gets_its_run(run_dir, tmp_path, monkeypatch):
    import sqlite3

    data, out0 = run_dir
    out = tmp_path / "out"
    shutil.copytree(out0, out)
    (out / CATALOGUE_NAME).unlink()
    real = Catalogue._connect

    def refuse(self, where=None):  # as SQLite answers on a file system without the locks it needs
        if where is None:
            raise sqlite3.OperationalError("disk I/O error")
        return real(self, where)

    monkeypatch.setattr(Catalogue, "_connect", refuse)
    before = _snapshot(out)
    s = run_batch([str(data)], out, BatchSettings(**SETTINGS))
    assert s.n_fitted_now == 0 and s.rows == 7 and not (out / CATALOGUE_NAME).exists()
    assert _snapshot(out) == before
    rows = rebuild_summary(out)  # the refit layer's path, in memory too
    assert isinstance(rows, list) and len(rows) == 7
