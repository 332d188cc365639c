"""The line model of one candidate, its linear and joint non-linear fits, and per-line measures.

A candidate (class + z) predicts every line of its class at lambda_rest (1+z)(1+v_off/c),
with a Gaussian profile whose velocity sigma is the instrumental one combined with a fitted
intrinsic width (narrow lines share one width; broad lines share one scale factor on their
typical width from the line list). Lines of a fixed-ratio group share one amplitude; every
amplitude is constrained to the sign of its kind (emission up, absorption down), so the fit
at fixed z and widths is a non-negative least-squares problem (``scipy.optimize.nnls``).

* :meth:`LineModel.fit_linear` — amplitudes at fixed z; its chi-square improvement over the
  continuum alone is the candidate's evidence.
* :func:`refine` — the joint fit of all lines with one z (bounded Levenberg-Marquardt on
  z and the widths, amplitudes solved exactly inside, weights from the uncertainties); the
  formal error of z comes from the full Jacobian (z, widths and amplitudes together).
* :func:`line_table` — each active line fitted on its own (centroid, sigma, flux, EW, S/N).

Examples
--------
>>> import numpy as np
>>> from zsieve.engine.identify import LineSet
>>> ls = LineSet("emission-galaxy", ["H-alpha"], np.array([6564.61]), np.array([1]),
...              np.array([0]), np.array([1.0]), np.array([1.0]), np.array([0.0]), np.array([0.0]))
>>> wave = np.linspace(6500.0, 6700.0, 401)
>>> s = 6564.61 * 1.01 * 100.0 / 299792.458
>>> r = 50.0 * np.exp(-0.5 * ((wave - 6564.61 * 1.01) / s) ** 2)
>>> fit = refine(ls, 0.0101, wave, r, np.ones(wave.size), sigma_inst_kms=60.0)  # 100 km/s in all
>>> round(fit.z, 5), round(fit.width_kms, 1)
(0.01, 80.0)
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular
from scipy.linalg.lapack import dposv as _posv
from scipy.optimize import nnls

from .detect import lm_bounded, pushed_past_bounds
from .prepare import C_KMS, good_cumsum
from .identify import LineSet

__all__ = ["LineModel", "CandidateFit", "covered_index", "refine", "with_formal_error", "line_table", "WIDTH_LIMITS_KMS"]

log = logging.getLogger(__name__)

SQRT2PI = math.sqrt(2.0 * math.pi)

#: Allowed intrinsic velocity sigma of the narrow lines per class (km/s): nebular lines of
#: galaxies, stellar velocity dispersions, stellar rotation (common practice, from memory).
WIDTH_LIMITS_KMS = {
    "emission-galaxy": (0.0, 400.0),
    "absorption-galaxy": (0.0, 450.0),
    "quasar": (0.0, 600.0),
    "star": (0.0, 150.0),
}
#: Allowed scale of the broad lines relative to their typical width in the line list.
BROAD_SCALE = (0.3, 2.5)
#: The Gauss-Newton steps of :func:`refine` stop once a step gains less chi-square than this:
#: far below anything a decision turns on (the penalty per line group is 4); a third of the steps
#: gained less than 0.1 when they ran to their cap.
GN_TOL_CHI2 = 0.05
#: Half-width of a line's fitting window, in line sigmas.
WINDOW_SIGMA = 5.0


def covered_index(lo, hi) -> np.ndarray:
    """Sorted distinct indices inside any of the ranges ``lo[i]:hi[i]`` (``lo <= hi``), built
    from the merged ranges, so the work goes with the pixels covered rather than with the whole
    spectrum (the union of line windows: :class:`LineModel`, the bootstrap's active windows).

    >>> covered_index(np.array([3, 1, 4]), np.array([6, 2, 5])).tolist()
    [1, 3, 4, 5]
    """
    lo = np.asarray(lo)
    if lo.size == 0:
        return np.zeros(0, dtype=np.intp)
    o = np.argsort(lo, kind="stable")
    lo = lo[o]
    hi = np.maximum.accumulate(np.asarray(hi)[o])
    first = np.flatnonzero(np.concatenate(([True], lo[1:] > hi[:-1])))  # a range that starts a run
    L = lo[first]
    n = np.maximum(hi[np.append(first[1:], lo.size) - 1] - L, 0)  # each run ends at its last range's cummax
    return np.repeat(L - (np.cumsum(n) - n), n) + np.arange(int(n.sum()))


def _line_constants(ls: LineSet):
    """``(centre at z = 0, broad mask, broad lines' typical sigma)`` of a LineSet, computed once
    and kept on it (read-only arrays)."""
    got = getattr(ls, "_zs_line_constants", None)
    if got is None:
        got = (ls.wave * (1 + ls.offset_kms / C_KMS), ls.broad, ls.width_kms / 2.3548)
        for arr in got:
            arr.flags.writeable = False
        ls._zs_line_constants = got
    return got


class LineModel:
    """Gaussian lines of one class at (z, widths) on the pixels near the lines.

    Parameters
    ----------
    ls : LineSet
    wave, ivar : arrays (npix,)
        Native wavelengths and inverse variance (0 = bad).
    sigma_inst_kms : float
        Instrumental Gaussian sigma.
    z_slack : float
        Extra window margin in z, so the same pixels serve small changes of z.
    good_cs : array (npix + 1,), optional
        Cumulative count of good pixels (``ivar > 0``) with a leading 0, when the caller
        builds many models on one spectrum (:func:`~zsieve.engine.prepare.good_cumsum`).
    """

    def __init__(self, ls: LineSet, wave, ivar, sigma_inst_kms: float, z: float, width_kms: float,
                 broad_scale: float = 1.0, z_slack: float = 0.0, good_cs=None):
        self.ls = ls
        self.sigma_inst = float(sigma_inst_kms)
        # per-line constants reused by every evaluation (kept on the LineSet: one per class)
        self._base, self._broad, self._bw = _line_constants(ls)
        self._any_broad = bool(self._broad.any())
        self._sv_key = None
        obs = self._base * (1 + z)
        sv = self._sigma_v(width_kms, broad_scale)
        half = obs * (WINDOW_SIGMA * sv / C_KMS + z_slack / (1 + z))
        core = 1.5 * obs * sv / C_KMS
        nl = obs.size
        # window edges and core edges of every line in one search
        edges = np.concatenate([obs - half, obs + half, obs - core, obs + core])
        lo, hi, core_lo, core_hi = np.searchsorted(wave, edges).reshape(4, nl)
        if good_cs is None:
            good_cs = good_cumsum(ivar)
        gc = good_cs[np.concatenate([lo, hi, core_lo, core_hi])].reshape(4, nl)
        # a line is usable when most of its core is on good pixels
        core_good = gc[3] - gc[2]
        self.present = (gc[1] - gc[0] >= 3) & (core_good >= np.maximum(2, 0.5 * (core_hi - core_lo)))
        use = np.flatnonzero(self.present)
        if use.size:
            pix = covered_index(lo[use], hi[use])
            pix = pix[ivar[pix] > 0]
        else:
            pix = np.zeros(0, dtype=int)
        self.pix = pix
        self.x = wave[pix]
        self.w = ivar[pix]
        gl = ls.group[use]  # the groups present (sorted) and each used line's column
        mark = np.zeros(int(gl.max()) + 1 if gl.size else 0, dtype=bool)
        mark[gl] = True
        groups = np.flatnonzero(mark)
        inv = (np.cumsum(mark) - 1)[gl]
        self.groups = groups  # model columns = these groups
        self.col_of_line = np.full(nl, -1)
        self.col_of_line[use] = inv
        self._use = use
        self._inv = inv
        self._coef = ls.sign[use] * ls.ratio[use]
        self._onehot_ = None
        # each line's own slice of the window pixels (profiles are negligible outside it)
        self._lo, self._hi = np.searchsorted(self.x, edges.reshape(4, nl)[:2, use]).reshape(2, use.size)
        # the (line, pixel) pairs of those slices, flattened (ragged: no padding), for one
        # vectorised evaluation of all profiles; ordered by model column, so that per-column
        # sums are contiguous (np.add.reduceat)
        ordl = np.argsort(inv, kind="stable")
        nw = np.maximum(self._hi - self._lo, 0)[ordl]
        st = np.cumsum(nw) - nw  # each line's first entry
        self._eline = np.repeat(ordl, nw)
        self._epix = np.arange(self._eline.size) + np.repeat(self._lo[ordl] - st, nw)
        self._ex = self.x[self._epix]
        self._ecol = inv[self._eline]
        self._eflat = self._epix * max(groups.size, 1) + self._ecol
        self._ew = self.w[self._epix]
        self._pairs = None
        self._prof = None
        self._F = None
        self._re = None
        # first entry of each column (every column has entries: its lines cover >= 3 pixels):
        # the first entry of the first line of each column in entry order
        io = inv[ordl]
        self._cstart = st[np.flatnonzero(np.concatenate(([True], io[1:] != io[:-1])))] \
            if self._ecol.size else np.zeros(0, dtype=int)

    @property
    def _onehot(self):
        """``(n_used_lines, n_cols)``: each used line's coefficient in its column (dense path)."""
        if self._onehot_ is None:
            oh = np.zeros((self._use.size, self.groups.size))
            oh[np.arange(self._use.size), self._inv] = self._coef
            self._onehot_ = oh
        return self._onehot_

    @property
    def n_cols(self) -> int:
        return int(self.groups.size)

    def _sigma_v(self, width_kms, broad_scale):
        """Velocity sigma of every line (km/s) at these widths (read-only; the last one is kept)."""
        key = (float(width_kms), float(broad_scale))
        if key == self._sv_key:
            return self._sv
        narrow = math.hypot(self.sigma_inst, width_kms)
        if self._any_broad:
            sv = np.where(self._broad, np.hypot(self.sigma_inst, broad_scale * self._bw), narrow)
        else:
            sv = np.full(self._base.size, narrow)
        sv.flags.writeable = False
        self._sv_key, self._sv = key, sv
        return sv

    def centres(self, z):
        return self._base * (1 + z)

    def design(self, z, width_kms, broad_scale=1.0, x=None, deriv=False):
        """Columns (npix_window, n_cols) of unit-flux profiles (sign applied); optionally d/dz."""
        use = self._use
        mu = self.centres(z)[use]
        s = (mu * self._sigma_v(width_kms, broad_scale)[use] / C_KMS)
        if x is not None:  # arbitrary pixels: dense evaluation
            u = (x[:, None] - mu[None, :]) / s[None, :]
            prof = np.exp(-0.5 * u * u) / (SQRT2PI * s[None, :])
            G = prof @ self._onehot
            if not deriv:
                return G
            dprof = prof * (u / s * (mu / (1 + z))[None, :] + (u * u - 1.0) / (1 + z))
            return G, dprof @ self._onehot
        x = self.x
        size = x.size * self.n_cols
        if self._eline.size == 0:
            G = np.zeros((x.size, self.n_cols))
            return (G, G.copy()) if deriv else G
        e = self._eline
        u = (self._ex - mu[e]) / s[e]
        p = np.exp(-0.5 * u * u) * (self._coef / (SQRT2PI * s))[e]
        G = np.bincount(self._eflat, p, minlength=size).reshape(x.size, self.n_cols)
        if not deriv:
            return G
        # d/dz: centre and sigma both scale with (1+z)
        dp = p * (u / s[e] * (mu / (1 + z))[e] + (u * u - 1.0) / (1 + z))
        D = np.bincount(self._eflat, dp, minlength=size).reshape(x.size, self.n_cols)
        return G, D

    def model_derivs(self, z, width_kms, broad_scale, amps):
        """Derivatives of the model ``design(z, ...) @ amps`` by z, narrow width and broad scale.

        The same sums as ``design(deriv=True)[1] @ amps`` and the width derivatives of the columns,
        accumulated straight onto the pixels (one profile evaluation, no matrices).
        """
        n = self.x.size
        if self._eline.size == 0:
            return np.zeros(n), np.zeros(n), np.zeros(n)
        use, e, ls = self._use, self._eline, self.ls
        mu = self.centres(z)[use]
        ae = np.asarray(amps, dtype=float)[self.col_of_line[use]]
        sv = self._sigma_v(width_kms, broad_scale)[use]
        s = mu * sv / C_KMS
        hit = self._prof
        if hit is not None and hit[0] == (float(z), float(width_kms), float(broad_scale)):
            _, p, u = hit  # the profiles of the last solve at this point
            p = p * ae[e]
        else:
            u = (self._ex - mu[e]) / s[e]
            p = np.exp(-0.5 * u * u) * (ae * self._coef / (SQRT2PI * s))[e]
        dz = p * (u / s[e] * (mu / (1 + z))[e] + (u * u - 1.0) / (1 + z))
        dlns = (u * u - 1.0) * p
        broad = self._broad[use]
        dn = np.where(broad, 0.0, width_kms / np.maximum(sv * sv, 1e-12))
        bw = ls.width_kms[use] / 2.3548
        db = np.where(broad, broad_scale * bw * bw / np.maximum(sv * sv, 1e-12), 0.0)
        pix = self._epix
        return (np.bincount(pix, dz, minlength=n), np.bincount(pix, dlns * dn[e], minlength=n),
                np.bincount(pix, dlns * db[e], minlength=n))

    # ---- the normal equations straight from the (line, pixel) entries
    # The columns are sparse (each line covers only its own window), so G^T W G and G^T W r
    # are sums over the pairs of entries that share a pixel instead of dense products.
    def _entry_profiles(self, zs, width_kms, broad_scale):
        """Unit-flux profile values (sign and ratio applied) of the entries: ``(len(zs), E)``
        (1-D for a scalar z); the same numbers :meth:`design` scatters into its columns."""
        use, e = self._use, self._eline
        sv = self._sigma_v(width_kms, broad_scale)[use] / C_KMS
        base = self._base[use]
        scalar = np.ndim(zs) == 0
        zs = np.asarray(zs, dtype=float)
        mu = (1 + zs)[..., None] * base
        s = mu * sv
        u = mu[..., e]  # in place from here: (x - mu) / s, then the profile
        np.subtract(self._ex, u, out=u)
        u /= s[..., e]
        p = u * u
        p *= -0.5
        np.exp(p, out=p)
        p *= (self._coef / (SQRT2PI * s))[..., e]
        if scalar:  # kept for model_derivs at the same point (the Jacobian follows a solve)
            self._prof = ((float(zs), float(width_kms), float(broad_scale)), p, u)
        return p

    def _pair_index(self):
        """Distinct entries on a common pixel (overlapping line windows), ``e1 < e2``, grouped by
        their (column, column) cell: ``(e1, e2, weight, group starts, cells)``."""
        if self._pairs is None:
            k = max(self.n_cols, 1)
            order = np.argsort(self._epix, kind="stable")
            pe = self._epix[order]
            start = np.flatnonzero(np.concatenate(([True], pe[1:] != pe[:-1])))
            cnt = np.diff(np.concatenate((start, [pe.size])))
            # every ordered pair of entries of one pixel, then those with e1 < e2
            gcnt = np.repeat(cnt, cnt)
            i1 = np.repeat(order, gcnt)
            off = np.arange(i1.size) - np.repeat(np.cumsum(gcnt) - gcnt, gcnt)
            i2 = order[np.repeat(np.repeat(start, cnt), gcnt) + off]
            keep = i1 < i2
            i1, i2 = i1[keep], i2[keep]
            cell = self._ecol[i1] * k + self._ecol[i2]
            srt = np.argsort(cell, kind="stable")
            i1, i2, cell = i1[srt], i2[srt], cell[srt]
            cstart = np.flatnonzero(np.concatenate(([True], cell[1:] != cell[:-1]))) if cell.size else np.zeros(0, int)
            self._pairs = (i1, i2, self._ew[i1], cstart, cell[cstart])
        return self._pairs

    def normal_equations(self, p, rr):
        """``(G^T W G, G^T W r)`` from entry profiles ``p`` (``(E,)`` or ``(nz, E)``) and the
        residual ``rr`` on the window pixels; stacked ``(nz, k, k), (nz, k)`` for 2-D ``p``.

        Each entry's own square and its residual product are summed per column (entries are
        stored column by column); the few pairs of overlapping windows are summed per cell and
        added symmetrically.
        """
        k = self.n_cols
        i1, i2, wp, cstart, cells = self._pair_index()
        if self._re is not None and self._re[0] is rr:  # the same residual as the last call
            re = self._re[1]
        else:
            re = self._ew * rr[self._epix]
            self._re = (rr, re)
        two = p.ndim == 2
        if not two:  # one point (the iterations of a fit): 1-D sums
            T = np.zeros(k * k)
            if cells.size:
                T[cells] = np.add.reduceat(p[i1] * p[i2] * wp, cstart)
            T = T.reshape(k, k)
            F = T + T.T
            F.ravel()[::k + 1] += np.add.reduceat(p * p * self._ew, self._cstart)
            return F, np.add.reduceat(p * re, self._cstart)
        P = p if two else p[None, :]
        nz = P.shape[0]
        diag = np.add.reduceat(P * P * self._ew, self._cstart, axis=1)
        b = np.add.reduceat(P * re, self._cstart, axis=1)
        T = np.zeros((nz, k * k))
        if cells.size:
            T[:, cells] = np.add.reduceat(P[:, i1] * P[:, i2] * wp, cstart, axis=1)
        T = T.reshape(nz, k, k)
        F = T + T.transpose(0, 2, 1)
        ii = np.arange(k)
        F[:, ii, ii] += diag
        return (F, b) if two else (F[0], b[0])

    def model_vector(self, p, amps):
        """``design(...) @ amps`` on the window pixels from entry profiles ``p``."""
        return np.bincount(self._epix, p * np.asarray(amps, dtype=float)[self._ecol], minlength=self.x.size)

    def fit_at(self, rr, z, width_kms, broad_scale=1.0, start=None):
        """Amplitudes at fixed (z, widths) for the window residual ``rr``: ``(amps, delta_chi2,
        model)`` with the model on the window pixels; ``start`` = a guess of the active columns."""
        p = self._entry_profiles(z, width_kms, broad_scale)
        F, b = self.normal_equations(p, rr)
        self._F = F  # kept with the profiles for amp_coupling at this point
        a, gain = nnls_normal(F, b, start=start)
        return a, gain, self.model_vector(p, a)

    def amp_coupling(self, cols, active, point):
        """``(A, C, X)`` for the columns ``cols`` (1-D arrays on the window pixels) at ``point``
        ``(z, width, broad_scale)``, which must be that of the last :meth:`fit_at`: the active
        model columns ``A``, ``C = G_A^T W J`` and ``X = (G_A^T W G_A)^-1 C``, or None (nothing
        active, another point, or a singular system). ``G_A X`` is
        the part of a change ``J`` that the re-solved amplitudes absorb, so ``J^T W J - C^T X``
        are the Gauss-Newton normal equations of the non-linear parameters with the amplitudes
        solved (the Schur complement of the joint system; Kaufman 1975, BIT 15, 49, from memory:
        the variable-projection Jacobian with its second-order term dropped)."""
        A = np.flatnonzero(active)
        if A.size == 0 or self._eline.size == 0 or self._F is None or self._prof is None \
                or self._prof[0] != tuple(float(v) for v in point):
            return None
        pw = self._prof[1] * self._ew
        C = np.stack([np.add.reduceat(pw * c[self._epix], self._cstart)[A] for c in cols], axis=1)
        X = _spd_solve(_ridged(self._F[A[:, None], A]), C)
        return None if X is None else (A, C, X)

    def project_out(self, cols, active, point):
        """The columns ``cols`` less the part the re-solved amplitudes absorb (see
        :meth:`amp_coupling`), as an ``(npix, len(cols))`` matrix: the Jacobian of the
        variable-projection problem."""
        J = np.column_stack(cols)
        got = self.amp_coupling(cols, active, point)
        if got is None:
            return J
        A, _, X = got
        p = self._prof[1]
        Xf = np.zeros((self.n_cols, len(cols)))
        Xf[A] = X
        n = self.x.size
        for j in range(len(cols)):  # two or three parameters
            J[:, j] -= np.bincount(self._epix, p * Xf[self._ecol, j], minlength=n)
        return J

    def scan_best(self, rr, zs, width_kms, broad_scale=1.0):
        """``(index, delta_chi2)`` of the z in ``zs`` with the largest amplitude-fit gain (the
        first of equals), found without solving every constrained fit: the unconstrained gain
        bounds the non-negative one from above, so a z whose bound is below the best exact
        gain cannot win and is skipped."""
        zs = np.asarray(zs, dtype=float)
        if self.n_cols == 0 or self._eline.size == 0:
            return 0, 0.0
        per = max(1, int(400_000 // max(1, self._pair_index()[0].size)))
        Fs, bs = [], []
        for i in range(0, zs.size, per):  # chunks that keep the pair stack small
            F, b = self.normal_equations(self._entry_profiles(zs[i:i + per], width_kms, broad_scale), rr)
            Fs.append(F)
            bs.append(b)
        F, b = np.concatenate(Fs), np.concatenate(bs)
        try:
            a = np.linalg.solve(_ridged(F), b[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            g = nnls_gain_normal(F, b)
            i = int(np.argmax(g))
            return i, float(g[i])
        upper = np.einsum("ij,ij->i", a, b)
        exact = np.all(a >= 0, axis=1) & np.isfinite(upper)
        gain = np.where(exact, upper, -np.inf)
        for i in np.argsort(-np.where(exact, -np.inf, upper), kind="stable"):  # constrained, best bound first
            if exact[i] or not upper[i] >= gain.max():
                break
            gain[i] = nnls_normal(F[i], b[i], start=a[i] > 0)[1]
        i = int(np.argmax(gain))
        return i, float(gain[i])

    def fit_linear(self, r, z, width_kms, broad_scale=1.0):
        """Non-negative amplitudes at fixed z and widths; returns (amps, delta_chi2)."""
        if self.n_cols == 0 or self.pix.size == 0:
            return np.zeros(0), 0.0
        # a one-off fit: the dense product is cheaper than building the pair index
        G = self.design(z, width_kms, broad_scale)
        Gw = G * self.w[:, None]
        return nnls_normal(G.T @ Gw, Gw.T @ r[self.pix])


def nnls_weighted(G, w, r):
    """Non-negative weighted least squares ``min sum w (G a - r)^2``, ``a >= 0``, solved on the
    normal equations: returns ``(a, delta_chi2)`` with ``delta_chi2 = sum w r^2 - chi2(a)``.

    With the Cholesky factor ``L`` of ``G^T W G`` the problem equals ``min |L^T a - c|^2`` with
    ``L c = G^T W r`` (an ``n_cols``-square NNLS instead of an ``npix``-row one); the design
    matrix is reduced once, which is what makes the many fits of a z scan cheap.

    >>> G = np.array([[1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    >>> a, d = nnls_weighted(G, np.ones(3), np.array([1.0, 0.0, -1.0]))
    >>> [round(float(v), 6) for v in a], round(d, 6)
    ([0.5, 0.0], 0.5)
    """
    Gw = G * w[:, None]
    F = G.T @ Gw
    b = Gw.T @ r
    n = F.shape[0]
    if n == 0:
        return np.zeros(0), 0.0
    ridge = 1e-12 * max(float(np.trace(F)) / n, 1e-300)
    try:
        L = np.linalg.cholesky(F + ridge * np.eye(n))
    except np.linalg.LinAlgError:
        L = None
    if L is not None and np.all(np.isfinite(L)):
        c = solve_triangular(L, b, lower=True, check_finite=False)
        try:
            a, rn = nnls(L.T, c, maxiter=20 * max(1, n))
            return a, float(c @ c - rn * rn)
        except RuntimeError:
            pass
    sw = np.sqrt(w)
    A, y = G * sw[:, None], r * sw
    try:
        a, rn = nnls(A, y, maxiter=20 * max(1, n))
    except RuntimeError:
        a = np.clip(np.linalg.lstsq(A, y, rcond=None)[0], 0, None)
        rn = float(np.linalg.norm(A @ a - y))
    return a, float(y @ y - rn * rn)



def _ridged(F):
    """``F`` plus a ridge of 1e-12 of its mean diagonal (a copy; stacks of matrices too)."""
    n = F.shape[-1]
    if F.ndim == 2:
        Fr = np.array(F, dtype=float)
        Fr.ravel()[::n + 1] += 1e-12 * max(float(np.trace(F)) / max(n, 1), 1e-300)
        return Fr
    ridge = 1e-12 * np.maximum(np.trace(F, axis1=-2, axis2=-1) / max(n, 1), 1e-300)
    return F + ridge[..., None, None] * np.eye(n)


def _spd_solve(A, y):
    """Solve ``A x = y`` for symmetric positive-definite ``A`` (LAPACK posv); None if not SPD."""
    _, x, info = _posv(A, y, lower=1)
    return x if info == 0 else None


def nnls_normal(F, b, start=None, maxiter=None):
    """Non-negative least squares on its normal equations: ``a >= 0`` minimising
    ``a^T F a - 2 b^T a`` (``F = G^T W G``, ``b = G^T W r``); returns ``(a, delta_chi2)`` with
    ``delta_chi2 = 2 b^T a - a^T F a``, the chi-square improvement of :func:`nnls_weighted`.

    The active-set method of Lawson & Hanson (1974, *Solving Least Squares Problems*, ch. 23)
    run on the ``k x k`` system. ``start`` (bool mask) is a guess of the active columns: when
    it is right (the KKT conditions hold) one small solve finishes, which is the common case
    inside an iterative fit. A guess that fails (some of its columns come out negative) is
    cut to its positive part and solved again, a few times, before the column-by-column
    passes begin from the last feasible point (one line leaving the fit as z moves no longer
    restarts them from nothing). The method stops only at a point satisfying the KKT conditions,
    and the solution is unique for positive-definite ``F``, so the start changes only the
    work. A ridge of 1e-12 of the mean diagonal is added, as in :func:`nnls_weighted`.

    >>> from scipy.optimize import nnls
    >>> G = np.array([[1.0, 0.0, 2.0], [1.0, 1.0, 0.0], [0.0, 1.0, 1.0], [2.0, 0.5, 0.0]])
    >>> r = np.array([1.0, 0.0, -1.0, 2.0])
    >>> a, d = nnls_normal(G.T @ G, G.T @ r)
    >>> bool(np.allclose(a, nnls(G, r)[0]))
    True
    """
    F = np.asarray(F, dtype=float)
    b = np.asarray(b, dtype=float)
    n = b.size
    if n == 0:
        return np.zeros(0), 0.0
    Fr = _ridged(F)
    if start is None or start.all():  # the unconstrained solution first
        s = _spd_solve(Fr, b)
        if s is None:
            if start is None:
                return _nnls_normal_fallback(F, b)
            P = np.zeros(n, dtype=bool)
        else:
            P = s > 0
            if P.all():
                return s, float(2.0 * (b @ s) - s @ (Fr @ s))
    else:
        P = np.array(start, dtype=bool)
    a = np.zeros(n)
    for _ in range(4):  # the guess's positive part, refined a few times, as the feasible start
        if not P.any():
            break
        idx = np.flatnonzero(P)
        s = _spd_solve(Fr[idx[:, None], idx], b[idx])
        if s is None:
            P[:] = False
            break
        pos = s > 0
        if pos.all():
            a[idx] = s
            break
        P[idx[~pos]] = False
    else:
        P[:] = False
    tol = 1e-13 * max(float(np.abs(b).max()), 1e-300) * n
    maxiter = 3 * n + 10 if maxiter is None else maxiter
    it = 0
    while it < maxiter:  # outer loop of Lawson-Hanson
        g = b - Fr @ a  # minus half the gradient
        g[P] = -np.inf
        j = int(g.argmax())
        if g[j] <= tol:  # KKT holds
            break
        P[j] = True
        while it < maxiter:  # inner loop: drop columns that would turn negative
            it += 1
            idx = np.flatnonzero(P)
            sP = _spd_solve(Fr[idx[:, None], idx], b[idx])
            if sP is None:
                return _nnls_normal_fallback(F, b)
            neg = sP <= 0
            if not neg.any():
                a[:] = 0.0
                a[idx] = sP
                break
            aP = a[idx]
            ratio = np.full(idx.size, np.inf)
            ratio[neg] = aP[neg] / (aP[neg] - sP[neg])
            alpha = float(ratio.min())
            newP = aP + alpha * (sP - aP)
            a[:] = 0.0
            a[idx] = newP
            P[idx[(newP <= 0) | (ratio <= alpha * (1 + 1e-12))]] = False
            a[~P] = 0.0
            if not P.any():
                break
    else:
        return _nnls_normal_fallback(F, b)
    return a, float(2.0 * (b @ a) - a @ (Fr @ a))


def _nnls_normal_fallback(F, b):
    """The reduced NNLS of :func:`nnls_weighted` via scipy (Cholesky factor of ``F``)."""
    n = b.size
    try:
        L = np.linalg.cholesky(_ridged(F))
        c = solve_triangular(L, b, lower=True, check_finite=False)
        a, rn = nnls(L.T, c, maxiter=20 * max(1, n))
        return a, float(c @ c - rn * rn)
    except (np.linalg.LinAlgError, RuntimeError, ValueError):
        a = np.clip(np.linalg.lstsq(F, b, rcond=None)[0], 0, None)
        return a, float(2.0 * (b @ a) - a @ (F @ a))


def nnls_gain_normal(F, b) -> np.ndarray:
    """``delta_chi2`` of :func:`nnls_normal` for stacks ``F (nz, k, k)``, ``b (nz, k)``: the
    unconstrained solutions of all at once, the active-set method only where one is negative.

    >>> F = np.array([[[2.0, 1.0], [1.0, 2.0]], [[1.0, 0.0], [0.0, 1.0]]])
    >>> b = np.array([[1.0, 1.0], [1.0, -1.0]])
    >>> [round(float(v), 6) for v in nnls_gain_normal(F, b)]
    [0.666667, 1.0]
    """
    nz, k = b.shape
    if k == 0 or nz == 0:
        return np.zeros(nz)
    Fr = _ridged(F)
    try:
        a = np.linalg.solve(Fr, b[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        return np.array([nnls_normal(F[i], b[i])[1] for i in range(nz)])
    gain = np.einsum("ij,ij->i", a, b)
    for i in np.flatnonzero((a < 0).any(axis=1) | ~np.isfinite(gain)):  # constrained ones
        gain[i] = nnls_normal(F[i], b[i], start=a[i] > 0)[1]
    return gain


@dataclass
class CandidateFit:
    """The joint fit of one candidate."""

    cls: str
    z: float
    z_err: float
    width_kms: float
    broad_scale: float
    amps: np.ndarray
    dchi2: float
    n_active: int
    model: LineModel
    active_lines: list[int] = field(default_factory=list)  # line indices with amplitude > 0
    chi2: float = math.nan
    ok: bool = True

    def model_flux(self, wave, z=None):
        """The line model on arbitrary pixels (the Cramer-Rao bound evaluates it at shifted z)."""
        G = self.model.design(self.z if z is None else z, self.width_kms, self.broad_scale, x=wave)
        return G @ self.amps


def _default_width(cls):
    return {"emission-galaxy": 60.0, "absorption-galaxy": 150.0, "quasar": 150.0, "star": 10.0}[cls]


def refine(ls: LineSet, z0: float, wave, resid, ivar, *, sigma_inst_kms: float, z_tol: float | None = None,
           width0: float | None = None, scan: bool = True, polish: bool = True, good_cs=None,
           error: bool = True) -> CandidateFit:
    """Joint least-squares fit of all lines of ``ls`` with a single z, starting at ``z0``.

    ``z_tol`` bounds the search to ``z0 +/- z_tol`` (default: 300 km/s, 2000 km/s for quasars);
    with ``scan`` a coarse grid over that range picks the start (for proposals whose z is only
    approximate, such as correlation peaks). The fit runs a few damped Gauss-Newton steps
    (amplitudes solved exactly at each point, the steps from the normal equations with the
    amplitudes re-solved, :meth:`LineModel.amp_coupling`); with ``polish`` it is finished by a bounded
    Levenberg-Marquardt fit (:func:`zsieve.engine.detect.lm_bounded`; bounds on z and widths).
    Without ``error`` the formal error of z is left NaN (:func:`with_formal_error` adds it),
    for fits that may be dropped unused.
    """
    cls = ls.cls
    if z_tol is None:
        z_tol = (2000.0 if cls == "quasar" else 300.0) / C_KMS * (1 + z0)
    wlo, whi = WIDTH_LIMITS_KMS[cls]
    w0 = _default_width(cls) if width0 is None else float(np.clip(width0, wlo, whi))
    model = LineModel(ls, wave, ivar, sigma_inst_kms, z0, max(w0, 0.5 * whi),
                      broad_scale=BROAD_SCALE[1] if bool(ls.broad.any()) else 1.0, z_slack=z_tol, good_cs=good_cs)
    has_broad = model._any_broad
    if model.n_cols == 0:
        return CandidateFit(cls, z0, math.inf, w0, 1.0, np.zeros(0), 0.0, 0, model, ok=False)
    sw = np.sqrt(model.w)
    rr = resid[model.pix]
    y = rr * sw
    yy = float(y @ y)

    def chi2(p):
        """Chi-square at p with the amplitudes solved."""
        return yy - solve(p)[2]

    def unpack(p):
        return p[0], p[1], (p[2] if has_broad else 1.0)

    cache = {}
    active = [None]  # the last active columns: the next NNLS starts from them

    def solve(p):
        key = tuple(p)
        hit = cache.get(key)
        if hit is None:
            z, wk, bs = unpack(p)
            a, gain, mod = model.fit_at(rr, z, wk, bs, start=active[0])
            active[0] = a > 0
            hit = (mod * sw - y, a, gain)
            cache.clear()
            cache[key] = hit
        return hit

    def fun(p):
        return solve(p)[0]

    def jac(p):
        # the model's derivatives with the amplitudes held, less the part the re-solved
        # amplitudes absorb (LineModel.project_out)
        z, wk, bs = unpack(p)
        a = solve(p)[1]
        dz, dw, db = model.model_derivs(z, wk, bs, a)
        cols = [dz, dw] + ([db] if has_broad else [])
        return model.project_out(cols, a > 0, (z, wk, bs)) * sw[:, None]

    def normal_eq(q, r):
        """``(S, g)``: the Gauss-Newton normal equations of the two or three parameters with
        the amplitudes re-solved (``LineModel.amp_coupling``: no projected Jacobian is formed)
        and the gradient ``J^T r``, which needs no correction, the residual being orthogonal to
        the active columns at their least-squares amplitudes."""
        z, wk, bs = unpack(q)
        a = solve(q)[1]
        cols = list(model.model_derivs(z, wk, bs, a))[:q.size]
        Jw = np.column_stack(cols) * sw[:, None]
        S = Jw.T @ Jw
        got = model.amp_coupling(cols, a > 0, (z, wk, bs))
        if got is not None:
            raw = np.diag(S).copy()
            S -= got[1].T @ got[2]
            # a direction the amplitudes absorb entirely (what is left is rounding) is no step
            gone = np.diag(S) <= 1e-12 * raw
            S[gone, :] = 0.0
            S[:, gone] = 0.0
        return S, Jw.T @ r

    lb = [z0 - z_tol, wlo]
    ub = [z0 + z_tol, whi]
    p0 = [z0, w0]
    if has_broad:
        lb.append(BROAD_SCALE[0])
        ub.append(BROAD_SCALE[1])
        p0.append(1.0)
    p0 = np.clip(p0, np.array(lb) + 1e-12, np.array(ub) - 1e-12)
    # a coarse scan in z first: line fits have many local minima on the scale of a line width
    if scan:
        # steps of about 0.7 line sigma (narrow lines), 9 to 41 points
        sv_min = float(np.min(model._sigma_v(w0, 1.0)))
        n_scan = int(np.clip(2 * z_tol / (1 + z0) * C_KMS / (0.7 * sv_min), 9, 41))
        zs = z0 + np.linspace(-z_tol, z_tol, n_scan) * 0.95
        _, wk0, bs0 = unpack(p0)
        # all scan points at once (normal equations from the sparse line windows), on windows
        # of WINDOW_SIGMA at the scan's own widths: the fit's windows are sized for the widest
        # lines it may reach (broad lines at 2.5 times their typical width), two to three times
        # the pixels the profiles at the starting widths reach
        sm = LineModel(ls, wave, ivar, sigma_inst_kms, z0, wk0, broad_scale=bs0, z_slack=z_tol, good_cs=good_cs)
        i_best, g_best = sm.scan_best(resid[sm.pix], zs, wk0, bs0)
        chi0 = chi2(p0)
        if yy - g_best < chi0:
            p0[0] = zs[i_best]
    lb_a, ub_a = np.array(lb, dtype=float), np.array(ub, dtype=float)
    p = np.array(p0, dtype=float)
    chi = float(np.sum(fun(p) ** 2))
    for _ in range(6):  # damped Gauss-Newton with the bounds enforced by clipping
        r = fun(p)
        S, g = normal_eq(p, r)
        # columns scaled to unit norm (their units differ by orders of magnitude); a column
        # with nothing left (the width derivative at zero width) takes no step, as in the
        # minimum-norm solution
        d = np.diag(S)
        # a parameter on a bound that the descent direction pushes beyond it is held there
        live = (d > 0) & ~pushed_past_bounds(p, lb_a, ub_a, g)
        if not live.any():
            break
        nrm = np.sqrt(d[live])
        sl = _spd_solve(S[np.ix_(live, live)] / np.outer(nrm, nrm), -g[live] / nrm)
        if sl is None:  # (near-)collinear columns: the least-squares solver's minimum-norm step
            try:
                Jp = jac(p)[:, live] / nrm
                sl = np.linalg.lstsq(Jp, -r, rcond=None)[0]
            except np.linalg.LinAlgError:
                break
        step = np.zeros(p.size)
        step[live] = sl / nrm
        for damp in (1.0, 0.5, 0.25):
            q = np.clip(p + damp * step, lb_a, ub_a)
            cq = chi2(q)
            if cq < chi:
                break
        else:
            break
        converged = chi - cq < max(1e-6 * chi, GN_TOL_CHI2)
        p, chi = q, cq
        if converged:
            break
    if polish:  # bounded Levenberg-Marquardt on the same variable-projection problem
        q, cq = lm_bounded(fun, jac, p, lb_a, ub_a, max_nfev=20, rtol=1e-8, xtol=1e-8, normal=normal_eq)
        if cq <= chi:
            p = q
    z, wk, bs = unpack(p)
    a, dchi2 = solve(p)[1:]
    active_cols = np.flatnonzero(a > 0)
    z_err = formal_z_error(model, z, wk, bs, a, active_cols) if error else math.nan
    active_lines = [int(l) for l in np.flatnonzero(model.col_of_line >= 0)
                    if a[model.col_of_line[l]] > 0]
    return CandidateFit(cls, float(z), z_err, float(wk), float(bs), a, dchi2, int(active_cols.size),
                        model, active_lines, chi2=float(yy - dchi2))


def with_formal_error(fit: CandidateFit) -> CandidateFit:
    """``fit`` with its formal z error computed (in place) if :func:`refine` left it NaN."""
    if math.isnan(fit.z_err):
        fit.z_err = formal_z_error(fit.model, fit.z, fit.width_kms, fit.broad_scale, fit.amps,
                                   np.flatnonzero(fit.amps > 0))
    return fit


def formal_z_error(model: LineModel, z, wk, bs, a, active_cols) -> float:
    """1-sigma error of z from the linearised joint fit (z, active amplitudes, widths)."""
    if active_cols.size == 0:
        return math.inf
    G = model.design(z, wk, bs)
    dz, dw, db = model.model_derivs(z, wk, bs, a)  # = (D @ a, dW @ a, dB @ a) of the matrices
    cols = [G[:, active_cols], dz[:, None]]
    if wk > 1.0:
        cols.append(dw[:, None])
    if model._any_broad:
        cols.append(db[:, None])
    J = np.hstack(cols)
    F = J.T @ (J * model.w[:, None])
    try:
        cov = np.linalg.pinv(F)
    except np.linalg.LinAlgError:
        return math.inf
    v = cov[active_cols.size, active_cols.size]
    return float(math.sqrt(v)) if v > 0 else math.inf


def group_snr(fit: CandidateFit) -> np.ndarray:
    """S/N of each model column's amplitude in the joint fit (amplitude / its linear error)."""
    G = fit.model.design(fit.z, fit.width_kms, fit.broad_scale)
    F = G.T @ (G * fit.model.w[:, None])
    with np.errstate(divide="ignore", invalid="ignore"):
        err = 1.0 / np.sqrt(np.diag(F))
    return np.where(np.isfinite(err), fit.amps / err, 0.0)


def line_table(fit: CandidateFit, wave, resid, ivar, continuum, min_snr: float = 0.0):
    """Fit each active line on its own (Gaussian, sigma-weighted) at the candidate's z.

    Returns a list of dicts with the :class:`zsieve.result.LineMatch` fields. Members of a
    blend (lines closer than 3 sigma) are fitted together. Lines whose group amplitude has an
    S/N below ``min_snr`` in the joint fit are skipped.
    """
    from .detect import _fit_group, fit_isolated

    ls = fit.model.ls
    out = []
    if not fit.active_lines:
        return out
    mu = fit.model.centres(fit.z)
    sv = fit.model._sigma_v(fit.width_kms, fit.broad_scale)
    gs = group_snr(fit)
    keep = [l for l in fit.active_lines if gs[fit.model.col_of_line[l]] >= min_snr]
    if not keep:
        return out
    act = np.array(sorted(keep, key=lambda l: mu[l]))
    sA = mu[act] * sv[act] / C_KMS
    gap = mu[act][1:] - mu[act][:-1]
    gid = np.concatenate([[0], np.cumsum(gap > 3.0 * (sA[1:] + sA[:-1]))])
    dlam = np.gradient(wave)
    peaks_all = np.clip(np.searchsorted(wave, mu[act]), 0, wave.size - 1)
    col = fit.model.col_of_line[act]
    amp_all = ls.sign[act] * ls.ratio[act] * fit.amps[col] / (SQRT2PI * sA)
    amp_all = np.where(amp_all == 0, ls.sign[act] * 1e-3, amp_all)
    counts = np.bincount(gid)
    fitted: dict[int, dict] = {}
    single = np.flatnonzero(counts[gid] == 1)
    for m, fd in zip(single, fit_isolated(wave, resid, ivar, continuum, peaks_all[single], sA[single],
                                          amp_all[single])):
        if fd is not None:
            fitted[int(m)] = fd
    for g in np.flatnonzero(counts > 1):  # blends of lines (few): joint least squares
        m = np.flatnonzero(gid == g)
        res = _fit_group(wave, resid, ivar, continuum, peaks_all[m], sA[m], amp_all[m], dlam)
        if len(res) == m.size:
            fitted.update({int(k): fd for k, fd in zip(m, res)})
    for k in sorted(fitted):
        fd, l = fitted[k], act[k]
        if not np.isfinite(fd["centroid_err"]) or (fd["flux"] > 0) != (ls.sign[l] > 0):
            continue
        rest = ls.wave[l] * (1 + ls.offset_kms[l] / C_KMS)
        out.append(dict(name=ls.names[l], rest_wavelength=float(ls.wave[l]),
                        observed_wavelength=fd["centroid"], observed_wavelength_err=fd["centroid_err"],
                        sigma_A=fd["sigma_A"], flux=fd["flux"], flux_err=fd["flux_err"], ew=fd["ew"],
                        snr=fd["snr"], kind="emission" if ls.sign[l] > 0 else "absorption",
                        z_line=float(fd["centroid"] / ls.wave[l] - 1.0),
                        z_line_systemic=float(fd["centroid"] / rest - 1.0),
                        offset_kms=float(ls.offset_kms[l]), broad=bool(ls.broad[l])))
    return out
