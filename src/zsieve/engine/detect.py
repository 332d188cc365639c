"""Detect emission and absorption features and measure each with a weighted Gaussian fit.

Detection is a matched filter on the continuum-subtracted flux: for a Gaussian profile g of
width s (pixels) the best amplitude at pixel x and its error follow from the uncertainty
array alone,

    A(x) = sum(w g r) / sum(w g^2),    S/N(x) = sum(w g r) / sqrt(sum(w g^2)),

(w = 1/sigma^2, r = residual; weighted least squares, common practice), evaluated for a ladder
of widths with FFT convolutions. Local extrema of S/N beyond the threshold become features.
Each feature is then fitted by weighted least squares with a Gaussian (sigma weights),
giving centroid, sigma, flux, equivalent width and S/N with errors from the Jacobian:
isolated features all at once by a batched Gauss-Newton (:func:`fit_isolated`), and features
whose windows overlap (doublets, blends) *together*, one Gaussian each, by a bounded
Levenberg-Marquardt fit (:func:`lm_bounded`).

Examples
--------
>>> import numpy as np
>>> rng = np.random.default_rng(1)
>>> wave = np.linspace(6000.0, 7000.0, 1001)
>>> resid = 20.0 * np.exp(-0.5 * ((wave - 6500.0) / 2.0) ** 2) + rng.normal(0, 1, wave.size)
>>> feats = detect_features(wave, resid, np.ones(wave.size), np.ones(wave.size), threshold=5.0)
>>> len(feats), round(feats[0].centroid), feats[0].kind
(1, 6500, 'emission')
"""

from __future__ import annotations

import logging
import math
from dataclasses import asdict, dataclass

import numpy as np
from functools import lru_cache

from scipy.fft import next_fast_len

__all__ = ["Feature", "detect_features", "matched_filter_snr", "lm_bounded", "pushed_past_bounds"]

log = logging.getLogger(__name__)

#: Matched-filter widths, Gaussian sigma in pixels (narrow lines up to broad quasar lines).
WIDTHS_PIX = (1.0, 1.6, 2.5, 4.0, 6.5, 10.0, 16.0, 25.0, 40.0)


@dataclass
class Feature:
    """One detected feature (observed frame, vacuum Angstrom)."""

    centroid: float
    centroid_err: float
    sigma_A: float
    sigma_err: float
    flux: float  # integrated, negative for absorption
    flux_err: float
    ew: float  # observed-frame equivalent width, positive for emission
    snr: float  # |flux| / flux_err
    kind: str  # 'emission' | 'absorption'
    detect_snr: float  # matched-filter S/N at detection
    blend: int = 0  # id of the group fitted jointly (0 = alone)
    on_sky: bool = False  # centroid within a sky line / telluric band window
    near_edge: bool = False

    def to_dict(self):
        return asdict(self)


def matched_filter_snr(resid, ivar, widths=WIDTHS_PIX):
    """Matched-filter S/N per pixel for each width: array (len(widths), npix), and amplitudes.

    All widths at once: the weighted flux and the weights are transformed once, multiplied by
    the (cached) transforms of the kernels ``g`` and ``g^2`` of every width, and transformed
    back in one batch (the convolutions of ``scipy.signal.fftconvolve(..., mode="same")``).

    A spike of 3 under unit weights: amplitude ``3 g(0) / sum(g^2)`` at the spike.

    >>> snr, amp = matched_filter_snr(np.r_[np.zeros(50), 3.0, np.zeros(50)], np.ones(101), (1.0,))
    >>> bool(np.isclose(amp[0, 50], 3.0 / np.sum(np.exp(-np.arange(-4, 5) ** 2.0)))), int(np.argmax(snr[0]))
    (True, 50)
    """
    r = np.asarray(resid, dtype=float)
    w = np.asarray(ivar, dtype=float)
    widths = tuple(float(v) for v in widths)
    n = r.size
    nfft = next_fast_len(n + 2 * int(math.ceil(4 * max(widths))) + 1, real=True)
    kg, kg2 = _kernel_ffts(widths, nfft)
    fr = np.fft.rfft(w * r, nfft)
    fw = np.fft.rfft(w, nfft)
    num = np.fft.irfft(kg * fr[None, :], nfft, axis=1)[:, :n]
    den = np.fft.irfft(kg2 * fw[None, :], nfft, axis=1)[:, :n]
    with np.errstate(divide="ignore", invalid="ignore"):
        ok = den > 1e-12 * np.maximum(den.max(axis=1, keepdims=True), 1e-300)
        dd = np.where(ok, den, 1.0)
        snr = np.where(ok, num / np.sqrt(dd), 0.0)
        amp = np.where(ok, num / dd, 0.0)
    return snr, amp


@lru_cache(maxsize=32)
def _kernel_ffts(widths, nfft):
    """Transforms of the centred Gaussian kernels ``g`` and ``g^2`` (wrapped, length ``nfft``)."""
    kg = np.zeros((len(widths), nfft))
    kg2 = np.zeros_like(kg)
    for k, s in enumerate(widths):  # a handful of widths
        half = int(math.ceil(4 * s))
        x = np.arange(-half, half + 1)
        g = np.exp(-0.5 * (x / s) ** 2)
        kg[k, x % nfft] = g
        kg2[k, x % nfft] = g * g
    out = np.fft.rfft(kg, axis=1), np.fft.rfft(kg2, axis=1)
    for a in out:
        a.flags.writeable = False
    return out


def fit_isolated(wave, resid, ivar, cont, peaks, widths_A, amps, n_iter: int = 8):
    """Weighted Gaussian fits of many isolated features at once (batched Gauss-Newton).

    Each feature gets a window of +/-4 sigma (padded to a common length with zero weight) and
    its own (amplitude, centroid, sigma); the 3x3 normal equations of all features are solved
    together at each iteration, with steps limited to stay inside the window. Returns a list of
    dicts as :func:`_fit_group` (``None`` where a fit failed).
    """
    nf = len(peaks)
    if nf == 0:
        return []
    dl = np.gradient(wave)[peaks]
    half = np.maximum(3, np.ceil(4.0 * widths_A / dl)).astype(int)
    K = int(2 * half.max() + 1)
    off = np.arange(K) - K // 2
    idx = peaks[:, None] + off[None, :]
    inside = (idx >= 0) & (idx < wave.size) & (np.abs(off)[None, :] <= half[:, None])
    idx = np.clip(idx, 0, wave.size - 1)
    x, y = wave[idx], resid[idx]
    w = np.where(inside, ivar[idx], 0.0)
    a, mu, sg = amps.astype(float).copy(), wave[peaks].astype(float), widths_A.astype(float).copy()
    mu0 = mu.copy()
    smin, smax = 0.3 * dl, 4.0 * widths_A + dl
    ok = np.ones(nf, dtype=bool)
    for _ in range(n_iter):  # iterations (a handful), all features at once
        u = (x - mu[:, None]) / sg[:, None]
        e = np.exp(-0.5 * u * u)
        r = y - a[:, None] * e
        J = np.stack([e, a[:, None] * e * u / sg[:, None], a[:, None] * e * u * u / sg[:, None]], axis=2)
        JW = J * w[:, :, None]
        F = np.einsum("fki,fkj->fij", JW, J)
        g = np.einsum("fki,fk->fi", JW, r)
        F = F + 1e-9 * np.eye(3)[None] * np.maximum(np.trace(F, axis1=1, axis2=2), 1e-30)[:, None, None]
        try:
            step = np.linalg.solve(F, g[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            return [None] * nf
        a = a + step[:, 0]
        mu = np.clip(mu + np.clip(step[:, 1], -sg, sg), mu0 - 3 * widths_A - dl, mu0 + 3 * widths_A + dl)
        sg = np.clip(sg + np.clip(step[:, 2], -0.5 * sg, sg), smin, smax)
    u = (x - mu[:, None]) / sg[:, None]
    e = np.exp(-0.5 * u * u)
    J = np.stack([e, a[:, None] * e * u / sg[:, None], a[:, None] * e * u * u / sg[:, None]], axis=2)
    F = np.einsum("fki,fkj->fij", J * w[:, :, None], J)
    out = []
    for i in range(nf):  # over features: unpack the 3x3 covariances
        if not ok[i] or (w[i] > 0).sum() < 4:
            out.append(None)
            continue
        try:
            cov = np.linalg.inv(F[i])
        except np.linalg.LinAlgError:
            out.append(None)
            continue
        out.append(_pack(a[i], mu[i], sg[i], cov, 0, wave, cont))
    return out


def _pack(a, mu, s, cov, i, wave, cont, n=1):
    """Feature fields from amplitude, centroid, sigma and their covariance (index i of n)."""
    var = np.clip(np.diag(cov), 0, None)
    emu, es = np.sqrt(var[n + i]), np.sqrt(var[2 * n + i])
    flux = a * s * math.sqrt(2 * math.pi)
    ja = np.zeros(3 * n)
    ja[i] = s * math.sqrt(2 * math.pi)
    ja[2 * n + i] = a * math.sqrt(2 * math.pi)
    ferr = float(np.sqrt(max(ja @ cov @ ja, 0.0)))
    c = float(np.interp(mu, wave, cont))
    ew = flux / c if c != 0 else math.nan
    return dict(centroid=float(mu), centroid_err=float(emu), sigma_A=float(s), sigma_err=float(es),
                flux=float(flux), flux_err=ferr, ew=float(ew),
                snr=float(abs(flux) / ferr) if ferr > 0 else 0.0,
                kind="emission" if a > 0 else "absorption")


def pushed_past_bounds(p, lb, ub, g):
    """Parameters on a bound that the descent direction ``-g`` (``g = J^T r``) pushes beyond it:
    a step holds them there and is solved without them.

    >>> p, g = np.array([0.0, 0.0, 1.0]), np.array([1.0, -1.0, -1.0])
    >>> pushed_past_bounds(p, np.zeros(3), np.ones(3), g).tolist()
    [True, False, True]
    """
    return ((p <= lb) & (g > 0)) | ((p >= ub) & (g < 0))


def lm_bounded(fun, jac, p0, lb, ub, *, max_nfev: int = 40, rtol: float = 1e-6, xtol: float = 1e-6,
               normal=None):
    """Levenberg-Marquardt minimisation of ``|fun(p)|^2`` with box bounds (steps clipped).

    Marquardt's diagonal scaling (``J^T J`` diagonal, the same as ``x_scale='jac'`` of
    ``scipy.optimize.least_squares``) makes the damping independent of the units of each
    parameter; a step is kept only when it lowers the chi-square. Small problems (a few to a
    few tens of parameters) converge in a handful of iterations at a fraction of the cost of
    the general-purpose solver. It stops when the chi-square falls by less than ``rtol`` of
    itself, the step is below ``xtol`` of the parameters, or after ``max_nfev`` evaluations of
    ``fun``. ``normal(p, r)``, if given, returns the normal equations ``(J^T J, J^T r)`` in
    place of ``jac`` (a problem that can form them without the Jacobian). Returns ``(p, chi2)``.

    >>> import numpy as np
    >>> x = np.linspace(-3.0, 3.0, 61)
    >>> y = 2.0 * np.exp(-0.5 * ((x - 0.3) / 0.8) ** 2)
    >>> f = lambda p: p[0] * np.exp(-0.5 * ((x - p[1]) / p[2]) ** 2) - y
    >>> def j(p):
    ...     e = np.exp(-0.5 * ((x - p[1]) / p[2]) ** 2)
    ...     u = (x - p[1]) / p[2]
    ...     return np.column_stack([e, p[0] * e * u / p[2], p[0] * e * u * u / p[2]])
    >>> p, c = lm_bounded(f, j, np.array([1.0, 0.0, 1.0]), np.array([0.0, -1.0, 0.1]), np.array([9.0, 1.0, 5.0]))
    >>> [round(float(v), 6) for v in p]
    [2.0, 0.3, 0.8]
    """
    lb = np.asarray(lb, dtype=float)
    ub = np.asarray(ub, dtype=float)
    p = np.clip(np.asarray(p0, dtype=float), lb, ub)
    r = fun(p)
    chi = float(r @ r)
    lam = 1e-3
    nfev = 1
    while nfev < max_nfev:  # iterations (a handful)
        if normal is None:
            J = jac(p)
            H, g = J.T @ J, J.T @ r
        else:
            H, g = normal(p, r)
        d = np.maximum(np.diag(H), 1e-12 * max(float(np.max(np.diag(H), initial=0.0)), 1e-300))
        # a parameter on a bound that the descent direction pushes beyond it is held there and
        # the step solved without it (a clipped full step leaves the others a step meant for a
        # move the bound forbids, and the fit crawls along the bound)
        free = ~pushed_past_bounds(p, lb, ub, g)
        if not free.any():
            break
        if not free.all():
            H, g, d = H[np.ix_(free, free)], g[free], d[free]
        improved = False
        while nfev < max_nfev and lam < 1e12:
            try:
                step = np.zeros(p.size)
                step[free] = np.linalg.solve(H + lam * np.diag(d), -g)
            except np.linalg.LinAlgError:
                lam *= 10.0
                continue
            q = np.clip(p + step, lb, ub)
            rq = fun(q)
            nfev += 1
            cq = float(rq @ rq)
            if np.isfinite(cq) and cq < chi:
                improved = True
                break
            lam *= 4.0
        if not improved:
            break
        done = chi - cq <= rtol * max(chi, 1e-300) or \
            np.all(np.abs(q - p) <= xtol * (np.abs(p) + xtol))
        p, r, chi = q, rq, cq
        lam = max(lam / 3.0, 1e-12)
        if done:
            break
    return p, chi


def _fit_group(wave, resid, ivar, cont, peaks, widths_A, amps, dlam):
    """Joint weighted Gaussian fit of the peaks of one blend; returns list of Feature fields."""
    n = len(peaks)
    lo = max(0, int(np.min(peaks - 4 * widths_A / dlam[peaks])) - 2)
    hi = min(wave.size, int(np.max(peaks + 4 * widths_A / dlam[peaks])) + 3)
    sl = slice(lo, hi)
    x, y, w = wave[sl], resid[sl], ivar[sl]
    sw = np.sqrt(w)
    if (w > 0).sum() < 3 * n + 1:
        return []
    mu0 = wave[peaks]
    p0 = np.concatenate([amps, mu0, widths_A])
    span = x[-1] - x[0]
    dmin = float(np.min(dlam[sl]))
    lb = np.concatenate([np.where(amps > 0, 0.0, -np.inf), mu0 - 3 * widths_A - dmin,
                         np.full(n, 0.3 * dmin)])
    ub = np.concatenate([np.where(amps > 0, np.inf, 0.0), mu0 + 3 * widths_A + dmin,
                         np.full(n, max(span, dmin))])
    eps = 1e-9 * np.maximum(np.abs(p0), 1e-6)
    p0 = np.clip(p0, np.where(np.isfinite(lb), lb + eps, p0), np.where(np.isfinite(ub), ub - eps, p0))

    last = [None, None, None]  # the profiles at the last point (the Jacobian follows fun there)

    def profiles(p):
        key = p.tobytes()
        if last[0] != key:
            mu, s = p[n:2 * n], p[2 * n:3 * n]
            u = (x[:, None] - mu[None, :]) / s[None, :]
            last[:] = key, u, np.exp(-0.5 * u * u)
        return last[1], last[2]

    def fun(p):
        return (profiles(p)[1] @ p[0:n] - y) * sw

    def jac(p):
        a, s = p[0:n], p[2 * n:3 * n]
        u, e = profiles(p)
        ae = a * e
        return np.hstack([e, ae * u / s, ae * u * u / s]) * sw[:, None]

    p, _ = lm_bounded(fun, jac, p0, lb, ub, max_nfev=30 * n, rtol=1e-6, xtol=1e-6)
    J = jac(p)
    if not np.all(np.isfinite(J)):
        return []
    try:
        cov = np.linalg.pinv(J.T @ J)
    except np.linalg.LinAlgError:
        return []
    return [_pack(p[i], p[n + i], p[2 * n + i], cov, i, wave, cont, n) for i in range(n)]


def detect_features(wave, resid, ivar, cont, *, threshold: float = 4.5, max_features: int = 40,
                    sky=None, widths=WIDTHS_PIX, edge_A: float = 15.0) -> list[Feature]:
    """Features beyond ``threshold`` (matched-filter S/N from the uncertainties), fitted.

    Parameters
    ----------
    wave, resid, ivar, cont : arrays (npix,)
        Wavelength, continuum-subtracted flux, inverse variance (0 = bad) and continuum.
    threshold : float
        Detection threshold in matched-filter S/N; fitted features below ``threshold - 1`` in
        fitted S/N are dropped.
    max_features : int
        Keep at most this many, strongest first.
    sky : bool array, optional
        Sky/telluric pixels; features centred there are marked ``on_sky``.
    """
    wave = np.asarray(wave, dtype=float)
    resid = np.where(ivar > 0, resid, 0.0)
    snr, amp = matched_filter_snr(resid, ivar, widths)
    k_best = np.argmax(np.abs(snr), axis=0)
    cols = np.arange(wave.size)
    best = snr[k_best, cols]
    best_amp = amp[k_best, cols]
    a = np.abs(best)
    # local extrema of |S/N| beyond threshold (vectorised), then non-maximum suppression by width
    is_peak = np.zeros(wave.size, dtype=bool)
    is_peak[1:-1] = (a[1:-1] >= a[:-2]) & (a[1:-1] > a[2:]) & (a[1:-1] > threshold)
    cand = np.flatnonzero(is_peak)
    if cand.size == 0:
        return []
    cand = cand[np.argsort(-a[cand])][: 4 * max_features]
    wpix = np.asarray(widths)[k_best[cand]]
    keep = []
    taken = np.zeros(wave.size, dtype=bool)
    for c, s in zip(cand, wpix):  # over candidate peaks (tens), strongest first
        if taken[c]:
            continue
        keep.append(c)
        r = int(math.ceil(1.5 * s)) + 1
        taken[max(0, c - r): c + r + 1] = True
        if len(keep) >= max_features:
            break
    keep = np.array(sorted(keep))
    dlam = np.gradient(wave)
    widths_A = np.asarray(widths)[k_best[keep]] * dlam[keep]
    amps = best_amp[keep]
    # blends: neighbours whose 3-sigma windows touch are fitted together
    gap = wave[keep[1:]] - wave[keep[:-1]]
    touch = gap < 3.0 * (widths_A[1:] + widths_A[:-1])
    gid = np.concatenate([[0], np.cumsum(~touch)])
    feats: list[Feature] = []
    counts = np.bincount(gid)
    single = np.flatnonzero(counts[gid] == 1)
    fitted_all: dict[int, dict] = {}
    for m, fd in zip(single, fit_isolated(wave, resid, ivar, cont, keep[single], widths_A[single], amps[single])):
        if fd is not None:
            fitted_all[int(m)] = fd
    blend_of = np.zeros(keep.size, dtype=int)
    for g in np.flatnonzero(counts > 1):  # blends (few): joint least-squares fit
        members = np.flatnonzero(gid == g)
        fitted = _fit_group(wave, resid, ivar, cont, keep[members], widths_A[members], amps[members], dlam)
        for m, fd in zip(members, fitted):
            fitted_all[int(m)] = fd
            blend_of[m] = int(g) + 1
    for m in sorted(fitted_all):
        fd = fitted_all[m]
        if not (fd["snr"] >= threshold - 1.0) or not np.isfinite(fd["centroid_err"]):
            continue
        if fd["centroid_err"] <= 0 or fd["centroid"] <= wave[0] or fd["centroid"] >= wave[-1]:
            continue
        pix = int(np.clip(np.searchsorted(wave, fd["centroid"]), 0, wave.size - 1))
        on_sky = bool(sky[pix]) if sky is not None else False
        near_edge = bool(fd["centroid"] - wave[0] < edge_A or wave[-1] - fd["centroid"] < edge_A)
        feats.append(Feature(detect_snr=float(best[keep[m]]), blend=int(blend_of[m]), on_sky=on_sky,
                             near_edge=near_edge, **fd))
    feats.sort(key=lambda f: -f.snr)
    log.debug("detected %d features", len(feats))
    return feats
