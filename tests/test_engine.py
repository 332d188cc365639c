"""Outside checks of the redshift engine (zsieve.engine.measure and its stages).

Spectra here are synthesised from rest wavelengths typed in from the NIST Atomic Spectra
Database (vacuum, from memory), independently of the bundled line lists the engine uses, so a
wrong entry or a wrong convention in the engine shows up as a wrong z.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import zsieve
from zsieve.engine.measure import MeasureConfig, measure
from zsieve.result import FitResult
from zsieve.spectrum import Spectrum, SpectrumMeta

C_KMS = 299792.458  # exact, SI definition of the metre

# Vacuum rest wavelengths in Angstrom, NIST Atomic Spectra Database (from memory).
NIST_VAC = {
    "[O II] 3727": 3727.09,
    "[O II] 3730": 3729.88,
    "H-gamma": 4341.69,
    "H-beta": 4862.69,
    "[O III] 4960": 4960.30,
    "[O III] 5008": 5008.24,
    "[N II] 6550": 6549.86,
    "H-alpha": 6564.61,
    "[N II] 6585": 6585.27,
    "[S II] 6718": 6718.29,
    "[S II] 6733": 6732.67,
    "Ca II K": 3934.78,
    "Ca II H": 3969.59,
    "Mg I 5185": 5185.05,
    "Mg I 5174": 5174.13,
    "Na I D2": 5891.58,
    "Na I D1": 5897.56,
    "H-delta": 4102.89,
}

# Typical relative strengths of star-forming galaxy lines (case-B Balmer decrement 2.86 and the
# [O III] and [N II] doublet ratios of ~3 from transition probabilities; common practice).
EMISSION = {"[O II] 3727": 0.8, "[O II] 3730": 1.1, "H-gamma": 0.16, "H-beta": 0.35,
            "[O III] 4960": 0.25, "[O III] 5008": 0.75, "[N II] 6550": 0.1, "H-alpha": 1.0,
            "[N II] 6585": 0.3, "[S II] 6718": 0.2, "[S II] 6733": 0.15}


def log_grid(lo=3700.0, hi=9200.0, dlog10=1e-4):
    """Pixels uniform in log10 wavelength (69 km/s, as SDSS; common practice)."""
    return 10 ** np.arange(np.log10(lo), np.log10(hi), dlog10)


def gaussians(wave, centres, sigmas, fluxes):
    out = np.zeros_like(wave)
    for c, s, f in zip(centres, sigmas, fluxes):
        out += f / (math.sqrt(2 * math.pi) * s) * np.exp(-0.5 * ((wave - c) / s) ** 2)
    return out


def emission_spectrum(z, rng, wave=None, noise=1.0, scale=60.0, sigma_kms=90.0, lines=EMISSION):
    wave = log_grid() if wave is None else wave
    obs = np.array([NIST_VAC[n] for n in lines]) * (1 + z)
    flux = 2.0 + gaussians(wave, obs, obs * sigma_kms / C_KMS, scale * np.array(list(lines.values())))
    return wave, flux + rng.normal(0, noise, wave.size), np.full(wave.size, noise)


FAST = MeasureConfig(n_resamples=40, seed=11)


@pytest.mark.parametrize("z", [0.03, 0.31, 0.74])
def test_redshift_recovered_from_nist_lines(z):
    # z from lines placed at NIST vacuum wavelengths (from memory); the error must be honest
    rng = np.random.default_rng(int(z * 1000))
    wave, flux, sig = emission_spectrum(z, rng)
    res = measure(Spectrum(wave, flux, sig), FAST)
    assert res.status == "ok"
    assert res.template == "emission-galaxy"
    assert abs(res.z - z) < 4 * res.z_err + 2e-6
    assert abs(res.z - z) / (1 + z) * C_KMS < 15.0
    assert res.grade in ("secure", "likely")
    assert res.z_p16 <= res.z <= res.z_p84 or abs(res.z - res.z_p50) < res.z_err
    names = {m.name for m in res.lines}
    assert "H-beta" in names or "[O II] 3727" in names


def test_air_file_gives_the_same_z_as_its_vacuum_twin(tmp_path):
    # An instrument sampling uniformly in AIR wavelength: the file says AWAV (FITS WCS Paper III,
    # Greisen et al. 2006; AWAV-LOG) and the reader converts with the IAU formula (Morton 2000). Its z must
    # equal that of the same object sampled in vacuum within 5 km/s.
    from zsieve.io import read_spectrum, write_fits_image
    from zsieve.lines import air_to_vacuum

    z = 0.12
    air = log_grid(3800.0, 9000.0)
    vac_of_air_pixels = air_to_vacuum(air)
    rng = np.random.default_rng(5)
    _, f_air, s_air = emission_spectrum(z, rng, wave=vac_of_air_pixels, noise=0.5)
    spec_air = Spectrum(vac_of_air_pixels, f_air, s_air, meta=SpectrumMeta(medium="air"))
    path = tmp_path / "cdx0042_air.fits"
    write_fits_image(spec_air, path, medium="air", sampling="log")
    back = read_spectrum(path)
    assert back.meta.medium == "air"
    assert np.allclose(back.wavelength, vac_of_air_pixels, rtol=0, atol=2e-3)
    rng = np.random.default_rng(6)
    vac = log_grid(3800.0, 9000.0)
    _, f_vac, s_vac = emission_spectrum(z, rng, wave=vac, noise=0.5)
    r_air = measure(back, FAST)
    r_vac = measure(Spectrum(vac, f_vac, s_vac), FAST)
    assert abs(r_air.z - r_vac.z) / (1 + z) * C_KMS < 5.0
    assert abs(r_vac.z - z) / (1 + z) * C_KMS < 5.0
    assert r_air.medium == "air" and r_vac.medium == "vacuum"


def test_bootstrap_sigma_matches_gaussian_centroid_bound():
    # Fisher information of a Gaussian centroid (common practice): sigma_mu^2 =
    # 2 sigma_n^2 Delta s / (A^2 sqrt(pi)), pixel Delta, width s, amplitude A, noise sigma_n.
    # The bootstrap sigma_z of a lone line must agree within 20%.
    delta, s_pix, amp, sn = 1.0, 3.0, 8.0, 1.0
    wave = np.arange(5000.0, 7000.0, delta)
    centre = 6100.0
    rng = np.random.default_rng(21)
    flux = 5.0 + amp * np.exp(-0.5 * ((wave - centre) / (s_pix * delta)) ** 2)
    spec = Spectrum(wave, flux + rng.normal(0, sn, wave.size), np.full(wave.size, sn))
    res = measure(spec, MeasureConfig(n_resamples=200, seed=3, mask_sky=False, xcorr=False))
    sigma_mu = math.sqrt(2 * sn**2 * delta * s_pix * delta / (amp**2 * math.sqrt(math.pi)))
    adopted = res.lines[0]
    assert abs(adopted.observed_wavelength - centre) < 4 * sigma_mu
    sigma_mu_boot = res.z_err * adopted.rest_wavelength
    assert abs(sigma_mu_boot / sigma_mu - 1) < 0.2
    # the reported information bound is the same Fisher bound (to the width/amplitude terms)
    assert abs(res.z_bound * adopted.rest_wavelength / sigma_mu - 1) < 0.1


def test_lone_line_is_ambiguous_never_secure():
    # One strong line alone can be [O II], H-beta, [O III] 5008, H-alpha or Ly-alpha (common practice)
    rng = np.random.default_rng(8)
    wave = log_grid()
    flux = 1.0 + gaussians(wave, [6200.0], [2.5], [150.0])
    spec = Spectrum(wave, flux + rng.normal(0, 0.5, wave.size), np.full(wave.size, 0.5))
    res = measure(spec, FAST)
    assert res.grade != "secure"
    assert len(res.candidates) >= 3
    assert len({round(c.z, 2) for c in res.candidates}) >= 3
    assert "one-line" in res.flags


def test_pure_noise_gives_none():
    rng = np.random.default_rng(9)
    wave = log_grid()
    spec = Spectrum(wave, 3.0 + rng.normal(0, 1.0, wave.size), np.ones(wave.size))
    res = measure(spec, FAST)
    assert res.grade == "none"


def test_sky_line_spike_is_not_secure():
    # A residual of the [O I] 5577.34 A (air) night-sky line (common practice) is not a galaxy.
    from zsieve.lines import air_to_vacuum

    rng = np.random.default_rng(10)
    wave = log_grid()
    flux = 2.0 + gaussians(wave, [float(air_to_vacuum(5577.34))], [1.3], [120.0])
    spec = Spectrum(wave, flux + rng.normal(0, 0.5, wave.size), np.full(wave.size, 0.5))
    for cfg in (FAST, FAST.replace(mask_sky=False)):
        res = measure(spec, cfg)
        assert res.grade != "secure"


def test_star_at_rest_gives_small_velocity():
    # Absorption lines of a cool star at +80 km/s (NIST vacuum wavelengths, from memory):
    # the answer must be a z ~ 0 star, |cz| < 500 km/s (stars sit at |v| < 1000 km/s).
    v = 80.0
    rng = np.random.default_rng(12)
    wave = log_grid()
    names = ["Ca II K", "Ca II H", "H-delta", "H-gamma", "H-beta", "Mg I 5174", "Mg I 5185",
             "Na I D2", "Na I D1", "H-alpha"]
    ew = np.array([6.0, 5.0, 2.0, 2.0, 2.5, 1.5, 1.8, 1.5, 1.3, 2.5])  # rest EW, A
    obs = np.array([NIST_VAC[n] for n in names]) * (1 + v / C_KMS)
    cont = 10.0 * (wave / 5500.0) ** -1.0
    flux = cont * (1.0 - gaussians(wave, obs, obs * 120.0 / C_KMS, ew))
    spec = Spectrum(wave, flux + rng.normal(0, 0.25, wave.size), np.full(wave.size, 0.25))
    res = measure(spec, FAST)
    assert abs(res.z * C_KMS) < 500.0
    assert abs(res.z * C_KMS - v) < 30.0
    assert res.template in ("star", "absorption-galaxy")
    assert res.grade in ("secure", "likely")


def test_hot_star_balmer_blend_does_not_pull_the_velocity():
    # An A-type star (common practice): Balmer lines ~1000 km/s FWHM, far wider than the metal
    # lines, with H-epsilon 3971.20 sitting 1.6 A from Ca II H 3969.59 (NIST vacuum, from memory).
    # Modelling the blend with one narrow width lets Ca II H soak up H-epsilon and drags cz; the
    # answer must stay within 10 km/s of the truth (a few times the expected error at this S/N).
    v = 35.0
    rng = np.random.default_rng(21)
    wave = log_grid()
    balmer = {"H-epsilon": 3971.20, "H-delta": 4102.89, "H-gamma": 4341.69, "H-beta": 4862.69,
              "H-alpha": 6564.61, "H8": 3890.16, "H9": 3836.47}  # NIST ASD vacuum (from memory)
    metals = ["Ca II K", "Ca II H", "Mg I 5174", "Mg I 5185", "Na I D2", "Na I D1"]
    b_obs = np.array(list(balmer.values())) * (1 + v / C_KMS)
    m_obs = np.array([NIST_VAC[n] for n in metals]) * (1 + v / C_KMS)
    cont = 10.0 * (wave / 5500.0) ** -2.0
    absorb = gaussians(wave, b_obs, b_obs * 1000.0 / 2.3548 / C_KMS, [9.0, 11.0, 12.0, 12.0, 10.0, 7.0, 6.0])
    absorb += gaussians(wave, m_obs, m_obs * 110.0 / C_KMS, [1.5, 1.2, 0.3, 0.4, 0.4, 0.35])
    flux = cont * (1.0 - absorb)
    sig = 0.02 * cont
    spec = Spectrum(wave, flux + rng.normal(0, 1, wave.size) * sig, sig)
    res = measure(spec, FAST)
    assert res.template == "star"
    assert abs(res.z * C_KMS - v) < 10.0


def test_quasar_systemic_redshift_names_its_lines():
    # Broad C IV, C III] and Mg II (NIST vacuum, from memory) blueshifted from systemic by
    # their mean offsets (Shen et al. 2016, ApJ 831, 7; from memory): systemic z comes back.
    z = 1.9
    rest = {"C IV 1549": (1549.06, -360.0), "C III] 1909": (1908.73, -220.0), "Mg II 2799": (2798.75, -50.0)}
    wave = log_grid()
    cen = np.array([w * (1 + z) * (1 + dv / C_KMS) for w, dv in rest.values()])
    flux = 5.0 * (wave / 5000.0) ** -1.5 + gaussians(wave, cen, cen * 1800.0 / C_KMS, [900.0, 500.0, 600.0])
    rng = np.random.default_rng(14)
    spec = Spectrum(wave, flux + rng.normal(0, 0.4, wave.size), np.full(wave.size, 0.4))
    res = measure(spec, FAST)
    assert res.template == "quasar"
    assert abs(res.z - z) / (1 + z) * C_KMS < 300.0
    assert res.systemic is not None and len(res.systemic["set_by"]) >= 2
    assert "Shen" in res.systemic["reference"]


def test_package_level_measure_reads_a_path_and_round_trips(tmp_path):
    from zsieve.io import write_text

    rng = np.random.default_rng(15)
    wave, flux, sig = emission_spectrum(0.2, rng)
    path = tmp_path / "cdx0007.csv"
    write_text(Spectrum(wave, flux, sig, meta=SpectrumMeta(object_name="CDX-0007")), path)
    res = zsieve.measure(path, n_resamples=20, seed=2)
    assert res.file == str(path)
    assert abs(res.z - 0.2) < 1e-3
    assert 0.0 <= res.confidence <= 1.0
    assert res.confidence == res.candidates[0].probability
    back = FitResult.from_json(res.to_json())
    assert back == res
    with pytest.raises(TypeError, match="unknown measure option"):
        zsieve.measure(path, n_resample=3)


def test_same_seed_same_answer():
    rng = np.random.default_rng(16)
    wave, flux, sig = emission_spectrum(0.45, rng)
    spec = Spectrum(wave, flux, sig)
    a = measure(spec, MeasureConfig(n_resamples=30, seed=4))
    b = measure(spec, MeasureConfig(n_resamples=30, seed=4))
    assert a.z_samples == b.z_samples and a.z == b.z


@pytest.mark.parametrize("scale", [1e-300, 1e-17, 1e250])
def test_flux_scale_does_not_change_the_answer(scale):
    # Weighted least squares is invariant when data and uncertainties are multiplied by one
    # constant (chi-square, S/N and equivalent widths unchanged, fluxes scale with it; common
    # practice). 1e-300 is a legal float64 whose square underflows, so 1/sigma^2 overflows.
    rng = np.random.default_rng(5)
    wave, flux, sig = emission_spectrum(0.31, rng)
    ref = measure(Spectrum(wave, flux, sig), FAST)
    res = measure(Spectrum(wave, flux * scale, sig * scale), FAST)
    assert res.status == "ok" and res.grade == ref.grade and res.template == ref.template
    assert abs(res.z - ref.z) < 0.05 * ref.z_err
    by_name = {m.name: m for m in ref.lines}
    assert res.lines and all(m.name in by_name for m in res.lines)
    for m in res.lines:
        assert m.flux == pytest.approx(by_name[m.name].flux * scale, rel=1e-3)
        assert m.ew == pytest.approx(by_name[m.name].ew, rel=1e-3)


def test_spectrum_ivar_of_tiny_sigma_is_finite(caplog):
    # 1/(1e-300)^2 exceeds the float64 maximum ~1.8e308 (IEEE 754): no inf may leak out
    s = Spectrum(log_grid()[:200], np.full(200, 1e-300), np.full(200, 1e-300))
    with caplog.at_level("WARNING"):
        iv = s.ivar
    assert np.isfinite(iv).all() and (iv == 0).all()
    assert "overflows" in caplog.text
    ok = Spectrum(log_grid()[:200], np.ones(200), np.full(200, 0.5))
    assert np.allclose(ok.ivar, 4.0)


@pytest.mark.parametrize("n_good", [1, 3])
def test_a_few_usable_pixels_is_a_failure_not_a_silent_nan(n_good):
    wave = log_grid()[:400]
    flux = np.full(wave.size, np.nan)
    flux[100:100 + n_good] = 1.0
    res = measure(Spectrum(wave, flux, np.ones(wave.size)), FAST)
    assert res.status == "failed" and res.grade == "none" and math.isnan(res.z)
    assert "usable pixels" in res.message


def test_window_resampling_has_the_distribution_of_full_resampling():
    # The bootstrap draws noise only on the candidates' window pixels plus one sum per
    # continuum block; the reference is the direct parametric bootstrap (Efron 1979): noise on
    # every pixel, the continuum re-estimated from it (continuum_batch), restricted to the
    # same pixels. Variances and the covariance of two pixels must agree to sampling error.
    from zsieve.engine.bootstrap import _resample_on, resample_noise
    from zsieve.engine.prepare import continuum_batch, prepare

    rng = np.random.default_rng(21)
    wave = np.linspace(4000.0, 8000.0, 3000)
    sigma = 0.5 + 0.5 * (wave / 8000.0) ** 2
    spec = Spectrum(wave, 3.0 + rng.normal(0, sigma), sigma)
    prep = prepare(spec)
    pix = np.r_[np.arange(400, 460), np.arange(1500, 1530), np.arange(2900, 3000)]
    n = 6000
    U, R = _resample_on(prep, [pix], n, np.random.default_rng(1))
    assert np.array_equal(U, pix) and R.shape == (n, pix.size)
    dR = R - prep.resid[U][None, :]
    eps = resample_noise(prep, n, np.random.default_rng(2))
    c = continuum_batch(eps, prep.ivar, prep.lnwave, scale_kms=prep.continuum_kms, use=prep.cont_use)
    ref = np.where(prep.ivar > 0, eps - c, 0.0)[:, U]
    ok = prep.ivar[U] > 0  # masked pixels (sky lines) carry no noise in either
    assert ok.sum() > 150 and np.all(dR[:, ~ok] == 0.0)
    v, vr = dR.var(axis=0), ref.var(axis=0)
    assert np.all(np.abs(v[ok] / vr[ok] - 1.0) < 0.1)  # ~ 4 sigma of a variance from 6000 draws
    # the continuum's share: the mean of 60 adjacent pixels (half a continuum block) loses
    # much of its noise to the re-estimated continuum, so its variance tests that part
    blk = (U >= 400) & (U < 460) & ok
    vm, vm_r = dR[:, blk].mean(axis=1).var(), ref[:, blk].mean(axis=1).var()
    assert abs(vm / vm_r - 1.0) < 0.1
    assert vm < 0.8 * np.mean(v[blk]) / blk.sum()  # well below independent pixels' value
    # covariance of neighbouring pixels (shared continuum) and of distant ones (independent)
    for i, j in ((0, 5), (0, 95), (100, 189)):
        assert ok[i] and ok[j]
        cov = np.mean(dR[:, i] * dR[:, j]) - dR[:, i].mean() * dR[:, j].mean()
        cov_r = np.mean(ref[:, i] * ref[:, j]) - ref[:, i].mean() * ref[:, j].mean()
        assert abs(cov - cov_r) < 4.0 * math.sqrt(v[i] * v[j] / n)
