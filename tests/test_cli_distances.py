"""``zsieve distances`` end to end: JSON keys and values against astropy.cosmology (reference
library), the readable table, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import subprocess
import sys

import astropy.units as u
import pytest
from astropy.cosmology import LambdaCDM, Planck18

from zsieve.cli import main

REQUIRED = (
    "z", "comoving_distance_mpc", "luminosity_distance_mpc", "angular_diameter_distance_mpc",
    "distance_modulus_mag", "lookback_time_gyr", "age_at_z_gyr", "recession_velocity_now_kms",
    "recession_velocity_emission_kms", "cz_kms", "relativistic_doppler_velocity_kms", "cosmology",
)


def _run_json(capsys, *argv):
    assert main(["distances", *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def _check_against(cosmo, rec):
    z = rec["z"]
    # astropy.cosmology directly (reference library)
    assert rec["comoving_distance_mpc"] == pytest.approx(cosmo.comoving_distance(z).to_value(u.Mpc), rel=1e-6)
    assert rec["luminosity_distance_mpc"] == pytest.approx(cosmo.luminosity_distance(z).to_value(u.Mpc), rel=1e-6)
    assert rec["angular_diameter_distance_mpc"] == pytest.approx(cosmo.angular_diameter_distance(z).to_value(u.Mpc), rel=1e-6)
    assert rec["distance_modulus_mag"] == pytest.approx(cosmo.distmod(z).to_value(u.mag), rel=1e-6)
    assert rec["lookback_time_gyr"] == pytest.approx(cosmo.lookback_time(z).to_value(u.Gyr), rel=1e-6)
    assert rec["age_at_z_gyr"] == pytest.approx(cosmo.age(z).to_value(u.Gyr), rel=1e-6)
    # Davis & Lineweaver 2004: v_now = H0 D_C, v_emit = H(z) D_C / (1+z)
    dc = cosmo.comoving_distance(z).to_value(u.Mpc)
    assert rec["recession_velocity_now_kms"] == pytest.approx(cosmo.H0.value * dc, rel=1e-6)
    assert rec["recession_velocity_emission_kms"] == pytest.approx(cosmo.H(z).value * dc / (1 + z), rel=1e-6)


def test_json_single_object_with_keys_and_astropy_values(capsys):
    rec = _run_json(capsys, "1.42")
    assert isinstance(rec, dict)
    for key in REQUIRED:
        assert key in rec, key
    assert rec["cosmology"]["name"] == "Planck18"
    _check_against(Planck18, rec)


def test_json_list_for_several_redshifts_and_errors(capsys):
    recs = _run_json(capsys, "0.1", "2.5", "--z-err", "0.001", "0.01", "--samples", "500")
    assert [r["z"] for r in recs] == [0.1, 2.5]
    for rec in recs:
        _check_against(Planck18, rec)
        assert rec["uncertainty"]["n_samples"] == 500
        for key in ("luminosity_distance_mpc", "lookback_time_gyr", "recession_velocity_now_kms"):
            assert rec[f"{key}_p16"] < rec[key] < rec[f"{key}_p84"]
            assert rec[f"{key}_err"] > 0
    assert recs[1]["uncertainty"]["z_err_input"] == 0.01


def test_custom_parameters(capsys):
    rec = _run_json(capsys, "0.8", "--H0", "72", "--Om0", "0.25", "--Ode0", "0.6")
    assert rec["cosmology"]["class"] == "LambdaCDM" and rec["cosmology"]["H0_kms_mpc"] == 72.0
    _check_against(LambdaCDM(H0=72.0, Om0=0.25, Ode0=0.6), rec)


def test_table_has_units_and_the_why_not_doppler_line(capsys):
    assert main(["distances", "1.42", "--z-err", "0.01", "--samples", "300"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("Cosmology: Planck18")
    for word in ("Mpc", "Gyr", "km/s", "kpc/arcsec", "mag", "NOT recession velocities", "Why not Doppler",
                 "above c are correct", "vs v_now", "+/- 0.01"):
        assert word in out, word
    d_l = Planck18.luminosity_distance(1.42).to_value(u.Mpc)  # astropy, reference library
    assert f"{d_l:.1f}" in out


@pytest.mark.parametrize(
    "argv, words",
    [
        (["-1"], "> -1"),
        (["-2.5"], "> -1"),
        (["abc"], "must be a number"),
        (["inf"], "finite"),
        (["0.5", "--cosmology", "NoSuchModel"], "unknown cosmology"),
        (["0.5", "--H0", "70", "--Om0", "-0.2"], "Om0"),
        (["0.5", "--Om0", "0.3"], "--H0"),
        (["0.5", "--H0", "70", "--Om0", "0.3", "--Ode0", "3"], "no big bang"),
        (["0.5", "--cosmology", "WMAP9", "--H0", "70"], "not both"),
        (["0.5", "1.0", "--z-err", "0.1", "0.2", "0.3"], "one per redshift"),
        (["0.5", "--z-err", "-0.1"], ">= 0"),
        (["0.5", "--samples", "x"], "--samples"),
    ],
)
def test_bad_arguments_one_line_exit_2(capsys, argv, words):
    assert main(["distances", *argv]) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and words in lines[0] and "Traceback" not in captured.err
    assert captured.out == ""


def test_real_process_exit_code():
    code = "import sys; from zsieve.cli import main; sys.exit(main(sys.argv[1:]))"
    bad = subprocess.run([sys.executable, "-c", code, "distances", "-3"], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1 and bad.stdout == ""


def test_negative_exponent_redshift_is_a_star_not_an_option(capsys):
    rec = _run_json(capsys, "-1e-4")
    assert rec["z"] == -1e-4 and rec["comoving_distance_mpc"] is None
    a = (1 - 1e-4) ** 2  # special-relativistic Doppler (common practice)
    c_kms = 299792.458  # astropy.constants.c (CODATA, exact)
    assert rec["relativistic_doppler_velocity_kms"] == pytest.approx(c_kms * (a - 1) / (a + 1), rel=1e-12)
