"""The report writers: atomic writes, output keys, summary tables, index page, figure.

Outside references: astropy's ECSV reader (units and metadata read back), Python's
html.parser (the page is well-formed HTML), the PNG file signature (PNG specification,
RFC 2083 section 3.1), matplotlib's own PNG reader, and astropy.cosmology for the distance
columns.
"""

import html
import json
import math
import os
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from zsieve.report import atomic, complete_result, update_object
from zsieve.report.figure import stagger_levels, write_figure
from zsieve.report.index import write_index
from zsieve.report.record import is_key, make_key, object_path, write_record
from zsieve.report.summary import COLUMNS, rebuild_summary, row_from_record, write_summary
from zsieve.result import Candidate, FitResult, LineMatch
from zsieve.spectrum import Spectrum, SpectrumMeta

HOSTILE = "../../etc/<script>alert('x')</script>\x1b[31m\n\u2028" + "A" * 10_000


def _spectrum_and_result(z=0.25, name="CDX-0042"):
    """A spectrum with two Gaussian lines at z and a result describing them (built by hand)."""
    wave = np.geomspace(3800.0, 9200.0, 3000)
    rest = {"H-alpha": 6564.61, "[O III] 5008": 5008.24}  # NIST vacuum wavelengths (from memory)
    rng = np.random.default_rng(3)
    flux = np.ones_like(wave)
    lines = []
    for nm, lam in rest.items():
        mu, sig, f = lam * (1 + z), 3.0, 40.0
        flux += f / (math.sqrt(2 * math.pi) * sig) * np.exp(-0.5 * ((wave - mu) / sig) ** 2)
        lines.append(LineMatch(name=nm, rest_wavelength=lam, observed_wavelength=mu, sigma_A=sig, flux=f,
                               snr=20.0, z_line=z))
    sigma = np.full_like(wave, 0.2)
    flux += rng.normal(0, 0.2, wave.size)
    spec = Spectrum(wave, flux, sigma, meta=SpectrumMeta(object_name=name, source="x.fits"))
    samples = list(z + rng.normal(0, 2e-5, 50))
    zz = np.linspace(0, 2, 400)
    res = FitResult(file="x.fits", object_name=name, z=z, z_err=2e-5, z_p16=z - 2e-5, z_p50=z, z_p84=z + 2e-5,
                    grade="secure", confidence=0.97, template="emission-galaxy", lines=lines,
                    candidates=[Candidate(z=z, template="emission-galaxy", probability=0.97),
                                Candidate(z=0.6, template="quasar", probability=0.03)],
                    z_samples=samples, n_resamples=50, extra={"xcorr": {"z": list(zz), "r": list(np.exp(-((zz - z) / 0.01) ** 2) * 9)}},
                    provenance={"key": "x.fits", "index": 0})
    return spec, res


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.links, self.scripts, self.rows, self.stack = [], 0, 0, []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "a":
            self.links.append(a["href"])
        if tag == "img":
            self.links.append(a["src"])
        if tag == "script":
            self.scripts += 1
        if tag == "tr" and "data-grade" in a:
            self.rows += 1


# ------------------------------------------------------------------ atomic writes
def test_write_atomic_failure_leaves_old_file(tmp_path, monkeypatch):
    p = tmp_path / "a.json"
    atomic.write_atomic(p, "old")

    def boom(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(atomic.os, "replace", boom)
    with pytest.raises(OSError):
        atomic.write_atomic(p, "new")
    assert p.read_text() == "old"
    assert sorted(os.listdir(tmp_path)) == ["a.json"]  # no temporary left behind


def test_remove_stale_parts_only_old_ones(tmp_path):
    old = tmp_path / ".a.json.xyz.part"
    new = tmp_path / ".b.json.xyz.part"
    old.write_text("x")
    new.write_text("y")
    os.utime(old, (1, 1))
    assert atomic.remove_stale_parts(tmp_path) == 1
    assert not old.exists() and new.exists()


# ------------------------------------------------------------------ keys
@given(st.text(min_size=1, max_size=300))
@settings(max_examples=200, deadline=None)
def test_make_key_is_always_safe(text):
    key = make_key(text)
    assert is_key(key)
    assert "/" not in key and "\\" not in key and ".." not in key
    assert len(key) + len(".json") < 255  # file-name limit of common file systems (common practice)


def test_make_key_injective_on_lookalikes():
    names = ["a b.fits", "a_b.fits", "a/b.fits", "a__b.fits", "a..b.fits", "a.b.fits", "A/B.fits"]
    keys = [make_key(n) for n in names]
    assert len(set(keys)) == len(keys)
    assert make_key("x.fits", 2) != make_key("x.fits@2")


def test_object_path_refuses_escape(tmp_path):
    for bad in ("../x", "a/b", "", ".hidden", "a\x00b"):
        with pytest.raises(ValueError):
            object_path(tmp_path, bad, ".json")


# ------------------------------------------------------------------ summary tables
def test_summary_ecsv_reads_back_with_units(tmp_path):
    from astropy.table import Table

    spec, res = _spectrum_and_result()
    res = complete_result(res, spec, "Planck18")
    rows = [row_from_record(res.to_dict()),
            row_from_record(FitResult.failure("bad.fits", "not a FITS file").replace(provenance={"key": "bad.fits"}).to_dict())]
    write_summary(tmp_path, rows, {"settings": {"n_resamples": 50}})
    t = Table.read(tmp_path / "summary.ecsv", format="ascii.ecsv")
    assert t.colnames == [c[0] for c in COLUMNS]
    assert str(t["lum_distance"].unit) == "Mpc" and str(t["v_recession_now"].unit) == "km / s"
    assert str(t["lookback_time"].unit) == "Gyr"
    assert t.meta["settings"]["n_resamples"] == 50
    assert list(t["status"]) == ["failed", "ok"]  # sorted by file name
    ok = t[t["status"] == "ok"][0]
    # astropy.cosmology Planck18 as the outside reference (no coordinates -> z as measured)
    from astropy.cosmology import Planck18

    assert ok["lum_distance"] == pytest.approx(Planck18.luminosity_distance(0.25).to_value("Mpc"), rel=1e-4)
    assert ok["lookback_time"] == pytest.approx(Planck18.lookback_time(0.25).to_value("Gyr"), rel=1e-4)
    assert ok["runner_up_z"] == pytest.approx(0.6) and ok["runner_up_prob"] == pytest.approx(0.03)
    assert ok["n_lines"] == 2 and ok["grade"] == "secure"
    csv = Table.read(tmp_path / "summary.csv", format="ascii.csv")
    assert len(csv) == 2 and "message" in csv.colnames


def test_hand_decision_wins_in_row():
    spec, res = _spectrum_and_result()
    rec = res.replace(hand={"z": 0.61, "grade": "likely", "user": "observer", "action": "type-z"}).to_dict()
    row = row_from_record(rec)
    assert row["hand"] and row["z"] == 0.61 and row["grade"] == "likely"
    assert row["z_engine"] == 0.25 and row["grade_engine"] == "secure"
    assert math.isnan(row["z_err"])  # the engine's error does not describe the hand redshift


def test_header_text_is_cleaned_in_tables():
    spec, res = _spectrum_and_result(name=HOSTILE)
    row = row_from_record(res.to_dict())
    assert "\n" not in row["object"] and "\x1b" not in row["object"] and len(row["object"]) <= 200


# ------------------------------------------------------------------ index page
def test_index_escapes_and_links_exist(tmp_path):
    spec, res = _spectrum_and_result(name=HOSTILE)
    key = make_key("night1/" + HOSTILE[:40] + ".fits")
    res = res.replace(provenance={"key": key, "index": 0})
    write_record(tmp_path, key, res.to_dict())
    rows = rebuild_summary(tmp_path, {})
    write_index(tmp_path, rows)
    page = (tmp_path / "index.html").read_text()
    assert "<script>alert" not in page and html.escape("<script>alert('x')</script>") in page
    p = _Collect()
    p.feed(page)
    p.close()
    assert p.scripts == 1 and p.rows == 1
    from urllib.parse import unquote

    for href in p.links:
        assert not href.startswith(("http:", "https:", "//", "/"))
        target = (tmp_path / unquote(href)).resolve()
        assert target.exists() and tmp_path.resolve() in target.parents
    assert "http://" not in page and "https://" not in page  # nothing fetched from the network


# ------------------------------------------------------------------ figure
def test_figure_png_and_pdf(tmp_path):
    import matplotlib.image as mpimg

    spec, res = _spectrum_and_result()
    res = complete_result(res, spec, None)
    p = write_figure(tmp_path / "f.png", res, spec)
    data = Path(p).read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (RFC 2083, 3.1)
    img = mpimg.imread(p)
    assert img.shape[:2] == (840, 1200)  # 12 x 8.4 in at 100 dpi
    q = write_figure(tmp_path / "f.pdf", res, spec)
    assert Path(q).read_bytes()[:5] == b"%PDF-"  # PDF header (ISO 32000-1, 7.5.2)


def test_model_flux_is_continuum_plus_lines():
    from zsieve.report.figure import model_flux

    spec, res = _spectrum_and_result()
    m = model_flux(spec, res)
    i = int(np.argmin(abs(spec.wavelength - 6564.61 * 1.25)))
    # peak of a Gaussian of integral 40 and sigma 3 above a unit continuum: 1 + 40/(3 sqrt(2 pi))
    assert m[i] == pytest.approx(1 + 40 / (3 * math.sqrt(2 * math.pi)), rel=0.05)
    assert np.median(m) == pytest.approx(1.0, abs=0.05)


@given(st.lists(st.floats(0, 100), min_size=1, max_size=30), st.floats(0.5, 5))
@settings(max_examples=100, deadline=None)
def test_stagger_levels_never_overlap_when_rows_suffice(xs, w):
    levels = stagger_levels(xs, [w] * len(xs), n_levels=len(xs))
    for k in set(levels):
        on_row = sorted(x for x, lv in zip(xs, levels) if lv == k)
        assert all(b - a >= w - 1e-9 for a, b in zip(on_row, on_row[1:]))


def test_update_object_rewrites_record_summary_and_index(tmp_path):
    spec, res = _spectrum_and_result()
    key = "x.fits"
    write_record(tmp_path, key, res.to_dict())
    hand = {"z": 0.25, "grade": "likely", "user": "observer", "action": "grade",
            "auto": {"z": 0.25, "grade": "secure"}}
    update_object(tmp_path, key, res.replace(grade="likely", hand=hand), spec, figure=True)
    rec = json.loads((tmp_path / "objects" / "x.fits.json").read_text())
    assert rec["hand"]["grade"] == "likely" and rec["cosmology"]["luminosity_distance_mpc"] > 0
    assert (tmp_path / "objects" / "x.fits.png").exists()
    text = (tmp_path / "summary.csv").read_text()
    assert ",likely," in text and (tmp_path / "index.html").exists()
