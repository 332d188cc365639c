"""Checks of the mock-spectrum generator against formulas from outside the project."""

from __future__ import annotations

import math

import numpy as np
import pytest

from zsieve.lines import air_to_vacuum, load_linelist
from zsieve.simulate import (
    C_KMS,
    KINDS,
    log_grid,
    mock_set,
    mock_spectrum,
    to_air_grid,
)

FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def _rest(name, list_name="galaxy_emission"):
    tab = load_linelist(list_name)
    return float(tab[tab["name"] == name]["wave_vac"][0])


def _peak_near(wave, flux, center, half=15.0, fn=np.argmax):
    w = (wave > center - half) & (wave < center + half)
    return wave[w][fn(flux[w])]


def test_grid_is_log_uniform_like_sdss():
    w = log_grid((3600.0, 9800.0), 1e-4)
    # dlog10 = 1e-4 is 69.0 km/s per pixel (SDSS convention; common practice)
    step = np.diff(np.log10(w))
    np.testing.assert_allclose(step, 1e-4, rtol=1e-8)
    assert C_KMS * math.log(10) * 1e-4 == pytest.approx(69.03, abs=0.01)
    assert w[0] == pytest.approx(3600.0) and w[-1] <= 9800.0


def test_emission_lines_where_one_plus_z_says():
    z = 0.25
    spec, truth = mock_spectrum("emission-galaxy", z, 50.0, np.random.default_rng(2), sky=False)
    model = truth["model"]
    px = spec.wavelength * math.log(10) * 1e-4  # pixel width in A
    for name in ("H-alpha", "[O III] 5008", "H-beta"):
        expect = _rest(name) * (1 + z)  # 1 + z = lambda_obs / lambda_rest
        got = _peak_near(spec.wavelength, model, expect, half=5.0)
        assert abs(got - expect) <= px[np.searchsorted(spec.wavelength, expect)], name


def test_emission_line_ratios_physical():
    _, truth = mock_spectrum("emission-galaxy", 0.1, 30.0, np.random.default_rng(4), sky=False)
    flux = {d["name"]: d["flux"] for d in truth["lines"]}
    # fixed by transition probabilities (common practice): 2.98 and 3.05; dust reddening
    # (Calzetti et al. 2000) shifts an observed ratio 48 A apart by well under 2%
    assert flux["[O III] 5008"] / flux["[O III] 4960"] == pytest.approx(2.98, rel=0.02)
    assert flux["[N II] 6585"] / flux["[N II] 6550"] == pytest.approx(3.05, rel=0.02)
    # case B H-alpha/H-beta = 2.86; dust only raises it (Osterbrock & Ferland; common practice)
    assert 2.84 < flux["H-alpha"] / flux["H-beta"] < 6.0


def test_absorption_lines_where_one_plus_z_says():
    z = 0.12
    spec, truth = mock_spectrum("absorption-galaxy", z, 30.0, np.random.default_rng(5), sky=False)
    for name in ("Ca II K", "Na D2"):
        expect = _rest(name, "galaxy_absorption") * (1 + z)
        got = _peak_near(spec.wavelength, truth["model"], expect, half=4.0, fn=np.argmin)
        assert abs(got - expect) < 2.5, name
    d = truth["params"]["velocity_dispersion_kms"]
    assert 150 <= d <= 250


def test_passive_galaxy_has_a_4000_break():
    # Dn4000 = <f_nu>(4000-4100) / <f_nu>(3850-3950) (Balogh et al. 1999, ApJ 527, 54;
    # from memory); passive galaxies have Dn4000 > ~1.5 (Kauffmann et al. 2003; from memory).
    z = 0.2
    spec, truth = mock_spectrum("absorption-galaxy", z, 30.0, np.random.default_rng(6), sky=False)
    rest = spec.wavelength / (1 + z)
    fnu = truth["model"] * rest**2
    red = fnu[(rest > 4000) & (rest < 4100)].mean()
    blue = fnu[(rest > 3850) & (rest < 3950)].mean()
    assert 1.4 < red / blue < 2.8


def test_quasar_broad_line_offsets():
    z = 2.0
    spec, truth = mock_spectrum("quasar", z, 30.0, np.random.default_rng(8), sky=False)
    civ = [d for d in truth["lines"] if d["name"] == "C IV 1549"][0]
    assert 2000 <= civ["fwhm_kms"] <= 6500  # broad (the instrument adds 150 km/s)
    expect = 1549.06 * (1 + z) * (1 + civ["offset_kms"] / C_KMS)
    got = _peak_near(spec.wavelength, truth["model"], expect, half=40.0)
    assert abs(got - expect) < 2.0
    # the mean offsets come from the list: Shen et al. 2016, ApJ 831, 7 (from memory)
    offs = [t["lines"][[d["name"] for d in t["lines"]].index("C IV 1549")]["offset_kms"]
            for _, t in mock_set(12, seed=3, kinds=("quasar",), sky=False, z_ranges={"quasar": (1.6, 3.0)})]
    assert -600 < np.mean(offs) < -150


def test_lyman_alpha_forest_mean_transmission():
    # mean forest transmission exp(-0.0018 (1+z)^3.92) (Faucher-Giguere et al. 2008, from memory)
    z = 2.8
    spec, truth = mock_spectrum("quasar", z, 20.0, np.random.default_rng(9), sky=False)
    w = spec.wavelength
    reg = (w > 1040 * (1 + z)) & (w < 1180 * (1 + z))
    za = w[reg] / 1215.67 - 1
    expect = np.mean(np.exp(-0.0018 * (1 + za) ** 3.92))
    alpha_lam = -(2.0 + truth["params"]["alpha_nu"])
    cont = (w[reg] / (1 + z) / 3000.0) ** alpha_lam
    lines = truth["model"][reg] / cont  # lines far from the forest window are negligible here
    assert np.mean(lines) == pytest.approx(expect, abs=0.06)
    red = (w > 1230 * (1 + z)) & (w < 1280 * (1 + z))
    assert np.all(truth["model"][red] > 0.99 * (w[red] / (1 + z) / 3000.0) ** alpha_lam)


def test_star_absorption_near_zero_velocity():
    for _, truth in mock_set(8, seed=11, kinds=("star",)):
        assert abs(truth["z"]) * C_KMS <= 300.0
    spec, truth = mock_spectrum("star", 0.0005, 40.0, np.random.default_rng(1), sky=False)
    expect = 3934.777 * 1.0005
    got = _peak_near(spec.wavelength, truth["model"], expect, half=5.0, fn=np.argmin)
    assert abs(got - expect) < 1.0


@pytest.mark.parametrize("kind", ["absorption-galaxy", "star", "quasar"])
def test_noise_matches_requested_sigma(kind):
    spec, truth = mock_spectrum(kind, 0.1, 10.0, np.random.default_rng(21), sky=False, edge_noise=0.0,
                                wave_range=(3600.0, 20000.0))
    resid = spec.flux - truth["model"]
    # sample standard deviation of Gaussian noise: relative error 1/sqrt(2N) ~ 1% here
    assert np.std(resid) == pytest.approx(truth["sigma0"], rel=0.04)
    np.testing.assert_allclose(spec.sigma, truth["sigma0"])
    # the S/N definition: median per-pixel S/N of the noiseless model
    assert np.median(truth["model"] / spec.sigma) == pytest.approx(10.0, rel=1e-6)


def test_pulls_unit_with_sky_and_edges():
    spec, truth = mock_spectrum("emission-galaxy", 0.4, 15.0, np.random.default_rng(22), spike_prob=0.0)
    pull = (spec.flux - truth["model"]) / spec.sigma
    assert np.std(pull) == pytest.approx(1.0, abs=0.05)
    assert spec.sigma[0] > 2 * truth["sigma0"] and spec.sigma[-1] > 2 * truth["sigma0"]


def test_single_line_snr_is_matched_filter_snr():
    # Optimal S/N of a Gaussian line of flux F on white noise sigma, pixels Delta, width s:
    # S/N = F / (sigma sqrt(2 sqrt(pi) s Delta)) (continuous limit; common practice)
    z = 0.3
    spec, truth = mock_spectrum("single-line", z, 12.0, np.random.default_rng(3), line="H-alpha",
                                sky=False, edge_noise=0.0)
    (ln,) = truth["lines"]
    s = ln["wave_obs"] * ln["fwhm_kms"] / C_KMS / FWHM_PER_SIGMA
    delta = ln["wave_obs"] * math.log(10) * 1e-4
    snr = ln["flux"] / (truth["sigma0"] * math.sqrt(2 * math.sqrt(math.pi) * s * delta))
    assert snr == pytest.approx(12.0, rel=0.03)


def test_bound_matches_gaussian_centroid_formula():
    # Fisher information of a Gaussian centroid (common practice):
    # sigma_mu^2 = 2 sigma_n^2 Delta s / (A^2 sqrt(pi)), and sigma_z = sigma_mu / lambda_rest
    z = 0.3
    spec, truth = mock_spectrum("single-line", z, 15.0, np.random.default_rng(4), line="[O III] 5008",
                                sky=False, edge_noise=0.0)
    (ln,) = truth["lines"]
    s = ln["wave_obs"] * ln["fwhm_kms"] / C_KMS / FWHM_PER_SIGMA
    amp = ln["flux"] / (s * math.sqrt(2 * math.pi))
    delta = ln["wave_obs"] * math.log(10) * 1e-4
    sig_mu = math.sqrt(2 * truth["sigma0"] ** 2 * delta * s / (amp**2 * math.sqrt(math.pi)))
    assert truth["z_bound"] == pytest.approx(sig_mu / ln["wave_rest"], rel=0.04)


def test_sky_lines_in_vacuum_raise_sigma():
    spec, truth = mock_spectrum("absorption-galaxy", 0.3, 10.0, np.random.default_rng(5), sky_level=3.0,
                                spike_prob=0.0)
    w = spec.wavelength
    ratio = spec.sigma / truth["sigma_base"]
    near = (w > 5560) & (w < 5600)
    # [O I] 5577.34 air is 5578.89 vacuum (NIST; from memory)
    assert abs(w[near][np.argmax(ratio[near])] - 5578.89) < 1.5
    assert ratio[near].max() > 2.5
    quiet = (w > 4600) & (w < 4900)
    np.testing.assert_allclose(ratio[quiet], 1.0, atol=1e-3)


def test_air_medium_grid():
    spec, truth = mock_spectrum("emission-galaxy", 0.2, 20.0, np.random.default_rng(6), medium="air", sky=False)
    assert spec.meta.medium == "air" and truth["medium"] == "air"
    wave_air, flux, sigma = to_air_grid(spec)
    np.testing.assert_allclose(np.diff(np.log10(wave_air)), 1e-4, rtol=1e-6)
    np.testing.assert_allclose(spec.wavelength, air_to_vacuum(wave_air), rtol=1e-12)
    # lines still sit at vacuum rest wavelength x (1 + z) in the (vacuum) spectrum
    expect = _rest("H-alpha") * 1.2
    got = _peak_near(spec.wavelength, truth["model"], expect, half=5.0)
    assert abs(got - expect) < 2.0


def test_noise_kind():
    spec, truth = mock_spectrum("noise", 0.0, 0.0, np.random.default_rng(7), sky=False, edge_noise=0.0)
    assert math.isnan(truth["z"]) and truth["z_bound"] == math.inf and truth["lines"] == []
    assert abs(np.mean(spec.flux)) < 5 * 1 / math.sqrt(spec.n_pix)
    spec, truth = mock_spectrum("noise", 0.0, 4.0, np.random.default_rng(7), sky=False, slope=0.3)
    assert np.median(truth["model"] / spec.sigma) == pytest.approx(4.0, rel=1e-6)


def test_mock_set_deterministic_and_mixed():
    a = list(mock_set(12, seed=42))
    b = list(mock_set(12, seed=42))
    c = list(mock_set(5, seed=42))
    for (sa, ta), (sb, tb) in zip(a, b):
        np.testing.assert_array_equal(sa.flux, sb.flux)
        assert ta["kind"] == tb["kind"]
    for (sa, _), (sc, _) in zip(a, c):  # mock i does not depend on n
        np.testing.assert_array_equal(sa.flux, sc.flux)
    d = list(mock_set(3, seed=43))
    assert not np.array_equal(a[0][0].flux, d[0][0].flux)
    assert len({t["kind"] for _, t in a}) >= 4
    for _, t in a:
        assert t["kind"] in KINDS and t["snr"] >= 0
        if t["kind"] == "single-line":
            assert t["lines"][0]["in_range"]


def test_bad_arguments():
    rng = np.random.default_rng(0)
    with pytest.raises(ValueError, match="kind"):
        mock_spectrum("galaxy", 0.1, 5.0, rng)
    with pytest.raises(ValueError, match="medium"):
        mock_spectrum("star", 0.0, 5.0, rng, medium="water")
    with pytest.raises(ValueError, match="grid"):
        mock_spectrum("single-line", 3.0, 5.0, rng, line="H-alpha")


def test_linear_grid_option():
    spec, truth = mock_spectrum("quasar", 2.2, 10.0, np.random.default_rng(12), dlambda=2.0, sky=False)
    np.testing.assert_allclose(np.diff(spec.wavelength), 2.0, rtol=1e-9)
    assert truth["dlambda"] == 2.0 and truth["dlog10"] is None
    expect = 1549.06 * 3.2 * (1 + [d for d in truth["lines"] if d["name"] == "C IV 1549"][0]["offset_kms"] / C_KMS)
    assert abs(_peak_near(spec.wavelength, truth["model"], expect, half=40.0) - expect) < 3.0


def test_bound_is_reached_by_a_least_squares_centroid():
    # Cramer-Rao: an efficient estimator (a least-squares Gaussian fit at high S/N) scatters
    # by the bound (Cramer 1946; Rao 1945). 150 mocks give the std to ~6% (1/sqrt(2N)).
    from scipy.optimize import curve_fit

    def gauss(w, a, mu, s, c):
        return c + a * np.exp(-0.5 * ((w - mu) / s) ** 2)

    z0, dz, bounds = 0.2, [], []
    for i in range(150):
        spec, truth = mock_spectrum("single-line", z0, 20.0, np.random.default_rng(1000 + i), line="H-alpha",
                                    wave_range=(7600.0, 8150.0), sky=False, edge_noise=0.0)
        (ln,) = truth["lines"]
        s0 = ln["wave_obs"] * ln["fwhm_kms"] / C_KMS / FWHM_PER_SIGMA
        p0 = [ln["flux"] / (s0 * math.sqrt(2 * math.pi)), ln["wave_obs"], s0, 1.0]
        p, _ = curve_fit(gauss, spec.wavelength, spec.flux, p0=p0, sigma=spec.sigma)
        dz.append(p[1] / ln["wave_rest"] - 1 - z0)
        bounds.append(truth["z_bound"])
    ratio = np.std(dz) / np.mean(bounds)
    # the fit also frees width and continuum, which costs little information for a centroid
    assert 0.85 < ratio < 1.25
    assert abs(np.mean(dz)) < 4 * np.mean(bounds) / math.sqrt(150)


def test_second_feature_snr_counts_a_blend_once():
    # matched-filter S/N sqrt(sum (m / sigma)^2) (common practice); [O II] 3727.09/3729.88
    # (NIST vacuum, from memory) are 224 km/s apart: at sigma 116 km/s one blended feature
    from zsieve.simulate import _second_feature_snr

    w = np.linspace(7900.0, 8300.0, 4000)
    c_kms = 299792.458

    def prof(c, sv, a):
        s = c * sv / c_kms
        return a * np.exp(-0.5 * ((w - c) / s) ** 2)

    oii = np.array([3727.09, 3729.88]) * 2.15
    third = 8200.0
    p = np.stack([prof(oii[0], 116.0, 1.0), prof(oii[1], 116.0, 1.3), prof(third, 116.0, 0.5)])
    cen, sv = np.array([oii[0], oii[1], third]), np.full(3, 116.0)
    got = _second_feature_snr(p, np.ones(3, bool), cen, sv)
    assert got == pytest.approx(np.sqrt(np.sum(p[2] ** 2)))
    # narrow lines (sigma 40 km/s): the doublet is resolved, so its weaker member is second
    p_n = np.stack([prof(oii[0], 40.0, 1.0), prof(oii[1], 40.0, 1.3), prof(third, 40.0, 0.1)])
    got_n = _second_feature_snr(p_n, np.ones(3, bool), cen, np.full(3, 40.0))
    assert got_n == pytest.approx(np.sqrt(np.sum(p_n[0] ** 2)))
