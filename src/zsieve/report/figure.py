"""The per-object figure: what a referee needs to judge one redshift at a glance.

Panels:

* the whole spectrum with its 1-sigma band, masked pixels (bad, sky, user masks) shaded grey,
  and every matched line marked and named at the fitted z (names staggered on as many rows as
  they need, so that none overlaps another);
* zooms on the strongest matched lines (up to four) with the model: the engine's continuum plus
  the fitted Gaussians;
* the cross-correlation function with the ranked candidates marked;
* the histogram of the bootstrap redshifts with z and the 16/84 percentiles;
* a text block: z ± sigma, the bound, grade, confidence, runner-up, and the key cosmology numbers.

Colours come from a diverging orange/purple scheme that stays distinct for the common forms of
colour blindness (no red/green pairs): orange for emission and the adopted answer, purple for
absorption and alternatives, grey for masks. The figure is drawn with matplotlib's Agg canvas
on a private :class:`~matplotlib.figure.Figure` (no pyplot state), at 100 dpi by default.

What keeps it cheap (a survey folder has 10^4-10^6 of them): the geometry is fixed (one
GridSpec, no automatic layout) and the axes are built once per thread and dpi and reused by
:func:`write_figure` (building axes and their ticks cost more than drawing them); a spectrum
longer than the panel is drawn as its min/max envelope, two points per pixel column of the
output (:func:`envelope`: every spike survives); the band, the masked regions, the line marks
and the histogram are one artist each; label rows are found from the font's advance widths
(:func:`text_width_px`), not by asking the renderer for text extents.
"""

from __future__ import annotations

import functools
import io
import logging
import math
import os
import textwrap
import threading
from typing import Any, Sequence

import numpy as np

from .atomic import write_atomic
from .summary import clean_text

__all__ = ["PALETTE", "model_flux", "draw_figure", "write_figure", "stagger_levels", "envelope", "mask_spans",
           "text_width_px"]

log = logging.getLogger(__name__)

#: Colours of the figure (orange/purple diverging scheme, colour-blind safe).
PALETTE = {
    "data": "#1b1b1b",
    "band": "#b2abd2",
    "mask": "#d4d4d4",
    "emission": "#e66101",
    "absorption": "#5e3c99",
    "model": "#e66101",
    "alt": "#5e3c99",
    "hist": "#b2abd2",
    "light": "#fdb863",
}

#: Size of the figure in inches (1200 x 840 pixels at the default 100 dpi).
FIGSIZE = (12.0, 8.4)

_SQRT2PI = math.sqrt(2.0 * math.pi)
_NAME_PT = 7.5  # line names in the spectrum panel
_CAND_PT = 7.5  # candidate labels in the correlation panel
_TEXT_PT = 7.4  # the text block (monospace)
_ROW = 1.3  # label row height in units of the font size
_MAX_ROWS = 8

def _get(obj, name, default=None):
    """Attribute or key access, so the figure works on FitResult objects and plain records."""
    if isinstance(obj, dict):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _prepare(spectrum, result):
    """The engine's own preparation (masks and continuum) with the settings of this fit."""
    from ..engine.prepare import prepare

    cfg = (_get(result, "provenance") or {}).get("config") or {}
    kw = {k: float(cfg[k]) for k in ("sky_min_strength", "continuum_kms") if cfg.get(k) is not None}
    masks = [tuple(m) for m in cfg.get("extra_masks") or ()]
    return prepare(spectrum, mask_sky=bool(cfg.get("mask_sky", True)), extra_masks=masks,
                   open_bands_to_emission=bool(cfg.get("emission_in_bands", True)), **kw)


def _gaussians(wave: np.ndarray, lines: Sequence[Any]) -> np.ndarray:
    """Sum of the fitted line profiles on ``wave`` (flux is the integral of each Gaussian)."""
    if not lines:
        return np.zeros_like(wave)
    mu = np.array([_f(_get(m, "observed_wavelength")) for m in lines])
    sig = np.array([_f(_get(m, "sigma_A")) for m in lines])
    flux = np.array([_f(_get(m, "flux")) for m in lines])
    ok = np.isfinite(mu) & np.isfinite(sig) & (sig > 0) & np.isfinite(flux)
    if not ok.any():
        return np.zeros_like(wave)
    mu, sig, flux = mu[ok], sig[ok], flux[ok]
    x = (wave[:, None] - mu[None, :]) / sig[None, :]
    return np.sum(flux / (_SQRT2PI * sig) * np.exp(-0.5 * x * x), axis=1)


def model_flux(spectrum, result, prepared=None) -> np.ndarray | None:
    """The model on the spectrum's pixels: the engine's continuum plus every fitted line.

    ``None`` if the spectrum is empty or the result carries no usable redshift.
    """
    if spectrum is None or spectrum.n_pix < 2 or not math.isfinite(_f(_get(result, "z"))):
        return None
    prepared = prepared if prepared is not None else _prepare(spectrum, result)
    return prepared.continuum + _gaussians(spectrum.wavelength, _get(result, "lines") or [])


def _f(v) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def stagger_levels(x: Sequence[float], widths: Sequence[float], n_levels: int = 4, pad: float = 0.0) -> list[int]:
    """Row (0 = top) for each label so that labels on one row never overlap.

    ``x`` are label centres and ``widths`` their widths in the same units; labels are taken in
    order of their left ends; each goes on the first row whose last label ends (plus ``pad``)
    before it starts. This first-fit order needs the fewest rows there are (interval colouring), so
    with ``n_levels >= len(x)`` nothing ever overlaps. When all rows are taken the row that frees
    up first is used (the overlap is then the least possible).

    >>> stagger_levels([0.0, 0.5, 1.0, 5.0], [2.0, 2.0, 2.0, 2.0], n_levels=3)
    [0, 1, 2, 0]
    """
    left_ends = np.asarray(x, dtype=float) - np.asarray(widths, dtype=float) / 2.0
    order = np.argsort(left_ends, kind="stable")
    right_end = [-math.inf] * n_levels
    out = [0] * len(order)
    for i in order:
        left = x[i] - widths[i] / 2.0
        free = [k for k in range(n_levels) if right_end[k] + pad <= left]
        k = free[0] if free else int(np.argmin(right_end))
        out[i] = k
        right_end[k] = x[i] + widths[i] / 2.0
    return out


def _robust_ylim(flux, good, sigma=None):
    vals = flux[good & np.isfinite(flux)]
    if vals.size == 0:
        return -1.0, 1.0
    lo, hi = np.percentile(vals, [0.5, 99.5])
    if sigma is not None:
        s = sigma[good & np.isfinite(sigma)]
        if s.size:
            lo -= float(np.median(s))
    span = max(hi - lo, 1e-30)
    return lo - 0.08 * span, hi + 0.08 * span


def _fmt(v, spec: str, unit: str = "") -> str:
    v = _f(v)
    if not math.isfinite(v):
        return "n/a"
    return f"{v:{spec}}{unit}"


def _text_block(result) -> str:
    z, ze = _f(_get(result, "z")), _f(_get(result, "z_err"))
    cands = _get(result, "candidates") or []
    lines = []
    name = clean_text(_get(result, "object_name") or "", 40)
    key = clean_text((_get(result, "provenance") or {}).get("key") or "", 40)
    lines.append(name or key or "spectrum")
    if name and key:
        lines.append(key)
    lines.append(f"z = {_fmt(z, '.5f')} \u00b1 {_fmt(ze, '.5f')}")
    lines.append(f"  16-84%: {_fmt(_get(result, 'z_p16'), '.5f')} .. {_fmt(_get(result, 'z_p84'), '.5f')}")
    lines.append(f"  bound {_fmt(_get(result, 'z_bound'), '.1e')}, formal {_fmt(_get(result, 'z_formal_err'), '.1e')}")
    lines.append(f"grade {_get(result, 'grade') or 'none'}, confidence {_fmt(_get(result, 'confidence'), '.2f')}")
    lines.append(f"class {_get(result, 'template') or 'n/a'}, {len(_get(result, 'lines') or [])} lines")
    if len(cands) > 1:
        ru = cands[1]
        lines.append(f"runner-up z = {_fmt(_get(ru, 'z'), '.4f')}, p = {_fmt(_get(ru, 'probability'), '.2f')}")
        lines.append(f"  ({_get(ru, 'template') or '?'})")
    else:
        lines.append("runner-up: none")
    flags = _get(result, "flags") or []
    if flags:
        lines.extend(textwrap.wrap("flags: " + ", ".join(map(str, flags)), 40, subsequent_indent="  "))
    hand = _get(result, "hand")
    if hand:
        lines.append(f"hand: z = {_fmt(hand.get('z'), '.5f')}, {hand.get('grade', '')}"
                     f" ({clean_text(hand.get('user') or '', 16)})")
    cosmo = (hand or {}).get("cosmology") or _get(result, "cosmology") or {}
    if cosmo:
        lines.append("")
        lines.append(f"D_L = {_fmt(cosmo.get('luminosity_distance_mpc'), '.1f')} Mpc")
        lines.append(f"D_A = {_fmt(cosmo.get('angular_diameter_distance_mpc'), '.1f')} Mpc")
        lines.append(f"lookback {_fmt(cosmo.get('lookback_time_gyr'), '.3f')} Gyr, "
                     f"{_fmt(cosmo.get('kpc_per_arcsec_proper'), '.2f')} kpc/\"")
        lines.append(f"v_rec now {_fmt(cosmo.get('recession_velocity_now_kms'), '.0f')} km/s")
        lines.append(f"v_rec at emission {_fmt(cosmo.get('recession_velocity_emission_kms'), '.0f')} km/s")
        cname = (cosmo.get("cosmology") or {}).get("name") if isinstance(cosmo.get("cosmology"), dict) else None
        if cname:
            lines.append(f"({clean_text(cname, 30)})")
    return "\n".join(lines)


def _strongest(lines, n: int, min_sep: float) -> list:
    """Up to ``n`` lines of highest S/N whose centres are at least ``min_sep`` Angstrom apart."""
    ranked = sorted(lines, key=lambda m: -(_f(_get(m, "snr")) if math.isfinite(_f(_get(m, "snr"))) else -1))
    chosen: list = []
    for m in ranked:
        w = _f(_get(m, "observed_wavelength"))
        if not math.isfinite(w):
            continue
        if all(abs(w - _f(_get(c, "observed_wavelength"))) >= min_sep for c in chosen):
            chosen.append(m)
        if len(chosen) == n:
            break
    return sorted(chosen, key=lambda m: _f(_get(m, "observed_wavelength")))


def _xcorr_curves(extra) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """The correlation curves in ``extra['xcorr']``: one ``{'z', 'r'}`` or one per template."""
    xc = (extra or {}).get("xcorr")
    if not isinstance(xc, dict):
        return []
    if "z" in xc and "r" in xc:
        items = [("", xc)]
    else:
        items = [(str(k), v) for k, v in xc.items() if isinstance(v, dict) and "z" in v and "r" in v]
    out = []
    for name, d in items:
        z = np.asarray(d["z"], dtype=float)
        r = np.asarray(d["r"], dtype=float)
        if z.size and z.shape == r.shape:
            out.append((name, z, r))
    return out


def _columns(x: np.ndarray, lo: float, hi: float, n_cols: int) -> np.ndarray | None:
    """Start index of each run of ``x`` (increasing) in one of ``n_cols`` equal columns of
    ``[lo, hi]``; ``None`` when there are no more than two values per column (nothing to gain)."""
    n_cols = int(n_cols)
    if n_cols < 1 or x.size <= 2 * n_cols or not hi > lo:
        return None
    col = np.clip(np.floor((x - lo) * (n_cols / (hi - lo))), 0, n_cols - 1).astype(np.intp)
    return np.flatnonzero(np.r_[True, col[1:] != col[:-1]])


def envelope(x, y, lo: float, hi: float, n_cols: int) -> tuple[np.ndarray, np.ndarray]:
    """The min/max envelope of ``y(x)`` on ``n_cols`` equal columns of ``[lo, hi]`` (pixel columns).

    Each column keeps two points: its lowest and its highest finite value, at their own ``x`` and
    in the order they occur, so a line through them covers every pixel the full curve covers
    (a lone spike survives) with at most ``2 n_cols`` points. Columns without a finite value
    become a gap (NaN). ``x`` must increase. With no more than two values per column the input
    is returned unchanged.

    >>> x = np.arange(12.0); y = np.zeros(12); y[8] = 5.0; y[2] = -1.0
    >>> xe, ye = envelope(x, y, 0.0, 12.0, 2)
    >>> xe.tolist(), ye.tolist()
    ([0.0, 2.0, 6.0, 8.0], [0.0, -1.0, 0.0, 5.0])
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    starts = _columns(x, lo, hi, n_cols)
    if starts is None:
        return x, y
    yv = np.where(np.isfinite(y), y, np.nan)
    ymin = np.fmin.reduceat(yv, starts)
    ymax = np.fmax.reduceat(yv, starts)
    seg = np.repeat(np.arange(starts.size), np.diff(np.r_[starts, x.size]))
    idx = np.arange(x.size)
    imin = np.minimum.reduceat(np.where(yv == ymin[seg], idx, x.size), starts)
    imax = np.minimum.reduceat(np.where(yv == ymax[seg], idx, x.size), starts)
    empty = imin >= x.size  # all-NaN column
    imin = np.where(empty, starts, imin)
    imax = np.where(empty, starts, imax)
    first, second = np.minimum(imin, imax), np.maximum(imin, imax)
    return np.column_stack([x[first], x[second]]).ravel(), np.column_stack([yv[first], yv[second]]).ravel()


def _band_envelope(x, lower, upper, lo, hi, n_cols):
    """Per pixel column the lowest ``lower`` and highest ``upper``, held over the column
    (points at its first and last sample); ``None`` when there is nothing to gain."""
    starts = _columns(x, lo, hi, n_cols)
    if starts is None:
        return None
    ends = np.r_[starts[1:], x.size] - 1
    lo_c = np.fmin.reduceat(np.where(np.isfinite(lower), lower, np.nan), starts)
    hi_c = np.fmax.reduceat(np.where(np.isfinite(upper), upper, np.nan), starts)
    xb = np.column_stack([x[starts], x[ends]]).ravel()
    return xb, np.repeat(lo_c, 2), np.repeat(hi_c, 2)


def mask_spans(wave, bad, min_width: float = 0.0) -> np.ndarray:
    """``(k, 2)`` wavelength ranges covered by the runs of ``bad`` pixels, from pixel edge to pixel
    edge (edges half-way between pixel centres), each at least ``min_width`` wide.

    >>> mask_spans(np.array([1.0, 2.0, 3.0, 4.0, 5.0]), np.array([0, 1, 1, 0, 1], bool)).tolist()
    [[1.5, 3.5], [4.5, 5.5]]
    """
    wave = np.asarray(wave, dtype=float)
    b = np.asarray(bad, dtype=bool)
    if wave.size < 2 or not b.any():
        return np.empty((0, 2))
    d = np.diff(np.r_[0, b.astype(np.int8), 0])
    s, e = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    edges = np.r_[1.5 * wave[0] - 0.5 * wave[1], 0.5 * (wave[1:] + wave[:-1]), 1.5 * wave[-1] - 0.5 * wave[-2]]
    lo, hi = edges[s], edges[e]
    grow = np.maximum(min_width - (hi - lo), 0.0) / 2.0
    return np.column_stack([lo - grow, hi + grow])


_ADVANCES: dict[tuple, dict[str, float]] = {}


def text_width_px(text: str, size_pt: float, dpi: float = 100.0, family: str = "sans-serif") -> float:
    """Width in pixels of one line of ``text``: the sum of the font's unhinted advance widths
    (kerning ignored). The renderer's hinted text is up to ~8% narrower, never wider (beyond a
    pixel), so labels spaced with this width do not collide. Each character is looked up in the
    font once per process.

    >>> text_width_px("", 8.0)
    0.0
    >>> text_width_px("H-alpha H-alpha", 8.0) == 2 * text_width_px("H-alpha", 8.0) + text_width_px(" ", 8.0)
    True
    """
    key = (family, float(size_pt), float(dpi))
    table = _ADVANCES.setdefault(key, {})
    missing = set(text).difference(table)
    if missing:
        from matplotlib.font_manager import FontProperties, findfont, get_font
        from matplotlib.ft2font import LoadFlags

        font = get_font(findfont(FontProperties(family=[family])))
        font.set_size(float(size_pt), float(dpi))
        for ch in missing:
            table[ch] = font.load_char(ord(ch), flags=LoadFlags.NO_HINTING).linearHoriAdvance / 65536.0
    return float(sum(table[c] for c in text))


def _display_scale(values: np.ndarray) -> tuple[float, str]:
    """A power of ten that brings the flux to order 1-1000 on the axis, and its label prefix."""
    v = values[np.isfinite(values)]
    top = float(np.percentile(np.abs(v), 99.5)) if v.size else 0.0
    if not top > 0 or 1e-2 <= top < 1e4:
        return 1.0, ""
    p = int(math.floor(math.log10(top)))
    sup = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")
    return 10.0 ** -p, "10" + str(p).translate(sup) + " "


def _stagger_px(centres, widths, span_px, n_max):
    """Rows for labels of ``widths`` (px) at ``centres`` (px), every label kept whole inside
    ``[0, span_px]``. Returns (clamped centres, rows, number of rows)."""
    c = np.clip(np.asarray(centres, dtype=float), np.asarray(widths) / 2.0, span_px - np.asarray(widths) / 2.0)
    rows = stagger_levels(list(c), list(widths), n_levels=max(1, len(c)), pad=2.0)
    n = max(rows) + 1 if rows else 0
    if n > n_max:
        rows = stagger_levels(list(c), list(widths), n_levels=n_max, pad=2.0)
        n = n_max
        log.debug("%d labels need more than %d rows: some may touch", len(c), n_max)
    return c, rows, n


_SPRITE_LIMIT = 4096  # texts kept per sheet (a few hundred kB)
_UNIQUE = "zsieve-unique-text"  # gid of texts that differ from object to object: drawn directly


@functools.lru_cache(maxsize=1)
def _sprite_classes():
    """An Agg canvas whose renderer keeps each distinct text it has drawn as a coverage bitmap.

    Tick labels, line names, titles and axis labels repeat from object to object; drawing one
    from its bitmap is a single blit instead of a shaping and a rasterisation per glyph. The
    bitmap is matplotlib's own rendering of the text (drawn once on a scratch Agg renderer), so
    the look is the same; a text is placed at the nearest whole pixel (matplotlib places glyphs
    to 1/64 pixel, a difference below what the eye sees). Mathtext, non-antialiased text and
    any failure fall back to matplotlib's own drawing.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg

    class SpriteRenderer(RendererAgg):
        def __init__(self, width, height, dpi, sprites):
            super().__init__(width, height, dpi)
            self._sprites = sprites

        def _sprite(self, s, prop, angle, mtext):
            # room for the text around its origin: the advance-width bound, one line high
            size = prop.get_size_in_points() * self.dpi / 72.0
            w = text_width_px(s, prop.get_size_in_points(), self.dpi, prop.get_family()[0]) + size + 8
            h = 2.0 * size + 8
            if angle == 0:
                dims, origin = (w + h, 2 * h), (h, h)
            elif angle == 90:
                dims, origin = (2 * h, w + h), (h, w)
            else:
                m = w + h
                dims, origin = (2 * m, 2 * m), (m, m)
            scratch = RendererAgg(int(math.ceil(dims[0])), int(math.ceil(dims[1])), self.dpi)
            ox, oy = int(origin[0]), int(origin[1])
            gc = scratch.new_gc()
            gc.set_foreground("black")
            RendererAgg.draw_text(scratch, gc, ox, oy, s, prop, angle, mtext=mtext)
            gc.restore()
            alpha = np.asarray(scratch.buffer_rgba())[..., 3]
            rows, cols = np.flatnonzero(alpha.any(axis=1)), np.flatnonzero(alpha.any(axis=0))
            if rows.size == 0:
                return None
            if rows[0] == 0 or cols[0] == 0 or rows[-1] == alpha.shape[0] - 1 or cols[-1] == alpha.shape[1] - 1:
                raise ValueError("text larger than its bitmap")  # cut off: draw it the usual way
            crop = np.ascontiguousarray(alpha[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1])
            return crop, int(cols[0]) - ox, int(rows[-1]) + 1 - oy

        def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
            if ismath or not gc.get_antialiased() or (mtext is not None and mtext.get_gid() == _UNIQUE):
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            features = mtext.get_fontfeatures() if mtext is not None else None
            language = mtext.get_language() if mtext is not None else None
            key = (s, tuple(prop.get_family()), prop.get_style(), prop.get_variant(), prop.get_weight(),
                   prop.get_stretch(), prop.get_size_in_points(), prop.get_file(), float(angle),
                   tuple(features) if features else None, language)
            try:
                if key not in self._sprites:
                    if len(self._sprites) >= _SPRITE_LIMIT:
                        self._sprites.clear()
                    self._sprites[key] = self._sprite(s, prop, angle, mtext)
                sprite = self._sprites[key]
                if sprite is not None:
                    crop, dx, dy = sprite
                    self._renderer.draw_text_image(crop, int(round(x)) + dx, int(round(y)) + dy, 0, gc)
            except (AttributeError, TypeError, ValueError) as exc:  # another matplotlib: its own way
                log.debug("text bitmap not used (%s); drawing %r directly", exc, s)
                self._sprites.pop(key, None)
                super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)

    class SpriteCanvas(FigureCanvasAgg):
        def __init__(self, figure):
            super().__init__(figure)
            self._sprites: dict = {}

        def get_renderer(self):
            w, h = self.get_width_height(physical=True)
            key = w, h, self.figure.dpi
            if self._lastKey != key:
                self.renderer = SpriteRenderer(w, h, self.figure.dpi, self._sprites)
                self._lastKey = key
            return self.renderer

    return SpriteCanvas


class _Sheet:
    """The figure's fixed geometry: axes, labels and text slots, built once and refilled for each
    object (building axes and their ticks costs more than drawing them)."""

    def __init__(self, dpi: float):
        from matplotlib.figure import Figure
        from matplotlib.lines import Line2D
        from matplotlib.patches import Patch
        from matplotlib.ticker import MaxNLocator, ScalarFormatter

        self.dpi = float(dpi)
        fig = self.fig = Figure(figsize=FIGSIZE, dpi=dpi)
        _sprite_classes()(fig)
        gs = fig.add_gridspec(3, 4, height_ratios=[1.45, 1.0, 1.05], hspace=0.5, wspace=0.32,
                              left=0.06, right=0.985, top=0.95, bottom=0.065)
        bottom = gs[2, :].subgridspec(1, 3, width_ratios=[1.75, 1.0, 1.25], wspace=0.25)
        self.ax = fig.add_subplot(gs[0, :])
        self.zooms = [fig.add_subplot(gs[1, i]) for i in range(4)]
        self.axc = fig.add_subplot(bottom[0, 0])
        self.axh = fig.add_subplot(bottom[0, 1])
        self.axes = [self.ax, *self.zooms, self.axc, self.axh]
        w_px, h_px = FIGSIZE[0] * self.dpi, FIGSIZE[1] * self.dpi
        self.px = {a: (a.get_position().width * w_px, a.get_position().height * h_px) for a in self.axes}
        cell = bottom[0, 2].get_position(fig)
        self.text_xy = (cell.x0, cell.y0 + 1.02 * cell.height)
        self.text_room_px = ((0.995 - cell.x0) * w_px, (self.text_xy[1] - 0.004) * h_px)
        self.text = fig.text(*self.text_xy, "", va="top", ha="left", fontsize=_TEXT_PT, family="monospace",
                             linespacing=1.18)
        self.text.set_gid(_UNIQUE)
        self.ax.title.set_gid(_UNIQUE)
        self.ax._left_title.set_gid(_UNIQUE)
        z0 = self.zooms[0].get_position()
        self.no_lines = fig.text(z0.x0, z0.y0 + 0.5 * z0.height, "no matched lines to show", fontsize=9,
                                 color="#555555", va="center", visible=False)
        ax = self.ax
        ax.set_xlabel("vacuum wavelength (\u00c5)")
        ax.yaxis.set_major_formatter(ScalarFormatter(useOffset=False))
        for i, axz in enumerate(self.zooms):
            axz.tick_params(labelsize=7.5)
            axz.xaxis.set_major_locator(MaxNLocator(4))
            axz.yaxis.set_major_locator(MaxNLocator(5))
            axz.xaxis.set_major_formatter(ScalarFormatter(useOffset=False))
            axz.yaxis.set_major_formatter(ScalarFormatter(useOffset=False))
            axz.set_xlabel("\u00c5", fontsize=8.5, labelpad=1)
        self.axc.set_xlabel("z")
        self.axc.set_ylabel("correlation", fontsize=9)
        self.axc.set_title("cross-correlation and ranked candidates", fontsize=9.5, loc="left", y=1.0, pad=3)
        self.axc.tick_params(labelsize=8)
        self.axh.set_xlabel("z", fontsize=9)
        self.axh.tick_params(labelsize=7.5)
        self.axh.xaxis.set_major_locator(MaxNLocator(3))
        self.axh.yaxis.set_major_locator(MaxNLocator(5, integer=True))
        self.handles = {
            "band": (Patch(color=PALETTE["band"], linewidth=0), "1\u03c3 uncertainty"),
            "flux": (Line2D([], [], color=PALETTE["data"], lw=0.6), "flux"),
            "model": (Line2D([], [], color=PALETTE["model"], lw=0.9, alpha=0.9), "model"),
            "mask": (Patch(color=PALETTE["mask"]), "masked"),
        }

    # ------------------------------------------------------------------ per object
    def clear(self) -> None:
        """Remove everything the last object added (the sheet holds no data between objects)."""
        for ax in self.axes:
            for artist in [*ax.lines, *ax.collections, *ax.patches, *ax.texts]:
                artist.remove()
            if ax.legend_ is not None:
                ax.legend_.remove()
            ax.set_visible(True)
            ax.ignore_existing_data_limits = True
        self.no_lines.set_visible(False)
        self.text.set_text("")

    def _shade(self, ax, wave, bad) -> None:
        from matplotlib.collections import PolyCollection

        if not bad.any():
            return
        w_px = self.px[ax][0]
        spans = mask_spans(wave, bad, min_width=(wave[-1] - wave[0]) / max(w_px, 1.0))
        verts = np.stack([np.column_stack([spans[:, 0], spans[:, 0], spans[:, 1], spans[:, 1]]),
                          np.tile([0.0, 1.0, 1.0, 0.0], (len(spans), 1))], axis=-1)
        ax.add_collection(PolyCollection(verts, facecolors=PALETTE["mask"], edgecolors="none", linewidths=0,
                                         transform=ax.get_xaxis_transform(), zorder=0), autolim=False)

    def fill(self, result, spectrum) -> None:
        wave = spectrum.wavelength
        prepared = _prepare(spectrum, result)
        bad = np.asarray(prepared.bad, dtype=bool)
        good = ~bad
        z = _f(_get(result, "z"))
        lines = list(_get(result, "lines") or [])
        model = model_flux(spectrum, result, prepared) if math.isfinite(z) else None
        scale, prefix = _display_scale(np.where(good, spectrum.flux, np.nan))
        flux = np.where(np.isfinite(spectrum.flux), spectrum.flux * scale, np.nan)
        sigma = np.where(np.isfinite(spectrum.sigma), spectrum.sigma * scale, np.nan)
        cont = prepared.continuum * scale
        if model is not None:
            model = model * scale
        self._spectrum_panel(result, spectrum, wave, flux, sigma, model, bad, good, z, lines, prefix)
        self._zooms(wave, flux, sigma, cont, bad, good, lines, model is not None, scale)
        self._correlation(result)
        self._histogram(result, z)
        self._text(result)

    def _spectrum_panel(self, result, spectrum, wave, flux, sigma, model, bad, good, z, lines, prefix):
        from matplotlib.collections import LineCollection

        ax = self.ax
        w_px, h_px = self.px[ax]
        x0, x1 = float(wave[0]), float(wave[-1])
        n_cols = int(w_px)
        self._shade(ax, wave, bad)
        band = _band_envelope(wave, flux - sigma, flux + sigma, x0, x1, n_cols)
        if band is None:
            ax.fill_between(wave, flux - sigma, flux + sigma, color=PALETTE["band"], linewidth=0, step="mid", zorder=1)
            ax.plot(wave, flux, color=PALETTE["data"], lw=0.6, drawstyle="steps-mid", zorder=2)
        else:  # min/max envelope per pixel column: same pixels lit, a fraction of the vertices
            ax.fill_between(band[0], band[1], band[2], color=PALETTE["band"], linewidth=0, zorder=1)
            ax.plot(*envelope(wave, flux, x0, x1, n_cols), color=PALETTE["data"], lw=0.6, zorder=2)
        keys = ["band", "flux"]
        if model is not None:
            ax.plot(*envelope(wave, model, x0, x1, n_cols), color=PALETTE["model"], lw=0.9, alpha=0.9, zorder=3)
            keys.append("model")
        if bad.any():
            keys.append("mask")
        lo, hi = _robust_ylim(flux, good, sigma)
        names = [str(_get(m, "name")) for m in lines]
        xs = np.array([_f(_get(m, "observed_wavelength")) for m in lines], dtype=float)
        ok = np.isfinite(xs)
        row_px = _ROW * _NAME_PT * self.dpi / 72.0
        top_px = 3.0
        nrows, size = 0, _NAME_PT
        if ok.any():
            for size in (_NAME_PT, 6.5):
                row_px = _ROW * size * self.dpi / 72.0
                widths = [text_width_px(n, size, self.dpi) + 4.0 for n, k in zip(names, ok) if k]
                centres = (xs[ok] - x0) / (x1 - x0) * w_px
                cx, rows, nrows = _stagger_px(centres, widths, w_px, _MAX_ROWS)
                if nrows <= 5:
                    break
        head = (top_px + nrows * row_px + 4.0) / h_px if nrows else 0.0
        head = max(head, 0.06)
        span = hi - lo
        ax.set_ylim(lo, hi + span * head / (1.0 - head))
        ax.set_xlim(x0, x1)
        if nrows:
            colours = [PALETTE["absorption"] if _get(m, "kind") == "absorption" else PALETTE["emission"]
                       for m, k in zip(lines, ok) if k]
            trans = ax.get_xaxis_transform()
            segs = []
            for xl, xt, lev, name, colour in zip(xs[ok], cx, rows, [n for n, k in zip(names, ok) if k], colours):
                ytop = 1.0 - (top_px + lev * row_px) / h_px
                segs.append([(xl, 0.0), (xl, ytop - (row_px + 1.0) / h_px)])
                ax.text(x0 + xt / w_px * (x1 - x0), ytop, name, transform=trans, ha="center", va="top", fontsize=size,
                        color=colour, clip_on=True)
            ax.add_collection(LineCollection(segs, colors=colours, linewidths=0.8, linestyles=[(0, (3, 2))],
                                             alpha=0.85, transform=trans, zorder=1.5), autolim=False)
        ax.set_ylabel(f"flux ({prefix}{clean_text(spectrum.meta.flux_unit or 'arbitrary', 30)})", fontsize=9)
        title = clean_text(_get(result, "object_name") or (_get(result, "provenance") or {}).get("key") or "", 60)
        ax.set_title(f"{title}   z = {_fmt(z, '.5f')} ({_get(result, 'grade') or 'none'})", fontsize=11, loc="left",
                     y=1.0, pad=4)
        ax.legend(*zip(*(self.handles[k] for k in keys)), loc="lower right", fontsize=7.5, ncol=len(keys),
                  framealpha=0.85)

    def _zooms(self, wave, flux, sigma, cont, bad, good, lines, with_model, scale):
        zoom = _strongest(lines, 4, min_sep=0.0)
        self.no_lines.set_visible(not zoom)
        for i, axz in enumerate(self.zooms):
            if i >= len(zoom):
                axz.set_visible(False)
                continue
            m = zoom[i]
            mu = _f(_get(m, "observed_wavelength"))
            sg = _f(_get(m, "sigma_A"))
            half = max(12.0 * (sg if math.isfinite(sg) else 2.0), 25.0)
            sel = (wave >= mu - half) & (wave <= mu + half)
            if sel.sum() < 3:
                axz.set_visible(False)
                continue
            w, fl, sgm = wave[sel], flux[sel], sigma[sel]
            self._shade(axz, w, bad[sel])
            axz.fill_between(w, fl - sgm, fl + sgm, color=PALETTE["band"], linewidth=0, step="mid")
            axz.plot(w, fl, color=PALETTE["data"], lw=0.8, drawstyle="steps-mid")
            if with_model:
                fine = np.linspace(w[0], w[-1], 300)
                model = np.interp(fine, wave, cont) + _gaussians(fine, lines) * scale
                axz.plot(fine, model, color=PALETTE["model"], lw=1.3)
            colour = PALETTE["absorption"] if _get(m, "kind") == "absorption" else PALETTE["emission"]
            axz.plot([mu, mu], [0.0, 1.0], transform=axz.get_xaxis_transform(), color=colour, lw=0.7, ls=":")
            ylo, yhi = _robust_ylim(fl, good[sel], sgm)
            axz.set_ylim(ylo, yhi)
            axz.set_xlim(w[0], w[-1])
            axz.set_title(f"{_get(m, 'name')}  S/N {_fmt(_get(m, 'snr'), '.1f')}", fontsize=9, y=1.0, pad=3)
            axz.set_ylabel("flux" if i == 0 else "", fontsize=8.5)

    def _correlation(self, result):
        from matplotlib.collections import LineCollection

        axc = self.axc
        w_px = self.px[axc][0]
        curves = _xcorr_curves(_get(result, "extra"))
        cols = [PALETTE["data"], PALETTE["alt"], PALETTE["emission"], "#7f7f7f"]
        cands = list(_get(result, "candidates") or [])[:6]
        czs = [_f(_get(c, "z")) for c in cands]
        zall = [c for c in czs if math.isfinite(c)]
        rall = []
        for _, zc, rc in curves:
            fin = np.isfinite(zc)
            if fin.any():
                zall += [float(zc[fin].min()), float(zc[fin].max())]
            fr = rc[np.isfinite(rc)]
            if fr.size:
                rall += [float(fr.min()), float(fr.max())]
        lo_z, hi_z = (min(zall), max(zall)) if zall else (0.0, 1.0)
        zspan = max(hi_z - lo_z, 1e-3)
        lo_z, hi_z = lo_z - 0.05 * zspan, hi_z + 0.05 * zspan  # the usual 5% margins
        axc.set_xlim(lo_z, hi_z)
        for j, (name, zc, rc) in enumerate(curves):
            axc.plot(*envelope(zc, rc, lo_z, hi_z, int(w_px)), lw=0.8, color=cols[j % len(cols)], label=name or None)
        if rall:
            r_lo, r_hi = min(rall), max(rall)
            pad = 0.05 * max(r_hi - r_lo, 1e-9)
            axc.set_ylim(r_lo - pad, r_hi + pad)
        else:
            axc.set_ylim(0.0, 1.0)
        if any(n for n, _, _ in curves):
            axc.legend(fontsize=7, loc="upper right")
        if cands:
            ctext = [f"#{k + 1} p={_fmt(_get(c, 'probability'), '.2f')}" for k, c in enumerate(cands)]
            pos = [(cz - lo_z) / (hi_z - lo_z) * w_px for cz in czs]
            widths = [text_width_px(t, _CAND_PT, self.dpi) + 4.0 for t in ctext]
            # a label starts at its candidate (ha=left) unless it would leave the panel: then it ends there
            right = [p + w > w_px for p, w in zip(pos, widths)]
            centres = [p - w / 2 if r else p + w / 2 for p, w, r in zip(pos, widths, right)]
            shown = [k for k, cz in enumerate(czs) if math.isfinite(cz)]
            rows = stagger_levels([centres[k] for k in shown], [widths[k] for k in shown], n_levels=max(1, len(shown)),
                                  pad=2.0)
            trans = axc.get_xaxis_transform()
            segs, colours, widths_l, styles = [], [], [], []
            for k, lev in zip(shown, rows):
                colour = PALETTE["emission"] if k == 0 else PALETTE["alt"]
                segs.append([(czs[k], 0.0), (czs[k], 1.0)])
                colours.append(colour)
                widths_l.append(1.2 if k == 0 else 0.8)
                styles.append("-" if k == 0 else "--")
                axc.text(czs[k], 0.97 - 0.1 * lev, ctext[k], transform=trans, fontsize=_CAND_PT,
                         ha="right" if right[k] else "left", va="top", color=colour,
                         bbox=dict(facecolor="white", edgecolor="none", alpha=0.75, pad=0.5))
            axc.add_collection(LineCollection(segs, colors=colours, linewidths=widths_l, linestyles=styles, alpha=0.9,
                                              transform=trans), autolim=False)
        if not curves:
            axc.text(0.5, 0.5, "no correlation function recorded", ha="center", va="center", transform=axc.transAxes,
                     fontsize=9, color="#555555")

    def _histogram(self, result, z):
        from matplotlib.collections import LineCollection, PolyCollection
        from matplotlib.ticker import FormatStrFormatter

        axh = self.axh
        zs = np.asarray([_f(v) for v in (_get(result, "z_samples") or [])], dtype=float)
        zs = zs[np.isfinite(zs)]
        if zs.size:
            bins = min(40, max(8, int(np.sqrt(zs.size) * 2)))
            counts, edges = np.histogram(zs, bins=bins)
            keep = counts > 0
            x0, x1, h = edges[:-1][keep], edges[1:][keep], counts[keep].astype(float)
            verts = np.stack([np.column_stack([x0, x0, x1, x1]), np.column_stack([0 * h, h, h, 0 * h])], axis=-1)
            axh.add_collection(PolyCollection(verts, facecolors=PALETTE["hist"], edgecolors=PALETTE["alt"],
                                              linewidths=0.5), autolim=False)
            marks = [(v, ls) for v, ls in ((z, "-"), (_f(_get(result, "z_p16")), ":"), (_f(_get(result, "z_p84")), ":"))
                     if math.isfinite(v)]
            if marks:
                axh.add_collection(LineCollection([[(v, 0.0), (v, 1.0)] for v, _ in marks], colors=PALETTE["emission"],
                                                  linestyles=[ls for _, ls in marks], linewidths=1.2,
                                                  transform=axh.get_xaxis_transform()), autolim=False)
            span = max(edges[-1] - edges[0], 1e-12)
            axh.set_xlim(edges[0] - 0.05 * span, edges[-1] + 0.05 * span)
            axh.set_ylim(0.0, 1.05 * counts.max())
            span_z = float(np.ptp(zs)) if zs.size > 1 else 0.0
            digits = int(min(6, max(2, math.ceil(-math.log10(span_z / 3)) if span_z > 0 else 4)))
            axh.xaxis.set_major_formatter(FormatStrFormatter(f"%.{digits}f"))
        else:
            axh.set_xlim(0.0, 1.0)
            axh.set_ylim(0.0, 1.0)
            axh.text(0.5, 0.5, "no bootstrap samples", ha="center", va="center", transform=axh.transAxes, fontsize=9,
                     color="#555555")
        axh.set_title(f"bootstrap z ({zs.size} resamples)", fontsize=9.5, loc="left", y=1.0, pad=3)

    def _text(self, result):
        block = _text_block(result)
        rows = block.split("\n")
        longest = max(rows, key=len)
        room_w, room_h = self.text_room_px
        per_pt_w = text_width_px(longest, 1.0, self.dpi, "monospace")
        per_pt_h = (len(rows) * 1.18 + 0.5) * self.dpi / 72.0  # 1.18 em a line (the spacing) + the descent
        size = min(_TEXT_PT, room_w / max(per_pt_w, 1e-9), room_h / per_pt_h)
        self.text.set_fontsize(size)
        self.text.set_text(block)


def _write_png(fig, buf, dpi) -> None:
    """The Agg canvas as an RGB PNG (the figure is opaque: no alpha channel, a third less to
    encode) with light compression (a third of the encoding time of the default for ~10% more
    bytes)."""
    from PIL import Image, PngImagePlugin

    fig.canvas.draw()
    rgb = np.ascontiguousarray(np.asarray(fig.canvas.buffer_rgba())[..., :3])
    info = PngImagePlugin.PngInfo()
    info.add_text("Software", "zsieve")
    Image.fromarray(rgb).save(buf, format="png", compress_level=3, pnginfo=info, dpi=(dpi, dpi))


_LOCAL = threading.local()


def _cached_sheet(dpi: float) -> _Sheet:
    sheets = getattr(_LOCAL, "sheets", None)
    if sheets is None:
        sheets = _LOCAL.sheets = {}
    sheet = sheets.get(float(dpi))
    if sheet is None:
        sheet = sheets[float(dpi)] = _Sheet(dpi)
    return sheet


def draw_figure(result, spectrum, *, dpi: int = 100):
    """The figure (a new :class:`matplotlib.figure.Figure`, Agg canvas) of one fitted spectrum."""
    sheet = _Sheet(dpi)
    sheet.fill(result, spectrum)
    return sheet.fig


def write_figure(path: str | os.PathLike, result, spectrum, *, dpi: int = 100, also: Sequence[str] = ()) -> str:
    """Draw the figure once and write it atomically to ``path`` (and to each path in ``also``).

    The format (PNG or PDF) of each file follows its suffix. The axes are this thread's reusable
    sheet at ``dpi`` (emptied again afterwards). Returns ``path``.
    """
    sheet = _cached_sheet(dpi)
    try:
        sheet.fill(result, spectrum)
        for target in (path, *also):
            target = os.fspath(target)
            buf = io.BytesIO()
            if target.lower().endswith(".pdf"):
                sheet.fig.savefig(buf, format="pdf", dpi=dpi)
            else:
                _write_png(sheet.fig, buf, dpi)
            write_atomic(target, buf.getvalue())
    finally:
        try:
            sheet.clear()
        except Exception:  # a sheet that cannot be emptied is not reused
            _LOCAL.sheets.pop(float(dpi), None)
            raise
    return os.fspath(path)
