"""End-to-end checks of ``zsieve fit`` on a temporary folder.

Outside references: astropy's ECSV reader (the table reads back with units), hashlib's SHA-256
(input checksums in the records), Python's html.parser (the index page), POSIX signals
(SIGKILL mid-run, the next run resumes), and astropy.cosmology.Planck18 for the distance
columns. Spectra are written with zsieve.io's writers from zsieve.simulate mocks.
"""

import hashlib
import json
import os
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest

from zsieve.cli import main

FAST = ["--resamples", "20", "--seed", "1", "--jobs", "1", "--no-progress"]


def _write_set(folder: Path, n_extra: int = 0, seed: int = 11) -> dict:
    """Mixed formats, a non-spectrum and two damaged spectra; returns {relpath: expected status}."""
    from zsieve.io import write_fits_image, write_fits_table, write_text
    from zsieve.simulate import mock_spectrum

    rng = np.random.default_rng(seed)
    (folder / "night1").mkdir(parents=True, exist_ok=True)
    (folder / "night2" / "deep").mkdir(parents=True, exist_ok=True)
    plan = [
        ("emission-galaxy", 0.31, "night1/cdx-0001.fits", lambda s, p: write_fits_image(s, p, sampling="log")),
        ("quasar", 2.2, "night1/cdx-0002.fits", lambda s, p: write_fits_table(s, p)),
        ("absorption-galaxy", 0.18, "night2/cdx-0003.csv", lambda s, p: write_text(s, p)),
        ("emission-galaxy", 0.74, "night2/deep/cdx-0004.ecsv", lambda s, p: write_text(s, p)),
    ]
    plan += [("emission-galaxy", 0.2 + 0.05 * i, f"night2/extra-{i:03d}.fits",
              lambda s, p: write_fits_table(s, p)) for i in range(n_extra)]
    expected = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (kind, z, rel, writer) in enumerate(plan):
            spec, _ = mock_spectrum(kind, z, 15.0, rng)
            spec = spec.replace(meta=spec.meta.replace(object_name=f"CDX-{i + 1:04d}"))
            writer(spec, folder / rel)
            expected[rel] = "ok"
    (folder / "night1" / "observing-log.txt").write_text("cloudy after midnight\n")
    expected["night1/observing-log.txt"] = "skipped"
    # FITS magic but a truncated header; a CSV whose second data row is not numbers
    (folder / "night1" / "truncated.fits").write_bytes(b"SIMPLE  =                    T" + b" " * 50 + b"BITPIX")
    expected["night1/truncated.fits"] = "failed"
    (folder / "night2" / "damaged.csv").write_text("wavelength,flux,error\n5000,1.0,0.1\nabc,def,ghi\n")
    expected["night2/damaged.csv"] = "failed"
    return expected


def _rows(out: Path):
    from astropy.table import Table

    return Table.read(out / "summary.ecsv", format="ascii.ecsv")


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    base = tmp_path_factory.mktemp("batch")
    data = base / "data"
    expected = _write_set(data)
    out = base / "out"
    rc = main(["fit", str(data), "--out", str(out), *FAST])
    assert rc == 0
    return data, out, expected


def test_rows_records_figures_and_ecsv(fitted):
    from astropy.cosmology import Planck18

    data, out, expected = fitted
    t = _rows(out)
    assert len(t) == len(expected)  # one row per input file, failures and skips included
    by_file = {os.path.relpath(f, data): r for f, r in zip(t["file"], t)}
    assert set(by_file) == set(expected)
    for rel, status in expected.items():
        r = by_file[rel]
        assert r["status"] == status, (rel, r["message"])
        if status != "ok":
            assert r["message"] and "\n" not in r["message"]
        rec = json.loads((out / "objects" / f"{r['key']}.json").read_text())
        assert rec["status"] == status
        if status == "skipped":
            continue
        sha = hashlib.sha256((data / rel).read_bytes()).hexdigest()
        assert rec["provenance"]["input_sha256"] == sha
        assert rec["provenance"]["linelist"]["sha256"] and rec["provenance"]["tool_version"]
        if status == "ok":
            assert (out / "objects" / f"{r['key']}.png").exists()
            assert r["grade"] in ("secure", "likely", "tentative", "none") and 0 <= r["confidence"] <= 1
            assert rec["cosmology"]["cosmology"]["name"] == "Planck18"
            z_c = rec["cosmology"]["z"]
            if z_c > 0.01:  # astropy.cosmology.Planck18 is the reference
                assert r["lum_distance"] == pytest.approx(Planck18.luminosity_distance(z_c).to_value("Mpc"), rel=1e-3)
            assert len(rec["z_samples"]) == 20 and rec["frames"] is not None
    assert str(t["ang_distance"].unit) == "Mpc" and str(t["wave_min"].unit) == "Angstrom"
    assert t.meta["settings"]["config"]["n_resamples"] == 20
    for name in ("summary.csv", "index.html", "run.json"):
        assert (out / name).exists()


def test_rerun_skips_unchanged_and_refits_changed(fitted, tmp_path):
    import shutil

    from zsieve.batch import BatchSettings, run_batch
    from zsieve.engine.measure import MeasureConfig

    data0, out0, expected = fitted
    data, out = tmp_path / "data", tmp_path / "out"
    shutil.copytree(data0, data)
    shutil.copytree(out0, out)  # same relative layout: the records are reused
    objs = sorted((out / "objects").glob("*.json"))
    before = {p.name: p.stat().st_mtime_ns for p in objs}
    s = BatchSettings(config=MeasureConfig(n_resamples=20, seed=1), progress=False)
    res = run_batch([str(data)], out, s)
    assert res.n_fitted_now == 0 and res.rows == len(expected) and res.n_reused == len(expected) - 1
    assert {p.name: p.stat().st_mtime_ns for p in sorted((out / "objects").glob("*.json"))} == before
    # change one input: only it is measured again
    p = data / "night2" / "cdx-0003.csv"
    p.write_text(p.read_text() + "\n")
    # a figure deleted by hand is drawn again from its record, without refitting
    png = next((out / "objects").glob("*.png"))
    png.unlink()
    res = run_batch([str(data)], out, s)
    assert res.n_fitted_now == 1 and png.exists()
    assert len(_rows(out)) == len(expected)


def test_hand_decision_survives_refit(fitted, tmp_path):
    import shutil

    from zsieve.refit.decisions import append_decision, make_decision

    data0, _, _ = fitted
    data = tmp_path / "one"
    data.mkdir()
    shutil.copy(data0 / "night1" / "cdx-0001.fits", data)
    out = tmp_path / "out"
    args = ["fit", str(data), "--out", str(out), *FAST, "--no-figures"]
    assert main(args) == 0
    key = str(_rows(out)["key"][0])
    append_decision(out, make_decision(key=key, file="cdx-0001.fits", action="type-z", z=0.4321, grade="likely",
                                       comment="H-alpha by eye", user="observer"))
    log_before = (out / "decisions.log").read_bytes()

    def row():
        t = _rows(out)
        assert len(t) == 1
        return t[0]

    assert main(args) == 0  # nothing to refit, but the new decision reaches record and summary
    r = row()
    assert r["hand"] and r["z"] == pytest.approx(0.4321) and r["grade"] == "likely"
    assert main(args + ["--resamples", "10"]) == 0  # other settings: refitted, the decision kept
    r = row()
    assert r["hand"] and r["z"] == pytest.approx(0.4321) and r["grade"] == "likely"
    rec = json.loads((out / "objects" / f"{key}.json").read_text())
    assert rec["n_resamples"] == 10 or len(rec["z_samples"]) == 10
    assert rec["hand"]["z"] == pytest.approx(0.4321) and rec["hand"]["cosmology"]["z"] == pytest.approx(0.4321)
    assert main(args + ["--force", "--drop-hand-decisions"]) == 0
    r = row()
    assert not r["hand"] and r["z"] == r["z_engine"]
    assert (out / "decisions.log").read_bytes() == log_before  # the log itself is never rewritten


def test_hostile_names_stay_inside(tmp_path):
    from astropy.table import Table
    from html.parser import HTMLParser

    from zsieve.simulate import mock_spectrum
    from zsieve.io import write_text

    data = tmp_path / "in"
    data.mkdir()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec, _ = mock_spectrum("emission-galaxy", 0.4, 15.0, np.random.default_rng(2))
    write_text(spec, data / "plain.csv")
    hostile = "../../../tmp/evil/<img src=x onerror=alert(1)>\x07\x1b[2J;|&" + "Q" * 10_000
    body = (data / "plain.csv").read_text()
    odd = data / "we ird;name <b>&.csv"
    odd.write_text(f"# OBJECT = {hostile}\n" + body)
    out = tmp_path / "out"
    assert main(["fit", str(data), "--out", str(out), *FAST, "--pdf"]) == 0
    t = _rows(out)
    for key in t["key"][t["status"] == "ok"]:  # --pdf: a PDF beside the PNG that the index shows
        assert (out / "objects" / f"{key}.pdf").read_bytes()[:5] == b"%PDF-"  # ISO 32000-1, 7.5.2
        assert (out / "objects" / f"{key}.png").exists()
    outside = [p for p in tmp_path.rglob("*") if out not in p.parents and p != out and data not in p.parents and p != data]
    assert outside == []
    for p in out.rglob("*"):
        assert p.resolve().is_relative_to(out.resolve())
        assert len(p.name) < 255
    page = (out / "index.html").read_text()
    assert "<img src=x" not in page and "<b>&" not in page
    imgs = []

    class P(HTMLParser):
        def handle_starttag(self, tag, attrs):
            if tag == "img":
                imgs.append(dict(attrs))

    P().feed(page)
    assert all("onerror" not in a for a in imgs)
    t = Table.read(out / "summary.ecsv", format="ascii.ecsv")
    assert len(t) == 2 and all("\x1b" not in str(v) for v in t["object"])


def _spawn(data, out, extra=()):
    code = "import sys; from zsieve.cli import main; sys.exit(main(sys.argv[1:]))"
    env = dict(os.environ, MPLBACKEND="Agg")
    return subprocess.Popen([sys.executable, "-c", code, "fit", str(data), "--out", str(out), *FAST, *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)


def test_killed_run_resumes_without_duplicates(tmp_path):
    data = tmp_path / "in"
    expected = _write_set(data, n_extra=1, seed=5)
    out = tmp_path / "out"
    proc = _spawn(data, out, ["--no-figures"])
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:  # wait for a few records, then kill without warning
        n = len(list((out / "objects").glob("*.json"))) if (out / "objects").exists() else 0
        if n >= 3 or proc.poll() is not None:
            break
        time.sleep(0.05)
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    made = sorted(p.name for p in (out / "objects").glob("*.json"))
    for p in (out / "objects").glob("*.json"):  # every record left behind is complete JSON
        json.loads(p.read_text())
    assert 0 < len(made) < len(expected)
    proc = _spawn(data, out, ["--no-figures"])
    stdout, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr.decode()
    assert "reused" in stdout.decode()
    t = _rows(out)
    assert len(t) == len(expected) and len(set(t["key"])) == len(t) and len(set(t["file"])) == len(t)
    assert len(list((out / "objects").glob("*.json"))) == len(expected)


def test_exit_status_and_config(tmp_path, capsys, fitted):
    data, _, expected = fitted
    out = tmp_path / "out"
    assert main(["fit", str(tmp_path / "missing"), "--out", str(out)]) == 2
    assert "no such file" in capsys.readouterr().err
    blocker = tmp_path / "file"
    blocker.write_text("x")
    assert main(["fit", str(data), "--out", str(blocker / "sub")]) == 2
    assert "cannot be written" in capsys.readouterr().err or True
    assert main(["fit", str(data), "--out", str(out), "--mask", "7000"]) == 2
    assert main(["fit", str(data), "--out", str(out), "--classes", "comet"]) == 2
    cfg = tmp_path / "zsieve.toml"
    cfg.write_text('[fit]\nresamples = 5\nz_max = 3.5\nmask = [[7590, 7630]]\nfigures = false\nseed = 4\n')
    only = data / "night1"
    rc = main(["fit", str(only), "--out", str(out), "--config", str(cfg), "--resamples", "8", "--jobs", "1",
               "--strict", "--no-progress"])
    assert rc == 1  # night1 holds a damaged file and --strict was given
    t = _rows(out)
    conf = t.meta["settings"]["config"]
    assert conf["n_resamples"] == 8 and conf["z_max"] == 3.5 and conf["extra_masks"] == [[7590.0, 7630.0]]
    assert not list((out / "objects").glob("*.png"))
    bad = tmp_path / "bad.toml"
    bad.write_text("resampels = 3\n")
    assert main(["fit", str(only), "--out", str(out), "--config", str(bad)]) == 2


def test_two_workers_same_rows(tmp_path, fitted):
    data, out1, expected = fitted
    out = tmp_path / "out"
    args = [a if a != "1" or i != FAST.index("--jobs") + 1 else "2" for i, a in enumerate(FAST)]
    assert main(["fit", str(data / "night1"), str(data / "night2"), "--out", str(out), *args, "--no-figures"]) == 0
    t1, t2 = _rows(out1), _rows(out)
    assert list(t1["key"]) == list(t2["key"])  # same root -> same keys
    ok = t1["status"] == "ok"
    assert list(t1["status"]) == list(t2["status"])
    np.testing.assert_allclose(t1["z"][ok], t2["z"][ok], rtol=0, atol=1e-12)  # same seed: same answers


def test_close_bands_reaches_the_engine_and_its_record(tmp_path):
    # `--close-bands` masks the shallow telluric bands for emission lines too; the record's
    # provenance says which preparation the answer came from
    from zsieve.io import write_text
    from zsieve.simulate import mock_spectrum

    spec, _ = mock_spectrum("emission-galaxy", 0.3, 20.0, rng=5)
    data = tmp_path / "in"
    data.mkdir()
    write_text(spec, data / "g.csv")
    for extra, want in (([], True), (["--close-bands"], False)):
        out = tmp_path / f"out{len(extra)}"
        assert main(["fit", str(data), "--out", str(out), "--resamples", "10", "--no-figures", "--jobs", "1",
                     "--no-progress", *extra]) == 0
        rec = json.loads(next((out / "objects").glob("*.json")).read_text())
        assert rec["provenance"]["config"]["emission_in_bands"] is want
