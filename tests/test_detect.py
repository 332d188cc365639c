"""The batched matched filter of zsieve.engine.detect against direct convolutions
(scipy.signal.fftconvolve and numpy.convolve, the reference implementations)."""

import math

import numpy as np
from scipy.signal import fftconvolve

from zsieve.engine.detect import WIDTHS_PIX, matched_filter_snr


def test_matched_filter_equals_direct_convolutions():
    rng = np.random.default_rng(4)
    for n in (64, 777, 4350):
        r = rng.normal(size=n)
        w = rng.random(n) * (rng.random(n) > 0.05)
        snr, amp = matched_filter_snr(r, w)
        for k, s in enumerate(WIDTHS_PIX):
            half = int(math.ceil(4 * s))
            g = np.exp(-0.5 * (np.arange(-half, half + 1) / s) ** 2)
            num = np.convolve(w * r, g, mode="same") if n >= g.size else fftconvolve(w * r, g, mode="same")
            den = np.convolve(w, g * g, mode="same") if n >= g.size else fftconvolve(w, g * g, mode="same")
            ok = den > 1e-9 * den.max()
            assert np.allclose(snr[k][ok], (num / np.sqrt(den))[ok], rtol=1e-9, atol=1e-9)
            assert np.allclose(amp[k][ok], (num / den)[ok], rtol=1e-9, atol=1e-9)
