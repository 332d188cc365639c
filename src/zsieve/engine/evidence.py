"""Evidence beyond the line count: doublet shape, Ly-alpha forest, per-line consistency.

Checks the joint line fit does not make by itself (design: "one strong line alone is
ambiguous ... use the doublet shape, neighbouring lines that should appear, the continuum
break"):

* :func:`doublet_delta_chi2` -- is a lone emission line better fitted by the resolved
  [O II] 3727.09/3729.88 doublet (fixed separation in ln lambda, free ratio in the physical
  range) than by one line (a Gaussian of free width, or Ly-alpha cut on its blue side)? The
  chi-square difference, with the uncertainty array, is evidence that counts like an
  independent line when it is large.
* :func:`forest_test` -- a line read as Ly-alpha at z > 2 implies the Ly-alpha forest blueward
  of it: the mean flux over rest 1050-1180 A must be depressed relative to redward of the line
  by the mean intergalactic transmission (Faucher-Giguere et al. 2008, ApJ 681, 831:
  tau_eff = 0.0018 (1+z)^3.92; from memory). A forest that is *absent* where those pixels are
  observed is evidence against the Ly-alpha reading.
* :func:`lyman_limit_test` -- a galaxy read with Ly-alpha at z > 2.9 leaves almost no flux
  below its Lyman limit, 911.75(1+z) A: its own neutral gas and the intergalactic Lyman-limit
  systems absorb it (the Lyman-break selection of distant galaxies, Steidel et al. 1996,
  ApJ 462, L17; from memory). Flux there well above a small leak of the continuum redward of
  Ly-alpha is evidence against the reading.
* :func:`balmer_test` -- a line read as H-beta implies H-alpha at least 2.86 times as strong
  (case B recombination, T = 10^4 K; Osterbrock & Ferland 2006, from memory; dust only raises
  the ratio). H-alpha missing where its pixels are observed is evidence against H-beta.
* :func:`ratio_floor_test` -- the floor on a pair's flux ratio behind :func:`balmer_test`, and
  Ca II H at no less than half of Ca II K (``CA_HK_FLOOR``, their oscillator strengths).
* :func:`sideband_test` -- a line stands on the continuum around it; lines fitted on a
  continuum break or a broad residual hump do not.
* :func:`birge_factor` -- the reduced chi-square of the per-line redshifts about their mean
  (Birge 1932, Phys. Rev. 40, 207: the "Birge ratio"); when the lines disagree with each other
  more than their errors allow (template mismatch, blends), the error of the mean is too small
  by sqrt(chi2_nu).

Examples
--------
>>> import numpy as np
>>> wave = np.arange(8000.0, 8300.0, 0.8)
>>> z = 1.18
>>> lam1, lam2 = OII_DOUBLET[0] * (1 + z), OII_DOUBLET[1] * (1 + z)
>>> s = 2.0
>>> prof = np.exp(-0.5 * ((wave - lam1) / s) ** 2) + 1.35 * np.exp(-0.5 * ((wave - lam2) / s) ** 2)
>>> rng = np.random.default_rng(0)
>>> flux = 5.0 * prof + rng.normal(0.0, 1.0, wave.size)
>>> d = doublet_delta_chi2(wave, flux, np.ones(wave.size), 0.5 * (lam1 + lam2))
>>> d > 12
True
>>> round(float(forest_transmission(3.0)), 3)
0.662
"""

from __future__ import annotations

import math

import numpy as np

from .prepare import C_KMS

__all__ = ["OII_DOUBLET", "fixed_line_flux", "balmer_test", "BALMER_CASE_B", "doublet_delta_chi2", "forest_transmission", "forest_test", "forest_absent",
           "birge_factor", "companion_test", "lyman_limit_test", "LYMAN_LIMIT_REST", "LYMAN_LEAK_MAX", "LYMAN_MIN_EXCESS", "COMPANION_ALLOWANCE",
           "LYA_REST", "FOREST_REST", "FOREST_RED_REST", "sideband_test", "ratio_floor_test", "CA_HK_FLOOR"]

#: [O II] 3727.09 / 3729.88 vacuum rest wavelengths (NIST ASD; as in linelists/galaxy_emission.ecsv).
OII_DOUBLET = (3727.092, 3729.875)
#: Range of the [O II] 3729/3726 flux ratio: ~1.5 in the low-density limit down to ~0.35 at high
#: density (Osterbrock & Ferland 2006, Astrophysics of Gaseous Nebulae; from memory).
OII_RATIO_RANGE = (0.3, 1.5)
LYA_REST = 1215.67
#: Rest range of the Ly-alpha forest measured (between Ly-beta and the Ly-alpha wing).
FOREST_REST = (1050.0, 1180.0)
#: Rest range redward of Ly-alpha used as the unabsorbed reference (clear of N V 1240 and Si II).
FOREST_RED_REST = (1270.0, 1380.0)
#: Rest wavelength of the Lyman limit, the ionisation edge of H I (13.598 eV; from memory).
LYMAN_LIMIT_REST = 911.75
#: Largest flux below the Lyman limit of a galaxy as a fraction of its continuum at rest
#: 1270-1380 A. Escape fractions of ionising light measured for star-forming galaxies at z ~ 3
#: are ~0.05-0.1 before the intergalactic absorption, which removes more (from memory); a
#: blue UV slope raises the intrinsic ratio by at most ~1.5 (f_lambda ~ lambda^-2.5). 0.2 is
#: lenient on both.
LYMAN_LEAK_MAX = 0.2
#: Least ``excess`` of :func:`lyman_limit_test` that refutes a reading: above the 3 of the other
#: tests, since a small error in sky subtraction, summed over the ~1000 pixels below the limit,
#: can lift their mean by a few of its (small) errors.
LYMAN_MIN_EXCESS = 5.0


def _gauss(x, mu, s):
    return np.exp(-0.5 * ((x - mu) / s) ** 2)


def _best_linear_chi2(cols, r, w):
    """Minimum chi-square over non-negative amplitudes of K profile columns plus a constant.

    ``cols``: (M, P, K) profiles for M trial shapes; ``r``, ``w``: (P,) data and weights.
    Returns (M,) chi-square, infinite where an amplitude comes out negative.
    """
    M, P, K = cols.shape
    ones = np.ones((M, P, 1))
    A = np.concatenate([cols, ones], axis=2)  # (M, P, K+1)
    Aw = A * w[None, :, None]
    F = np.einsum("mpk,mpl->mkl", Aw, A)
    b = np.einsum("mpk,p->mk", Aw, r)
    F += 1e-12 * np.eye(K + 1)[None]
    x = np.linalg.solve(F, b[..., None])[..., 0]
    chi2 = float(np.sum(w * r * r)) - np.einsum("mk,mk->m", x, b)
    bad = (x[:, :K] < 0).any(axis=1)
    return np.where(bad, np.inf, chi2)


def doublet_delta_chi2(wave, resid, ivar, centre, *, sigma_inst_kms: float = 60.0,
                       pair=OII_DOUBLET, ratio_range=OII_RATIO_RANGE, n_shift: int = 41,
                       n_width: int = 16, lya_cut: bool = True) -> float:
    """chi2(one line, free centre and width) - chi2(doublet ``pair``, free ratio and width).

    ``resid`` is the continuum-subtracted flux, ``ivar`` its inverse variance, ``centre`` the
    observed wavelength of the feature (the doublet's mean). Both models have a free constant.
    The doublet keeps the members' separation fixed in ln(lambda) (one z), one width for both
    and a ratio ``second/first`` within ``ratio_range`` (boundary values tried when the free
    ratio falls outside). A grid over centre and width is searched for both (vectorised).
    Returns 0 when too few pixels are usable, and when the single Gaussian's best width is
    the grid's widest (four times the separation): a feature that broad is no narrow doublet.

    With ``lya_cut`` the one line may also be a Ly-alpha line as it is seen from a distant
    galaxy: the absorbers just blueward of it take part of its blue half and the forest lowers
    the continuum there, which gives a line a sharp blue edge and a red wing (common practice:
    the asymmetric Ly-alpha profile of high-z emitters). That model (:func:`_cut_line_chi2`)
    nests the single Gaussian, so a resolved doublet must beat it too.
    """
    wave = np.asarray(wave, float)
    resid = np.asarray(resid, float)
    ivar = np.asarray(ivar, float)
    lnsep = math.log(pair[1] / pair[0])
    sep = centre * lnsep
    s_min = max(centre * sigma_inst_kms / C_KMS, 0.3 * float(np.median(np.diff(wave))))
    s_max = max(4.0 * sep, 3.0 * s_min)
    half = 0.5 * sep + 4.0 * s_max
    sel = (wave > centre - half) & (wave < centre + half) & (ivar > 0)
    if sel.sum() < 8:
        return 0.0
    x, r, w = wave[sel], resid[sel], ivar[sel]
    shifts = np.linspace(-1.0, 1.0, n_shift) * max(sep, 2 * s_min)
    widths = np.geomspace(s_min, s_max, n_width)
    S, W = np.meshgrid(shifts, widths, indexing="ij")
    S, W = S.ravel(), W.ravel()
    mu = centre + S
    # one Gaussian
    g1 = _gauss(x[None, :], mu[:, None], W[:, None])[..., None]
    chi1 = _best_linear_chi2(g1, r, w)
    chi_single = float(np.min(chi1))
    if W[int(np.argmin(chi1))] >= widths[-1]:
        # as broad as the widest trial (a broad-line bump): wider than any narrow doublet, so
        # its shape says nothing about one
        return 0.0
    if lya_cut:
        chi_single = min(chi_single, _cut_line_chi2(x, r, w, mu, W))
    # the doublet: members at mean -/+ half the separation (in ln lambda)
    m1 = mu * math.exp(-0.5 * lnsep)
    m2 = mu * math.exp(0.5 * lnsep)
    p1 = _gauss(x[None, :], m1[:, None], W[:, None])
    p2 = _gauss(x[None, :], m2[:, None], W[:, None])
    free = _best_linear_chi2(np.stack([p1, p2], axis=2), r, w)
    # the free ratio's value decides whether it is admissible; else try the two boundaries
    best = []
    A = np.stack([p1, p2, np.ones_like(p1)], axis=2)
    Aw = A * w[None, :, None]
    F = np.einsum("mpk,mpl->mkl", Aw, A) + 1e-12 * np.eye(3)[None]
    b = np.einsum("mpk,p->mk", Aw, r)
    a = np.linalg.solve(F, b[..., None])[..., 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = a[:, 1] / a[:, 0]
    ok = (a[:, 0] > 0) & (ratio >= ratio_range[0]) & (ratio <= ratio_range[1])
    best.append(np.where(ok, free, np.inf))
    for q in ratio_range:
        best.append(_best_linear_chi2((p1 + q * p2)[..., None], r, w))
    chi_double = float(np.min(np.concatenate(best)))
    if not (np.isfinite(chi_single) and np.isfinite(chi_double)):
        return 0.0
    return chi_single - chi_double


def _cut_line_chi2(x, r, w, mu, W) -> float:
    """Least chi-square of a line whose blue half is dimmed, on a continuum stepped down blueward.

    For trial centres ``mu`` and widths ``W`` (M,): non-negative amplitudes of a Gaussian, of
    its red half on top (so the blue half is never the brighter) and of a downward step of
    the continuum blueward of the centre, plus a free constant; the subsets with a term
    dropped are tried too (a term pushed negative), so the symmetric Gaussian is among them."""
    g = _gauss(x[None, :], mu[:, None], W[:, None])
    blue = x[None, :] < mu[:, None]
    red_half, step = np.where(blue, 0.0, g), -blue.astype(float)
    best = math.inf
    for cols in ((g, red_half, step), (g, red_half), (red_half, step), (g, step), (red_half,)):
        best = min(best, float(np.min(_best_linear_chi2(np.stack(cols, axis=2), r, w))))
    return best


def forest_transmission(z) -> np.ndarray | float:
    """Mean Ly-alpha forest transmission at absorber redshift ``z``:
    exp(-0.0018 (1+z)^3.92) (Faucher-Giguere et al. 2008, ApJ 681, 831; from memory)."""
    return np.exp(-0.0018 * np.power(1.0 + np.asarray(z, dtype=float), 3.92))


#: Least pixel-to-pixel rms of any Ly-alpha forest, as a fraction of its mean depth
#: ``1 - <T>`` times the continuum. The forest's flux power spectrum (McDonald et al. 2006,
#: ApJS 163, 80; from memory: k P(k) / pi ~ 0.05-0.07 at k ~ 0.01-0.02 s/km, z ~ 3) gives an
#: rms of adjacent-pixel differences of ~0.25 continuum at R ~ 2000 and 69 km/s pixels, i.e.
#: ~0.8 of the depth (order of magnitude); four real BOSS DR9 quasars at z = 2.67-2.97 with
#: pixel S/N >= 5 measure 0.30-0.56, the mocks >= 0.48. Half the lowest real value:
FOREST_ROUGH_MIN = 0.15


def _weighted_mean(flux, ivar, sel) -> tuple[float, float]:
    """Inverse-variance weighted mean of ``flux[sel]`` and its error."""
    w = ivar[sel]
    return float(np.sum(w * flux[sel]) / np.sum(w)), float(1.0 / math.sqrt(np.sum(w)))


def forest_test(wave, flux, ivar, z, *, min_pixels: int = 20) -> dict | None:
    """Compare the mean flux of rest 1050-1180 A with that of rest 1270-1380 A for Ly-alpha at ``z``,
    and the pixel-to-pixel roughness of the two ranges.

    Returns None where either range is not observed (fewer than ``min_pixels`` usable
    pixels). Otherwise a dict: ``ratio`` (blue mean / red mean, inverse-variance weighted),
    ``ratio_err``, ``expected`` (the mean transmission at the forest's absorber redshifts)
    and ``excess`` = (ratio - allowance * expected) / error, where the allowance 1.45 is the
    largest blue-to-red continuum rise of a plausible UV slope (f_lambda ~ lambda^-2.5 between
    the two ranges' centres; common practice for star-forming galaxies and quasars). ``excess``
    > 3 means the mean flux is not depressed as the forest would depress it.

    The forest is also a thicket of narrow absorption lines (common practice), so it roughens
    the spectrum on the scale of a pixel whatever its mean transmission along one sightline
    (which scatters about the cosmic mean, and rises near the quasar): ``rough_blue`` and
    ``rough_red`` are the median of ``d^2 / var(d)`` over differences ``d`` of adjacent usable
    pixels, divided by 0.4549 (the median of chi-square with one degree of freedom), so 1 for
    noise about any smooth spectrum; ``rough_excess`` is ``rough_blue - rough_red`` over its
    error (2.6 / sqrt(pairs) for each, measured on pure noise). ``rough_excess`` > 3 means the
    forest's lines are seen. ``rough_floor`` is the least ``rough_blue`` a forest at this z
    gives (``FOREST_ROUGH_MIN`` of its mean depth in rms, on top of ``rough_red``) and
    ``rough_deficit`` = (rough_floor - rough_blue) / error: > 3 means the blue side is too smooth
    for any forest, even though its mean is low (the blue side of a 4000 A break read as
    Ly-alpha). :func:`forest_absent` combines them.
    """
    wave = np.asarray(wave, float)
    a = 1.0 + z
    out = {}
    for key, (lo, hi) in (("blue", FOREST_REST), ("red", FOREST_RED_REST)):
        sel = (wave > lo * a) & (wave < hi * a) & (ivar > 0)
        if sel.sum() < min_pixels:
            return None
        out[key] = _weighted_mean(flux, ivar, sel)
    (mb, eb), (mr, er) = out["blue"], out["red"]
    if mr <= 3.0 * er:  # no measurable continuum redward: nothing to normalise by
        return None
    ratio = mb / mr
    err = abs(ratio) * math.hypot(eb / max(abs(mb), 1e-30), er / mr) if mb != 0 else eb / mr
    err = max(err, eb / mr)
    zabs = np.linspace(FOREST_REST[0], FOREST_REST[1], 32) * a / LYA_REST - 1.0
    expected = float(np.mean(forest_transmission(zabs)))
    allowance = (0.5 * sum(FOREST_REST) / (0.5 * sum(FOREST_RED_REST))) ** -2.5
    (rb, nb, vb), (rr, nr, _) = (_roughness(wave, flux, ivar, lo * a, hi * a)
                                 for lo, hi in (FOREST_REST, FOREST_RED_REST))
    rough_err = 2.6 * math.sqrt(1.0 / max(nb, 1) + 1.0 / max(nr, 1))
    floor = rr + (FOREST_ROUGH_MIN * (1.0 - expected) * mr) ** 2 / vb if vb > 0 else rr
    floor_err = 2.6 * math.sqrt(floor**2 / max(nb, 1) + rr**2 / max(nr, 1))
    return dict(ratio=float(ratio), ratio_err=float(err), expected=expected,
                excess=float((ratio - allowance * expected) / err),
                rough_blue=rb, rough_red=rr, rough_excess=float((rb - rr) / rough_err),
                rough_floor=float(floor), rough_deficit=float((floor - rb) / floor_err))


def lyman_limit_test(wave, flux, ivar, z, *, leak: float = LYMAN_LEAK_MAX, min_pixels: int = 50) -> dict | None:
    """Flux below the Lyman limit of a galaxy whose Ly-alpha is at ``z``.

    Compares the inverse-variance weighted mean flux of the pixels below rest 0.99 x 911.75 A
    (``blue``, ``blue_err``) with ``leak`` times a high estimate of the continuum at rest
    1270-1380 A (its weighted mean plus three errors, never below zero: a red side too faint
    to measure still bounds the leak). ``excess`` = (blue - leak x red_high) / blue_err;
    above ``LYMAN_MIN_EXCESS`` the reading leaves light that its Lyman limit would have
    absorbed. None when fewer than ``min_pixels`` usable pixels lie on either side.

    Examples
    --------
    >>> import numpy as np
    >>> wave = np.arange(3600.0, 9800.0, 1.0)
    >>> flat = np.ones(wave.size)
    >>> rng = np.random.default_rng(2)
    >>> noisy = flat + rng.normal(0.0, 2.0, wave.size)       # per-pixel S/N 0.5
    >>> lyman_limit_test(wave, noisy, np.full(wave.size, 0.25), 4.3)["excess"] > 10
    True
    >>> dropped = np.where(wave < 911.75 * 5.3, 0.0, 1.0) + rng.normal(0.0, 2.0, wave.size)
    >>> lyman_limit_test(wave, dropped, np.full(wave.size, 0.25), 4.3)["excess"] < 3
    True
    """
    wave = np.asarray(wave, float)
    a = 1.0 + z
    blue = (wave < 0.99 * LYMAN_LIMIT_REST * a) & (ivar > 0)
    red = (wave > FOREST_RED_REST[0] * a) & (wave < FOREST_RED_REST[1] * a) & (ivar > 0)
    if blue.sum() < min_pixels or red.sum() < min_pixels:
        return None
    (mb, eb), (mr, er) = (_weighted_mean(flux, ivar, s) for s in (blue, red))
    red_high = max(mr, 0.0) + 3.0 * er
    return dict(blue=mb, blue_err=eb, red=mr, red_err=er, leak=float(leak),
                excess=float((mb - leak * red_high) / eb))


def _roughness(wave, flux, ivar, lo, hi) -> tuple[float, int, float]:
    """``(median(d^2 / var d) / 0.4549, number of pairs, median var d)`` over adjacent usable
    pixel pairs in (lo, hi)."""
    sel = np.flatnonzero((wave > lo) & (wave < hi))
    if sel.size < 2:
        return math.nan, 0, 0.0
    i = sel[:-1][(np.diff(sel) == 1)]
    i = i[(ivar[i] > 0) & (ivar[i + 1] > 0)]
    if i.size == 0:
        return math.nan, 0, 0.0
    d = flux[i + 1] - flux[i]
    vd = 1.0 / ivar[i] + 1.0 / ivar[i + 1]
    return float(np.median(d * d / vd) / 0.45494), int(i.size), float(np.median(vd))


def forest_absent(test: dict | None, max_excess: float = 3.0) -> bool:
    """True when :func:`forest_test` finds neither the forest's depressed mean (``excess`` above
    ``max_excess``) nor its roughness (``rough_excess`` at most ``max_excess``), or when the
    blue side is smoother than any forest (``rough_deficit`` above ``max_excess``)."""
    if test is None:
        return False
    if test.get("rough_deficit", -math.inf) > max_excess:
        return True
    if not test["excess"] > max_excess:
        return False
    return not test["rough_excess"] > max_excess


#: How far below its typical ratio to the strongest line a strong broad quasar line may fall:
#: broad-line flux ratios differ from the composite's by up to a factor of about 3 between
#: quasars (Vanden Berk et al. 2001, AJ 122, 549; from memory); 5 leaves room beyond that.
COMPANION_ALLOWANCE = 5.0


def companion_test(wave, resid, ivar, centres, sigmas_A, strengths, *, testable=None,
                   allowance=COMPANION_ALLOWANCE, min_snr: float = 5.0) -> dict | None:
    """Are the strong lines that must come with the strongest one there?

    ``centres`` and ``sigmas_A`` place Gaussians of fixed centre and width (Angstrom) for lines
    whose typical fluxes relative to each other are ``strengths`` (e.g. a composite quasar's
    Ly-alpha 1, C IV 0.25, C III] 0.16, Mg II 0.15). Each flux is measured by
    :func:`fixed_line_flux`; the line of highest S/N leads, and every other observed line clear
    of the leader's profile (4 sigma each) must reach ``strength / strength_lead / allowance``
    of its flux (``allowance`` a number, one per line, or a square array whose row is the
    leader: an allowance that holds beside one leader only); ``testable`` (bool per line, default
    all) limits which lines may count as missing (lines that absorption can remove may still
    lead). Returns None when fewer than
    two lines are observed, the leader's S/N is below ``min_snr`` or no other line can be
    tested; otherwise a dict with the
    index of the ``lead`` and of the most ``missing`` line, their fluxes, and ``deficit`` =
    (required - measured flux) / error of that line: > 3 means a companion is missing, evidence
    against the reading (one broad bump that any line could fit, such as the residual of a
    continuum break).

    >>> import numpy as np
    >>> w = np.arange(3800.0, 9200.0, 1.0)
    >>> g = lambda c, s, f: f / (np.sqrt(2 * np.pi) * s) * np.exp(-0.5 * ((w - c) / s) ** 2)
    >>> lone = g(7000.0, 40.0, 400.0) + np.random.default_rng(1).normal(0, 0.05, w.size)
    >>> t = companion_test(w, lone, np.full(w.size, 400.0), [4000.0, 7000.0], [25.0, 40.0], [1.0, 1.0])
    >>> t["lead"], t["missing"], t["deficit"] > 3
    (1, 0, True)
    """
    strengths = np.asarray(strengths, float)
    meas = np.array([fixed_line_flux(wave, resid, ivar, c, s) for c, s in zip(centres, sigmas_A)],
                    dtype=float).reshape(-1, 2)
    f, e = meas[:, 0], meas[:, 1]
    ok = np.isfinite(f) & np.isfinite(e) & (e > 0) & (strengths > 0)
    if ok.sum() < 2:
        return None
    snr = np.where(ok, f / np.where(ok, e, 1.0), -np.inf)
    lead = int(np.argmax(snr))
    if snr[lead] < min_snr:
        return None
    allow = np.asarray(allowance, float)
    if allow.ndim == 2:
        allow = allow[lead]
    frac = strengths / strengths[lead] / np.broadcast_to(allow, strengths.shape)
    err = np.hypot(e, frac * e[lead])
    deficit = np.where(ok, (frac * f[lead] - f) / np.where(ok, err, 1.0), -np.inf)
    # a line inside the leader's own profile is not measured apart from it (N V 1240 on the
    # wing of Ly-alpha, absorbed by the outflows of broad-absorption-line quasars)
    centres = np.asarray(centres, float)
    sig = np.asarray(sigmas_A, float)
    near = np.abs(centres - centres[lead]) < 4.0 * (sig + sig[lead])
    deficit[near] = -np.inf
    if testable is not None:
        deficit[~np.asarray(testable, bool)] = -np.inf
    k = int(np.argmax(deficit))
    if not np.isfinite(deficit[k]):
        return None
    return dict(lead=lead, missing=k, flux_lead=float(f[lead]), flux_missing=float(f[k]),
                deficit=float(deficit[k]))


def birge_factor(z_lines, z_errs, *, quantile_sigma: float = 2.0) -> float:
    """Factor by which to scale the error of the mean of per-line redshifts (>= 1).

    sqrt(chi2_nu) of ``z_lines`` about their weighted mean (Birge ratio), applied only when
    chi2 exceeds its expectation by ``quantile_sigma`` standard deviations (chi2 with n-1
    degrees of freedom: mean n-1, variance 2(n-1)), so that chance fluctuations of honest
    errors are left alone. Fewer than 3 lines: 1.

    >>> birge_factor([1.0, 1.0, 1.0], [0.1, 0.1, 0.1])
    1.0
    >>> round(birge_factor([0.0, 1.0, 0.0, 1.0], [0.1, 0.1, 0.1, 0.1]), 2)
    5.77
    """
    z = np.asarray(z_lines, float)
    e = np.asarray(z_errs, float)
    ok = np.isfinite(z) & np.isfinite(e) & (e > 0)
    z, e = z[ok], e[ok]
    n = z.size
    if n < 3:
        return 1.0
    w = 1.0 / e**2
    zbar = np.sum(w * z) / np.sum(w)
    chi2 = float(np.sum(w * (z - zbar) ** 2))
    dof = n - 1
    if chi2 <= dof + quantile_sigma * math.sqrt(2.0 * dof):
        return 1.0
    return float(math.sqrt(chi2 / dof))


#: Case-B H-alpha / H-beta flux ratio at 10^4 K, low density (Osterbrock & Ferland 2006,
#: Astrophysics of Gaseous Nebulae and AGN, table 4.2; from memory; common practice).
BALMER_CASE_B = 2.86


def fixed_line_flux(wave, resid, ivar, centre, sigma_A, *, half_width: float = 4.0):
    """Flux (and its 1-sigma error) of a Gaussian of fixed centre and width, with a local
    constant, by weighted linear least squares; ``(nan, nan)`` when fewer than 5 pixels are
    usable within ``half_width`` sigmas.

    >>> import numpy as np
    >>> w = np.arange(6500.0, 6630.0, 1.0)
    >>> f = 30.0 / (np.sqrt(2 * np.pi) * 2.0) * np.exp(-0.5 * ((w - 6564.6) / 2.0) ** 2)
    >>> flux, err = fixed_line_flux(w, f, np.ones(w.size), 6564.6, 2.0)
    >>> round(flux, 3)
    30.0
    """
    wave = np.asarray(wave, float)
    sel = (np.abs(wave - centre) < half_width * sigma_A) & (np.asarray(ivar) > 0)
    if sel.sum() < 5:
        return math.nan, math.nan
    x = wave[sel]
    g = _gauss(x, centre, sigma_A) / (math.sqrt(2 * math.pi) * sigma_A)  # flux density of unit flux
    A = np.stack([g, np.ones_like(g)], axis=1)
    w = np.asarray(ivar, float)[sel]
    F = A.T @ (A * w[:, None])
    try:
        cov = np.linalg.inv(F)
    except np.linalg.LinAlgError:
        return math.nan, math.nan
    a = cov @ (A.T @ (w * np.asarray(resid, float)[sel]))
    # flux in units of resid x Angstrom
    return float(a[0]), float(math.sqrt(cov[0, 0]))


def ratio_floor_test(wave, resid, ivar, centres, sigmas_A, floor, *, sign: float = 1.0,
                     min_snr: float = 5.0) -> dict | None:
    """Is the second of two lines at least ``floor`` times as strong as the first?

    ``centres`` and ``sigmas_A`` (Angstrom) place the ``(lead, follow)`` pair; each flux is
    measured by :func:`fixed_line_flux` (``sign`` -1 for absorption lines, whose fluxes are
    negative). Returns None when the lead is not measured at S/N >= ``min_snr`` or the
    follower's pixels are not observed. Otherwise a dict with both fluxes and ``deficit`` =
    (floor F(lead) - F(follow)) / its error: > 3 means the follower is missing, evidence
    against the reading that implies it.

    >>> import numpy as np
    >>> w = np.arange(4800.0, 6700.0, 1.0)
    >>> g = lambda c, f: f / (np.sqrt(2 * np.pi) * 3.0) * np.exp(-0.5 * ((w - c) / 3.0) ** 2)
    >>> t = ratio_floor_test(w, g(4862.7, 10.0), np.full(w.size, 100.0), (4862.7, 6564.6), (3.0, 3.0), 2.86)
    >>> round(t["flux_lead"], 2), t["deficit"] > 3
    (10.0, True)
    """
    (fl, el), (ff, ef) = (fixed_line_flux(wave, resid, ivar, c, s) for c, s in zip(centres, sigmas_A))
    fl, ff = sign * fl, sign * ff
    if not (np.isfinite(fl) and np.isfinite(ff)) or fl < min_snr * el:
        return None
    err = math.hypot(ef, floor * el)
    return dict(flux_lead=fl, flux_follow=ff, deficit=float((floor * fl - ff) / err))


def balmer_test(wave, resid, ivar, z, sigma_kms, *, h_beta: float = 4862.683, h_alpha: float = 6564.614,
                min_snr: float = 5.0) -> dict | None:
    """Is H-alpha as strong as H-beta at ``z`` requires (>= BALMER_CASE_B times)?

    Returns None when H-beta is not measured at S/N >= ``min_snr`` or H-alpha's pixels are not
    observed. Otherwise ``deficit`` = (BALMER_CASE_B F(Hb) - F(Ha)) / its error: > 3 means
    H-alpha is missing, evidence against the H-beta reading (:func:`ratio_floor_test`).
    """
    c = np.array([h_beta, h_alpha]) * (1.0 + z)
    t = ratio_floor_test(wave, resid, ivar, c, c * sigma_kms / C_KMS, BALMER_CASE_B, min_snr=min_snr)
    if t is None:
        return None
    return dict(flux_hb=t["flux_lead"], flux_ha=t["flux_follow"], deficit=t["deficit"])


#: Least Ca II H / K equivalent-width ratio: the optically thin limit, the ratio of their
#: oscillator strengths (0.33 / 0.68; NIST ASD, from memory); saturation raises it towards 1,
#: and in galaxies H-epsilon blends with H.
CA_HK_FLOOR = 0.5


def sideband_test(wave, resid, ivar, lo, hi, peak, *, band: float | None = None,
                  min_pixels: int = 8) -> dict | None:
    """Does the feature fitted on ``lo .. hi`` (Angstrom) stand on a continuum step?

    An emission line sits on the continuum around it: the continuum-subtracted flux ``resid``
    averages zero just blueward and just redward of it. A continuum break (the 4000 A break of
    an old population) that a smooth continuum cannot follow leaves a negative residual on one
    side and a positive one on the other, and lines of free width fitted there take the step
    for emission. Compared are the inverse-variance weighted means of ``resid`` over ``band``
    Angstrom (default: the feature's own extent) on either side, outside ``lo .. hi``.

    A broad hump of residual (a continuum the smooth fit runs under) lifts both sides instead.

    Returns None when a side has fewer than ``min_pixels`` usable pixels; otherwise a dict with
    the means ``blue``, ``red``, their difference's error ``err``, ``step`` = (red - blue) /
    ``peak`` (the fitted feature's peak height), ``significance`` = (red - blue) / err, and for
    the side further from zero its mean over ``peak`` (``level``) and over its own error
    (``level_significance``).

    >>> import numpy as np
    >>> w = np.arange(6800.0, 7200.0, 1.0)
    >>> line = 2.0 * np.exp(-0.5 * ((w - 7000.0) / 5.0) ** 2)
    >>> flat = sideband_test(w, line, np.full(w.size, 100.0), 6980.0, 7020.0, 2.0)
    >>> abs(flat["significance"]) < 1
    True
    >>> stepped = sideband_test(w, line + np.where(w > 6990.0, 0.5, -0.5), np.full(w.size, 100.0),
    ...                         6980.0, 7020.0, 2.0)
    >>> round(stepped["step"], 2), stepped["significance"] > 10, round(stepped["level"], 2)
    (0.5, True, 0.25)
    """
    wave = np.asarray(wave, float)
    resid = np.asarray(resid, float)
    ivar = np.asarray(ivar, float)
    band = float(hi - lo) if band is None else float(band)
    means = []
    for a, b in ((lo - band, lo), (hi, hi + band)):
        i0, i1 = np.searchsorted(wave, (a, b))
        w, r = ivar[i0:i1], resid[i0:i1]
        ok = w > 0
        if ok.sum() < min_pixels:
            return None
        sw = float(np.sum(w[ok]))
        means.append((float(np.sum(w[ok] * r[ok]) / sw), 1.0 / math.sqrt(sw)))
    (blue, eb), (red, er) = means
    err = math.hypot(eb, er)
    side = int(abs(red) > abs(blue))  # the side further from zero
    level, level_err = means[side]
    scale = peak if peak > 0 else math.inf
    return dict(blue=blue, red=red, err=err, step=(red - blue) / scale, significance=(red - blue) / err,
                level=level / scale, level_significance=level / level_err)
