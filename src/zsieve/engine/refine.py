"""The line model of one candidate, its linear and joint non-linear fits, and per-line measures.

A candidate (class + z) predicts every line of its class at lambda_rest (1+z)(1+v_off/c),
with a Gaussian profile whose velocity sigma is the instrumental one combined with a fitted
intrinsic width (narrow lines share one width; broad lines share one scale factor on their
typical width from the line list). Lines of a fixed-ratio group share one amplitude; every
amplitude is constrained to the sign of its kind (emission up, absorption down), so the fit
at fixed z and widths is a non-negative least-squares problem (``scipy.optimize.nnls``).

* :meth:`LineModel.fit_linear` — amplitudes at fixed z; its chi-square improvement over the
  continuum alone is the candidate's evidence.
* :func:`refine` — the joint fit of all lines with one z (``scipy.optimize.least_squares`` on
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
from scipy.optimize import least_squares, nnls

from .prepare import C_KMS
from .identify import LineSet

__all__ = ["LineModel", "CandidateFit", "refine", "line_table", "WIDTH_LIMITS_KMS"]

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
#: Half-width of a line's fitting window, in line sigmas.
WINDOW_SIGMA = 5.0


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
    """

    def __init__(self, ls: LineSet, wave, ivar, sigma_inst_kms: float, z: float, width_kms: float,
                 broad_scale: float = 1.0, z_slack: float = 0.0):
        self.ls = ls
        self.sigma_inst = float(sigma_inst_kms)
        obs = ls.wave * (1 + z) * (1 + ls.offset_kms / C_KMS)
        sv = self._sigma_v(width_kms, broad_scale)
        half = obs * (WINDOW_SIGMA * sv / C_KMS + z_slack / (1 + z))
        lo = np.searchsorted(wave, obs - half)
        hi = np.searchsorted(wave, obs + half)
        good_cs = np.concatenate([[0], np.cumsum(ivar > 0)])
        cover = good_cs[hi] - good_cs[lo]
        # a line is usable when most of its core is on good pixels
        core_lo = np.searchsorted(wave, obs - 1.5 * obs * sv / C_KMS)
        core_hi = np.searchsorted(wave, obs + 1.5 * obs * sv / C_KMS)
        core_n = core_hi - core_lo
        core_good = good_cs[core_hi] - good_cs[core_lo]
        self.present = (cover >= 3) & (core_good >= np.maximum(2, 0.5 * core_n))
        if self.present.any():
            sel = np.zeros(wave.size + 1, dtype=int)
            np.add.at(sel, lo[self.present], 1)
            np.add.at(sel, hi[self.present], -1)
            pix = np.flatnonzero((np.cumsum(sel)[:-1] > 0) & (ivar > 0))
        else:
            pix = np.zeros(0, dtype=int)
        self.pix = pix
        self.x = wave[pix]
        self.w = ivar[pix]
        groups = np.unique(ls.group[self.present])
        self.groups = groups  # model columns = these groups
        self.col_of_line = np.full(ls.wave.size, -1)
        for k, g in enumerate(groups):
            self.col_of_line[(ls.group == g) & self.present] = k
        self._use = np.flatnonzero(self.col_of_line >= 0)
        onehot = np.zeros((self._use.size, groups.size))
        onehot[np.arange(self._use.size), self.col_of_line[self._use]] = 1.0
        self._onehot = onehot * (ls.sign[self._use] * ls.ratio[self._use])[:, None]
        self._coef = ls.sign[self._use] * ls.ratio[self._use]
        # each line's own slice of the window pixels (profiles are negligible outside it)
        self._lo = np.searchsorted(self.x, (obs - half)[self._use])
        self._hi = np.searchsorted(self.x, (obs + half)[self._use])
        # padded (line, k) index matrix of those slices, for one vectorised evaluation
        nwin = self._hi - self._lo
        kmax = int(nwin.max()) if nwin.size else 0
        k = np.arange(kmax)
        self._valid = k[None, :] < nwin[:, None]
        self._idx = np.where(self._valid, self._lo[:, None] + k[None, :], 0)
        self._flat = self._idx * max(groups.size, 1) + self.col_of_line[self._use][:, None]

    @property
    def n_cols(self) -> int:
        return int(self.groups.size)

    def _sigma_v(self, width_kms, broad_scale):
        ls = self.ls
        narrow = math.hypot(self.sigma_inst, width_kms)
        broad = np.hypot(self.sigma_inst, broad_scale * ls.width_kms / 2.3548)
        return np.where(ls.broad, broad, narrow)

    def centres(self, z):
        ls = self.ls
        return ls.wave * (1 + z) * (1 + ls.offset_kms / C_KMS)

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
        if self._idx.size == 0:
            G = np.zeros((x.size, self.n_cols))
            return (G, G.copy()) if deriv else G
        xs = x[self._idx]
        u = (xs - mu[:, None]) / s[:, None]
        p = np.where(self._valid, np.exp(-0.5 * u * u), 0.0) * (self._coef / (SQRT2PI * s))[:, None]
        G = np.bincount(self._flat.ravel(), p.ravel(), minlength=size).reshape(x.size, self.n_cols)
        if not deriv:
            return G
        # d/dz: centre and sigma both scale with (1+z)
        dp = p * (u / s[:, None] * (mu / (1 + z))[:, None] + (u * u - 1.0) / (1 + z))
        D = np.bincount(self._flat.ravel(), dp.ravel(), minlength=size).reshape(x.size, self.n_cols)
        return G, D

    def design_dwidth(self, z, width_kms, broad_scale=1.0):
        """d(columns)/d(narrow width in km/s) and d/d(broad scale), analytic."""
        use = self._use
        ls = self.ls
        mu = self.centres(z)[use]
        sv = self._sigma_v(width_kms, broad_scale)[use]
        s = mu * sv / C_KMS
        size = self.x.size * self.n_cols
        if self._idx.size == 0:
            G = np.zeros((self.x.size, self.n_cols))
            return G, G.copy()
        u = (self.x[self._idx] - mu[:, None]) / s[:, None]
        p = np.where(self._valid, np.exp(-0.5 * u * u), 0.0) * (self._coef / (SQRT2PI * s))[:, None]
        dlns = (u * u - 1.0) * p  # d prof / d ln s
        broad = ls.broad[use]
        # d ln s / d width (narrow) and d ln s / d scale (broad)
        dn = np.where(broad, 0.0, width_kms / np.maximum(sv * sv, 1e-12))
        bw = ls.width_kms[use] / 2.3548
        db = np.where(broad, broad_scale * bw * bw / np.maximum(sv * sv, 1e-12), 0.0)
        f = self._flat.ravel()
        dW = np.bincount(f, (dlns * dn[:, None]).ravel(), minlength=size).reshape(self.x.size, self.n_cols)
        dB = np.bincount(f, (dlns * db[:, None]).ravel(), minlength=size).reshape(self.x.size, self.n_cols)
        return dW, dB

    def fit_linear(self, r, z, width_kms, broad_scale=1.0):
        """Non-negative amplitudes at fixed z and widths; returns (amps, delta_chi2)."""
        if self.n_cols == 0 or self.pix.size == 0:
            return np.zeros(0), 0.0
        G = self.design(z, width_kms, broad_scale)
        sw = np.sqrt(self.w)
        y = r[self.pix] * sw
        A = G * sw[:, None]
        try:
            a, rnorm = nnls(A, y, maxiter=20 * max(1, self.n_cols))
        except RuntimeError:
            a = np.clip(np.linalg.lstsq(A, y, rcond=None)[0], 0, None)
            rnorm = float(np.linalg.norm(A @ a - y))
        return a, float(y @ y - rnorm**2)


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
           width0: float | None = None, scan: bool = True, polish: bool = True) -> CandidateFit:
    """Joint least-squares fit of all lines of ``ls`` with a single z, starting at ``z0``.

    ``z_tol`` bounds the search to ``z0 +/- z_tol`` (default: 300 km/s, 2000 km/s for quasars);
    with ``scan`` a coarse grid over that range picks the start (for proposals whose z is only
    approximate, such as correlation peaks). The fit runs a few damped Gauss-Newton steps
    (amplitudes solved exactly at each step); with ``polish`` it is finished by
    ``scipy.optimize.least_squares`` (trust-region reflective, bounds on z and the widths).
    """
    cls = ls.cls
    if z_tol is None:
        z_tol = (2000.0 if cls == "quasar" else 300.0) / C_KMS * (1 + z0)
    wlo, whi = WIDTH_LIMITS_KMS[cls]
    w0 = _default_width(cls) if width0 is None else float(np.clip(width0, wlo, whi))
    has_broad = bool(ls.broad.any())
    model = LineModel(ls, wave, ivar, sigma_inst_kms, z0, max(w0, 0.5 * whi),
                      broad_scale=BROAD_SCALE[1] if has_broad else 1.0, z_slack=z_tol)
    if model.n_cols == 0:
        return CandidateFit(cls, z0, math.inf, w0, 1.0, np.zeros(0), 0.0, 0, model, ok=False)
    sw = np.sqrt(model.w)
    y = resid[model.pix] * sw

    def unpack(p):
        return p[0], p[1], (p[2] if has_broad else 1.0)

    cache = {}

    def solve(p):
        key = tuple(p)
        hit = cache.get(key)
        if hit is None:
            z, wk, bs = unpack(p)
            A = model.design(z, wk, bs) * sw[:, None]
            try:
                a, _ = nnls(A, y, maxiter=20 * max(1, model.n_cols))
            except RuntimeError:
                a = np.clip(np.linalg.lstsq(A, y, rcond=None)[0], 0, None)
            hit = (A @ a - y, a)
            cache.clear()
            cache[key] = hit
        return hit

    def fun(p):
        return solve(p)[0]

    def jac(p):
        # variable-projection Jacobian with the amplitudes held (Kaufman's approximation)
        z, wk, bs = unpack(p)
        a = solve(p)[1]
        _, D = model.design(z, wk, bs, deriv=True)
        dW, dB = model.design_dwidth(z, wk, bs)
        cols = [D @ a, dW @ a] + ([dB @ a] if has_broad else [])
        return np.column_stack(cols) * sw[:, None]

    lb = [z0 - z_tol, wlo]
    ub = [z0 + z_tol, whi]
    p0 = [z0, w0]
    if has_broad:
        lb.append(BROAD_SCALE[0])
        ub.append(BROAD_SCALE[1])
        p0.append(1.0)
    p0 = np.clip(p0, np.array(lb) + 1e-12, np.array(ub) - 1e-12)
    scale = [max(1e-5 * (1 + z0), z_tol / 30.0), 30.0] + ([0.2] if has_broad else [])
    # a coarse scan in z first: line fits have many local minima on the scale of a line width
    if scan:
        # steps of about 0.7 line sigma (narrow lines), 9 to 41 points
        sv_min = float(np.min(model._sigma_v(w0, 1.0)))
        n_scan = int(np.clip(2 * z_tol / (1 + z0) * C_KMS / (0.7 * sv_min), 9, 41))
        zs = z0 + np.linspace(-z_tol, z_tol, n_scan) * 0.95
        chis = [float(np.sum(fun(np.r_[zz, p0[1:]]) ** 2)) for zz in zs]
        chi0 = float(np.sum(fun(p0) ** 2))
        if min(chis) < chi0:
            p0[0] = zs[int(np.argmin(chis))]
    lb_a, ub_a = np.array(lb, dtype=float), np.array(ub, dtype=float)
    p = np.array(p0, dtype=float)
    chi = float(np.sum(fun(p) ** 2))
    for _ in range(6):  # damped Gauss-Newton with the bounds enforced by clipping
        J = jac(p)
        r = fun(p)
        try:
            step = np.linalg.lstsq(J, -r, rcond=None)[0]
        except np.linalg.LinAlgError:
            break
        for damp in (1.0, 0.5, 0.25):
            q = np.clip(p + damp * step, lb_a, ub_a)
            cq = float(np.sum(fun(q) ** 2))
            if cq < chi:
                break
        else:
            break
        converged = chi - cq < 1e-6 * max(chi, 1.0)
        p, chi = q, cq
        if converged:
            break
    if polish:
        try:
            res = least_squares(fun, np.clip(p, lb_a + 1e-12, ub_a - 1e-12), jac=jac, bounds=(lb, ub),
                                x_scale=scale, max_nfev=20, xtol=1e-8, ftol=1e-8)
            if float(np.sum(res.fun**2)) <= chi:
                p = res.x
        except ValueError:
            pass
    z, wk, bs = unpack(p)
    A = model.design(z, wk, bs)
    try:
        a, rn = nnls(A * sw[:, None], y, maxiter=20 * max(1, model.n_cols))
    except RuntimeError:
        a = np.clip(np.linalg.lstsq(A * sw[:, None], y, rcond=None)[0], 0, None)
        rn = float(np.linalg.norm((A * sw[:, None]) @ a - y))
    dchi2 = float(y @ y - rn**2)
    active_cols = np.flatnonzero(a > 0)
    z_err = formal_z_error(model, z, wk, bs, a, active_cols)
    active_lines = [int(l) for l in np.flatnonzero(model.col_of_line >= 0)
                    if a[model.col_of_line[l]] > 0]
    return CandidateFit(cls, float(z), z_err, float(wk), float(bs), a, dchi2, int(active_cols.size),
                        model, active_lines, chi2=float(rn**2))


def formal_z_error(model: LineModel, z, wk, bs, a, active_cols) -> float:
    """1-sigma error of z from the linearised joint fit (z, active amplitudes, widths)."""
    if active_cols.size == 0:
        return math.inf
    G, D = model.design(z, wk, bs, deriv=True)
    cols = [G[:, active_cols], (D @ a)[:, None]]
    dW, dB = model.design_dwidth(z, wk, bs)
    if wk > 1.0:
        cols.append((dW @ a)[:, None])
    if model.ls.broad.any():
        cols.append((dB @ a)[:, None])
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
