"""Checks of the bundled line lists against outside references.

Sources are named beside each check: the Rydberg formula with CODATA constants from
astropy.constants, NIST Atomic Spectra Database values (from memory), transition-
probability ratios and the nm values quoted in the trade (common practice).
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import constants as const
from astropy.table import Table

from zsieve.lines import (
    BUNDLED_LISTS,
    LINE_COLUMNS,
    LineListError,
    air_to_vacuum,
    load_linelist,
    sky_features,
    vacuum_to_air,
)

HYDROGEN = {  # name -> (lower n, upper n)
    "Ly-alpha": (1, 2),
    "Ly-beta": (1, 3),
    "H-alpha": (2, 3),
    "H-beta": (2, 4),
    "H-gamma": (2, 5),
    "H-delta": (2, 6),
    "H-epsilon": (2, 7),
    "H8": (2, 8),
    "H9": (2, 9),
    "H10": (2, 10),
}


@pytest.fixture(scope="module")
def lines():
    return load_linelist()


def _rydberg_wavelength(n1, n2):
    """Vacuum wavelength (A) from 1/lambda = R_M (1/n1^2 - 1/n2^2), R_M = R_inf / (1 + m_e/m_p)."""
    r_inf = const.Ryd.to_value("1 / Angstrom")  # CODATA via astropy.constants
    r_m = r_inf / (1.0 + (const.m_e / const.m_p).decompose().value)
    return 1.0 / (r_m * (1.0 / n1**2 - 1.0 / n2**2))


def test_columns_and_kinds(lines):
    for col in LINE_COLUMNS:
        assert col in lines.colnames
    assert set(lines["kind"]) <= {"emission", "absorption"}
    assert np.all(lines["wave_vac"] > 900) and np.all(lines["wave_vac"] < 11000)
    assert all(len(s) > 10 for s in lines["source"]), "every line names its source"
    assert set(lines["list"]) == set(BUNDLED_LISTS)


@pytest.mark.parametrize("name", ["Ly-alpha", "H-alpha", "H-beta", "H-gamma", "H-delta"])
def test_hydrogen_agrees_with_rydberg(lines, name):
    # Rydberg formula with the reduced-mass correction, constants from astropy (CODATA);
    # fine structure and the Lamb shift account for the rest (< 0.15 A).
    expect = _rydberg_wavelength(*HYDROGEN[name])
    rows = lines[lines["name"] == name]
    assert len(rows) >= 1
    for w in rows["wave_vac"]:
        assert abs(w - expect) < 0.15, (name, w, expect)


def test_every_hydrogen_row_agrees_with_rydberg(lines):
    # Same outside reference for every Lyman/Balmer row in every bundled list.
    hyd = lines[lines["species"] == "H I"]
    assert len(hyd) >= 20
    for row in hyd:
        expect = _rydberg_wavelength(*HYDROGEN[row["name"]])
        assert abs(row["wave_vac"] - expect) < 0.15, row["name"]


def test_h_alpha_offset_from_bohr_value_is_fine_structure_sized(lines):
    # H-alpha: NIST vacuum 6564.61 vs Rydberg 6564.70, about 0.09 A (from memory).
    row = lines[(lines["name"] == "H-alpha") & (lines["list"] == "galaxy_emission")][0]
    diff = _rydberg_wavelength(2, 3) - row["wave_vac"]
    assert 0.05 < diff < 0.12


@pytest.mark.parametrize(
    "nm, name",
    [(410, "H-delta"), (434, "H-gamma"), (486, "H-beta"), (656, "H-alpha")],
)
def test_trade_nm_values_in_air(lines, nm, name):
    # The Balmer lines quoted in nm in air: 410, 434, 486, 656 (common practice).
    air_nm = np.round(vacuum_to_air(np.asarray(lines["wave_vac"])) / 10.0)
    found = lines[(air_nm == nm) & (lines["species"] == "H I")]
    assert name in set(found["name"])


@pytest.mark.parametrize(
    "name, vac",
    [  # NIST ASD vacuum wavelengths (from memory)
        ("[O II] 3727", 3727.09),
        ("[O II] 3730", 3729.88),
        ("[Ne III] 3870", 3869.86),
        ("[O III] 4960", 4960.30),
        ("[O III] 5008", 5008.24),
        ("He I 5877", 5877.25),
        ("[O I] 6302", 6302.05),
        ("[N II] 6550", 6549.86),
        ("[N II] 6585", 6585.27),
        ("[S II] 6718", 6718.29),
        ("[S II] 6733", 6732.67),
        ("[S III] 9071", 9071.1),
        ("[S III] 9533", 9533.2),
        ("Ca II K", 3934.78),
        ("Ca II H", 3969.59),
        ("Na D2", 5891.58),
        ("Na D1", 5897.56),
        ("Ca II 8500", 8500.36),
        ("Ca II 8544", 8544.44),
        ("Ca II 8665", 8664.52),
        ("C IV 1549", 1549.06),
        ("He II 1640", 1640.42),
        ("C III] 1909", 1908.73),
        ("N V 1240", 1240.14),
    ],
)
def test_required_lines_present(lines, name, vac):
    rows = lines[lines["name"] == name]
    assert len(rows) >= 1, name
    assert np.all(np.abs(rows["wave_vac"] - vac) < 0.02)


def test_nist_air_values_convert_to_list_values(lines):
    # NIST air wavelengths (from memory) converted with the IAU formula land on the list.
    for name, air in [("H-alpha", 6562.80), ("[O III] 5008", 5006.84), ("H-beta", 4861.33),
                      ("[N II] 6585", 6583.45), ("Ca II K", 3933.66), ("Na D2", 5889.95)]:
        w = lines[lines["name"] == name]["wave_vac"][0]
        assert abs(air_to_vacuum(air) - w) < 0.02, name


def test_doublet_ratios(lines):
    # [O III] 5008/4960 = 2.98 from the transition probabilities (common practice);
    # [N II] 6585/6550 ~ 3.05 (common practice).
    em = lines[lines["list"] == "galaxy_emission"]

    def ratio(a, b, col):
        ra = em[em["name"] == a][0]
        rb = em[em["name"] == b][0]
        assert ra["group"] == rb["group"] != ""
        return ra[col] / rb[col]

    assert ratio("[O III] 5008", "[O III] 4960", "ratio") == pytest.approx(2.98, abs=0.01)
    assert ratio("[N II] 6585", "[N II] 6550", "ratio") == pytest.approx(3.05, abs=0.05)
    # the class strengths agree with the fixed ratios (to the 4 digits stored)
    assert ratio("[O III] 5008", "[O III] 4960", "strength_emission_galaxy") == pytest.approx(2.98, rel=1e-3)


def test_group_strengths_follow_ratios(lines):
    # Internal consistency: within a group, class strengths scale like the ratio column.
    for grp in set(lines["group"]) - {""}:
        g = lines[lines["group"] == grp]
        for col in ("strength_emission_galaxy", "strength_quasar"):
            s = np.asarray(g[col], dtype=float)
            if np.all(s == 0):
                continue
            np.testing.assert_allclose(s / s.max(), g["ratio"] / g["ratio"].max(), rtol=2e-3)


def test_balmer_decrement(lines):
    # Case B recombination H-alpha/H-beta = 2.86 (Osterbrock & Ferland; common practice).
    em = lines[lines["list"] == "galaxy_emission"]
    ha = em[em["name"] == "H-alpha"]["strength_emission_galaxy"][0]
    hb = em[em["name"] == "H-beta"]["strength_emission_galaxy"][0]
    assert ha / hb == pytest.approx(2.86, rel=0.02)


def test_quasar_offsets_and_widths():
    # Shen et al. 2016 (ApJ 831, 7) and Vanden Berk et al. 2001 (AJ 122, 549), from memory:
    # C IV is blueshifted by a few hundred km/s; Mg II sits within ~100 km/s of systemic.
    q = load_linelist("quasar")
    civ = q[q["name"] == "C IV 1549"][0]
    mg2 = q[q["name"] == "Mg II 2799"][0]
    assert -800 < civ["qso_offset_kms"] < -150
    assert abs(mg2["qso_offset_kms"]) < 100
    assert np.all((q["width_kms"] >= 2000) & (q["width_kms"] <= 6000))
    for name in ["O VI 1034", "Ly-beta", "Ly-alpha", "N V 1240", "Si IV+O IV] 1400", "He II 1640",
                 "C III] 1909", "Mg II 2799", "H-gamma", "H-beta", "H-alpha"]:
        assert name in set(q["name"]), name
    assert np.all(q["strength_quasar"] > 0)


def test_classes_have_lines(lines):
    for col in ("strength_emission_galaxy", "strength_absorption_galaxy", "strength_quasar",
                "strength_star"):
        assert (lines[col] > 0).sum() >= 10
        assert lines[col].max() == pytest.approx(1.0)


def test_sky_features_converted_to_vacuum():
    sky = sky_features()
    assert set(sky["kind"]) == {"line", "band"}
    assert np.all(sky["wave_hi_vac"] >= sky["wave_lo_vac"])
    o1 = sky[sky["name"] == "[O I] 5577"][0]
    # NIST: [O I] 5577.34 air = 5578.89 vacuum (from memory)
    assert o1["wave_lo_vac"] == pytest.approx(5578.89, abs=0.02)
    a_band = sky[sky["name"] == "O2 A band"][0]
    assert a_band["wave_lo_vac"] == pytest.approx(air_to_vacuum(7594.0), abs=1e-6)
    # street-light mercury and the OH forest (common practice)
    assert any(n.startswith("Hg I 4358") for n in sky["name"])
    oh = sky[[n.startswith("OH") for n in sky["name"]]]
    assert len(oh) >= 5 and oh["wave_lo_vac"].min() > 7200


def test_user_list_air_and_defaults(tmp_path):
    path = tmp_path / "mine.csv"
    path.write_text("name,wave_air\nmy H-alpha,6562.80\nmy [O III],5006.84\n")
    tab = load_linelist(path)
    assert list(tab["name"]) == ["my H-alpha", "my [O III]"]
    # NIST vacuum values (from memory)
    np.testing.assert_allclose(tab["wave_vac"], [6564.61, 5008.24], atol=0.02)
    assert set(tab["kind"]) == {"emission"} and np.all(tab["strength_quasar"] == 1.0)
    assert all("mine.csv" in s for s in tab["source"])


def test_user_list_wave_plus_medium_ecsv(tmp_path):
    t = Table({"name": ["a", "b"], "wave": [4861.33, 4862.683], "medium": ["air", "vacuum"],
               "kind": ["absorption", "emission"], "strength_star": [1.0, 0.0]})
    path = tmp_path / "m.ecsv"
    t.write(path, format="ascii.ecsv")
    tab = load_linelist(path)
    np.testing.assert_allclose(tab["wave_vac"], [4862.68, 4862.683], atol=0.02)
    assert list(tab["kind"]) == ["absorption", "emission"]
    assert list(tab["strength_emission_galaxy"]) == [0.0, 0.0]  # other classes then default to 0


@pytest.mark.parametrize(
    "text, words",
    [
        ("name,flux\nx,1\n", "wave_vac"),
        ("label,wave_vac\nx,5000\n", "'name'"),
        ("name,wave_vac\nx,abc\n", "not numeric"),
        ("name,wave_vac,kind\nx,5000,sideways\n", "kind"),
        ("name,wave_vac\nx,-5\n", "positive"),
    ],
)
def test_bad_user_list_names_file(tmp_path, text, words):
    path = tmp_path / "broken_list.csv"
    path.write_text(text)
    with pytest.raises(LineListError) as info:
        load_linelist(path)
    assert "broken_list.csv" in str(info.value) and words in str(info.value)


def test_missing_file_and_unknown_name(tmp_path):
    with pytest.raises(LineListError, match="nothere.ecsv"):
        load_linelist(tmp_path / "nothere.ecsv")
    with pytest.raises(LineListError, match="nothere: neither a bundled"):
        load_linelist("nothere")


def test_copies_are_independent():
    a = load_linelist("stellar")
    a["wave_vac"][0] = -1.0
    assert load_linelist("stellar")["wave_vac"][0] > 0


def test_versions_recorded():
    assert load_linelist().meta["version"] == load_linelist("quasar").meta["version"] != ""
    assert sky_features().meta["version"]
