"""Realistic mock spectra with known answers, for tests, benchmarks and the demo data.

:func:`mock_spectrum` builds one noiseless model of a given class on a log-lambda grid,
adds night-sky residuals and noise, and returns the :class:`~zsieve.spectrum.Spectrum`
together with a ``truth`` dictionary (the redshift, the lines put in, the noise level and
the Cramer-Rao bound on z of that very model). :func:`mock_set` yields a reproducible mix.

Classes (``kind``)
------------------
``'emission-galaxy'``
    weak blue power-law continuum with a mild 4000 A break, narrow emission lines from
    ``linelists/galaxy_emission.ecsv`` with fixed doublet ratios, case-B Balmer ratios,
    dust attenuation (Calzetti et al. 2000, ApJ 533, 682) and a 0.15 dex scatter of the
    other line ratios; rest equivalent width of the strongest line 20-200 A.
``'absorption-galaxy'``
    red continuum with a 4000 A break (D4000 1.5-2.2) and absorption lines (Ca II H/K,
    G band, Mg b, Na D, Balmer series) broadened by a 150-250 km/s velocity dispersion.
``'quasar'``
    power-law continuum (f_nu ~ nu^alpha, alpha -0.8..-0.2; composite value -0.44, Vanden
    Berk et al. 2001, from memory), broad lines with FWHM 2000-6000 km/s at the mean
    velocity offsets of ``linelists/quasar.ecsv`` plus a random scatter, narrow [O III]
    and [O II], and the Ly-alpha forest blueward of Ly-alpha with the mean transmission
    exp(-0.0018 (1+z)^3.92) (Faucher-Giguere et al. 2008, from memory).
``'star'``
    blackbody continuum of 4500-9000 K with Balmer, Ca II, Ca I, G band, Mg b, Na D and
    Ca II triplet absorption; hot stars get stronger Balmer lines, cool stars stronger
    metal lines; ``z`` is v/c with |v| < 300 km/s in the default mixes.
``'noise'``
    pure noise around a featureless, possibly sloped level (``truth['z']`` is NaN).
``'single-line'``
    one emission line only (by default one of Ly-alpha, H-beta, [O III] 5008, H-alpha:
    the ambiguous case) on a flat faint continuum.

Signal-to-noise (``snr``)
-------------------------
The base noise is Gaussian, independent of the signal (background-limited), with a
per-pixel sigma ``sigma0 * f(lambda)`` where ``f`` is 1 in the middle of the grid and
rises towards both ends (``edge_noise``, by default to 2.5x at the very edge), as a
spectrograph's throughput falls. ``sigma0`` is fixed by ``snr``:

* ``'emission-galaxy'`` and ``'single-line'``: ``snr`` is the optimal (matched-filter)
  S/N of the integrated flux of the strongest line inside the grid,
  ``snr = sqrt(sum_i (m_i / sigma_i)^2)`` with ``m`` that line's noiseless profile;
* ``'absorption-galaxy'``, ``'quasar'``, ``'star'`` and ``'noise'``: ``snr`` is the median
  over the grid of the per-pixel S/N of the noiseless model, ``median(m_i / sigma_i)``
  (for ``'noise'`` the featureless level; ``snr=0`` gives zero-mean noise).

Both are defined with the base (sky-free) noise. With ``sky=True`` night-sky lines add
variance at their (vacuum, observed-frame) positions, a few of them leave residual spikes
in the flux that the reported sigma does not cover (as a real sky subtraction does), and
the telluric O2 and H2O bands partly absorb the signal; all of it is recorded in truth.

Wavelength medium
-----------------
A :class:`Spectrum` is always in vacuum. ``medium='air'`` simulates an instrument whose
pixels are uniform in log **air** wavelength over ``wave_range`` (given in air): the
returned spectrum holds the vacuum wavelengths of those pixels and ``meta.medium='air'``,
exactly as a reader returns an air-wavelength file. :func:`to_air_grid` gives back the air
wavelengths of the pixels for writing such a file.

Examples
--------
>>> import numpy as np
>>> spec, truth = mock_spectrum("emission-galaxy", 0.3, 20.0, np.random.default_rng(1))
>>> spec.n_pix, truth["kind"], truth["z"]
(4350, 'emission-galaxy', 0.3)
>>> bool(0 < truth["z_bound"] < 1e-4)
True
>>> [t["kind"] for _, t in mock_set(3, seed=7, kinds=("star", "quasar"))] == \\
...     [t["kind"] for _, t in mock_set(3, seed=7, kinds=("star", "quasar"))]
True
"""

from __future__ import annotations

import functools
import logging
import math
import os
from pathlib import Path
from typing import Iterator

import numpy as np
from scipy.special import expit, ndtr

from .lines import BUNDLED_LISTS, air_to_vacuum, load_linelist, sky_features, vacuum_to_air
from .spectrum import Spectrum, SpectrumMeta

__all__ = [
    "KINDS",
    "C_KMS",
    "DEFAULT_Z_RANGES",
    "DEFAULT_SNR_RANGES",
    "SINGLE_LINE_CHOICES",
    "log_grid",
    "pixel_edges",
    "gaussian_pixel_profile",
    "calzetti_k",
    "mock_spectrum",
    "mock_set",
    "to_air_grid",
]

log = logging.getLogger(__name__)

#: Speed of light in km/s (exact, SI definition).
C_KMS = 299792.458

KINDS = ("emission-galaxy", "absorption-galaxy", "quasar", "star", "noise", "single-line")

#: Redshift ranges of the default mix (star: |v| < 300 km/s).
DEFAULT_Z_RANGES = {
    "emission-galaxy": (0.02, 1.5),
    "absorption-galaxy": (0.02, 0.9),
    "quasar": (0.3, 4.0),
    "star": (-0.001, 0.001),
    "noise": (float("nan"), float("nan")),
    "single-line": (0.02, 1.0),
}

#: S/N ranges of the default mix (drawn uniformly in log S/N); see the module docstring.
DEFAULT_SNR_RANGES = {
    "emission-galaxy": (4.0, 40.0),
    "absorption-galaxy": (2.0, 20.0),
    "quasar": (2.0, 20.0),
    "star": (3.0, 40.0),
    "noise": (0.0, 5.0),
    "single-line": (6.0, 40.0),
}

#: Lines a lone emission line is drawn from: each one can pass for another (common practice).
SINGLE_LINE_CHOICES = ("Ly-alpha", "H-beta", "[O III] 5008", "H-alpha")

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_LYA = 1215.670
_LYLIMIT = 911.75


# ----------------------------------------------------------------------------- grids
def log_grid(wave_range=(3600.0, 9800.0), dlog10: float = 1e-4) -> np.ndarray:
    """Pixel centres uniform in log10 wavelength from ``wave_range[0]`` up to ``wave_range[1]``.

    >>> w = log_grid((4000.0, 4002.0), 1e-4)
    >>> w.size, float(round(np.log10(w[1] / w[0]), 12))
    (3, 0.0001)
    """
    lo, hi = float(wave_range[0]), float(wave_range[1])
    if not (0 < lo < hi) or dlog10 <= 0:
        raise ValueError(f"need 0 < wave_range[0] < wave_range[1] and dlog10 > 0 (got {wave_range}, {dlog10})")
    n = int(math.floor(math.log10(hi / lo) / dlog10 + 1e-9)) + 1
    return 10.0 ** (math.log10(lo) + dlog10 * np.arange(n))


def pixel_edges(wave: np.ndarray) -> np.ndarray:
    """Pixel boundaries (``n + 1`` values): midpoints inside, mirrored half-steps at the ends."""
    w = np.asarray(wave, dtype=float)
    if w.size == 1:
        return np.array([w[0] * (1 - 1e-4), w[0] * (1 + 1e-4)])
    mid = 0.5 * (w[1:] + w[:-1])
    return np.concatenate(([w[0] - (mid[0] - w[0])], mid, [w[-1] + (w[-1] - mid[-1])]))


def gaussian_pixel_profile(edges: np.ndarray, center, sigma) -> np.ndarray:
    """Unit-area Gaussian(s) averaged over pixels, per Angstrom.

    ``center`` and ``sigma`` (Angstrom) may be arrays of L lines; the result then has shape
    ``(L, n_pix)``. Integrating over pixel edges keeps the flux right for narrow lines.

    >>> e = np.arange(0.0, 101.0)
    >>> p = gaussian_pixel_profile(e, 50.3, 1.2)
    >>> round(float(np.sum(p * np.diff(e))), 10)
    1.0
    """
    c = np.atleast_1d(np.asarray(center, dtype=float))[:, None]
    s = np.atleast_1d(np.asarray(sigma, dtype=float))[:, None]
    cdf = ndtr((edges[None, :] - c) / s)
    prof = np.diff(cdf, axis=1) / np.diff(edges)[None, :]
    return prof if np.ndim(center) else prof[0]


def _profile_sum(edges, centers, sigmas, weights, nsig: float = 8.0) -> np.ndarray:
    """Sum of ``weights[k]`` x unit-area pixel-averaged Gaussians, each only within +-nsig sigma.

    Same result as ``weights @ gaussian_pixel_profile(...)`` to ~1e-15, at a fraction of
    the cost (a short loop over lines, vectorised over pixels).
    """
    out = np.zeros(edges.size - 1)
    centers = np.atleast_1d(np.asarray(centers, dtype=float))
    sigmas = np.broadcast_to(np.asarray(sigmas, dtype=float), centers.shape)
    weights = np.broadcast_to(np.asarray(weights, dtype=float), centers.shape)
    first = np.clip(np.searchsorted(edges, centers - nsig * sigmas) - 1, 0, out.size)
    last = np.clip(np.searchsorted(edges, centers + nsig * sigmas) + 1, 0, out.size)
    for c, sg, w, a, b in zip(centers, sigmas, weights, first, last):
        if w == 0.0 or b <= a:
            continue
        e = edges[a : b + 1]
        out[a:b] += w * np.diff(ndtr((e - c) / sg)) / np.diff(e)
    return out


def calzetti_k(wave_rest) -> np.ndarray:
    """Calzetti et al. (2000, ApJ 533, 682) attenuation curve k(lambda), R_V = 4.05 (from memory).

    Valid 1200 A - 2.2 micron; extrapolated linearly in 1/lambda outside.

    >>> round(float(calzetti_k(5500.0)), 2)    # k(V) ~ R_V
    4.05
    """
    x = 1e4 / np.asarray(wave_rest, dtype=float)  # inverse micron
    blue = 2.659 * (-2.156 + 1.509 * x - 0.198 * x**2 + 0.011 * x**3) + 4.05
    red = 2.659 * (-1.857 + 1.040 * x) + 4.05
    return np.where(x > 1.0 / 0.63, blue, red)


def to_air_grid(spec: Spectrum):
    """Air wavelengths of the pixels of ``spec`` with its flux and sigma, for an air file.

    Returns ``(wave_air, flux, sigma)``. For a mock made with ``medium='air'`` the air grid
    is uniform in log wavelength again (to ~1e-10 relative).
    """
    return np.asarray(vacuum_to_air(spec.wavelength), dtype=float), spec.flux.copy(), spec.sigma.copy()


# ----------------------------------------------------------------------- line tables
class _Lines:
    """Plain numpy columns of a line list (cheaper than an astropy Table in the inner loop)."""

    def __init__(self, cols: dict):
        self.cols = cols

    def __len__(self):
        return int(next(iter(self.cols.values())).size)

    def __getitem__(self, key):
        if isinstance(key, str):
            return self.cols[key]
        return _Lines({k: v[key] for k, v in self.cols.items()})


@functools.lru_cache(maxsize=16)
def _cached_lines(key: str) -> _Lines:
    tab = load_linelist(key)
    cols = {c: np.asarray(tab[c]) for c in tab.colnames}
    for c in cols.values():
        c.setflags(write=False)
    return _Lines(cols)


def _line_table(name_or_path) -> _Lines:
    key = os.fspath(name_or_path)
    return _cached_lines(key if key in BUNDLED_LISTS else str(Path(key).expanduser().resolve()))


@functools.lru_cache(maxsize=1)
def _cached_sky() -> _Lines:
    tab = sky_features()
    return _Lines({c: np.asarray(tab[c]) for c in ("name", "wave_lo_vac", "wave_hi_vac", "kind", "strength")})


def _lines_for(list_name: str, column: str, linelist=None):
    tab = _line_table(linelist if linelist is not None else list_name)
    if column in tab.cols:
        tab = tab[tab[column] > 0]
    return tab


def _draw_loguniform(rng, lo, hi):
    return float(math.exp(rng.uniform(math.log(lo), math.log(hi))))


class _Model:
    """A noiseless spectrum as a function of z with every other parameter frozen."""

    def __init__(self, edges, obs_transmission, continuum, lines):
        # continuum(wave_rest) -> flux density at rest wavelength; lines: dict of arrays
        self.edges = edges
        self.wave = np.sqrt(edges[1:] * edges[:-1])
        self.trans = obs_transmission  # fixed in the observed frame (forest, telluric)
        self.continuum = continuum
        self.lines = lines

    def components(self, z, per_lines: bool = True):
        """(continuum, emission sum, absorption factor, per-line emission profiles)."""
        a = 1.0 + z
        cont = self.continuum(self.wave / a)
        ln = self.lines
        emis = np.zeros_like(self.wave)
        absorb = np.ones_like(self.wave)
        per_line = None
        if ln["n_em"]:
            centers = ln["em_rest"] * a * (1.0 + ln["em_offset"] / C_KMS)
            sig = centers * ln["em_sigma_v"] / C_KMS
            # line flux scales with the continuum at the line (fixed equivalent width)
            flux = ln["em_ew"] * a * self.continuum(ln["em_rest"])
            if per_lines:
                per_line = gaussian_pixel_profile(self.edges, centers, sig) * np.asarray(flux)[:, None]
                emis = per_line.sum(axis=0)
            else:
                emis = _profile_sum(self.edges, centers, sig, flux)
        if ln["n_ab"]:
            centers = ln["ab_rest"] * a
            sig = centers * ln["ab_sigma_v"] / C_KMS
            # optical depth with unsaturated equivalent width ew (observed = ew * (1+z))
            tau = _profile_sum(self.edges, centers, sig, ln["ab_ew"] * a)
            absorb = np.exp(-tau)
        return cont, emis, absorb, per_line

    def __call__(self, z):
        cont, emis, absorb, _ = self.components(z, per_lines=False)
        return (cont * absorb + emis) * self.trans


def _empty_lines():
    z = np.zeros(0)
    return dict(n_em=0, n_ab=0, em_rest=z, em_offset=z, em_sigma_v=z, em_ew=z,
                ab_rest=z, ab_sigma_v=z, ab_ew=z, names_em=[], names_ab=[])


def _sigma_v(fwhm_kms, resolution):
    """Gaussian sigma (km/s) of an intrinsic FWHM convolved with the resolution FWHM c/R."""
    inst = C_KMS / float(resolution)
    return np.sqrt(np.asarray(fwhm_kms, dtype=float) ** 2 + inst**2) / _FWHM_PER_SIGMA


# ------------------------------------------------------------------ per-class builders
def _emission_galaxy(rng, resolution, linelist):
    tab = _lines_for("galaxy_emission", "strength_emission_galaxy", linelist)
    strength = np.asarray(tab["strength_emission_galaxy"], dtype=float).copy()
    rest = np.asarray(tab["wave_vac"], dtype=float)
    names = [str(n) for n in tab["name"]]
    species = np.asarray(tab["species"], dtype=str)
    groups = np.asarray(tab["group"], dtype=str)
    # one factor per group, one shared by all hydrogen lines, one per other line
    keys = np.where(species == "H I", "__H I__", np.where(groups != "", groups, np.asarray(names)))
    keys[np.asarray(names) == "Ly-alpha"] = "__Lya__"
    factors = {}
    for k in dict.fromkeys(keys):
        spread = 0.0 if k == "__H I__" else (0.4 if k == "__Lya__" else 0.15)
        factors[k] = 10.0 ** rng.normal(0.0, spread)
    strength *= np.array([factors[k] for k in keys])
    ebv = rng.uniform(0.0, 0.4)
    strength *= 10.0 ** (-0.4 * ebv * calzetti_k(rest))
    strength /= strength.max()
    beta = rng.uniform(-2.2, -1.0)
    brk = rng.uniform(0.05, 0.2)

    def continuum(wr):
        step = 1.0 - brk * expit((4000.0 - np.asarray(wr)) / 40.0)
        return (np.asarray(wr) / 5000.0) ** beta * step

    ew_max = _draw_loguniform(rng, 20.0, 200.0)  # rest EW of the strongest line, A
    # equivalent widths relative to the continuum at each line
    ew = ew_max * strength * continuum(rest[np.argmax(strength)]) / continuum(rest)
    fwhm = np.asarray(tab["width_kms"], dtype=float) * rng.uniform(0.6, 1.6)
    ln = _empty_lines()
    ln.update(n_em=len(tab), em_rest=rest, em_offset=np.zeros(len(tab)),
              em_sigma_v=_sigma_v(fwhm, resolution), em_ew=ew, names_em=names)
    params = dict(continuum_slope_flambda=beta, break_4000=brk, ebv_gas=ebv, ew_strongest_rest=ew_max,
                  fwhm_kms=float(np.median(fwhm)) if len(fwhm) else 0.0)
    return continuum, ln, params


def _absorption_galaxy(rng, resolution, linelist):
    tab = _lines_for("galaxy_absorption", "strength_absorption_galaxy", linelist)
    rest = np.asarray(tab["wave_vac"], dtype=float)
    sigma_disp = rng.uniform(150.0, 250.0)
    # the list's widths hold a 200 km/s dispersion; scale them to the drawn one
    fwhm = np.asarray(tab["width_kms"], dtype=float) * sigma_disp / 200.0
    ew_ref = rng.uniform(8.0, 14.0)  # Ca II K rest EW, A (common practice)
    ew = ew_ref * np.asarray(tab["strength_absorption_galaxy"], dtype=float) * 10.0 ** rng.normal(0, 0.08, len(tab))
    d4000 = rng.uniform(1.5, 2.2)
    alpha = rng.uniform(-0.6, 0.3)

    def continuum(wr):
        wr = np.asarray(wr, dtype=float)
        blue = 1.0 / d4000
        step = blue + (1.0 - blue) * expit((wr - 4000.0) / 25.0)
        uv = expit((wr - 2900.0) / 150.0)  # old populations are faint in the UV
        return (wr / 5500.0) ** alpha * step * (0.08 + 0.92 * uv)

    ln = _empty_lines()
    ln.update(n_ab=len(tab), ab_rest=rest, ab_sigma_v=_sigma_v(fwhm, resolution), ab_ew=ew,
              names_ab=[str(n) for n in tab["name"]])
    params = dict(velocity_dispersion_kms=sigma_disp, d4000=d4000, continuum_slope_flambda=alpha,
                  ew_ca_k_rest=ew_ref)
    return continuum, ln, params


def _star(rng, resolution, linelist):
    tab = _lines_for("stellar", "strength_star", linelist)
    rest = np.asarray(tab["wave_vac"], dtype=float)
    temp = rng.uniform(4500.0, 9000.0)
    hyd = np.asarray(tab["species"], dtype=str) == "H I"
    scale = np.where(hyd, np.clip((temp / 6000.0) ** 2, 0.3, 2.5), np.clip((6000.0 / temp) ** 2, 0.3, 2.0))
    ew = 6.0 * np.asarray(tab["strength_star"], dtype=float) * scale * 10.0 ** rng.normal(0, 0.08, len(tab))
    fwhm = np.asarray(tab["width_kms"], dtype=float) * rng.uniform(0.8, 1.2)
    hc_k = 1.4387769e8  # h c / k in Angstrom K (CODATA, from memory)

    def continuum(wr):
        wr = np.asarray(wr, dtype=float)
        x = hc_k / (wr * temp)
        ref = hc_k / (5500.0 * temp)
        return (5500.0 / wr) ** 5 * np.expm1(ref) / np.expm1(x)

    ln = _empty_lines()
    ln.update(n_ab=len(tab), ab_rest=rest, ab_sigma_v=_sigma_v(fwhm, resolution), ab_ew=ew,
              names_ab=[str(n) for n in tab["name"]])
    return continuum, ln, dict(temperature_k=temp)


def _quasar(rng, resolution, linelist):
    tab = _lines_for("quasar", "strength_quasar", linelist)
    narrow = _lines_for("galaxy_emission", "strength_quasar") if linelist is None else tab[:0]
    rest = np.concatenate([np.asarray(tab["wave_vac"], float), np.asarray(narrow["wave_vac"], float)])
    strength = np.concatenate([np.asarray(tab["strength_quasar"], float), np.asarray(narrow["strength_quasar"], float)])
    strength = strength * 10.0 ** rng.normal(0.0, 0.12, strength.size)
    off_mean = np.concatenate([np.asarray(tab["qso_offset_kms"], float), np.zeros(len(narrow))])
    scatter = np.concatenate([np.maximum(100.0, 0.6 * np.abs(np.asarray(tab["qso_offset_kms"], float))),
                              np.full(len(narrow), 30.0)])
    offset = off_mean + rng.normal(0.0, 1.0, rest.size) * scatter
    width_scale = rng.uniform(0.6, 1.3)
    fwhm_broad = np.clip(np.asarray(tab["width_kms"], float) * width_scale * rng.uniform(0.9, 1.1, len(tab)),
                         2000.0, 6000.0)
    fwhm = np.concatenate([fwhm_broad, np.full(len(narrow), rng.uniform(250.0, 500.0))])
    alpha_nu = rng.uniform(-0.8, -0.2)
    alpha_lam = -(2.0 + alpha_nu)

    def continuum(wr):
        wr = np.asarray(wr, dtype=float)
        return (wr / 3000.0) ** alpha_lam

    ew_lya = rng.uniform(50.0, 120.0)  # rest EW of Ly-alpha, A (composite ~ 90, from memory)
    flux_lya_rest = ew_lya * continuum(_LYA)
    ln = _empty_lines()
    # line fluxes relative to Ly-alpha, held as rest equivalent widths on this continuum
    ew = flux_lya_rest * strength / continuum(rest)
    names = [str(n) for n in tab["name"]] + [str(n) for n in narrow["name"]]
    ln.update(n_em=rest.size, em_rest=rest, em_offset=offset, em_sigma_v=_sigma_v(fwhm, resolution),
              em_ew=ew, names_em=names)
    params = dict(alpha_nu=alpha_nu, ew_lya_rest=ew_lya, fwhm_scale=width_scale)
    return continuum, ln, params


def _single_line(rng, resolution, wave_lo, wave_hi, z, line):
    tab = _line_table("galaxy_emission")
    if line is None:
        ok = [n for n in SINGLE_LINE_CHOICES
              if wave_lo * 1.01 < float(tab[tab["name"] == n]["wave_vac"][0]) * (1 + z) < wave_hi * 0.99]
        if not ok:
            raise ValueError(f"none of {SINGLE_LINE_CHOICES} falls inside the grid at z={z}")
        line = ok[int(rng.integers(len(ok)))]
    rows = tab[tab["name"] == line]
    if len(rows) == 0:
        raise ValueError(f"unknown emission line {line!r} for a single-line mock")
    rest = float(rows["wave_vac"][0])
    fwhm = float(rows["width_kms"][0]) * rng.uniform(0.6, 2.0)
    ew = _draw_loguniform(rng, 30.0, 300.0)

    def continuum(wr):
        return np.ones_like(np.asarray(wr, dtype=float))

    ln = _empty_lines()
    ln.update(n_em=1, em_rest=np.array([rest]), em_offset=np.zeros(1),
              em_sigma_v=_sigma_v([fwhm], resolution), em_ew=np.array([ew]), names_em=[line])
    return continuum, ln, dict(line=line, fwhm_kms=fwhm, ew_rest=ew)


def _second_feature_snr(profiles, inside, centres, sigma_v, blend: float = 2.5) -> float:
    """Optimal S/N of the second strongest separate feature: lines whose centres lie within
    ``blend`` times their Gaussian sigma of each other form one feature (a blend such as
    [O II] 3727/3730 at modest resolution), whose S/N is that of their summed profile.
    ``profiles`` are the lines' noiseless profiles over the noise sigma; whether a second
    feature is there says whether a pattern can be found at all."""
    idx = np.flatnonzero(inside)
    if idx.size < 2:
        return 0.0
    idx = idx[np.argsort(centres[idx])]
    c = centres[idx]
    gap = np.diff(c) / c[1:] * C_KMS
    join = gap < blend * np.maximum(sigma_v[idx][1:], sigma_v[idx][:-1])
    label = np.concatenate([[0], np.cumsum(~join)])
    feat = np.zeros((label[-1] + 1, profiles.shape[1]))
    np.add.at(feat, label, profiles[idx])
    snr = np.sort(np.sqrt(np.sum(feat**2, axis=1)))[::-1]
    return float(snr[1]) if snr.size > 1 else 0.0


# ----------------------------------------------------------------------- sky and forest
def _forest_transmission(rng, wave, z, lyman_leak=None):
    """Ly-alpha forest (and a Lyman-limit drop) in the observed frame; 1 redward of Ly-alpha.

    Below the Lyman limit the transmission is multiplied by ``lyman_leak`` if given, else by
    exp(-tau) with tau uniform in 0.5-3 (a quasar's own light ionises its surroundings)."""
    trans = np.ones_like(wave)
    lya_obs = _LYA * (1.0 + z)
    region = wave < lya_obs
    if not region.any():
        return trans, 0.0
    z_abs = wave / _LYA - 1.0
    # absorbers: Poisson per pixel, optical depths from a power law, Doppler b ~ 20-40 km/s
    n_pix = wave.size
    dv_pix = C_KMS * float(np.median(np.diff(np.log(wave)))) if n_pix > 1 else 69.0
    density = 0.8 * (dv_pix / 69.0)  # mean absorbers per pixel
    counts = rng.poisson(density, n_pix) * region
    tau0 = np.zeros(n_pix)
    # column densities dN/dN_HI ~ N_HI^-1.5 (common practice), so optical depths likewise
    n_abs = int(np.count_nonzero(counts))
    np.add.at(tau0, np.nonzero(counts)[0], np.minimum(rng.pareto(0.5, n_abs) + 1.0, 1e4) * 0.02)
    b = rng.uniform(20.0, 40.0)
    half = int(math.ceil(5 * b / dv_pix)) + 1
    k = np.exp(-0.5 * (np.arange(-half, half + 1) * dv_pix / b) ** 2)
    tau = np.convolve(tau0, k, mode="same")
    # scale so that the mean transmission follows exp(-0.0018 (1+z)^3.92) (Faucher-Giguere 2008)
    tau_eff = 0.0018 * np.clip(1.0 + z_abs, 1.0, None) ** 3.92
    shape = tau * tau_eff / max(float(np.mean(tau[region])), 1e-12)
    target = float(np.mean(np.exp(-tau_eff[region])))
    lo_s, hi_s = 0.0, 50.0
    for _ in range(40):  # bisection on one overall scale
        mid = 0.5 * (lo_s + hi_s)
        if np.mean(np.exp(-mid * shape[region])) > target:
            lo_s = mid
        else:
            hi_s = mid
    scale = 0.5 * (lo_s + hi_s)
    trans = np.where(region, np.exp(-scale * shape), 1.0)
    # Ly-beta forest and the Lyman limit make the far blue side darker still
    trans = np.where(wave < 1025.72 * (1 + z), trans * 0.7, trans)
    leak = math.exp(-rng.uniform(0.5, 3.0)) if lyman_leak is None else float(lyman_leak)
    trans = np.where(wave < _LYLIMIT * (1 + z), trans * leak, trans)
    return trans, float(np.mean(trans[region]))


def _sky_terms(rng, wave, edges, resolution, sigma0, level, spike_prob):
    """Extra sky sigma, residual spikes and telluric transmission on the observed grid."""
    sky = _cached_sky()
    lines = sky[sky["kind"] == "line"]
    bands = sky[sky["kind"] == "band"]
    inwin = (lines["wave_lo_vac"] > edges[0]) & (lines["wave_lo_vac"] < edges[-1])
    lines = lines[inwin]
    extra = np.zeros_like(wave)
    spikes = np.zeros_like(wave)
    spike_log = []
    if len(lines):
        cen = np.asarray(lines["wave_lo_vac"], dtype=float)
        sig = cen / float(resolution) / _FWHM_PER_SIGMA
        peak = sig * math.sqrt(2 * math.pi)  # unit-area profile x peak = unit-peak profile
        strength = np.asarray(lines["strength"], dtype=float)
        # photon noise of the sky line: sigma_extra^2 ~ line flux, in units of sigma0
        extra = sigma0 * level * np.sqrt(_profile_sum(edges, cen, sig, strength * peak))
        hit = rng.random(len(lines)) < spike_prob * np.sqrt(strength)
        amp = rng.normal(0.0, 2.5, len(lines)) * sigma0 * level * np.sqrt(strength)
        amp[~hit] = 0.0
        spikes = _profile_sum(edges, cen, sig, amp * peak)
        spike_log = [dict(name=str(n), wave_vac=float(w), amplitude=float(a))
                     for n, w, a in zip(lines["name"], cen, amp) if a != 0.0]
    trans = np.ones_like(wave)
    for name, lo, hi, strength in zip(bands["name"], bands["wave_lo_vac"], bands["wave_hi_vac"],
                                      bands["strength"]):  # a handful of bands: a short loop
        inside = expit((wave - lo) / 1.5) * expit((hi - wave) / 1.5)
        if str(name).startswith("OH"):  # unresolved faint OH lines: a little more noise
            extra = np.hypot(extra, sigma0 * level * 0.25 * float(strength) * inside)
        else:  # imperfectly corrected telluric absorption, up to 30% deep
            trans *= 1.0 - inside * 0.3 * float(strength) * rng.uniform(0.3, 1.0)
    return extra, spikes, trans, spike_log


# ---------------------------------------------------------------------------- public
def mock_spectrum(
    kind: str,
    z: float,
    snr: float,
    rng: np.random.Generator | int | None = None,
    *,
    wave_range=(3600.0, 9800.0),
    resolution: float = 2000.0,
    dlog10: float = 1e-4,
    dlambda: float | None = None,
    medium: str = "vacuum",
    sky: bool = True,
    sky_level: float = 3.0,
    spike_prob: float = 0.2,
    edge_noise: float = 1.5,
    line: str | None = None,
    linelist=None,
    slope: float | None = None,
    meta: SpectrumMeta | None = None,
):
    """One mock spectrum and what went into it.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    z : float
        Systemic redshift (ignored for ``'noise'``; for a star, v/c).
    snr : float
        Signal-to-noise as defined in the module docstring (line S/N for emission galaxies
        and single lines, median per-pixel S/N otherwise).
    rng : numpy.random.Generator or int, optional
        Source of randomness (an int seeds a new generator).
    wave_range : (float, float)
        Grid limits in Angstrom, in ``medium``.
    resolution : float
        Resolving power R = lambda / FWHM of the line-spread function.
    dlog10 : float
        Pixel size in log10 wavelength (1e-4 = 69 km/s, as in SDSS).
    dlambda : float, optional
        If given, a grid uniform in wavelength with this step (Angstrom) instead.
    medium : {'vacuum', 'air'}
        Medium in which the pixel grid is uniform (see the module docstring).
    sky : bool
        Add night-sky line noise, residual spikes and telluric absorption.
    sky_level : float
        Peak extra sky sigma at the brightest sky line, in units of the base sigma.
    spike_prob : float
        Chance that a sky line of strength 1 leaves a residual spike.
    edge_noise : float
        How much the noise rises at the grid ends (sigma x ``1 + edge_noise`` at the edge).
    line : str, optional
        For ``'single-line'``: the emission line (a ``name`` of the galaxy emission list).
    linelist : str or path, optional
        A line list to use instead of the bundled one of the class.
    slope : float, optional
        For ``'noise'``: fractional change of the level across the grid (random if None).
    meta : SpectrumMeta, optional
        Metadata for the spectrum (``medium`` is set from ``medium``).

    Returns
    -------
    (Spectrum, dict)
        The spectrum (vacuum Angstrom) and ``truth`` with keys ``z, kind, snr, snr_second``
        (emission-line kinds: the optimal S/N of the second strongest separate feature, blends
        counted once; else nan), ``z_bound, sigma0, lines`` (one dict per line put in: name,
        kind, wave_rest, wave_obs, fwhm_kms, flux or ew_obs), ``params`` (drawn class parameters), ``sky_spikes``,
        ``medium``, ``resolution``, ``model`` (the noiseless flux) and ``sigma_base``.
    """
    from .engine.bound import cramer_rao_sigma_z

    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS} (got {kind!r})")
    if medium not in ("vacuum", "air"):
        raise ValueError(f"medium must be 'vacuum' or 'air' (got {medium!r})")
    if snr < 0 or not np.isfinite(snr):
        raise ValueError(f"snr must be finite and >= 0 (got {snr})")
    if not isinstance(rng, np.random.Generator):
        rng = np.random.default_rng(rng)
    if dlambda is not None:
        if not dlambda > 0:
            raise ValueError(f"dlambda must be > 0 (got {dlambda})")
        grid = np.arange(float(wave_range[0]), float(wave_range[1]) + 1e-9 * dlambda, float(dlambda))
    else:
        grid = log_grid(wave_range, dlog10)
    wave = np.asarray(air_to_vacuum(grid), dtype=float) if medium == "air" else grid
    edges = pixel_edges(wave)
    z = float("nan") if kind == "noise" else float(z)

    trans = np.ones_like(wave)
    params: dict = {}
    if kind == "emission-galaxy":
        continuum, ln, params = _emission_galaxy(rng, resolution, linelist)
    elif kind == "absorption-galaxy":
        continuum, ln, params = _absorption_galaxy(rng, resolution, linelist)
    elif kind == "star":
        continuum, ln, params = _star(rng, resolution, linelist)
    elif kind == "quasar":
        continuum, ln, params = _quasar(rng, resolution, linelist)
        forest, mean_t = _forest_transmission(rng, wave, z)
        trans = trans * forest
        params["forest_mean_transmission"] = mean_t
    elif kind == "single-line":
        continuum, ln, params = _single_line(rng, resolution, wave[0], wave[-1], z, line)
        if params["line"] == "Ly-alpha":  # a Ly-alpha emitter: forest and Lyman break too
            forest, mean_t = _forest_transmission(rng, wave, z, lyman_leak=rng.uniform(0.0, 0.1))
            trans = trans * forest
            params["forest_mean_transmission"] = mean_t
    else:  # noise: a featureless level, scaled below so that its median S/N is snr
        s = rng.uniform(-0.5, 0.5) if slope is None else float(slope)
        x0, span = float(np.median(wave)), float(wave[-1] - wave[0])

        def continuum(wr, _s=s):
            return 1.0 + _s * (np.asarray(wr, dtype=float) - x0) / span

        ln = _empty_lines()
        params = dict(slope=s)

    # base noise shape: 1 in the middle, rising at both ends
    x = np.linspace(0.0, 1.0, wave.size)
    shape = 1.0 + edge_noise * (np.exp(-x / 0.03) + np.exp(-(1.0 - x) / 0.03))

    zz = 0.0 if kind == "noise" else z
    model = _Model(edges, trans, continuum, ln)
    cont, emis, absorb, per_line = model.components(zz)
    noiseless_no_sky = (cont * absorb + emis) * trans

    snr_second = math.nan
    if kind in ("emission-galaxy", "single-line"):
        if per_line is None:
            raise ValueError(f"no emission line of {kind!r} falls inside the grid at z={z}")
        # strongest line by integrated flux inside the grid
        inside = (ln["em_rest"] * (1 + z) > wave[0]) & (ln["em_rest"] * (1 + z) < wave[-1])
        if not inside.any():
            raise ValueError(f"no emission line of {kind!r} falls inside the grid at z={z}")
        fluxes = np.where(inside, per_line.sum(axis=1), -np.inf)
        strongest = per_line[int(np.argmax(fluxes))] * trans
        info = float(np.sqrt(np.sum((strongest / shape) ** 2)))
        sigma0 = info / snr if snr > 0 else float(np.median(cont))
        snr_second = _second_feature_snr(per_line * trans / shape / sigma0, inside,
                                         ln["em_rest"] * (1 + z), ln["em_sigma_v"])
    else:
        level = float(np.median(noiseless_no_sky / shape))
        if kind == "noise":
            sigma0 = 1.0
            noise_scale = snr / level  # median(level / sigma) = snr; snr = 0: zero-mean noise
        else:
            sigma0 = level / snr if snr > 0 else level
    sigma_base = sigma0 * shape

    spikes = np.zeros_like(wave)
    spike_log: list = []
    sky_sigma = np.zeros_like(wave)
    if sky:
        sky_sigma, spikes, tell, spike_log = _sky_terms(rng, wave, edges, resolution, sigma0, sky_level, spike_prob)
        model.trans = model.trans * tell
    sigma = np.hypot(sigma_base, sky_sigma)
    if kind == "noise":
        base = model(0.0) * noise_scale
        z_bound = float("inf")
    else:
        base = model(z)
        z_bound = cramer_rao_sigma_z(model, z, sigma)
    flux = base + spikes + sigma * rng.standard_normal(wave.size)

    line_log = []
    a = 1.0 + zz
    for i, name in enumerate(ln["names_em"]):
        cen = ln["em_rest"][i] * a * (1 + ln["em_offset"][i] / C_KMS)
        line_log.append(dict(
            name=name, kind="emission", wave_rest=float(ln["em_rest"][i]), wave_obs=float(cen),
            offset_kms=float(ln["em_offset"][i]), fwhm_kms=float(ln["em_sigma_v"][i] * _FWHM_PER_SIGMA),
            flux=float(ln["em_ew"][i] * a * continuum(ln["em_rest"][i])),
            ew_obs=float(ln["em_ew"][i] * a), in_range=bool(wave[0] < cen < wave[-1])))
    for i, name in enumerate(ln["names_ab"]):
        cen = ln["ab_rest"][i] * a
        line_log.append(dict(
            name=name, kind="absorption", wave_rest=float(ln["ab_rest"][i]), wave_obs=float(cen),
            offset_kms=0.0, fwhm_kms=float(ln["ab_sigma_v"][i] * _FWHM_PER_SIGMA),
            flux=0.0, ew_obs=float(ln["ab_ew"][i] * a), in_range=bool(wave[0] < cen < wave[-1])))

    if meta is None:
        meta = SpectrumMeta(source=f"mock:{kind}", object_name=f"mock {kind}", frame="topocentric",
                            format="mock")
    meta = meta.replace(medium=medium, wave_unit="Angstrom")
    spec = Spectrum(wave, flux, sigma, meta=meta)
    truth = dict(
        z=z, kind=kind, snr=float(snr), snr_second=snr_second, z_bound=float(z_bound), sigma0=float(sigma0),
        lines=line_log, params=params, sky_spikes=spike_log, medium=medium,
        resolution=float(resolution), dlog10=None if dlambda is not None else float(dlog10),
        dlambda=None if dlambda is None else float(dlambda), model=base, sigma_base=sigma_base,
    )
    log.debug("mock %s z=%s snr=%.3g: z_bound=%.3g", kind, z, snr, z_bound)
    return spec, truth


def mock_set(
    n: int,
    seed: int = 0,
    *,
    kinds=KINDS,
    weights=None,
    z_ranges: dict | None = None,
    snr_ranges: dict | None = None,
    **kwargs,
) -> Iterator[tuple[Spectrum, dict]]:
    """Yield ``n`` mocks ``(Spectrum, truth)`` of a realistic mix, the same for the same seed.

    Each mock draws from its own child of ``numpy.random.SeedSequence(seed)``, so mock ``i``
    does not depend on ``n``. The class is drawn with ``weights`` (default uniform over
    ``kinds``); z uniformly from ``z_ranges[kind]`` (defaults :data:`DEFAULT_Z_RANGES`; for a
    single line, z is redrawn until the line lies inside the grid) and S/N log-uniformly
    from ``snr_ranges[kind]`` (defaults :data:`DEFAULT_SNR_RANGES`). Other keywords go to
    :func:`mock_spectrum`. ``truth['index']`` and ``truth['seed']`` record the draw.
    """
    kinds = tuple(kinds)
    for k in kinds:
        if k not in KINDS:
            raise ValueError(f"unknown kind {k!r}; choose from {KINDS}")
    zr = dict(DEFAULT_Z_RANGES, **(z_ranges or {}))
    sr = dict(DEFAULT_SNR_RANGES, **(snr_ranges or {}))
    p = None if weights is None else np.asarray(weights, dtype=float) / np.sum(weights)
    children = np.random.SeedSequence(seed).spawn(int(n))
    for i, child in enumerate(children):
        rng = np.random.default_rng(child)
        kind = kinds[int(rng.choice(len(kinds), p=p))]
        lo, hi = sr[kind]
        snr = float(rng.uniform(lo, hi)) if lo <= 0 else _draw_loguniform(rng, lo, hi)
        z = float("nan")
        extra = {}
        if kind != "noise":
            zlo, zhi = zr[kind]
            z = float(rng.uniform(zlo, zhi))
        if kind == "single-line":
            wr = kwargs.get("wave_range", (3600.0, 9800.0))
            tab = _line_table("galaxy_emission")
            name = kwargs.get("line") or SINGLE_LINE_CHOICES[int(rng.integers(len(SINGLE_LINE_CHOICES)))]
            rest = float(tab[tab["name"] == name]["wave_vac"][0])
            zlo = max(zr[kind][0], wr[0] * 1.02 / rest - 1)
            zhi = min(zr[kind][1], wr[1] * 0.98 / rest - 1)
            if zhi <= zlo:  # this line cannot be in the grid at the allowed z: take any that fits
                zlo, zhi = max(0.0, wr[0] * 1.02 / rest - 1), wr[1] * 0.98 / rest - 1
            z = float(rng.uniform(zlo, zhi))
            extra["line"] = name
        kw = dict(kwargs)
        kw.update(extra)
        spec, truth = mock_spectrum(kind, z, snr, rng, **kw)
        truth["index"] = i
        truth["seed"] = int(seed)
        yield spec, truth
