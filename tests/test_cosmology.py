"""Checks of zsieve.cosmology against outside references.

References: astropy.cosmology (reference library); Davis & Lineweaver 2004, PASA 21, 97
(recession velocities, Einstein-de Sitter closed forms); Hogg 1999, astro-ph/9905116
(distance measures); Planck 2018 results VI (age of the universe).
"""

from __future__ import annotations

import math

import astropy.units as u
import numpy as np
import pytest
from astropy import constants as const
from astropy.cosmology import FlatLambdaCDM, FlatwCDM, LambdaCDM, Planck18, w0waCDM, wCDM

from zsieve.cosmology import CosmologyError, describe, get_cosmology, quantities
from zsieve.cosmology.distances import _arrays
from zsieve.cosmology.uncertainty import draw_z_samples

C_KMS = const.c.to_value("km/s")
ZS = np.array([0.005, 0.1, 0.5, 1.0, 1.42, 3.0, 6.5])
EDS = {"H0": 70.0, "Om0": 1.0, "Ode0": 0.0}


def _astropy_reference(cosmo, z):
    """Every distance and time straight from astropy.cosmology (reference library)."""
    return {
        "comoving_distance_mpc": cosmo.comoving_distance(z).to_value(u.Mpc),
        "transverse_comoving_distance_mpc": cosmo.comoving_transverse_distance(z).to_value(u.Mpc),
        "angular_diameter_distance_mpc": cosmo.angular_diameter_distance(z).to_value(u.Mpc),
        "luminosity_distance_mpc": cosmo.luminosity_distance(z).to_value(u.Mpc),
        "distance_modulus_mag": cosmo.distmod(z).to_value(u.mag),
        "lookback_time_gyr": cosmo.lookback_time(z).to_value(u.Gyr),
        "age_at_z_gyr": cosmo.age(z).to_value(u.Gyr),
        "kpc_per_arcsec_proper": 1.0 / cosmo.arcsec_per_kpc_proper(z).to_value(u.arcsec / u.kpc),
        "kpc_per_arcsec_comoving": 1.0 / cosmo.arcsec_per_kpc_comoving(z).to_value(u.arcsec / u.kpc),
        "hubble_parameter_kms_mpc": cosmo.H(z).to_value(u.km / u.s / u.Mpc),
    }


@pytest.mark.parametrize(
    "spec, reference",
    [
        ("Planck18", Planck18),
        # custom models built independently with astropy's own classes (reference library)
        ({"H0": 72.0, "Om0": 0.25, "Ode0": 0.6}, LambdaCDM(H0=72.0, Om0=0.25, Ode0=0.6)),
        ({"H0": 68.0, "Om0": 0.3, "Ode0": 0.8, "w0": -0.9}, wCDM(H0=68.0, Om0=0.3, Ode0=0.8, w0=-0.9)),
    ],
)
def test_every_distance_and_time_matches_astropy(spec, reference):
    ref = _astropy_reference(reference, ZS)
    q = quantities(ZS, spec)
    for key, expected in ref.items():
        np.testing.assert_allclose(q[key].value, expected, rtol=1e-6, err_msg=key)
    # the single-z record carries the same numbers as plain floats
    d = describe(1.42, cosmology=spec)
    one = _astropy_reference(reference, 1.42)
    for key, expected in one.items():
        assert isinstance(d[key], float)
        assert d[key] == pytest.approx(float(expected), rel=1e-6), key
    assert d["age_now_gyr"] == pytest.approx(reference.age(0).to_value(u.Gyr), rel=1e-6)


def test_quantities_carry_units_and_keep_shape():
    z = np.array([[0.1, 0.2], [0.3, 0.4]])
    q = quantities(z)
    assert q["luminosity_distance_mpc"].unit == u.Mpc
    assert q["recession_velocity_now_kms"].unit == u.km / u.s
    assert q["lookback_time_gyr"].shape == (2, 2)
    # astropy, reference library
    np.testing.assert_allclose(q["luminosity_distance_mpc"].value, Planck18.luminosity_distance(z).value, rtol=1e-6)


def test_class_chosen_from_parameters():
    assert isinstance(get_cosmology({"H0": 70, "Om0": 0.3}), FlatLambdaCDM)
    assert isinstance(get_cosmology({"H0": 70, "Om0": 0.3, "Ode0": 0.7}), FlatLambdaCDM)
    assert type(get_cosmology({"H0": 70, "Om0": 0.3, "Ode0": 0.5})) is LambdaCDM
    assert isinstance(get_cosmology({"H0": 70, "Om0": 0.3, "w0": -0.8}), FlatwCDM)
    assert type(get_cosmology({"H0": 70, "Om0": 0.3, "Ode0": 0.5, "w0": -0.8})) is wCDM
    assert get_cosmology(Planck18) is Planck18
    assert get_cosmology("planck15").name == "Planck15"
    # Tcmb0 defaults to 0 K (no radiation) and is honoured when given
    assert get_cosmology({"H0": 70, "Om0": 0.3}).Tcmb0.value == 0.0
    assert get_cosmology({"H0": 70, "Om0": 0.3, "Tcmb0": 2.7255}).Tcmb0.value == 2.7255


def test_cosmology_recorded_in_output():
    d = describe(0.3, cosmology={"H0": 71.0, "Om0": 0.27, "Ode0": 0.65, "w0": -1.1})
    rec = d["cosmology"]
    assert rec["class"] == "wCDM" and rec["name"] is None
    assert (rec["H0_kms_mpc"], rec["Om0"], rec["Ode0"], rec["w0"]) == (71.0, 0.27, 0.65, -1.1)
    assert rec["Ok0"] == pytest.approx(1 - 0.27 - 0.65)
    p = describe(0.3)["cosmology"]
    assert p["name"] == "Planck18" and p["H0_kms_mpc"] == Planck18.H0.value


@pytest.mark.parametrize(
    "spec, words",
    [
        ("Planck99", "unknown cosmology"),
        ({"H0": 70, "Om0": -0.1}, "Om0"),
        ({"H0": 0, "Om0": 0.3}, "H0"),
        ({"Om0": 0.3}, "H0"),
        ({"H0": 70, "Om0": 0.3, "Omega_k": 0.1}, "unknown cosmology parameter"),
        ({"H0": "fast", "Om0": 0.3}, "number"),
        ({"H0": 70, "Om0": 0.3, "Ode0": 3.0}, "no big bang"),  # E(z)^2 < 0: a bounce (Hogg 1999 eq. 14)
        (42, "cannot make a cosmology"),
    ],
)
def test_bad_cosmologies_raise_one_clear_error(spec, words):
    with pytest.raises(CosmologyError, match=words):
        get_cosmology(spec)


# ---------------------------------------------------------------- Einstein-de Sitter
def test_einstein_de_sitter_closed_forms():
    z = np.linspace(0.01, 20.0, 200)
    q = quantities(z, EDS)
    # Davis & Lineweaver 2004: v_now = 2c(1 - (1+z)^-1/2), v_emit = 2c((1+z)^1/2 - 1)
    np.testing.assert_allclose(q["recession_velocity_now_c"].value, 2 * (1 - (1 + z) ** -0.5), rtol=1e-6)
    np.testing.assert_allclose(q["recession_velocity_emission_c"].value, 2 * ((1 + z) ** 0.5 - 1), rtol=1e-6)
    np.testing.assert_allclose(q["recession_velocity_now_kms"].value, 2 * C_KMS * (1 - (1 + z) ** -0.5), rtol=1e-6)
    # Hogg 1999 eq. 15-16 for Om=1: D_C = 2 D_H (1 - (1+z)^-1/2)
    d_h = C_KMS / 70.0
    np.testing.assert_allclose(q["comoving_distance_mpc"].value, 2 * d_h * (1 - (1 + z) ** -0.5), rtol=1e-6)


def test_einstein_de_sitter_age_and_special_redshifts():
    cosmo = get_cosmology(EDS)
    # age = 2/(3 H0) for Om = 1 (Hogg 1999 / Davis & Lineweaver 2004)
    age = (2.0 / (3.0 * 70.0 * u.km / u.s / u.Mpc)).to_value(u.Gyr)
    assert describe(0.5, cosmology=cosmo)["age_now_gyr"] == pytest.approx(age, rel=1e-6)
    # from the closed forms: v_emit = c at z = 1.25, v_now = c at z = 3
    assert describe(1.25, cosmology=cosmo)["recession_velocity_emission_c"] == pytest.approx(1.0, rel=1e-6)
    assert describe(3.0, cosmology=cosmo)["recession_velocity_now_c"] == pytest.approx(1.0, rel=1e-6)
    # the angular-diameter distance peaks at z = 1.25 (Hogg 1999, fig. 2 and text)
    z = np.linspace(0.5, 3.0, 2501)
    da = quantities(z, cosmo)["angular_diameter_distance_mpc"].value
    assert z[np.argmax(da)] == pytest.approx(1.25, abs=2e-3)


def test_special_relativistic_figure_stays_below_c_and_cz_does_not():
    # common practice: a special-relativistic velocity is below c for every z; cz is not
    z = np.concatenate([np.linspace(-0.9, 10.0, 500), [100.0, 1e4]])
    q = quantities(z, EDS)
    assert np.all(np.abs(q["relativistic_doppler_velocity_c"].value) < 1.0)
    assert q["cz_c"].value[-1] > 1.0
    # ... while the recession velocity exceeds c beyond z = 3 in EdS
    assert describe(5.0, cosmology=EDS)["recession_velocity_now_c"] > 1.0


def test_planck18_age_today():
    # Planck 2018 results VI: age 13.787 +/- 0.020 Gyr
    assert describe(1.0)["age_now_gyr"] == pytest.approx(13.787, abs=0.02)


def test_doppler_figures_labelled_and_compared_with_v_now():
    d = describe(1.42)
    assert "not a recession velocity" in d["labels"]["cz_kms"]
    assert "not a recession velocity" in d["labels"]["relativistic_doppler_velocity_kms"]
    assert d["cz_kms"] == pytest.approx(1.42 * C_KMS, rel=1e-12)
    a = 2.42**2
    assert d["relativistic_doppler_velocity_kms"] == pytest.approx(C_KMS * (a - 1) / (a + 1), rel=1e-12)
    v_now = Planck18.H0.value * Planck18.comoving_distance(1.42).value  # Davis & Lineweaver 2004 eq. 1
    assert d["recession_velocity_now_kms"] == pytest.approx(v_now, rel=1e-6)
    assert d["cz_relative_difference_from_v_now"] == pytest.approx(d["cz_kms"] / v_now - 1, rel=1e-6)
    assert any("above c are correct" in n for n in d["notes"])
    assert any("Why not Doppler" in n for n in d["notes"])


def test_z_zero_and_blueshifted_stars():
    d0 = describe(0.0)
    assert d0["comoving_distance_mpc"] == 0.0 and d0["distance_modulus_mag"] is None
    assert any("distance modulus" in n for n in d0["notes"])
    star = describe(-0.0003, z_err=1e-5)
    for key in ("comoving_distance_mpc", "luminosity_distance_mpc", "distance_modulus_mag",
                "lookback_time_gyr", "recession_velocity_now_kms", "comoving_distance_mpc_err"):
        assert star[key] is None, key
    # special relativity: the star's line-of-sight velocity (common practice)
    a = (1 - 0.0003) ** 2
    assert star["relativistic_doppler_velocity_kms"] == pytest.approx(C_KMS * (a - 1) / (a + 1), rel=1e-12)
    assert star["relativistic_doppler_velocity_kms_err"] == pytest.approx(1e-5 * C_KMS, rel=0.05)
    assert any("not meaningful" in n for n in star["notes"])
    with pytest.raises(CosmologyError):
        describe(-1.0)
    with pytest.raises(CosmologyError):
        describe(float("nan"))


# ------------------------------------------------------------------- uncertainties
@pytest.mark.parametrize("spec", ["Planck18", {"H0": 70.0, "Om0": 0.3, "Ode0": 0.5}])
def test_sampled_errors_agree_with_linearised_for_small_sigma(spec):
    """Small sigma: the 16-84 half-width equals |dQ/dz| sigma (first-order propagation,
    common practice), derivatives taken from astropy directly."""
    z0, sigma = 0.8, 2e-4
    d = describe(z0, z_err=sigma, cosmology=spec, n_samples=20000, seed=3)
    cosmo = get_cosmology(spec)
    h = 1e-4
    lo, hi = _astropy_reference(cosmo, z0 - h), _astropy_reference(cosmo, z0 + h)
    for key in lo:
        slope = (hi[key] - lo[key]) / (2 * h)
        assert d[f"{key}_err"] == pytest.approx(abs(slope) * sigma, rel=0.03), key
        assert d[f"{key}_p16"] < d[key] < d[f"{key}_p84"]


def test_errors_asymmetric_where_mapping_bends():
    # the distance modulus is concave in z (5 log10 D_L, Hogg 1999 eq. 25): longer lower tail
    d = describe(0.05, z_err=0.02, n_samples=4000, seed=1)
    up = d["distance_modulus_mag_p84"] - d["distance_modulus_mag"]
    down = d["distance_modulus_mag"] - d["distance_modulus_mag_p16"]
    assert down > 1.3 * up
    assert d["uncertainty"]["method"] == "gaussian"


def test_bootstrap_samples_propagate_exactly():
    rng = np.random.default_rng(7)
    samples = 1.42 + 0.004 * rng.standard_t(4, size=300)
    d = describe(1.42, z_samples=samples)
    ref = Planck18.luminosity_distance(samples).value  # astropy, reference library
    p16, p84 = np.percentile(ref, [16, 84])
    assert d["luminosity_distance_mpc_p16"] == pytest.approx(p16, rel=1e-6)
    assert d["luminosity_distance_mpc_p84"] == pytest.approx(p84, rel=1e-6)
    assert d["luminosity_distance_mpc_err"] == pytest.approx((p84 - p16) / 2, rel=1e-6)
    assert d["uncertainty"]["method"] == "samples" and d["uncertainty"]["n_samples"] == 300


_CURVED = LambdaCDM(H0=70, Om0=0.3, Ode0=0.6)  # open
_CLOSED = LambdaCDM(H0=70, Om0=0.4, Ode0=0.75)
_W0WA = w0waCDM(H0=68, Om0=0.31, Ode0=0.69, w0=-0.9, wa=0.2, Tcmb0=2.7255)


@pytest.mark.parametrize("cosmo", [Planck18, _CURVED, _CLOSED, _W0WA], ids=["Planck18", "open", "closed", "w0wa"])
@pytest.mark.parametrize("lo, hi", [(0.0, 7.0), (1.40, 1.44), (0.0005, 0.002)])
def test_sample_quadrature_matches_direct_astropy(lo, hi, cosmo):
    """The fast path for bootstrap samples (one cumulative Gauss-Legendre quadrature) against
    astropy's adaptive integrals evaluated at every z (reference library), flat and curved."""
    rng = np.random.default_rng(11)
    z = np.concatenate([[lo, hi], rng.uniform(lo, hi, 200)])
    fast = _arrays(z, cosmo, fast=True)
    direct = {
        "comoving_distance_mpc": cosmo.comoving_distance(z).to_value(u.Mpc),
        "transverse_comoving_distance_mpc": cosmo.comoving_transverse_distance(z).to_value(u.Mpc),
        "lookback_time_gyr": cosmo.lookback_time(z).to_value(u.Gyr),
        "age_at_z_gyr": cosmo.age(z).to_value(u.Gyr),
    }
    dl = (1 + z) * direct["transverse_comoving_distance_mpc"]  # Hogg 1999 eq. 21
    direct["luminosity_distance_mpc"] = dl
    for key, ref in direct.items():
        np.testing.assert_allclose(fast[key], ref, rtol=1e-8, atol=1e-9, err_msg=key)
    ok = z > 0
    np.testing.assert_allclose(fast["distance_modulus_mag"][ok], 5 * np.log10(dl[ok]) + 25, rtol=1e-6)


def test_gaussian_draws_truncated_above_minus_one():
    s = draw_z_samples(-0.995, 0.01, 5000, seed=0)
    assert np.all(s > -1.0)
    assert abs(np.std(draw_z_samples(2.0, 0.1, 20000, seed=0)) - 0.1) < 0.003
    with pytest.raises(CosmologyError):
        describe(0.5, z_err=-0.1)


def test_samples_below_zero_noted_when_z_small():
    d = describe(0.001, z_err=0.002, n_samples=2000, seed=0)
    assert any("below 0" in n for n in d["notes"])
    assert d["comoving_distance_mpc_p16"] is not None and d["comoving_distance_mpc_p16"] >= 0.0
    assert math.isfinite(d["cz_kms_p16"]) and d["cz_kms_p16"] < 0
