"""Bootstrap of the measurement: resampled flux, candidate probabilities and the z spread.

Resamples are ``f* = f + sigma * eps`` with ``eps`` standard normal (a parametric bootstrap
from the uncertainty array; Efron 1979), all drawn at once as one ``(N, npix)`` matrix. For
each resample the whole decision is repeated in batch:

1. the continuum is re-estimated with the data's clip mask (then a linear operator, so it is
   applied to the noise matrix in one pass);
2. every shortlisted candidate's line model is re-fitted by a linearised least-squares step in
   (amplitudes, z) that is the same matrix for all resamples (one matrix product for all N),
   giving each resample's chi-square improvement (the candidate's evidence) and z; it sees
   the pixels within ``WINDOW_SIGMA`` of the candidate's active lines at its fitted z and
   widths, and only those pixels are resampled;
3. for the candidate each resample adopts, one more vectorised Gauss-Newton step in z with the
   profiles re-evaluated at that resample's own z and amplitudes (non-linear correction);
4. each resample adopts the candidate with the best penalised evidence, or none when no
   candidate reaches ``score_min``.

The fraction of resamples adopting each candidate is its probability; the z values of the
resamples (for the adopted candidate) give the percentiles and a robust sigma.

Examples
--------
>>> import numpy as np
>>> rng = np.random.default_rng(0)
>>> robust_sigma(rng.normal(0.0, 2.0, 20000)) > 1.9
True
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .prepare import Prepared, continuum_batch, continuum_operator
from .refine import SQRT2PI, WINDOW_SIGMA, CandidateFit, covered_index
from .prepare import C_KMS

__all__ = ["BootstrapResult", "resample_noise", "bootstrap", "robust_sigma", "hopeless", "HOPELESS_SIGMA"]

log = logging.getLogger(__name__)

#: A candidate whose penalised evidence lies this many standard deviations (of the resampled
#: difference to the leader's) below the leader's is never adopted by a resample (a Gaussian
#: fluctuation of 10 sigma has probability ~1e-23), so its resamples are not computed.
HOPELESS_SIGMA = 10.0


def robust_sigma(x) -> float:
    """Half the 16-84 percentile range (equals sigma for a Gaussian)."""
    x = np.asarray(x, dtype=float)
    x = x[np.isfinite(x)]
    if x.size < 2:
        return math.nan
    p16, p84 = np.percentile(x, [15.865525, 84.134475])
    return float(0.5 * (p84 - p16))


def resample_noise(prep: Prepared, n: int, rng) -> np.ndarray:
    """``(n, npix)`` matrix of Gaussian noise with the per-pixel sigma (0 on masked pixels)."""
    s = np.where(prep.ivar > 0, prep.sigma, 0.0)
    return rng.standard_normal((n, s.size)) * s[None, :]


@dataclass
class BootstrapResult:
    n: int
    choice: np.ndarray  # (n,) index into fits, -1 = none
    probability: np.ndarray  # (n_fits,)
    p_none: float
    z: np.ndarray  # (n,) z of fits[0] in each resample
    z_by_fit: np.ndarray  # (n_fits, n) linearised z of each candidate
    score: np.ndarray  # (n_fits, n) penalised evidence
    resid: np.ndarray | None = None  # (n, npix) resampled residuals (for batched correlation)


def hopeless(fits: list[CandidateFit], penalty: float, n_sigma: float = HOPELESS_SIGMA) -> np.ndarray:
    """Candidates no resample can adopt: penalised evidence more than ``n_sigma`` below the
    leader's, in units of the spread of the difference.

    A linear model of ``p`` parameters fitted to data with chi-square improvement ``d`` gives,
    on resamples, a non-central chi-square of ``p`` degrees of freedom and non-centrality
    ``d``: variance ``4 d + 2 p`` (common practice). The difference of two candidates' values
    has at most the sum of their standard deviations.

    >>> from types import SimpleNamespace as F
    >>> import numpy as np
    >>> fits = [F(dchi2=4000.0, amps=np.ones(12)), F(dchi2=3900.0, amps=np.ones(10)),
    ...         F(dchi2=800.0, amps=np.ones(5))]
    >>> hopeless(fits, penalty=9.0).tolist()
    [False, False, True]
    """
    if not fits:
        return np.zeros(0, dtype=bool)
    act = np.array([np.count_nonzero(np.asarray(f.amps) > 0) for f in fits], dtype=float)
    d = np.array([f.dchi2 for f in fits], dtype=float)
    score = d - penalty * act
    sd = np.sqrt(4.0 * np.clip(d, 0.0, None) + 2.0 * (act + 1.0))
    lead = int(np.argmax(score))
    return score[lead] - score > n_sigma * (sd[lead] + sd)


def bootstrap(prep: Prepared, fits: list[CandidateFit], *, n: int, rng, penalty: float,
              score_min: float, keep_resid: bool = False, noise=None) -> BootstrapResult:
    """Repeat the decision on ``n`` resamples (see module docstring). Candidates that no
    resample can adopt (:func:`hopeless`) get probability 0 without being resampled."""
    nf = len(fits)
    skip = hopeless(fits, penalty)
    # each candidate's linearised fit sees only the pixels within WINDOW_SIGMA of its active
    # lines at its fitted z and widths (a third or less of its model's windows, which are
    # sized for the widest lines and the whole z range the fit could reach)
    win = [None if s or not np.any(f.amps > 0) or f.model.pix.size == 0 else _active_windows(f)
           for f, s in zip(fits, skip)]
    if noise is None and not keep_resid:
        # only the pixels the candidates' line models see are needed: draw those, and the rest
        # of each continuum block as one Gaussian sum (same distribution, far fewer draws)
        U, R = _resample_on(prep, [f.model.pix[w[1]] for f, w in zip(fits, win) if w is not None], n, rng)
    else:
        eps = resample_noise(prep, n, rng) if noise is None else noise
        c_eps = continuum_batch(eps, prep.ivar, prep.lnwave, scale_kms=prep.continuum_kms, use=prep.cont_use)
        R = prep.resid[None, :] + np.where(prep.ivar > 0, eps - c_eps, 0.0)
        U = None
    score = np.full((nf, n), -np.inf)
    zfit = np.full((nf, n), np.nan)
    amps0 = None
    for k, fit in enumerate(fits):  # over shortlisted candidates (a handful)
        m = fit.model
        act = np.flatnonzero(fit.amps > 0)
        if win[k] is None:
            continue
        keep = win[k][1]
        G = m.design(fit.z, fit.width_kms, fit.broad_scale)[keep]
        dz = m.model_derivs(fit.z, fit.width_kms, fit.broad_scale, fit.amps)[0][keep]  # = D @ amps
        J = np.hstack([G[:, act], dz[:, None]])
        WJ = J * m.w[keep][:, None]
        F = J.T @ WJ
        try:
            Finv = np.linalg.inv(F)
        except np.linalg.LinAlgError:
            Finv = np.linalg.pinv(F)
        Rm = _rows_at(R, U, m.pix[keep])
        # (n, A+1); single-precision resamples in a single-precision product (sums of a few
        # hundred terms: relative error ~1e-6, far below the resampling noise)
        b = (Rm @ WJ.astype(Rm.dtype)).astype(float)
        X = b @ Finv  # least-squares solutions
        dchi2 = np.einsum("ij,ij->i", X, b)
        zmax = 5.0 * max(fit.z_err if np.isfinite(fit.z_err) else 0.0, 30.0 / C_KMS * (1 + fit.z))
        zfit[k] = fit.z + np.clip(X[:, -1], -zmax, zmax)
        score[k] = dchi2 - penalty * act.size
        if k == 0:
            amps0 = (act, X[:, :-1])
            R0 = np.ascontiguousarray(Rm)
    best = np.argmax(score, axis=0)
    top = score[best, np.arange(n)]
    choice = np.where(top >= score_min, best, -1)
    if nf and amps0 is not None:
        zfit[0] = _newton_z(fits[0], R0, zfit[0], amps0, win[0])
    prob = np.array([np.mean(choice == k) for k in range(nf)])
    return BootstrapResult(n, choice, prob, float(np.mean(choice < 0)), zfit[0] if nf else np.zeros(0),
                           zfit, score, R if keep_resid else None)


def _rows_at(R, U, pix):
    """Columns ``pix`` (native pixel indices) of resamples stored on pixels ``U`` (None = all).

    ``R`` may be stored pixel-major (Fortran order, as :func:`_resample_on` returns it): then
    the gather copies whole contiguous rows of the transpose."""
    ix = pix if U is None else np.searchsorted(U, pix)
    if R.flags.f_contiguous and not R.flags.c_contiguous:
        return R.T[ix].T
    return R[:, ix]


def _resample_on(prep: Prepared, pixels, n: int, rng):
    """Resampled residuals ``(U, R)`` on the union ``U`` of the pixel sets ``pixels`` only.

    Each resample is ``f* = f + eps`` minus the change ``c(eps)`` of the (fixed-selection,
    linear) continuum. ``c(eps)`` needs only each block's weighted noise sum: the part from
    pixels in ``U`` is summed from their draws, the part from the other pixels of the block is
    one normal draw with the variance of that sum (sum of w^2 sigma^2 = sum of w, since
    w = 1/sigma^2), so the joint distribution on ``U`` is exactly that of
    :func:`resample_noise` + :func:`~zsieve.engine.prepare.continuum_batch`.

    The draws are made pixel-major (``(U, n)``, returned transposed as an ``(n, U)`` view), so
    each candidate's window pixels are contiguous rows (see :func:`_rows_at`); the block sums
    and the continuum's interpolation between block centres are sparse products (a pixel
    belongs to one block and is interpolated from two).
    """
    pix = [p for p in pixels if p.size]
    U = np.unique(np.concatenate(pix)) if pix else np.zeros(0, dtype=int)
    block, w, sw, MU = continuum_operator(prep.ivar, prep.lnwave, scale_kms=prep.continuum_kms, use=prep.cont_use,
                                          at=U)
    nblk = sw.size
    # single precision throughout (7 significant digits are plenty for noise, and residuals of
    # a few hundred sigma keep 1e-5 sigma): half the memory traffic of the (U, n) matrix
    f4 = np.float32
    sig = np.where(prep.ivar > 0, prep.sigma, 0.0)[U].astype(f4)
    eps = rng.standard_normal((U.size, n), dtype=f4)
    eps *= sig[:, None]
    blk = U // block
    wU = w[U]
    rest = np.sqrt(np.clip(sw - np.bincount(blk, wU, minlength=nblk), 0.0, None))
    sums = rng.standard_normal((nblk, n)) * rest[:, None]
    sums += sparse.csr_matrix((wU.astype(f4), (blk, np.arange(U.size))), shape=(nblk, U.size)) @ eps
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(sw[:, None] > 0, sums / np.where(sw > 0, sw, 1.0)[:, None], 0.0)
    # R = resid + where(ivar > 0, eps - c_eps, 0), in place
    eps -= sparse.csr_matrix(MU.T.astype(f4)) @ mean.astype(f4)
    eps[~(prep.ivar[U] > 0)] = 0.0
    eps += prep.resid[U].astype(f4)[:, None]
    return U, eps.T


def _active_windows(fit: CandidateFit):
    """``(use, keep, lo, hi)``: the lines of the fit's active columns, the pixels within
    WINDOW_SIGMA of any of them at the fitted z and widths (indices into ``fit.model.pix``),
    and each line's slice ``lo:hi`` of those pixels."""
    m = fit.model
    act = np.flatnonzero(fit.amps > 0)
    use = np.flatnonzero(m.col_of_line >= 0)
    use = use[np.isin(m.col_of_line[use], act)]
    sv = m._sigma_v(fit.width_kms, fit.broad_scale)[use] / C_KMS
    mu0 = m.centres(fit.z)[use]
    lo = np.searchsorted(m.x, mu0 - WINDOW_SIGMA * mu0 * sv)
    hi = np.searchsorted(m.x, mu0 + WINDOW_SIGMA * mu0 * sv)
    keep = covered_index(lo, hi)
    return use, keep, np.searchsorted(keep, lo), np.searchsorted(keep, hi)


def _newton_z(fit: CandidateFit, R, z_n, amps, windows):
    """One Gauss-Newton step in z per resample, profiles at each resample's own z (vectorised).

    ``R`` holds the resampled residuals on the pixels of ``windows`` (:func:`_active_windows`
    of the fit): the active lines' own windows, outside which the derivative is 0."""
    m = fit.model
    act, a_n = amps
    a_full = np.zeros((R.shape[0], fit.amps.size))
    a_full[:, act] = np.clip(a_n, 0.0, None)
    ls = m.ls
    use, keep, lo, hi = windows
    if use.size == 0:
        return z_n
    sv = m._sigma_v(fit.width_kms, fit.broad_scale)[use] / C_KMS
    base = m.centres(0.0)[use]  # the line centres at z = 0
    # single precision, as the resamples themselves: offsets from each line's centre at the
    # fitted z (a few Angstrom, so 7 digits keep 1e-6 of a line sigma); the step in z comes
    # from sums of a few hundred terms
    f4 = np.float32
    x, w = m.x[keep], m.w[keep]
    mu = (1 + z_n)[:, None] * base[None, :]  # (n, L)
    c0 = (1 + fit.z) * base  # the centres at the fitted z
    s = (mu * sv[None, :]).astype(f4)
    coef = (a_full[:, m.col_of_line[use]] * (ls.sign[use] * ls.ratio[use])[None, :] / (SQRT2PI * s)).astype(f4)
    dmu = ((z_n - fit.z)[:, None] * base[None, :]).astype(f4)  # = mu - c0
    inv1z = (1.0 / (1 + z_n)).astype(f4)[:, None]
    model = np.zeros((R.shape[0], x.size), dtype=f4)
    dmod = np.zeros_like(model)
    for j in range(use.size):  # over lines (tens); each a vectorised (n, window) block
        sl = slice(lo[j], hi[j])
        sj = s[:, j:j + 1]
        u = (x[sl] - c0[j]).astype(f4)[None, :] - dmu[:, j:j + 1]
        u /= sj
        p = u * u
        p *= -0.5
        np.exp(p, out=p)
        p *= coef[:, j:j + 1]
        model[:, sl] += p
        d = u / sj
        d *= f4(base[j])
        u *= u
        u -= 1.0
        u *= inv1z
        d += u
        d *= p
        dmod[:, sl] += d
    r = R - model
    r *= dmod
    w4 = w.astype(f4)
    num = (r @ w4).astype(float)
    dmod *= dmod
    den = (dmod @ w4).astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(den > 0, num / den, 0.0)
    zmax = 5.0 * max(fit.z_err if np.isfinite(fit.z_err) else 0.0, 30.0 / C_KMS * (1 + fit.z))
    return np.clip(z_n + step, fit.z - 2 * zmax, fit.z + 2 * zmax)
