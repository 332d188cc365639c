"""Rest-frame line templates for the Tonry-Davis cross-correlation.

A template is a continuum-free spectrum made only of the lines of one object class, on a
uniform natural-log wavelength grid (so that a redshift is a constant shift of the grid).
Each line is a Gaussian whose FWHM combines the instrument's resolution and the line's
intrinsic width in quadrature, integrated over each pixel. Emission lines are positive,
absorption lines negative; the amplitude of a line is its typical strength in that class
(line flux for emission rows, rest equivalent width for absorption rows, as in the bundled
line lists) divided by its width, so the template has the shape of the expected signal. The
ends of a template are tapered with a cosine bell and its mean is removed.

Classes and the line-list column that feeds them:

=====================  ===============================  =====================================
class                  strength column                  width used
=====================  ===============================  =====================================
``emission-galaxy``    ``strength_emission_galaxy``     ``width_kms`` of the row
``absorption-galaxy``  ``strength_absorption_galaxy``   ``width_kms`` of the row
``quasar``             ``strength_quasar``              ``width_kms`` of the row; the line is
                                                        placed at its mean offset from
                                                        systemic, ``qso_offset_kms``
``star``               ``strength_star``                ``width_kms`` of the row
=====================  ===============================  =====================================

Because the quasar lines sit at their published mean offsets, a correlation peak with the
quasar template estimates the *systemic* redshift.

Examples
--------
>>> from astropy.table import Table
>>> lines = Table({"name": ["H-alpha"], "wave_vac": [6564.614], "kind": ["emission"],
...                "strength_emission_galaxy": [1.0], "width_kms": [100.0]})
>>> bank = build_bank(lines, ("emission-galaxy",), 2.3e-4, 150.0, (6000.0, 7000.0))
>>> bank.classes, bank.flux.shape[0]
(('emission-galaxy',), 1)
>>> wave = bank.wavelength
>>> abs(float(wave[np.argmax(bank.flux[0])]) - 6564.614) < 0.5 * 2.3e-4 * 6564.614
True
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np
from scipy import fft as sfft
from scipy.special import erf

from .prepare import C_KMS

logger = logging.getLogger(__name__)

__all__ = [
    "CLASSES",
    "TemplateBank",
    "build_bank",
    "rest_range_for",
    "render_lines",
    "class_lines",
]

#: The object classes a bank can hold, in the order used by default.
CLASSES = ("emission-galaxy", "absorption-galaxy", "quasar", "star")

#: FWHM / sigma of a Gaussian.
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


def _strength_column(cls: str) -> str:
    return "strength_" + cls.replace("-", "_")


def rest_range_for(wave_min: float, wave_max: float, z_min: float, z_max: float) -> tuple[float, float]:
    """Rest-frame range (Angstrom) seen through an observed window for any z in [z_min, z_max].

    A rest wavelength lambda_r lands in ``[wave_min, wave_max]`` for some allowed z exactly when
    ``wave_min / (1 + z_max) <= lambda_r <= wave_max / (1 + z_min)`` (1 + z = lambda_obs /
    lambda_rest).

    >>> rest_range_for(3600.0, 9800.0, 0.0, 6.0)
    (514.2857142857143, 9800.0)
    """
    if not (z_max > z_min > -1.0):
        raise ValueError(f"need -1 < z_min < z_max, got z_min={z_min}, z_max={z_max}")
    return float(wave_min) / (1.0 + z_max), float(wave_max) / (1.0 + z_min)


def render_lines(loglam, centres, fwhm_kms, amplitudes) -> np.ndarray:
    """Sum of pixel-integrated Gaussian lines on a uniform ln-lambda grid.

    Parameters
    ----------
    loglam : array_like
        Natural log of the pixel-centre wavelengths (uniform step).
    centres : array_like
        Line centres, Angstrom.
    fwhm_kms : array_like
        Total FWHM of each line in km/s (a velocity width is a constant width in ln lambda).
    amplitudes : array_like
        Integrated strength of each line in flux-density x Angstrom (negative for absorption);
        the returned profile is a flux density per Angstrom, a Gaussian in ln(lambda) (its
        integral over wavelength equals the strength to order (sigma_v / c)^2).

    Returns
    -------
    numpy.ndarray
        The line spectrum, one value per pixel (the mean over each pixel of the profile).

    Examples
    --------
    The integral of the profile over wavelength is the line strength:

    >>> ll = np.log(6000.0) + 1e-4 * np.arange(2000)
    >>> f = render_lines(ll, [6500.0], [300.0], [2.5])
    >>> lam = np.exp(ll)
    >>> round(float(np.sum(f * lam * 1e-4)), 4)
    2.5
    """
    loglam = np.asarray(loglam, dtype=float)
    centres = np.atleast_1d(np.asarray(centres, dtype=float))
    fwhm = np.atleast_1d(np.asarray(fwhm_kms, dtype=float)) * np.ones_like(centres)
    amps = np.atleast_1d(np.asarray(amplitudes, dtype=float)) * np.ones_like(centres)
    out = np.zeros(loglam.size)
    if loglam.size < 2 or centres.size == 0:
        return out
    step = float(loglam[1] - loglam[0])
    sig = fwhm / C_KMS / FWHM_PER_SIGMA  # sigma in ln lambda
    lnc = np.log(centres)
    # Each line only touches pixels within 8 sigma: a small window per line (no pixel loop).
    half = int(np.ceil(8.0 * sig.max() / step)) + 2
    offs = np.arange(-half, half + 1)
    icen = np.rint((lnc - loglam[0]) / step).astype(int)
    idx = icen[:, None] + offs[None, :]
    x = loglam[0] + idx * step  # pixel centres in ln lambda, may fall off the grid
    s2 = np.sqrt(2.0) * sig[:, None]
    frac = 0.5 * (erf((x + 0.5 * step - lnc[:, None]) / s2) - erf((x - 0.5 * step - lnc[:, None]) / s2))
    # fraction of the line flux in the pixel / pixel width in Angstrom at the line centre: the
    # profile is symmetric in ln(lambda), so its peak and centroid sit at the line centre
    dens = amps[:, None] * frac / (centres[:, None] * step)
    ok = (idx >= 0) & (idx < loglam.size)
    np.add.at(out, idx[ok], dens[ok])
    return out


def class_lines(linelist, cls: str):
    """The rows of ``linelist`` that a template of class ``cls`` uses.

    Returns ``(names, wave_vac, amplitude, width_kms, offset_kms)`` as numpy arrays, where the
    amplitude is signed (negative for absorption) and ``offset_kms`` is the mean velocity offset
    from systemic (used for quasars only, zero otherwise).
    """
    col = _strength_column(cls)
    if col not in linelist.colnames:
        raise ValueError(f"line list has no column {col!r} for class {cls!r}")
    strength = np.asarray(linelist[col], dtype=float)
    use = np.isfinite(strength) & (strength > 0)
    names = np.asarray(linelist["name"]).astype(str)[use]
    wave = np.asarray(linelist["wave_vac"], dtype=float)[use]
    kind = np.char.lower(np.asarray(linelist["kind"]).astype(str)[use])
    sign = np.where(kind == "absorption", -1.0, 1.0)
    width = (np.asarray(linelist["width_kms"], dtype=float)[use]
             if "width_kms" in linelist.colnames else np.zeros(use.sum()))
    width = np.where(np.isfinite(width), width, 0.0)
    if cls == "quasar" and "qso_offset_kms" in linelist.colnames:
        off = np.asarray(linelist["qso_offset_kms"], dtype=float)[use]
        off = np.where(np.isfinite(off), off, 0.0)
    else:
        off = np.zeros(wave.size)
    return names, wave, sign * strength[use], width, off


def _cosine_taper(n: int, frac: float) -> np.ndarray:
    """Cosine bell over ``frac`` of ``n`` points at each end (1 in the middle)."""
    w = np.ones(n)
    m = int(round(frac * n))
    if m > 0:
        ramp = 0.5 * (1.0 - np.cos(np.pi * (np.arange(m) + 0.5) / m))
        w[:m] = ramp
        w[n - m:] = ramp[::-1]
    return w


@dataclass(frozen=True, eq=False)
class TemplateBank:
    """Rest-frame templates of several classes on one uniform ln-lambda grid.

    Attributes
    ----------
    classes : tuple of str
        Class of each template (row of ``flux``).
    loglam0 : float
        ln(lambda / Angstrom) of the first template pixel (rest frame, vacuum).
    dloglam : float
        Step of the grid in ln lambda (equal to the data grid's step).
    flux : numpy.ndarray
        ``(n_templates, n_pix)`` read-only array: continuum-free, tapered, zero-mean templates,
        each scaled to a maximum absolute value of 1.
    resolution_kms : float
        Instrumental FWHM the templates were broadened to.
    line_names : tuple of tuple of str
        The lines that went into each template.

    The FFTs of the templates (and of their squares, used to normalise the correlation) are
    cached per FFT length and dtype by :meth:`spectra`.
    """

    classes: tuple
    loglam0: float
    dloglam: float
    flux: np.ndarray
    resolution_kms: float
    line_names: tuple = ()
    _cache: dict = field(default_factory=dict, repr=False)

    @property
    def n_pix(self) -> int:
        """Number of pixels of each template."""
        return int(self.flux.shape[1])

    @property
    def loglam(self) -> np.ndarray:
        """ln lambda of the template pixels."""
        return self.loglam0 + self.dloglam * np.arange(self.n_pix)

    @property
    def wavelength(self) -> np.ndarray:
        """Rest vacuum wavelength of the template pixels, Angstrom."""
        return np.exp(self.loglam)

    def template(self, cls: str) -> np.ndarray:
        """The template of class ``cls``."""
        return self.flux[self.classes.index(cls)]

    def spectra(self, nfft: int, dtype=np.float32):
        """Conjugate real FFTs of the templates and of their squares for length ``nfft``.

        Returns ``(conj(rfft(T)), conj(rfft(T**2)))``, each ``(n_templates, nfft // 2 + 1)``,
        computed once per ``(nfft, dtype)`` and cached.
        """
        key = (int(nfft), np.dtype(dtype).str)
        hit = self._cache.get(key)
        if hit is None:
            t = self.flux.astype(dtype)
            ft = np.conj(sfft.rfft(t, n=nfft, axis=-1))
            ft2 = np.conj(sfft.rfft(t * t, n=nfft, axis=-1))
            ft.setflags(write=False)
            ft2.setflags(write=False)
            hit = (ft, ft2)
            self._cache[key] = hit
            logger.debug("template FFTs cached for nfft=%d dtype=%s", nfft, key[1])
        return hit


def build_bank(linelist=None, classes=CLASSES, loglam_step: float = 1e-4 * np.log(10.0),
               resolution_kms: float = 150.0, rest_range=(900.0, 10000.0), *,
               taper_kms: float = 2000.0, margin_fwhm: float = 5.0) -> TemplateBank:
    """Build rest-frame templates of ``classes`` from a line list.

    Parameters
    ----------
    linelist : astropy.table.Table or str or path, optional
        The line list (columns ``name, wave_vac, kind, strength_<class>, width_kms`` and, for
        quasars, ``qso_offset_kms``), or a name/path for :func:`zsieve.lines.load_linelist`;
        ``None`` loads the bundled lists.
    classes : sequence of str
        Template classes, e.g. :data:`CLASSES`.
    loglam_step : float
        Grid step in natural-log wavelength: the data grid's d ln(lambda).
    resolution_kms : float
        Instrumental FWHM in km/s (c / R for resolving power R).
    rest_range : (float, float)
        Rest wavelengths (Angstrom) the templates must cover; use :func:`rest_range_for` with
        the observed window and the z range. Lines outside it are left out (they can never be
        observed), and the grid is cropped to the span of the remaining lines plus
        ``margin_fwhm`` line widths, which keeps the FFTs short without losing any overlap.
    taper_kms : float
        Length of the cosine bell at each end of a template, km/s. It lies outside the
        outermost lines (beyond the margin), so it never tilts a line profile; it only brings
        the zero-mean pedestal smoothly to zero.
    margin_fwhm : float
        Margin kept beyond the outermost lines before the taper, in units of their FWHM.

    Returns
    -------
    TemplateBank
    """
    if linelist is None or isinstance(linelist, (str, bytes)) or hasattr(linelist, "__fspath__"):
        from ..lines import load_linelist  # lazy: the lines layer loads the bundled files

        linelist = load_linelist(linelist)
    classes = tuple(classes)
    if not classes:
        raise ValueError("no template classes given")
    step = float(loglam_step)
    if not step > 0:
        raise ValueError(f"loglam_step must be positive, got {loglam_step}")
    lo, hi = float(rest_range[0]), float(rest_range[1])
    if not (0 < lo < hi):
        raise ValueError(f"bad rest_range {rest_range}")
    per_class = []
    span_lo, span_hi = np.inf, -np.inf
    for cls in classes:
        names, wave, amp, width, off = class_lines(linelist, cls)
        centre = wave * np.exp(off / C_KMS)
        fwhm = np.sqrt(float(resolution_kms) ** 2 + width**2)
        keep = (centre >= lo) & (centre <= hi)
        if not keep.any():
            raise ValueError(f"class {cls!r} has no lines in the rest range {lo:.1f}-{hi:.1f} A")
        per_class.append((tuple(names[keep]), centre[keep], fwhm[keep], amp[keep]))
        pad = (margin_fwhm * fwhm[keep] + float(taper_kms)) / C_KMS
        span_lo = min(span_lo, float(np.min(np.log(centre[keep]) - pad)))
        span_hi = max(span_hi, float(np.max(np.log(centre[keep]) + pad)))
    ll0 = max(np.log(lo), span_lo)
    ll1 = min(np.log(hi), span_hi)
    n = int(np.floor((ll1 - ll0) / step)) + 1
    loglam = ll0 + step * np.arange(n)
    window = _cosine_taper(n, min(0.5, float(taper_kms) / C_KMS / step / max(n, 1)))
    flux = np.empty((len(classes), n))
    for i, (_names, centre, fwhm, amp) in enumerate(per_class):
        t = render_lines(loglam, centre, fwhm, amp) * window
        t -= t.mean()
        flux[i] = t / np.max(np.abs(t))
    flux.setflags(write=False)
    logger.debug("template bank: %d classes, %d pixels from %.1f to %.1f A", len(classes), n,
                 np.exp(ll0), np.exp(loglam[-1]))
    return TemplateBank(classes=classes, loglam0=float(ll0), dloglam=step, flux=flux,
                        resolution_kms=float(resolution_kms),
                        line_names=tuple(p[0] for p in per_class))
