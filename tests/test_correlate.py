"""Checks of the batched Tonry-Davis cross-correlation (zsieve.engine.correlate).

Outside references: the redshift definition 1 + z = lambda_obs / lambda_rest; NIST vacuum
wavelengths (from memory); Tonry & Davis (1979, AJ 84, 1511) for the meaning of r
(r = h / (sqrt(2) sigma_a), sigma_a the rms of the antisymmetric part of the correlation, an
estimate of its noise; r grows in proportion to the signal-to-noise; noise alone gives small
r); the matched-filter signal-to-noise of a template of known amplitude in white Gaussian noise,
A * sqrt(sum T^2) / sigma_n (common practice).
"""

import numpy as np
import pytest
from astropy.table import Table

from zsieve.engine.correlate import (LogGrid, correlate_batch, correlate_peaks,
                                     correlation_curves, lag_to_z, td_sigma_z, z_to_lag)
from zsieve.engine.templates import build_bank, class_lines, render_lines, rest_range_for

# NIST ASD vacuum wavelengths, Angstrom (from memory)
H_ALPHA = 6564.61
H_BETA = 4862.68
OIII_5008 = 5008.24
OIII_4960 = 4960.30
OII_3729 = 3729.88

DLN = 1e-4 * np.log(10.0)  # a common survey sampling: 1e-4 in log10 lambda


def _table(waves, strengths, kind="emission", cls="emission-galaxy", width=0.0):
    n = len(waves)
    return Table({"name": [f"l{i}" for i in range(n)], "wave_vac": list(waves),
                  "kind": [kind] * n, "strength_" + cls.replace("-", "_"): list(strengths),
                  "width_kms": [width] * n})


def _emission_bank(resolution=150.0):
    lines = _table([OII_3729, H_BETA, OIII_4960, OIII_5008, H_ALPHA], [0.6, 0.4, 0.33, 1.0, 1.0])
    return lines, build_bank(lines, ("emission-galaxy",), DLN, resolution,
                             rest_range_for(3600.0, 9800.0, 0.0, 1.5))


def _grid(lam0=3600.0, lam1=9800.0, step=DLN):
    n = int(np.log(lam1 / lam0) / step)
    return np.log(lam0) + step * np.arange(n)


def _gauss_lines(ll, centres, fwhm_kms, amps):
    """Point-sampled Gaussians written out directly (independent of render_lines)."""
    lam = np.exp(ll)[:, None]
    c = np.asarray(centres)[None, :]
    sig = c * np.asarray(fwhm_kms) / 299792.458 / 2.3548200450309493
    return np.sum(np.asarray(amps) * np.exp(-0.5 * ((lam - c) / sig) ** 2), axis=1)


def test_lag_maps_to_observed_over_rest_wavelength():
    # 1 + z = lambda_obs / lambda_rest (the definition of redshift), with a data grid and a
    # template grid whose origins are not a whole number of pixels apart.
    step = 1.5e-4
    bank = build_bank(_table([H_ALPHA], [1.0]), ("emission-galaxy",), step, 120.0, (5000.0, 8000.0))
    ll = np.log(5123.4) + step * np.arange(4000)
    assert ((ll[0] - bank.loglam0) / step) % 1.0 not in (0.0,)
    for lam_obs in (7000.0, 7777.77, 8804.5):  # clear of the apodised ends of the window
        z_true = lam_obs / H_ALPHA - 1.0
        flux = _gauss_lines(ll, [lam_obs], 120.0, [1.0])
        peaks = correlate_batch(flux, np.ones(ll.size), ll, bank, 0.0, 1.0, n_peaks=1)[0]
        dz_pix = abs(np.log1p(peaks[0].z) - np.log1p(z_true)) / step
        assert dz_pix < 0.02, (lam_obs, peaks[0].z, z_true)
    # the lag helpers are inverse to each other and follow the same definition
    g = LogGrid.from_any(ll)
    k = z_to_lag(0.3, g, bank)
    assert lag_to_z(k, g, bank) == pytest.approx(0.3, abs=1e-12)
    assert np.exp(g.loglam0 + k * step) / np.exp(bank.loglam0) == pytest.approx(1.3, rel=1e-12)


@pytest.mark.parametrize("z_true", [0.0123, 0.3517, 0.80004, 1.2])
def test_template_shifted_by_known_z_is_recovered(z_true):
    # A template correlated with itself shifted by a known z (a whole and a fractional number
    # of pixels) gives that z back to a small fraction of a pixel (the shift theorem behind
    # the Tonry-Davis method).
    lines, bank = _emission_bank()
    _, wave, amp, width, _ = class_lines(lines, "emission-galaxy")
    ll = _grid()
    flux = render_lines(ll, wave * (1 + z_true), np.hypot(150.0, width), amp)
    peaks = correlate_batch(flux, np.ones(ll.size), ll, bank, 0.0, 1.5)[0]
    best = peaks[0]
    assert abs(np.log1p(best.z) - np.log1p(z_true)) / DLN < 0.05
    # the correlation peak of two Gaussians of equal FWHM F has FWHM sqrt(2) F (common practice)
    assert best.width_kms == pytest.approx(np.sqrt(2) * 150.0, rel=0.1)


def test_bundled_classes_recover_their_own_z():
    # Each bundled class template, rendered at a known z and correlated against the whole
    # bank, is best matched by itself at that z: the normalised correlation is a correlation
    # coefficient times |data|, largest for the proportional template (Cauchy-Schwarz).
    ll = _grid()
    bank = build_bank(None, loglam_step=DLN, resolution_kms=150.0,
                      rest_range=rest_range_for(3600.0, 9800.0, -0.01, 6.0))
    from zsieve.lines import load_linelist

    table = load_linelist()
    cases = {"emission-galaxy": 0.61, "absorption-galaxy": 0.21, "quasar": 2.3, "star": 0.0004}
    rows = []
    for cls, z in cases.items():
        _, wave, amp, width, off = class_lines(table, cls)
        rows.append(render_lines(ll, wave * np.exp(off / 299792.458) * (1 + z),
                                 np.hypot(150.0, width), amp))
    res = correlate_peaks(np.array(rows), np.ones(ll.size), ll, bank, -0.01, 6.0)
    t_best, p_best = res.best(by="height")
    for i, (cls, z) in enumerate(cases.items()):
        assert bank.classes[t_best[i]] == cls
        assert abs(np.log1p(res.z[i, t_best[i], p_best[i]]) - np.log1p(z)) / DLN < 0.1, cls


def _signal_bank_and_unit_template(snr_scale):
    lines, bank = _emission_bank()
    _, wave, amp, width, _ = class_lines(lines, "emission-galaxy")
    ll = _grid()
    shape = render_lines(ll, wave * 1.4321, np.hypot(150.0, width), amp)
    shape /= np.sqrt(np.sum(shape**2))  # unit norm: amplitude A gives matched-filter S/N A
    return ll, bank, shape * snr_scale


def test_r_grows_in_proportion_to_signal_to_noise():
    # Tonry & Davis (1979): for the true peak the antisymmetric part of the correlation comes
    # from noise only, so r = h / (sqrt(2) sigma_a) tracks the signal-to-noise; with a template
    # that matches the signal, h is the matched-filter S/N A*|T|/sigma_n (common practice).
    rng = np.random.default_rng(11)
    n_real = 40
    med_r, med_h, med_noise = {}, {}, {}
    for snr in (10.0, 20.0, 40.0):
        ll, bank, sig = _signal_bank_and_unit_template(snr)
        flux = sig[None, :] + rng.normal(0.0, 1.0, (n_real, ll.size))
        res = correlate_peaks(flux, np.ones(ll.size), ll, bank, 0.0, 1.5, n_peaks=3)
        t, p = res.best()
        rows = np.arange(n_real)
        z = res.z[rows, t, p]
        assert np.mean(np.abs(z - 0.4321) < 1e-3) == 1.0
        med_r[snr] = np.median(res.r[rows, t, p])
        med_h[snr] = np.median(res.height[rows, t, p])
        med_noise[snr] = np.median(np.sqrt(2.0) * res.sigma_a[rows, t, p])
    for snr in med_r:
        assert med_h[snr] == pytest.approx(snr, rel=0.05)
        # sqrt(2) sigma_a estimates the rms noise of the normalised correlation, which is 1
        assert med_noise[snr] == pytest.approx(1.0, rel=0.2)
        assert med_r[snr] == pytest.approx(snr, rel=0.2)
    assert med_r[40.0] / med_r[10.0] == pytest.approx(4.0, rel=0.15)


def test_noise_alone_gives_small_r_and_unit_variance_correlation():
    # Tonry & Davis (1979): without a signal the correlation peaks are noise and r stays small
    # (r below ~3-4 for the highest peaks); and the normalised correlation of white Gaussian
    # noise has unit variance at every lag (matched-filter normalisation, common practice).
    rng = np.random.default_rng(5)
    lines, bank = _emission_bank()
    ll = _grid()
    noise = rng.normal(0.0, 2.5, (60, ll.size))
    w = np.full(ll.size, 1 / 2.5)
    res = correlate_peaks(noise, w, ll, bank, 0.0, 1.5, n_peaks=5)
    t, p = res.best()
    top_r = res.r[np.arange(60), t, p]
    assert np.median(top_r) < 4.0
    assert np.quantile(top_r, 0.95) < 5.0
    curves = correlation_curves(noise[0], w, ll, bank, 0.0, 1.5, curve_points=10**9)
    c = curves["emission-galaxy"][1]
    assert np.std(c) == pytest.approx(1.0, rel=0.15)


def test_batch_equals_row_by_row_and_float32_matches_float64():
    rng = np.random.default_rng(2)
    ll, bank, sig = _signal_bank_and_unit_template(15.0)
    sigma = np.where(np.arange(ll.size) % 97 < 3, np.inf, 1.0)  # a few masked pixels
    w = np.where(np.isfinite(sigma), 1.0 / sigma, 0.0)
    flux = sig[None, :] + rng.normal(0.0, 1.0, (7, ll.size))
    batch = correlate_peaks(flux, w, ll, bank, 0.0, 1.5, n_peaks=4, chunk_rows=3)
    for i in range(flux.shape[0]):
        one = correlate_peaks(flux[i], w, ll, bank, 0.0, 1.5, n_peaks=4)
        np.testing.assert_allclose(one.z[0], batch.z[i], rtol=0, atol=1e-9)
        np.testing.assert_allclose(one.r[0], batch.r[i], rtol=1e-5)
    # per-row weights that happen to be equal give the same answer as shared weights
    w2 = correlate_peaks(flux, np.tile(w, (7, 1)), ll, bank, 0.0, 1.5, n_peaks=4)
    np.testing.assert_allclose(w2.z, batch.z, atol=1e-9)
    f64 = correlate_peaks(flux, w, ll, bank, 0.0, 1.5, n_peaks=4, dtype=np.float64)
    t, p = f64.best()
    rows = np.arange(7)
    lag32 = batch.lag[rows, t, p]
    assert np.max(np.abs(lag32 - f64.lag[rows, t, p])) < 1e-3  # pixels
    np.testing.assert_allclose(batch.r[rows, t, p], f64.r[rows, t, p], rtol=1e-3)
    as_lists = correlate_batch(flux, w, ll, bank, 0.0, 1.5, n_peaks=4)
    assert [pk.r_tdr for pk in as_lists[3]] == sorted((pk.r_tdr for pk in as_lists[3]), reverse=True)


def test_td_error_estimate_matches_the_scatter_within_a_factor_two():
    # Tonry & Davis (1979): sigma_v = (3/8) w / (1 + r) (coefficient from memory) is an
    # estimate of the velocity error; compare it with the scatter over noise realisations.
    rng = np.random.default_rng(8)
    ll, bank, sig = _signal_bank_and_unit_template(12.0)
    flux = sig[None, :] + rng.normal(0.0, 1.0, (80, ll.size))
    res = correlate_peaks(flux, np.ones(ll.size), ll, bank, 0.0, 1.5, n_peaks=1)
    z = res.z[:, 0, 0]
    scatter = np.std(z)
    est = np.median(td_sigma_z(res.width_kms[:, 0, 0], res.r[:, 0, 0], z))
    assert 0.5 < est / scatter < 2.0


def test_gaps_edges_and_bad_input():
    lines, bank = _emission_bank()
    ll = _grid()
    # a step different from the templates' is refused
    with pytest.raises(ValueError):
        correlate_peaks(np.zeros(ll.size), np.ones(ll.size), (ll[0], 2 * DLN, ll.size), bank)
    # a z range the templates cannot reach through the window gives no peaks, not an error
    res = correlate_peaks(np.ones(ll.size), np.ones(ll.size), ll, bank, 5.0, 6.0)
    assert not res.valid.any() and correlate_batch(np.ones(ll.size), np.ones(ll.size), ll, bank,
                                                   5.0, 6.0) == [[]]
    # NaN flux and a masked half do not break the search: the line in the good half is found
    _, wave, amp, width, _ = class_lines(lines, "emission-galaxy")
    rng = np.random.default_rng(4)
    flux = render_lines(ll, wave * 1.2, 150.0, amp) * 30 + rng.normal(0.0, 1.0, ll.size)
    flux[: ll.size // 3] = np.nan
    w = np.ones(ll.size)
    w[ll.size // 3: ll.size // 2] = 0.0
    best = correlate_batch(flux, w, ll, bank, 0.0, 1.5)[0][0]
    assert abs(np.log1p(best.z) - np.log1p(0.2)) / DLN < 0.3
    assert np.isfinite(best.r_tdr) and best.r_tdr > 5


def test_fft_correlation_equals_the_direct_sum_at_every_lag():
    # The circular FFT correlation, with its lag window and zero padding, must equal the plain
    # linear sum c(k) = sum_i X(i) T(i - k) / sqrt(sum_i w_i^2 T(i - k)^2) computed directly
    # with numpy.correlate (no wrap-around at any lag of the z range).
    rng = np.random.default_rng(9)
    lines, bank = _emission_bank()
    ll = _grid(4200.0, 7600.0)
    flux = rng.normal(0.0, 1.0, ll.size)
    w = rng.uniform(0.5, 2.0, ll.size) * (rng.uniform(size=ll.size) > 0.05)
    z_lo, z_hi = 0.0, 1.5
    curves = correlation_curves(flux, w, ll, bank, z_lo, z_hi, apodize=0.0, curve_points=10**9,
                                dtype=np.float64, min_overlap=0.0)
    z, c = curves["emission-galaxy"]
    tpl = np.asarray(bank.flux[0])
    num = np.correlate(flux * w**2, tpl, mode="full")
    den = np.correlate(w**2, tpl**2, mode="full")
    g = LogGrid.from_any(ll)
    k = np.rint(z_to_lag(z, g, bank)).astype(int)
    m = k + tpl.size - 1
    ok = den[m] > 1e-9 * den.max()
    direct = num[m][ok] / np.sqrt(den[m][ok])
    np.testing.assert_allclose(c[ok], direct, rtol=1e-6, atol=1e-6 * np.abs(direct).max())
    assert ok.sum() > 0.9 * ok.size
