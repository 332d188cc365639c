"""Checks of the rest-frame line templates (zsieve.engine.templates).

Outside references: Gaussian widths add in quadrature under convolution (common practice);
the non-relativistic Doppler shift lambda = lambda_0 exp(v / c) ~ lambda_0 (1 + v/c) for the
quasar line offsets (common practice); NIST vacuum wavelengths (from memory); the redshift
definition 1 + z = lambda_obs / lambda_rest.
"""

import numpy as np
import pytest
from astropy.table import Table

from zsieve.engine.templates import CLASSES, build_bank, render_lines, rest_range_for

C_KMS = 299792.458  # speed of light, km/s (SI definition)
DLN = 1e-4 * np.log(10.0)


def _one_line(wave, cls="emission-galaxy", kind="emission", width=0.0, offset=0.0):
    return Table({"name": ["x"], "wave_vac": [wave], "kind": [kind],
                  "strength_" + cls.replace("-", "_"): [1.0], "width_kms": [width],
                  "qso_offset_kms": [offset]})


def _moments(bank, row=0):
    t = bank.flux[row] - np.median(bank.flux[row])  # remove the small zero-mean pedestal
    ll = bank.loglam
    w = np.where(np.abs(t) > 1e-6, np.abs(t), 0.0)
    mean = np.sum(w * ll) / np.sum(w)
    var = np.sum(w * (ll - mean) ** 2) / np.sum(w)
    return mean, np.sqrt(var)


@pytest.mark.parametrize("res_kms,width_kms", [(150.0, 0.0), (70.0, 250.0), (300.0, 4000.0)])
def test_line_width_is_resolution_and_intrinsic_in_quadrature(res_kms, width_kms):
    # Convolving Gaussians adds their variances (common practice): FWHM^2 = R^2 + W^2.
    bank = build_bank(_one_line(6564.61, width=width_kms), ("emission-galaxy",), DLN / 4,
                      res_kms, (5000.0, 8000.0))
    mean, sd = _moments(bank)
    expect = np.hypot(res_kms, width_kms) / C_KMS / 2.3548200450309493
    # pixel integration adds (step^2 / 12) to the variance
    assert sd == pytest.approx(np.sqrt(expect**2 + (DLN / 4) ** 2 / 12), rel=0.03)
    assert np.exp(mean) == pytest.approx(6564.61, rel=DLN / 40)


def test_quasar_lines_sit_at_their_offset_from_systemic():
    # C IV 1549.06 (NIST vacuum, from memory) blueshifted by 360 km/s: lambda = lambda_0 exp(v/c).
    bank = build_bank(_one_line(1549.06, cls="quasar", width=4500.0, offset=-360.0), ("quasar",),
                      DLN, 150.0, (1200.0, 2000.0))
    mean, _ = _moments(bank)
    assert np.exp(mean) == pytest.approx(1549.06 * (1 - 360.0 / C_KMS), rel=2e-6)


def test_absorption_is_negative_and_templates_are_zero_mean():
    bank = build_bank(_one_line(3934.78, cls="star", kind="absorption"), ("star",), DLN, 100.0,
                      (3000.0, 5000.0))
    t = bank.flux[0]
    assert t.min() == pytest.approx(-1.0) and t.max() < 0.05
    assert abs(t.mean()) < 1e-12


def test_render_lines_conserves_line_strength():
    # The integral over wavelength of a line is its strength (flux for emission, EW for
    # absorption), independent of the width (to order (sigma_v / c)^2 for a profile that is
    # Gaussian in ln lambda).
    ll = np.log(4000.0) + DLN * np.arange(6000)
    lam = np.exp(ll)
    for fwhm in (60.0, 500.0, 5000.0):
        f = render_lines(ll, [5000.0, 7000.0], fwhm, [2.0, -0.5])
        left = lam < 6000.0
        assert np.sum((f * lam * DLN)[left]) == pytest.approx(2.0, rel=1e-3)
        assert np.sum((f * lam * DLN)[~left]) == pytest.approx(-0.5, rel=1e-3)


def test_bundled_bank_has_four_classes_covering_the_needed_rest_range():
    lo, hi = rest_range_for(3600.0, 9800.0, 0.0, 6.0)
    # 1 + z = lambda_obs / lambda_rest: the extreme rest wavelengths seen through the window
    assert lo == pytest.approx(3600.0 / 7.0) and hi == pytest.approx(9800.0)
    bank = build_bank(None, CLASSES, DLN, 150.0, (lo, hi))
    assert bank.classes == CLASSES and bank.flux.shape[0] == 4
    assert not bank.flux.flags.writeable
    # every line used lies on the grid: Ly-alpha 1215.67 and [O III] 5008.24 (NIST, from memory)
    wave = bank.wavelength
    assert wave[0] < 1215.67 < wave[-1] and wave[0] < 5008.24 < wave[-1]
    for i, cls in enumerate(CLASSES):
        assert np.max(np.abs(bank.flux[i])) == pytest.approx(1.0)
        assert len(bank.line_names[i]) >= 3, cls
    # emission templates peak upward, absorption ones downward
    em, ab = bank.template("emission-galaxy"), bank.template("absorption-galaxy")
    assert em.max() > -em.min() and -ab.min() > ab.max()
    # the FFTs are computed once per length
    a = bank.spectra(20000)
    assert bank.spectra(20000) is a and a[0].shape == (4, 10001)


def test_bad_requests_are_refused():
    with pytest.raises(ValueError):
        build_bank(_one_line(6564.61), ("emission-galaxy",), DLN, 150.0, (7000.0, 8000.0))
    with pytest.raises(ValueError):
        build_bank(_one_line(6564.61), ("nebula",), DLN, 150.0, (5000.0, 8000.0))
    with pytest.raises(ValueError):
        rest_range_for(3600.0, 9800.0, 1.0, 0.5)
