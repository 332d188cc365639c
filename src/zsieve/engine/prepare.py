"""Prepare a spectrum for measurement: masks, a robust continuum, and a uniform ln-lambda grid.

Three jobs, all vectorised so that the bootstrap can run them on a whole matrix of resampled
spectra at once:

* **Masks.** A pixel is left out when its flux or uncertainty is not finite, its inverse
  variance is not positive, the file flagged it, it falls on a bright night-sky line or telluric
  band (``zsieve.lines.sky_features()``, switchable with ``mask_sky``), or it lies in a range the
  user gave (``extra_masks``).
* **Spikes.** Single-pixel spikes (cosmic rays, flipped bytes) that no resolved line can
  make are masked too (:func:`spike_mask`).
* **Continuum.** Iteratively clipped block means on a velocity scale of several thousand km/s,
  joined linearly. Each pass clips pixels that stand out individually (``|r| > k sigma``) *or*
  collectively (the residual smoothed over ~1000 km/s is significant against its own propagated
  noise), so broad quasar lines and absorption troughs that are weak per pixel still drop out
  of the continuum; blocks that lose all pixels are bridged from their neighbours.
* **ln-lambda grid.** For the cross-correlation the flux is put on a uniform grid in ln lambda
  by linear interpolation, and the variance is carried with the same weights,
  ``var = (1-t)^2 var_i + t^2 var_{i+1}``. Linear interpolation is used rather than flux-
  conserving rebinning because the grid step is chosen no finer than the native step, the
  correlation only needs relative weights, and it keeps bad pixels local (a masked input pixel
  makes at most two output pixels bad). Line fits and error bars never use the resampled grid:
  they run on the native pixels, whose noise is independent.

Examples
--------
>>> import numpy as np
>>> wave = np.linspace(5000.0, 6000.0, 2001)
>>> flux = 3.0 + 0.001 * (wave - 5000.0)
>>> flux[1000:1004] += 50.0                      # a narrow emission line
>>> ivar = np.full(wave.size, 100.0)
>>> cont = continuum_batch(flux[None, :], ivar, np.log(wave), scale_kms=8000.0)[0]
>>> bool(np.max(np.abs(cont - (3.0 + 0.001 * (wave - 5000.0)))) < 0.05)
True
"""

from __future__ import annotations

import logging
from functools import cached_property, lru_cache
from dataclasses import dataclass

import numpy as np

__all__ = [
    "C_KMS",
    "Prepared",
    "sky_mask",
    "range_mask",
    "spike_mask",
    "continuum_batch",
    "continuum_operator",
    "flux_scale",
    "loglam_grid",
    "LoglamMap",
    "prepare",
]

log = logging.getLogger(__name__)

#: Template classes measured inside the shallow telluric bands (see :meth:`Prepared.for_class`).
BAND_CLASSES = ("emission-galaxy",)

#: Speed of light in km/s (exact, SI definition).
C_KMS = 299792.458


def range_mask(wave, ranges) -> np.ndarray:
    """``True`` where ``wave`` falls inside any of the ``(lo, hi)`` ranges (Angstrom).

    >>> range_mask(np.array([1.0, 2.0, 3.0, 4.0]), [(1.5, 3.0)]).tolist()
    [False, True, True, False]
    """
    wave = np.asarray(wave, dtype=float)
    ranges = np.asarray(list(ranges), dtype=float).reshape(-1, 2)
    if ranges.size == 0:
        return np.zeros(wave.shape, dtype=bool)
    lo, hi = np.minimum(ranges[:, 0], ranges[:, 1]), np.maximum(ranges[:, 0], ranges[:, 1])
    # a pixel is inside a range when the number of starts at or below it exceeds the number of ends below it
    order_lo, order_hi = np.sort(lo), np.sort(hi)
    starts = np.searchsorted(order_lo, wave, side="right")
    ends = np.searchsorted(order_hi, wave, side="left")
    return starts > ends


def sky_ranges(min_strength: float = 0.2, pad_A: float = 4.0, bands: bool = True,
               band_min_depth: float | None = None) -> np.ndarray:
    """Bright night-sky lines and telluric absorption bands of the bundled list (vacuum Angstrom).

    Lines at least ``min_strength`` strong are padded by ``pad_A`` on each side (a sky-line
    residual spans about one resolution element); telluric *absorption* bands at least
    ``band_min_depth`` deep (default ``max(min_strength, 0.4)``) are taken whole. The
    emission-band extents of the OH forest are not masked: there the uncertainty array already
    carries the sky noise. Returns an ``(n, 2)`` array; empty (with a warning) if the sky list
    is unavailable.
    """
    depth = max(min_strength, 0.4) if band_min_depth is None else float(band_min_depth)
    out = _sky_ranges_cached(float(min_strength), float(pad_A), bool(bands), depth)
    return out.copy()


@lru_cache(maxsize=1)
def _sky_table():
    """The bundled sky list as arrays ``(lo, hi, strength, is_line, is_absorption_band)``
    (vacuum Angstrom), read once; None if it is unavailable."""
    try:
        from zsieve.lines import sky_features
    except ImportError:
        log.warning("zsieve.lines.sky_features is not available; no sky masking")
        return None
    tab = sky_features()
    kind = np.array([str(k) for k in tab["kind"]])
    absorb = np.array(["absorption" in str(s).lower() for s in tab["source"]])
    return (np.asarray(tab["wave_lo_vac"], dtype=float), np.asarray(tab["wave_hi_vac"], dtype=float),
            np.asarray(tab["strength"], dtype=float), kind == "line", (kind == "band") & absorb)


@lru_cache(maxsize=32)
def _sky_ranges_cached(min_strength: float, pad_A: float, bands: bool, depth: float) -> np.ndarray:
    """:func:`sky_ranges` of the bundled sky list, read once per argument set."""
    tab = _sky_table()
    if tab is None:
        return np.zeros((0, 2))
    lo, hi, strength, line, band = tab
    is_line = line & (strength >= min_strength)
    is_band = band & (strength >= depth) & bands
    return np.concatenate([np.column_stack([lo[is_line] - pad_A, hi[is_line] + pad_A]),
                           np.column_stack([lo[is_band], hi[is_band]])])


def sky_mask(wave, min_strength: float = 0.2, pad_A: float = 4.0) -> np.ndarray:
    """``True`` on pixels covered by bright sky lines or telluric bands (see :func:`sky_ranges`)."""
    return range_mask(wave, sky_ranges(min_strength, pad_A))


#: Telluric bands shallower than this stay open to emission lines (their pixels carry a
#: correction residual in the uncertainty, :data:`BAND_RESIDUAL`); deeper ones are masked for all.
OPEN_BAND_MAX_DEPTH = 0.6
#: Residual of a telluric correction, as a fraction of the band's depth times the continuum.
BAND_RESIDUAL = 0.2


def open_bands(min_depth: float) -> np.ndarray:
    """``(n, 3)`` array ``lo, hi, depth`` (vacuum Angstrom) of the telluric absorption bands that
    :func:`sky_ranges` masks at ``band_min_depth = min_depth`` and that are shallower than
    :data:`OPEN_BAND_MAX_DEPTH`: those emission lines may still be measured in."""
    return _open_bands_cached(float(min_depth)).copy()


@lru_cache(maxsize=8)
def _open_bands_cached(min_depth: float) -> np.ndarray:
    tab = _sky_table()
    if tab is None:
        return np.zeros((0, 3))
    lo, hi, depth, _, band = tab
    sel = band & (depth >= min_depth) & (depth < OPEN_BAND_MAX_DEPTH)
    return np.column_stack([lo[sel], hi[sel], depth[sel]])


def _box_sum(a, half: int):
    """Sum of ``a`` over a centred box of ``2*half+1`` pixels along the last axis (edges truncated)."""
    n = a.shape[-1]
    cs = np.concatenate([np.zeros(a.shape[:-1] + (1,)), np.cumsum(a, axis=-1)], axis=-1)
    idx = np.arange(n)
    hi = np.minimum(idx + half + 1, n)
    lo = np.maximum(idx - half, 0)
    return cs[..., hi] - cs[..., lo]


def continuum_batch(flux2d, ivar, lnwave, *, scale_kms: float = 8000.0, clip: float = 3.0,
                    smooth_kms: float = 1000.0, n_iter: int = 3, use=None, return_use: bool = False):
    """Robust continuum of each row of ``flux2d`` (shape ``(n, npix)``), one shared ``ivar``.

    Parameters
    ----------
    flux2d : array (n, npix)
        Flux rows (the data and/or bootstrap resamples). Bad pixels must have ``ivar = 0``.
    ivar : array (npix,) or (n, npix)
        Inverse variance; zero leaves a pixel out.
    lnwave : array (npix,)
        Natural log of the wavelength of each pixel (sets the velocity scale).
    scale_kms : float
        Width of the continuum blocks; features narrower than about half of it stay out.
    clip : float
        Clipping threshold in sigma, for single pixels and for the smoothed residual.
    smooth_kms : float
        Box over which residuals are averaged for the collective clip.
    n_iter : int
        Clipping passes.
    use : bool array (npix,), optional
        Pixels to average, fixed (no clipping): the continuum is then a *linear* operator of the
        flux, which lets the bootstrap apply the data's clip mask to pure-noise resamples.
    return_use : bool
        Also return the final clip mask of each row.

    Returns
    -------
    array (n, npix), and the ``(n, npix)`` mask of pixels used if ``return_use``
    """
    flux2d = np.atleast_2d(np.asarray(flux2d, dtype=float))
    n, npix = flux2d.shape
    ivar = np.broadcast_to(np.asarray(ivar, dtype=float), flux2d.shape)
    lnwave = np.asarray(lnwave, dtype=float)
    dv = C_KMS * float(np.median(np.diff(lnwave))) if npix > 1 else 1.0
    block = int(np.clip(round(scale_kms / max(dv, 1e-6)), 8, max(npix, 8)))
    nblk = max(1, int(np.ceil(npix / block)))
    pad = nblk * block - npix
    half = max(1, int(round(0.5 * smooth_kms / max(dv, 1e-6))))
    centre = np.add.reduceat(lnwave, np.arange(0, npix, block)) / np.diff(
        np.append(np.arange(0, npix, block), npix))
    good0 = ivar > 0
    if use is not None and np.ndim(use) == 1 and ivar.shape[0] == n and (n == 1 or ivar.strides[0] == 0):
        return _continuum_fixed(flux2d, ivar[0], np.asarray(use, dtype=bool) & good0[0], scale_kms, lnwave)
    f0 = np.where(good0, flux2d, 0.0)
    if use is not None:
        use = np.broadcast_to(np.asarray(use, dtype=bool), flux2d.shape) & good0
        n_iter = 0
    else:
        use = good0.copy()
    cont = None
    for it in range(n_iter + 1):
        w = np.where(use, ivar, 0.0)
        wp = np.pad(w, ((0, 0), (0, pad))).reshape(n, nblk, block)
        fp = np.pad(f0, ((0, 0), (0, pad))).reshape(n, nblk, block)
        sw = wp.sum(axis=2)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = (wp * fp).sum(axis=2) / sw
        cont = _interp_blocks(centre, mean, sw > 0, lnwave)
        if it == n_iter:
            break
        resid = f0 - cont
        sig_ok = good0
        with np.errstate(invalid="ignore", divide="ignore"):
            pix_dev = np.abs(resid) * np.sqrt(ivar)
            # smoothed residual and its propagated error (sum of r*ivar / sqrt(sum ivar))
            num = _box_sum(np.where(sig_ok, resid * ivar, 0.0), half)
            den = _box_sum(np.where(sig_ok, ivar, 0.0), half)
            coll = np.abs(num) / np.sqrt(den)
        use = good0 & (pix_dev < clip) & ~(coll > clip + 1.0)
    return (cont, use) if return_use else cont


def continuum_operator(ivar, lnwave, *, scale_kms: float = 8000.0, use=None, at=None):
    """The continuum of :func:`continuum_batch` with a fixed pixel selection, as a linear map.

    Returns ``(block, w, sw, M)``: the block length in pixels (block ``k`` holds pixels
    ``k*block ... (k+1)*block-1``), the weights ``w`` (ivar on the selected pixels, else 0),
    their sum ``sw`` per block, and the ``(nblk, npix)`` interpolation matrix, so that the
    continuum of a flux row ``f`` is ``((sums of w f per block) / sw) @ M`` (0 for empty blocks).
    With ``at`` (pixel indices) ``M`` holds only those columns, ``(nblk, at.size)``: the
    continuum on those pixels, the same numbers as ``M[:, at]``.
    """
    ivar = np.asarray(ivar, dtype=float)
    lnwave = np.asarray(lnwave, dtype=float)
    npix = ivar.size
    use = (ivar > 0) if use is None else (np.asarray(use, dtype=bool) & (ivar > 0))
    dv = C_KMS * float(np.median(np.diff(lnwave))) if npix > 1 else 1.0
    block = int(np.clip(round(scale_kms / max(dv, 1e-6)), 8, max(npix, 8)))
    starts = np.arange(0, npix, block)
    centre = np.add.reduceat(lnwave, starts) / np.diff(np.append(starts, npix))
    w = np.where(use, ivar, 0.0)
    sw = np.add.reduceat(w, starts)
    ok = sw > 0
    # built from unit vectors, so it equals the bridging of empty blocks in continuum_batch
    M = _interp_blocks(centre, np.eye(starts.size), np.broadcast_to(ok, (starts.size, starts.size)),
                       lnwave if at is None else lnwave[at])
    M[~ok] = 0.0
    return block, w, sw, M


def _continuum_fixed(flux2d, ivar, use, scale_kms, lnwave):
    """Continuum of many rows with one fixed pixel selection and one ``ivar`` (two matrix
    products; equals the general path of :func:`continuum_batch` without clipping to rounding)."""
    block, w, sw, M = continuum_operator(ivar, lnwave, scale_kms=scale_kms, use=use)
    npix = w.size
    sums = np.add.reduceat(np.where(w[None, :] > 0, flux2d, 0.0) * w[None, :], np.arange(0, npix, block), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(sw > 0, sums / np.where(sw > 0, sw, 1.0), 0.0)
    return mean @ M

def _interp_blocks(centre, value, ok, x):
    """Linear interpolation of block values (rows of ``value``) to ``x``; empty blocks bridged.

    Beyond the first and last block centres the end segments are extrapolated linearly.
    """
    n = value.shape[0]
    out = np.empty((n, x.size))
    all_ok = ok.all(axis=1)
    if all_ok.any():
        if centre.size == 1:
            out[all_ok] = value[all_ok, :1]
        else:
            j = np.clip(np.searchsorted(centre, x) - 1, 0, centre.size - 2)
            t = (x - centre[j]) / (centre[j + 1] - centre[j])  # linear extrapolation at the ends
            v = value[all_ok]
            out[all_ok] = v[:, j] * (1 - t) + v[:, j + 1] * t
    for i in np.flatnonzero(~all_ok):  # rows with empty blocks (rare): per-row bridge
        k = ok[i]
        if not k.any():
            out[i] = 0.0
        else:
            out[i] = np.interp(x, centre[k], value[i, k])
    return out


def loglam_grid(wave_min: float, wave_max: float, step: float) -> np.ndarray:
    """Uniform grid of ln(wavelength) from ``wave_min`` to ``wave_max`` with ``step`` in ln lambda.

    >>> g = loglam_grid(4000.0, 4000.0 * np.exp(1e-3), 1e-4)
    >>> g.size, bool(np.allclose(np.diff(g), 1e-4))
    (11, True)
    """
    n = int(np.floor((np.log(wave_max) - np.log(wave_min)) / step + 1e-9)) + 1
    return np.log(wave_min) + step * np.arange(n)


@dataclass(frozen=True)
class LoglamMap:
    """Linear interpolation from native pixels to a uniform ln-lambda grid (shared by all rows)."""

    grid: np.ndarray  # ln lambda of the output pixels
    j: np.ndarray  # left native pixel
    t: np.ndarray  # interpolation weight of the right pixel

    @classmethod
    def build(cls, lnwave, step: float) -> "LoglamMap":
        grid = loglam_grid(float(np.exp(lnwave[0])), float(np.exp(lnwave[-1])), step)
        j = np.clip(np.searchsorted(lnwave, grid) - 1, 0, lnwave.size - 2)
        t = np.clip((grid - lnwave[j]) / (lnwave[j + 1] - lnwave[j]), 0.0, 1.0)
        return cls(grid, j, t)

    def apply(self, flux2d, ivar):
        """Return ``(flux, weight)`` on the grid; weight = propagated inverse variance."""
        f = np.atleast_2d(flux2d)
        iv = np.asarray(ivar, dtype=float)
        a, b = iv[..., self.j], iv[..., self.j + 1]
        out = f[..., self.j] * (1 - self.t) + f[..., self.j + 1] * self.t
        with np.errstate(divide="ignore", invalid="ignore"):
            var = (1 - self.t) ** 2 / a + self.t**2 / b
            w = np.where((a > 0) & (b > 0), 1.0 / var, 0.0)
        return np.where(w > 0, out, 0.0), w


def good_cumsum(ivar) -> np.ndarray:
    """``(npix + 1,)`` running count of good pixels (``ivar > 0``), starting at 0: the good
    pixels in ``[i, j)`` number ``c[j] - c[i]``.

    >>> good_cumsum(np.array([1.0, 0.0, 2.0])).tolist()
    [0, 1, 1, 2]
    """
    c = np.zeros(np.size(ivar) + 1, dtype=np.int64)
    np.cumsum(np.asarray(ivar) > 0, out=c[1:])
    return c


@dataclass
class Prepared:
    """A spectrum ready for measurement (native pixels, independent noise)."""

    wave: np.ndarray
    lnwave: np.ndarray
    flux: np.ndarray
    sigma: np.ndarray  # 1-sigma, inf on masked pixels
    ivar: np.ndarray  # 0 on masked pixels
    bad: np.ndarray  # all reasons combined
    sky: np.ndarray  # the sky/telluric part of the mask (also used to flag coincidences)
    continuum: np.ndarray
    cont_use: np.ndarray  # pixels the continuum averaged (after clipping)
    dv_kms: float  # median pixel step in km/s
    sigma_from_scatter: bool = False
    continuum_kms: float = 8000.0
    #: pixels of shallow telluric bands left open to emission lines (``ivar`` there carries the
    #: correction residual); absorbing classes and the correlation see them masked (``closed``)
    open_band: np.ndarray | None = None

    @cached_property
    def closed(self) -> "Prepared":
        """This spectrum with the open telluric band pixels masked too (itself if there are none)."""
        if self.open_band is None or not self.open_band.any():
            return self
        from dataclasses import replace

        ob = self.open_band
        return replace(self, ivar=np.where(ob, 0.0, self.ivar), sigma=np.where(ob, np.inf, self.sigma),
                       bad=self.bad | ob, open_band=None)

    def for_class(self, cls: str) -> "Prepared":
        """The pixels a template class is measured on. Narrow emission lines (``BAND_CLASSES``)
        are measured in the shallow telluric bands too: an imperfect correction leaves
        absorption, or a residual of a fraction of the band's depth, never a narrow emission
        line. Absorption lines are never measured there, nor broad quasar lines, which span
        whole bands: a quasar reading whose broad H-beta fell in the open water band at
        8130-8350 A escaped its missing-companion test (the band's raised noise) and took half
        the resamples from a z = 0.15 absorption galaxy of a 2,000-mock benchmark."""
        return self if cls in BAND_CLASSES else self.closed

    @cached_property
    def good_cs(self) -> np.ndarray:
        """:func:`good_cumsum` of ``ivar`` (computed once; read-only)."""
        c = good_cumsum(self.ivar)
        c.flags.writeable = False
        return c

    @cached_property
    def resid(self) -> np.ndarray:
        """Flux minus continuum, 0 on masked pixels (computed once; read-only)."""
        r = np.where(self.ivar > 0, self.flux - self.continuum, 0.0)
        r.flags.writeable = False
        return r


def _scatter_sigma(flux, good, lnwave, scale_kms=8000.0):
    """Per-pixel noise from the flux scatter (for files without an uncertainty array)."""
    d = np.where(good[1:] & good[:-1], np.diff(flux), np.nan)
    d = np.append(d, np.nan)
    dv = C_KMS * float(np.median(np.diff(lnwave)))
    block = int(max(16, round(scale_kms / max(dv, 1e-6))))
    out = np.full(flux.size, np.nan)
    starts = np.arange(0, flux.size, block)
    for s in starts:  # loop over blocks (tens), not pixels
        seg = d[s:s + block]
        seg = seg[np.isfinite(seg)]
        if seg.size >= 5:
            out[s:s + block] = 1.4826 * np.median(np.abs(seg - np.median(seg))) / np.sqrt(2.0)
    fill = np.nanmedian(out) if np.isfinite(out).any() else 1.0
    out = np.where(np.isfinite(out) & (out > 0), out, fill)
    return out


def flux_scale(spec) -> float:
    """A robust flux scale of a spectrum: the median sigma of its good pixels.

    Falls back to the median absolute flux when there is no usable uncertainty, and to 1 when
    neither is a positive finite number. The engine divides flux and sigma by it, so that
    values of any magnitude (1e-300 as well as 1e+300) keep a finite inverse variance; every
    chi-square, S/N and equivalent width is unchanged by the division.

    >>> from zsieve.spectrum import Spectrum
    >>> s = Spectrum(np.linspace(4000.0, 5000.0, 5), np.full(5, 3e-300), np.full(5, 2e-300))
    >>> flux_scale(s)
    2e-300
    """
    good = ~np.asarray(spec.mask, dtype=bool)
    sig = np.asarray(spec.sigma, dtype=float)[good]
    sig = sig[np.isfinite(sig) & (sig > 0)]
    if sig.size:
        scale = float(np.median(sig))
    else:
        f = np.abs(np.asarray(spec.flux, dtype=float)[good])
        f = f[np.isfinite(f) & (f > 0)]
        scale = float(np.median(f)) if f.size else 1.0
    return scale if np.isfinite(scale) and scale > 0 else 1.0


def spike_mask(flux, sigma, *, threshold: float = 10.0, neighbour_ratio: float = 0.2) -> np.ndarray:
    """Single-pixel spikes: cosmic-ray hits, flipped bytes, dead or hot pixels.

    A pixel is a spike when it departs from the mean of its two neighbours by more than
    ``threshold`` times the noise of that difference, while both neighbours depart from the local
    baseline (running median of 7 pixels) by less than ``neighbour_ratio`` of its own departure.
    A line resolved by the spectrograph (FWHM of two pixels or more, Nyquist sampling; common
    practice) has neighbours at about half its peak or more, so real lines are never caught.
    Pixels with non-finite ``sigma`` (already bad) are never flagged, nor are their neighbours.

    >>> f = np.ones(50); f[20] = 1e6; f[30:33] += [500.0, 1000.0, 500.0]   # a spike and a line
    >>> np.flatnonzero(spike_mask(f, np.ones(50))).tolist()
    [20]
    """
    from scipy.ndimage import median_filter

    flux = np.asarray(flux, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    out = np.zeros(flux.size, dtype=bool)
    if flux.size < 7:
        return out
    var = np.where(np.isfinite(sigma), sigma**2, np.inf)
    d = flux[1:-1] - 0.5 * (flux[:-2] + flux[2:])
    with np.errstate(invalid="ignore", over="ignore"):
        sd = np.sqrt(var[1:-1] + 0.25 * (var[:-2] + var[2:]))
        big = np.abs(d) > threshold * sd
    if not big.any():
        return out
    base = median_filter(flux, size=7, mode="nearest")
    dev = flux - base
    own = np.abs(dev[1:-1])
    quiet = (np.abs(dev[:-2]) < neighbour_ratio * own) & (np.abs(dev[2:]) < neighbour_ratio * own)
    out[1:-1] = big & quiet
    return out


def prepare(spec, *, mask_sky: bool = True, extra_masks=(), sky_min_strength: float = 0.2,
            continuum_kms: float = 8000.0, open_bands_to_emission: bool = True) -> Prepared:
    """Masks and continuum of a :class:`zsieve.spectrum.Spectrum` on its native pixels.

    With ``open_bands_to_emission``, the telluric bands shallower than
    :data:`OPEN_BAND_MAX_DEPTH` are masked for the continuum and for all classes but the
    narrow emission-line galaxies (:meth:`Prepared.for_class`), whose lines are measured there
    with the noise raised by a correction residual of :data:`BAND_RESIDUAL` x depth x continuum.
    """
    wave = spec.wavelength
    flux = np.where(np.isfinite(spec.flux), spec.flux, 0.0)
    bad = np.asarray(spec.mask, dtype=bool).copy()
    sigma = np.asarray(spec.sigma, dtype=float)
    from_scatter = False
    if not np.isfinite(sigma[~bad]).any():
        sigma = _scatter_sigma(flux, ~bad & np.isfinite(spec.flux), np.log(wave))
        from_scatter = True
        log.info("no uncertainty array: noise estimated from the flux scatter")
    sky = sky_mask(wave, sky_min_strength) if mask_sky else np.zeros(wave.size, dtype=bool)
    extra = range_mask(wave, extra_masks)
    bad = bad | sky | extra | ~np.isfinite(sigma) | ~(sigma > 0)
    with np.errstate(divide="ignore", over="ignore"):
        ivar = np.where(bad, 0.0, 1.0 / sigma**2)
    if not np.isfinite(ivar).all():  # sigma so small that 1/sigma^2 overflows float64
        log.warning("%d pixel(s) have sigma too small for an inverse variance and are left out; "
                    "scale the flux first (see flux_scale)", int((~np.isfinite(ivar)).sum()))
        bad = bad | ~np.isfinite(ivar)
        ivar = np.where(bad, 0.0, ivar)
    spikes = spike_mask(flux, np.where(bad, np.inf, sigma))
    if spikes.any():
        log.info("%d single-pixel spike(s) masked (narrower than any resolved line)", int(spikes.sum()))
        bad = bad | spikes
        ivar = np.where(spikes, 0.0, ivar)
    lnwave = np.log(wave)
    cont, use = continuum_batch(flux[None, :], ivar, lnwave, scale_kms=continuum_kms, return_use=True)
    dv = C_KMS * float(np.median(np.diff(lnwave))) if wave.size > 1 else 1.0
    sigma0, sigma = sigma, np.where(bad, np.inf, sigma)
    open_band = None
    if mask_sky and open_bands_to_emission:
        # shallow telluric bands: open again, with the correction residual added to the noise
        # (the continuum stays the one fitted without them)
        ob = open_bands(max(sky_min_strength, 0.4))
        if ob.size:
            depth = np.zeros(wave.size)
            for lo, hi, d in ob:  # a handful of bands
                depth = np.where((wave >= lo) & (wave <= hi), d, depth)
            # pixels masked by nothing but the band (not by the file, a sky line, the user,
            # a spike or an unusable sigma)
            other = (np.asarray(spec.mask, dtype=bool) | extra | spikes | ~np.isfinite(sigma0) | ~(sigma0 > 0)
                     | range_mask(wave, sky_ranges(sky_min_strength, 4.0, bands=False)))
            reopen = (depth > 0) & bad & ~other
            if reopen.any():
                s_eff = np.hypot(np.where(reopen, sigma0, 0.0), BAND_RESIDUAL * depth * np.abs(cont[0]))
                sigma = np.where(reopen, s_eff, sigma)
                with np.errstate(divide="ignore", over="ignore"):
                    ivar = np.where(reopen, 1.0 / s_eff**2, ivar)
                reopen &= np.isfinite(ivar) & (ivar > 0)
                ivar = np.where(np.isfinite(ivar), ivar, 0.0)
                sigma = np.where(reopen | ~bad, sigma, np.inf)
                bad = bad & ~reopen
                open_band = reopen
    return Prepared(wave, lnwave, flux, sigma, ivar, bad, sky, cont[0], use[0],
                    dv, from_scatter, continuum_kms, open_band)
