"""Batched Tonry-Davis cross-correlation of spectra with line templates on a ln-lambda grid.

Method (Tonry & Davis 1979, AJ 84, 1511): on a grid uniform in ln(lambda) a redshift is a
shift, so the cross-correlation of a continuum-subtracted, apodised spectrum with a rest-frame
template, computed with FFTs, scores every trial redshift at once. Peaks of the correlation
are candidate redshifts; the significance of a peak of height ``h`` is the Tonry-Davis
``r = h / (sqrt(2) sigma_a)``, where ``sigma_a`` is the rms of the antisymmetric part of the
correlation about the peak (the part a perfect match cannot produce, hence an estimate of the
noise in the correlation).

Conventions used here
---------------------
* Data pixel ``i`` sits at ``ln(lambda_obs) = L_obs + i d``; template pixel ``j`` at
  ``ln(lambda_rest) = L_rest + j d``. The correlation at integer lag ``k`` is
  ``c(k) = sum_i D(i) T(i - k)``, so lag ``k`` means ``ln(1 + z) = L_obs - L_rest + k d``, i.e.
  ``1 + z = exp(L_obs - L_rest + k d)`` (exact for any grid origins).
* Weighting and normalisation: with flux ``f`` (continuum removed), weights ``w = 1/sigma``
  (0 on masked pixels) and the cosine-bell apodisation ``a``, the correlation at lag ``k`` is
  ``c(k) = sum(a f w^2 T_k) / sqrt(sum(a^2 w^2 T_k^2))``: the signal-to-noise of the best
  template amplitude at that redshift (a matched filter; for white noise it is the
  Tonry-Davis normalised correlation up to a constant). In pure Gaussian noise every ``c(k)``
  is a standard normal variable, so heights are in units of sigma; both sums are correlations
  and are done with one batched real FFT.
* ``sigma_a`` is the rms of ``a(k) = [c(p + k) - c(p - k)] / 2`` over ``1 <= k <= K`` lags
  about the sub-pixel peak position ``p`` (linear interpolation; ``K`` =
  ``sigma_a_halfwidth``, lags with no overlap left out). With this definition
  ``sqrt(2) sigma_a`` is the rms of the noise in ``c``, so ``r`` is the peak height in units
  of that noise: ``r ~ h`` for a correct match in white noise. Because the weights make that
  noise 1 by construction, ``sqrt(2) sigma_a`` is floored at ``noise_floor`` (default 1):
  a peak whose surroundings are too smooth cannot claim more than its height.
* Peak position and width come from a Gaussian through the three points around the maximum
  (a parabola in ln c; a plain parabola when a point is not positive). ``width_kms`` is the
  FWHM of the correlation peak, ``c d`` km/s per lag.

Examples
--------
A template correlated with a copy of itself shifted to z = 0.25 gives back z = 0.25:

>>> from astropy.table import Table
>>> from zsieve.engine.templates import build_bank, render_lines
>>> lines = Table({"name": ["a", "b", "c"], "wave_vac": [4000.0, 5000.0, 6500.0],
...                "kind": ["emission"] * 3, "strength_emission_galaxy": [1.0, 0.5, 0.8],
...                "width_kms": [0.0] * 3})
>>> d = 2e-4
>>> bank = build_bank(lines, ("emission-galaxy",), d, 200.0, (3000.0, 9000.0))
>>> ll = np.log(4500.0) + d * np.arange(4200)
>>> flux = render_lines(ll, [4000 * 1.25, 5000 * 1.25, 6500 * 1.25], 200.0, [1.0, 0.5, 0.8])
>>> peaks = correlate_batch(flux[None, :], np.ones(ll.size), ll, bank, 0.0, 1.0, n_peaks=3)
>>> best = peaks[0][0]
>>> best.template_class, round(best.z, 5)
('emission-galaxy', 0.25)
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
from scipy import fft as sfft

from .prepare import C_KMS
from .templates import FWHM_PER_SIGMA, TemplateBank

logger = logging.getLogger(__name__)

__all__ = [
    "LogGrid",
    "Peak",
    "PeakArrays",
    "correlate_peaks",
    "correlate_batch",
    "correlation_curves",
    "lag_window",
    "td_sigma_z",
    "td_sigma_v",
    "lag_to_z",
    "z_to_lag",
]


@dataclass(frozen=True)
class LogGrid:
    """A uniform natural-log wavelength grid: ``ln(lambda_i) = loglam0 + i * dloglam``."""

    loglam0: float
    dloglam: float
    n_pix: int

    @classmethod
    def from_any(cls, grid, n_pix: int | None = None) -> "LogGrid":
        """A grid from a :class:`LogGrid`, a ``(loglam0, dloglam[, n_pix])`` tuple, an object
        with ``loglam0``/``dloglam`` attributes, or an array of ln(lambda) (checked uniform).

        >>> LogGrid.from_any(np.log(4000.0) + 1e-4 * np.arange(5)).n_pix
        5
        """
        if isinstance(grid, LogGrid):
            return grid
        if hasattr(grid, "loglam0") and hasattr(grid, "dloglam"):
            n = getattr(grid, "n_pix", n_pix)
            return cls(float(grid.loglam0), float(grid.dloglam), int(n if n is not None else -1))
        if isinstance(grid, tuple) and len(grid) in (2, 3):
            n = grid[2] if len(grid) == 3 else n_pix
            return cls(float(grid[0]), float(grid[1]), int(n if n is not None else -1))
        ll = np.asarray(grid, dtype=float)
        if ll.ndim != 1 or ll.size < 2:
            raise ValueError("a ln-lambda grid needs at least two points")
        step = (ll[-1] - ll[0]) / (ll.size - 1)
        if not step > 0 or np.max(np.abs(np.diff(ll) - step)) > 1e-6 * step:
            raise ValueError("the ln-lambda grid is not uniform")
        return cls(float(ll[0]), float(step), int(ll.size))


def lag_to_z(lag, grid: LogGrid, bank: TemplateBank):
    """Redshift of a (fractional) lag: ``1 + z = exp(L_obs - L_rest + lag * d)``.

    >>> g = LogGrid(np.log(5000.0), 1e-4, 10)
    >>> b = TemplateBank(("x",), np.log(4000.0), 1e-4, np.zeros((1, 3)), 100.0)
    >>> round(float(lag_to_z(0.0, g, b)), 12)
    0.25
    """
    return np.exp(grid.loglam0 - bank.loglam0 + np.asarray(lag, dtype=float) * grid.dloglam) - 1.0


def z_to_lag(z, grid: LogGrid, bank: TemplateBank):
    """Inverse of :func:`lag_to_z` (fractional lag)."""
    return (np.log1p(np.asarray(z, dtype=float)) - (grid.loglam0 - bank.loglam0)) / grid.dloglam


def td_sigma_v(width_kms, r, coeff: float = 0.375):
    """Tonry-Davis velocity error from the correlation peak FWHM ``w`` and ``r``.

    ``sigma_v = coeff * w / (1 + r)``; Tonry & Davis (1979, AJ 84, 1511) give the form
    ``w / (1 + r)`` and a coefficient of 3/8 for their peak-width definition (from memory).
    The coefficient depends on how the width and r are defined, so treat this as a
    cross-check on a bootstrap or line-fit error, not a replacement.

    >>> round(float(td_sigma_v(300.0, 7.0)), 4)
    14.0625
    """
    return coeff * np.asarray(width_kms, dtype=float) / (1.0 + np.asarray(r, dtype=float))


def td_sigma_z(width_kms, r, z, coeff: float = 0.375):
    """Redshift error ``(1 + z) sigma_v / c`` from :func:`td_sigma_v`.

    >>> round(float(td_sigma_z(300.0, 7.0, 1.0)) * 1e5, 4)
    9.3815
    """
    return (1.0 + np.asarray(z, dtype=float)) * td_sigma_v(width_kms, r, coeff) / C_KMS


@dataclass(frozen=True)
class Peak:
    """One correlation peak.

    Attributes
    ----------
    z : float
        Redshift of the peak (sub-pixel).
    r_tdr : float
        Tonry-Davis r of the peak.
    height : float
        Peak height of the normalised correlation (signal-to-noise of the template amplitude).
    template_class : str
        Class of the template.
    width_kms : float
        FWHM of the correlation peak, km/s.
    lag : float
        Fractional lag in pixels (``1 + z = exp(L_obs - L_rest + lag * d)``).
    """

    z: float
    r_tdr: float
    height: float
    template_class: str
    width_kms: float
    lag: float

    @property
    def sigma_z_td(self) -> float:
        """Tonry-Davis error estimate of z (see :func:`td_sigma_z`)."""
        return float(td_sigma_z(self.width_kms, self.r_tdr, self.z))


@dataclass(frozen=True)
class PeakArrays:
    """Top peaks of every row and template as arrays of shape ``(n_rows, n_templates, n_peaks)``.

    Peaks of a row and template are sorted by height, highest first; slots with no peak hold
    NaN (``valid`` is False there). ``curves`` is filled only when asked for (row 0).
    """

    classes: tuple
    z: np.ndarray
    r: np.ndarray
    height: np.ndarray
    width_kms: np.ndarray
    lag: np.ndarray
    sigma_a: np.ndarray
    valid: np.ndarray
    curves: dict | None = None

    def peaks(self, row: int) -> list[Peak]:
        """The valid peaks of one row as :class:`Peak` objects, highest r first."""
        ok = self.valid[row]
        ti, pi = np.nonzero(ok)
        order = np.argsort(-self.r[row][ok], kind="stable")
        out = []
        for o in order:
            t, p = ti[o], pi[o]
            out.append(Peak(z=float(self.z[row, t, p]), r_tdr=float(self.r[row, t, p]),
                            height=float(self.height[row, t, p]), template_class=self.classes[t],
                            width_kms=float(self.width_kms[row, t, p]),
                            lag=float(self.lag[row, t, p])))
        return out

    def best(self, by: str = "r"):
        """Index arrays ``(template, peak)`` of the best peak of each row (-1 if none).

        ``by="r"`` ranks by the Tonry-Davis r, ``by="height"`` by the normalised peak height
        (the matched-filter signal-to-noise; for noise-free data the matching template has the
        largest height, by the Cauchy-Schwarz inequality).
        """
        n_rows, n_t, n_p = self.r.shape
        key = {"r": self.r, "height": self.height}[by]
        flat = np.where(self.valid, key, -np.inf).reshape(n_rows, n_t * n_p)
        i = np.argmax(flat, axis=1)
        none = ~np.isfinite(flat[np.arange(n_rows), i])
        t, p = np.divmod(i, n_p)
        t[none] = -1
        p[none] = -1
        return t, p


def _apodisation(good: np.ndarray, frac: float) -> np.ndarray:
    """Cosine bell rising over ``frac`` of the good range at each end (zero outside it)."""
    n = good.size
    a = np.zeros(n)
    idx = np.flatnonzero(good)
    if idx.size == 0:
        return a
    i0, i1 = idx[0], idx[-1] + 1
    m = i1 - i0
    a[i0:i1] = 1.0
    ramp_n = int(round(frac * m))
    if ramp_n > 0:
        ramp = 0.5 * (1.0 - np.cos(np.pi * (np.arange(ramp_n) + 0.5) / ramp_n))
        a[i0:i0 + ramp_n] = ramp
        a[i1 - ramp_n:i1] = ramp[::-1]
    return a


def _placed(x, nfft: int, shift: int, dtype):
    """Rows of ``x`` written circularly from index ``shift`` into a zeroed ``nfft``-long buffer."""
    n = x.shape[-1]
    buf = np.zeros((x.shape[0], nfft), dtype=dtype)
    first = min(n, nfft - shift)
    buf[:, shift:shift + first] = x[:, :first]
    if first < n:
        buf[:, :n - first] = x[:, first:]
    return buf


def _downsample_curve(z, c, n_max: int):
    """Keep the largest value of each of at most ``n_max`` bins (peaks stay visible)."""
    step = max(1, int(np.ceil(z.size / max(n_max, 1))))
    nb = z.size // step
    if step > 1 and nb > 0:
        j = np.argmax(c[:nb * step].reshape(nb, step), axis=1) + step * np.arange(nb)
        z, c = z[j], c[j]
    return np.asarray(z, float), np.asarray(c, float)


def _top_local_maxima(c, off: int, n_core: int, n_take: int, block: int):
    """Indices (relative to ``off``) of the highest local maxima of each row of ``c``.

    The lags ``off .. off + n_core - 1`` are cut into blocks of ``block`` lags; the maximum of
    each block is found with strided comparisons, the best ``2 n_take`` blocks per row are kept
    with ``argpartition``, and a block counts only if its maximum is a true local maximum (higher
    than its left neighbour, not lower than its right one) and positive. So at most one peak is
    reported per block. Returns ``(top, found)`` of shape ``(n_rows, n_take)``, highest first.
    """
    n_rows = c.shape[0]
    block = max(1, min(int(block), n_core))
    nb = -(-n_core // block)
    # the last block may run past the z range into the extended window (which is long enough)
    bmax = c[:, off:off + nb * block:block].copy()
    for j in range(1, block):  # strided passes: faster than a reduction over a short axis
        np.maximum(bmax, c[:, off + j:off + j + nb * block:block], out=bmax)
    n_pick = min(nb, 2 * n_take)
    if nb > n_pick:
        pick = np.argpartition(-bmax, n_pick - 1, axis=1)[:, :n_pick]
    else:
        pick = np.broadcast_to(np.arange(nb), (n_rows, nb)).copy()
    rows = np.arange(n_rows)[:, None]
    win = np.lib.stride_tricks.sliding_window_view(c, block, axis=1)
    within = np.argmax(win[rows, off + pick * block], axis=2)
    idx = pick * block + within  # relative to off
    val = c[rows, off + idx]
    left = c[rows, off + idx - 1]
    right = c[rows, off + idx + 1]
    ok = (idx < n_core) & (val > left) & (val >= right) & (val > 0)
    score = np.where(ok, val, -np.inf)
    order = np.argsort(-score, axis=1, kind="stable")[:, :n_take]
    top = np.take_along_axis(idx, order, axis=1)
    found = np.isfinite(np.take_along_axis(score, order, axis=1))
    return top, found


def _sigma_a(c, valid, p, x, K: int):
    """rms of the antisymmetric part ``[c(p+x+k) - c(p+x-k)] / 2`` for ``k = 1..K`` lags.

    ``c`` is ``(n_rows, n_lags)``, ``p`` the integer peak indices ``(n_rows, n_peaks)`` and
    ``x`` their sub-pixel offsets; values between lags are linearly interpolated and pairs
    touching an invalid lag (no overlap, or outside the searched window) are left out. ``c``
    must extend at least ``K + 1`` lags beyond every peak on each side.
    """
    n_rows = c.shape[0]
    fl = np.floor(x).astype(int)
    eps = (x - fl).astype(c.dtype)[..., None]
    start = p + fl - K  # the window holds lags base-K .. base+K+1; the caller pads c by K+1
    rows = np.arange(n_rows)[:, None]
    vals = np.lib.stride_tricks.sliding_window_view(c, 2 * K + 2, axis=1)[rows, start]
    interp = vals[..., :-1] + eps * (vals[..., 1:] - vals[..., :-1])
    diff = 0.5 * (interp[..., K + 1:] - interp[..., K - 1::-1])
    # windows that touch an invalid lag (rare: near the ends of the overlap) are masked
    bad_cum = np.concatenate([np.zeros((valid.shape[0], 1), int),
                              np.cumsum(~valid, axis=1)], axis=1)
    vrows = rows if valid.shape[0] > 1 else 0
    n_bad = bad_cum[vrows, start + 2 * K + 2] - bad_cum[vrows, start]
    n_ok = np.full(p.shape, K, dtype=float)
    if np.any(n_bad):
        sel = n_bad > 0
        ok = np.lib.stride_tricks.sliding_window_view(valid, 2 * K + 2, axis=1)[vrows, start][sel]
        iok = ok[..., :-1] & ok[..., 1:]
        pair_ok = iok[..., K + 1:] & iok[..., K - 1::-1]
        sub = diff[sel]
        sub[~pair_ok] = 0.0
        diff[sel] = sub
        n_ok[sel] = pair_ok.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(np.einsum("...k,...k->...", diff, diff, dtype=float) / n_ok)


def _subpixel(ym, y0, yp):
    """Offset, height and Gaussian sigma (pixels) of a peak from three samples around it."""
    with np.errstate(divide="ignore", invalid="ignore"):
        pos = (ym > 0) & (y0 > 0) & (yp > 0)
        lm = np.log(np.where(pos, ym, 1.0))
        l0 = np.log(np.where(pos, y0, 1.0))
        lp = np.log(np.where(pos, yp, 1.0))
        dg = lm - 2.0 * l0 + lp
        okg = pos & (dg < 0)
        xg = np.where(okg, 0.5 * (lm - lp) / np.where(okg, dg, -1.0), 0.0)
        hg = np.exp(l0 - 0.25 * (lm - lp) * xg)
        sg = np.sqrt(-1.0 / np.where(okg, dg, -1.0))
        dp = ym - 2.0 * y0 + yp
        okp = dp < 0
        xp = np.where(okp, 0.5 * (ym - yp) / np.where(okp, dp, -1.0), 0.0)
        hp = y0 - 0.25 * (ym - yp) * xp
        sp = np.sqrt(np.where(okp, -hp / np.where(okp, dp, -1.0), np.nan))
    x = np.clip(np.where(okg, xg, xp), -1.0, 1.0)
    h = np.where(okg, hg, hp)
    s = np.where(okg, sg, sp)
    return x, h, s


def lag_window(n_data: int, grid, bank: TemplateBank, z_min: float, z_max: float, *,
               sigma_a_halfwidth: int = 200, block: int = 8):
    """Lags and FFT length of a correlation over ``z_min .. z_max``.

    Returns ``(k_lo, k_hi, e_lo, e_hi, t_lo, t_hi, nfft)``: the lags of the z range; the
    extended window computed around it (room for the peak fit, the ``sigma_a`` window and
    the last peak block); the part of that window where template and data overlap at all;
    and the shortest fast FFT length for which those overlapping lags do not wrap around
    (``nfft >= t_hi + n_template`` and ``nfft >= n_data - t_lo``; lags outside ``t_lo..t_hi``
    are ignored, so they may wrap). ``None`` if no lag of the z range overlaps the data.
    """
    g = LogGrid.from_any(grid, n_data)
    d = g.dloglam
    delta0 = g.loglam0 - bank.loglam0
    k_lo = int(np.ceil((np.log1p(z_min) - delta0) / d - 1e-9))
    k_hi = int(np.floor((np.log1p(z_max) - delta0) / d + 1e-9))
    k_min, k_max = -(bank.n_pix - 1), n_data - 1  # lags with any overlap at all
    k_lo, k_hi = max(k_lo, k_min + 1), min(k_hi, k_max - 1)
    if k_hi < k_lo:
        return None
    K, blk = int(sigma_a_halfwidth), max(1, int(block))
    e_lo, e_hi = k_lo - K - 2, k_hi + K + 2 + blk
    t_lo, t_hi = max(e_lo, k_min), min(e_hi, k_max)
    n_win = e_hi - e_lo + 1
    nfft = sfft.next_fast_len(max(t_hi + bank.n_pix, n_data - t_lo, n_data, bank.n_pix, n_win),
                              real=True)
    return k_lo, k_hi, e_lo, e_hi, t_lo, t_hi, nfft


def correlate_peaks(flux2d, weight2d, grid, bank: TemplateBank, z_min: float = 0.0,
                    z_max: float = 6.0, n_peaks: int = 5, *, apodize: float = 0.05,
                    sigma_a_halfwidth: int = 200, dtype=np.float32, workers: int = 1,
                    min_overlap: float = 0.02, noise_floor: float = 1.0, block: int = 8,
                    chunk_rows: int = 100,
                    curves: bool = False,
                    curve_points: int = 3000) -> PeakArrays:
    """Correlate every row of ``flux2d`` with every template and keep the top peaks.

    Parameters
    ----------
    flux2d : array_like
        ``(n_rows, n_pix)`` continuum-subtracted flux on the uniform ln-lambda grid (row 0 the
        data, the other rows e.g. bootstrap resamples); a 1-D array is one row.
    weight2d : array_like
        Weights ``1/sigma`` (0 on masked pixels), ``(n_pix,)`` shared by all rows or
        ``(n_rows, n_pix)``. Non-finite flux is given zero weight.
    grid : LogGrid or tuple or array
        The ln-lambda grid of the data (see :meth:`LogGrid.from_any`); its step must equal
        ``bank.dloglam``.
    bank : TemplateBank
        Templates from :func:`zsieve.engine.templates.build_bank`.
    z_min, z_max : float
        Redshift range searched (peaks must be local maxima inside it). Stars blueshifted
        below z = 0 need a slightly negative ``z_min``.
    n_peaks : int
        Peaks kept per row and template.
    apodize : float
        Fraction of the good range tapered by a cosine bell at each end (common practice).
    sigma_a_halfwidth : int
        Number of lags on each side of a peak over which ``sigma_a`` is measured.
    dtype : numpy dtype
        Working precision of the FFTs (float32 is ample: positions agree with float64 to a
        small fraction of a pixel; see the tests).
    workers : int
        Threads for scipy.fft (-1 = all cores; 1 by default, since batches run one process
        per core and extra threads only contend).
    min_overlap : float
        Lags where the template's weighted power in the data is below this fraction of its
        largest value are ignored: there only a line wing or the template's small zero-mean
        pedestal meets the data, and a smooth continuum residual would give a peak with
        almost no antisymmetric part (a huge, meaningless r).
    noise_floor : float
        Lower limit of ``sqrt(2) sigma_a`` in ``r``. With the weights ``1/sigma`` the noise of
        the normalised correlation is known to be 1, so the antisymmetric estimate may only
        add to it (template mismatch, systematics): ``r = h / max(sqrt(2) sigma_a, floor)``.
        Set 0 for the plain Tonry-Davis ratio (e.g. with arbitrary weights).
    block : int
        Peaks are looked for one per block of this many lags (at most one peak per block:
        peaks closer than a few lags are one feature).
    chunk_rows : int
        Rows transformed and searched together (a cache-sized block; results do not depend
        on it).
    curves : bool
        Also return the correlation of row 0 with each template over the z range,
        downsampled to at most ``curve_points`` points by keeping the maximum of each bin.

    Returns
    -------
    PeakArrays
    """
    flux2d = np.asarray(flux2d, dtype=float)
    if flux2d.ndim == 1:
        flux2d = flux2d[None, :]
    n_rows, n_data = flux2d.shape
    weight = np.asarray(weight2d, dtype=float)
    if weight.ndim == 2 and weight.shape[0] > 1 and np.array_equal(weight, np.broadcast_to(weight[0], weight.shape)):
        weight = weight[0]
    elif weight.ndim == 2 and weight.shape[0] == 1:
        weight = weight[0]
    if weight.shape[-1] != n_data or (weight.ndim == 2 and weight.shape[0] != n_rows):
        raise ValueError(f"weights of shape {weight.shape} do not match flux of shape {flux2d.shape}")
    g = LogGrid.from_any(grid, n_data)
    if g.n_pix not in (-1, n_data):
        raise ValueError(f"grid has {g.n_pix} pixels but the flux has {n_data}")
    if abs(g.dloglam / bank.dloglam - 1.0) > 1e-6:
        raise ValueError(f"grid step {g.dloglam:.6g} differs from the template step {bank.dloglam:.6g}")
    d = g.dloglam
    n_t = len(bank.classes)
    K = int(sigma_a_halfwidth)

    w = np.where(np.isfinite(weight) & (weight > 0), weight, 0.0)
    good_any = (w > 0) if w.ndim == 1 else np.any(w > 0, axis=0)
    apo = _apodisation(good_any, apodize)
    finite = np.isfinite(flux2d)
    if finite.all():
        num_in = flux2d * (w * w * apo)
        if w.ndim == 2:
            w = w * 1.0
    else:
        # non-finite flux: those pixels get zero weight, row by row
        num_in = np.where(finite, flux2d, 0.0) * (w * w * apo)
        w = np.broadcast_to(w, flux2d.shape) * finite
    den_in = (w * apo) ** 2
    if den_in.ndim == 2 and np.array_equal(den_in, np.broadcast_to(den_in[0], den_in.shape)):
        den_in = den_in[0]

    shape = (n_rows, n_t, n_peaks)
    nan = np.full(shape, np.nan)
    win = lag_window(n_data, g, bank, z_min, z_max, sigma_a_halfwidth=K, block=block)
    if win is None or not good_any.any():
        logger.info("no lag of the template bank overlaps the data for z in [%g, %g]", z_min, z_max)
        return PeakArrays(bank.classes, nan, nan.copy(), nan.copy(), nan.copy(), nan.copy(),
                          nan.copy(), np.zeros(shape, bool), {} if curves else None)
    k_lo, k_hi, e_lo, e_hi, t_lo, t_hi, nfft = win
    blk = max(1, int(block))
    n_win = e_hi - e_lo + 1
    trusted = (np.arange(e_lo, e_hi + 1) >= t_lo) & (np.arange(e_lo, e_hi + 1) <= t_hi)
    off = k_lo - e_lo  # index of k_lo in the extended window
    n_core = k_hi - k_lo + 1
    lags = np.arange(e_lo, e_hi + 1)

    # Placing the data at offset -e_lo (mod nfft) in the FFT buffer makes output index m the
    # lag e_lo + m, so the lag window is a contiguous slice of the inverse transform.
    ft, ft2 = bank.spectra(nfft, dtype)
    shift = (-e_lo) % nfft
    fv = sfft.rfft(_placed(np.atleast_2d(den_in), nfft, shift, dtype), axis=-1, workers=workers,
                   overwrite_x=True)
    inv, valid = [], []
    for t in range(n_t):
        den = sfft.irfft(fv * ft2[t], n=nfft, axis=-1, workers=workers)[:, :n_win]
        top_den = np.max(np.where(trusted, den, 0.0), axis=-1, keepdims=True)
        ok = trusted & (den > min_overlap * top_den)
        valid.append(ok)
        inv.append(np.where(ok, 1.0 / np.sqrt(np.where(ok, den, 1.0)), 0.0).astype(dtype))
    # the part of the z range where each template meets the data: only it is searched
    spans = []
    for ok in valid:
        idx = np.flatnonzero(ok.any(axis=0)[off:off + n_core])
        spans.append((off + int(idx[0]), int(idx[-1] - idx[0] + 1)) if idx.size else (off, 0))

    z_out, r_out, h_out, s_out, lag_out, sa_out = (np.full(shape, np.nan) for _ in range(6))
    curve_out = {} if curves else None
    p_take = min(n_peaks, n_core)
    step_kms = FWHM_PER_SIGMA * d * C_KMS
    # Rows go through in chunks so that each correlation block stays in cache while its peaks
    # are found; every step inside a chunk is vectorised over its rows.
    for r0 in range(0, n_rows, max(1, int(chunk_rows))):
        r1 = min(n_rows, r0 + max(1, int(chunk_rows)))
        rows = np.arange(r1 - r0)[:, None]
        fx = sfft.rfft(_placed(num_in[r0:r1], nfft, shift, dtype), axis=-1, workers=workers,
                       overwrite_x=True)
        prod = np.empty_like(fx)
        for t in range(n_t):
            vt = valid[t] if valid[t].shape[0] == 1 else valid[t][r0:r1]
            it = inv[t] if inv[t].shape[0] == 1 else inv[t][r0:r1]
            full = sfft.irfft(np.multiply(fx, ft[t], out=prod), n=nfft, axis=-1, workers=workers,
                              overwrite_x=True)
            c = full[:, :n_win]
            c *= it  # normalised correlation, 0 where the template does not overlap the data
            if curves and r0 == 0:
                curve_out[bank.classes[t]] = _downsample_curve(
                    lag_to_z(lags[off:off + n_core], g, bank), c[0, off:off + n_core], curve_points)

            s_off, s_n = spans[t]
            if s_n <= 0:
                continue  # this template meets the data at no lag of the z range
            top, found = _top_local_maxima(c, s_off, s_n, min(p_take, s_n), blk)
            if top.shape[1] < p_take:
                top = np.pad(top, ((0, 0), (0, p_take - top.shape[1])), mode="edge")
                found = np.pad(found, ((0, 0), (0, p_take - found.shape[1])))
            p = top + s_off  # index in the extended window
            x, h, s = _subpixel(c[rows, p - 1].astype(float), c[rows, p].astype(float),
                                c[rows, p + 1].astype(float))
            sig_a = _sigma_a(c, vt, p, x, K)
            with np.errstate(invalid="ignore", divide="ignore"):
                r = h / np.maximum(np.sqrt(2.0) * sig_a, noise_floor)
            lagf = e_lo + p + x
            good = found & np.isfinite(h) & np.isfinite(r) & (h > 0)
            sl = (slice(r0, r1), t, slice(0, p_take))
            z_out[sl] = np.where(good, lag_to_z(lagf, g, bank), np.nan)
            r_out[sl] = np.where(good, r, np.nan)
            h_out[sl] = np.where(good, h, np.nan)
            s_out[sl] = np.where(good, s * step_kms, np.nan)
            lag_out[sl] = np.where(good, lagf, np.nan)
            sa_out[sl] = np.where(good, sig_a, np.nan)
    valid_out = np.isfinite(z_out)
    return PeakArrays(bank.classes, z_out, r_out, h_out, s_out, lag_out, sa_out, valid_out, curve_out)


def correlate_batch(flux2d, weight2d, grid, bank: TemplateBank, z_min: float = 0.0,
                    z_max: float = 6.0, n_peaks: int = 5, *, return_curves: bool = False,
                    **options):
    """Top Tonry-Davis peaks of every row, as lists of :class:`Peak` (highest r first).

    Each row's list holds up to ``n_peaks`` peaks per template. Keyword options are those of
    :func:`correlate_peaks`. With ``return_curves=True`` the return value is
    ``(peaks, curves)`` where ``curves[class] = (z, c)`` is the normalised correlation of row 0
    (signal-to-noise units), downsampled for plotting.
    """
    res = correlate_peaks(flux2d, weight2d, grid, bank, z_min, z_max, n_peaks,
                          curves=return_curves, **options)
    out = [res.peaks(i) for i in range(res.z.shape[0])]
    return (out, res.curves) if return_curves else out


def correlation_curves(flux, weight, grid, bank: TemplateBank, z_min: float = 0.0,
                       z_max: float = 6.0, **options) -> dict:
    """The normalised correlation of one spectrum with each template: ``{class: (z, c)}``."""
    flux = np.asarray(flux, dtype=float)
    res = correlate_peaks(flux[:1] if flux.ndim == 2 else flux, weight if np.ndim(weight) == 1
                          else np.asarray(weight)[:1], grid, bank, z_min, z_max, 1,
                          curves=True, **options)
    return res.curves
