"""The committed demo spectra are what the committed generator makes (fixed seed)."""

from __future__ import annotations

import csv
import importlib.util
from pathlib import Path

import numpy as np
import pytest

from zsieve.io import read_spectrum

SAMPLES = Path(__file__).resolve().parents[1] / "sample_spectra"


def _generator():
    spec = importlib.util.spec_from_file_location("make_samples", SAMPLES / "make_samples.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory):
    out = tmp_path_factory.mktemp("samples")
    rows = _generator().make(out)
    return out, rows


def test_samples_reproduce(regenerated):
    out, rows = regenerated
    committed = list(csv.DictReader(open(SAMPLES / "truth.csv")))
    assert [r["file"] for r in committed] == [r["file"] for r in rows]
    for row, old in zip(rows, committed):
        assert row["z_true"] == old["z_true"] and row["kind"] == old["kind"]
        a = read_spectrum(SAMPLES / row["file"])
        b = read_spectrum(out / row["file"])
        np.testing.assert_allclose(a.wavelength, b.wavelength, rtol=1e-12)
        np.testing.assert_allclose(a.flux, b.flux, rtol=1e-6, atol=1e-6 * np.nanmax(np.abs(a.flux)))
        assert np.array_equal(a.mask, b.mask)


def test_sample_mix_and_size():
    rows = list(csv.DictReader(open(SAMPLES / "truth.csv")))
    kinds = [r["kind"] for r in rows]
    assert kinds.count("emission-galaxy") >= 3 and "absorption-galaxy" in kinds and "star" in kinds
    assert "noise" in kinds and "single-line" in kinds
    assert any(r["kind"] == "quasar" and float(r["z_true"]) > 2 for r in rows)
    assert {r["medium"] for r in rows} == {"air", "vacuum"}
    total = sum(p.stat().st_size for p in SAMPLES.iterdir())
    assert total < 3e6


def test_air_sample_reads_as_air_and_lines_land_in_vacuum():
    # CDX-0215 is written with CTYPE1 = 'AWAV'; [O II] 3729.875 (NIST vacuum; from memory)
    # must appear at 3729.875 (1 + z) in the vacuum spectrum the reader returns.
    spec = read_spectrum(SAMPLES / "CDX-0215_air.fits")
    assert spec.meta.medium == "air"
    z = 0.7702
    w = spec.wavelength
    near = (w > 3728.5 * (1 + z) - 15) & (w < 3728.5 * (1 + z) + 15)
    peak = w[near][np.argmax(np.convolve(spec.flux[near], np.ones(3) / 3, mode="same"))]
    assert abs(peak - 3728.5 * (1 + z)) < 6.0  # the blended doublet's centre
