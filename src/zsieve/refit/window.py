"""The refit window: a thin matplotlib view over a :class:`~zsieve.refit.session.RefitSession`.

The window draws the object on screen (the spectrum with its 1-sigma band, the masked
pixels, the current model, the lines expected at the current z with their names, the ranked
candidates with their bootstrap probabilities, the correlation curve) and turns keys and
clicks into calls of session methods, then redraws. It holds no state of its own beyond what
is half-typed (a prompt) or half-clicked (the first edge of a mask).

Only keys that matplotlib leaves free are taken, so its own zoom, pan, home, back/forward,
grid and save keys keep working; while a prompt is open every key goes to the prompt.
Press ``?`` in the window for the list (:data:`BINDINGS`).

Headless use: :func:`snapshot` renders the window for the current object to an image file
without a display.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..errors import ZsieveError
from ..result import GRADES

__all__ = ["BINDINGS", "RefitWindow", "snapshot", "help_text"]

log = logging.getLogger(__name__)

#: Key -> (action name, what it does). Keys matplotlib binds by default are left alone.
BINDINGS: dict[str, tuple[str, str]] = {
    "?": ("help", "show / hide this list"),
    "down": ("cand_next", "highlight the next candidate"),
    "up": ("cand_prev", "highlight the previous candidate"),
    "enter": ("adopt", "adopt the highlighted candidate, refit around it"),
    "n": ("name", "name the clicked feature as a rest line (name or menu number)"),
    "z": ("type_z", "type a redshift, refit around it"),
    "[": ("narrow", "halve the z range around the current z, search again"),
    "]": ("widen", "double the z range around the current z, search again"),
    "t": ("cycle_class", "next object class (any, emission-galaxy, ..., star)"),
    "m": ("mask_edge", "mask: press at one edge, then at the other"),
    "u": ("unmask", "remove your mask under the pointer (or the last one)"),
    "U": ("sky", "switch automatic sky masking off / on"),
    "e": ("bootstrap", "rerun the bootstrap for the current choice"),
    "1": ("grade_secure", "grade: secure (then a comment)"),
    "2": ("grade_likely", "grade: likely (then a comment)"),
    "3": ("grade_tentative", "grade: tentative (then a comment)"),
    "4": ("grade_none", "grade: none (then a comment)"),
    "w": ("comment", "write a comment"),
    "a": ("accept", "accept what is shown, save, next object"),
    "d": ("done", "save the changes, next object"),
    "j": ("skip", "skip to the next object (nothing saved)"),
    "b": ("back", "back to the previous object"),
    "Z": ("revert", "drop the unsaved changes of this object"),
    "W": ("withdraw", "withdraw the decision on record (back to the automatic answer)"),
    "x": ("quit", "end the session (unsaved changes are dropped)"),
    "escape": ("cancel", "cancel a prompt, a half-made mask or the pin"),
}

_LABEL_ROWS = 5
_EMISSION, _ABSORPTION = "#e66101", "#5e3c99"  # the report figure's colour-blind-safe pair
_SHORT_CLASS = {"emission-galaxy": "em-galaxy", "absorption-galaxy": "abs-galaxy", "quasar": "quasar", "star": "star"}

_CLICK_HELP = (
    ("left click", "on the spectrum: pin a feature (then n); on a candidate: highlight it"),
    ("zoom / pan", "matplotlib's own: o zoom, p pan, h home, left/right views"),
)


def help_text() -> str:
    """The help overlay: every key and click with what it does.

    >>> "adopt the highlighted candidate" in help_text()
    True
    """
    rows = [f"{k:>10}  {what}" for k, (_, what) in BINDINGS.items()]
    rows += [f"{k:>10}  {what}" for k, what in _CLICK_HELP]
    return "keys and clicks\n\n" + "\n".join(rows)


@dataclass
class _Prompt:
    label: str
    done: Callable[[str], None]
    text: str = ""
    menu: str = ""


class RefitWindow:
    """The matplotlib view of a refit session.

    Parameters
    ----------
    session : RefitSession
    figure : matplotlib.figure.Figure, optional
        Draw into this figure (default: a new pyplot figure, which needs an interactive
        backend for :meth:`show`; any figure works with synthetic events).
    """

    def __init__(self, session, figure=None):
        import matplotlib.pyplot as plt

        self.session = session
        if figure is None:
            with plt.rc_context({"toolbar": "toolbar2"}):
                figure = plt.figure(figsize=(14, 8))
        self.fig = figure
        self.prompt: _Prompt | None = None
        self.mask_start: float | None = None
        self.show_help = False
        self._drawn_key = None
        self._limits = None
        gs = figure.add_gridspec(2, 2, width_ratios=(3.2, 1.0), height_ratios=(1.0, 0.62),
                                 left=0.06, right=0.985, bottom=0.17, top=0.93, wspace=0.16, hspace=0.32)
        self.ax_spec = figure.add_subplot(gs[:, 0])
        self.ax_cand = figure.add_subplot(gs[0, 1])
        self.ax_curve = figure.add_subplot(gs[1, 1])
        self.status = figure.text(0.06, 0.085, "", fontsize=9, family="monospace", va="top")
        self.line2 = figure.text(0.06, 0.035, "", fontsize=10, va="top", color="#7a1f5c", weight="bold")
        self.help = figure.text(0.5, 0.52, help_text(), ha="center", va="center", family="monospace",
                                fontsize=9.5, zorder=50, visible=False, multialignment="left",
                                bbox=dict(boxstyle="round,pad=1.0", fc="#fffdf2", ec="#555555", alpha=0.97))
        canvas = figure.canvas
        manager = getattr(canvas, "manager", None)
        hid = getattr(manager, "key_press_handler_id", None)
        if hid is not None:  # keys go through us first; unbound ones are passed on below
            canvas.mpl_disconnect(hid)
        self._cids = [
            canvas.mpl_connect("key_press_event", self.on_key),
            canvas.mpl_connect("button_press_event", self.on_click),
        ]
        self.redraw()

    # ------------------------------------------------------------------ events
    def on_key(self, event) -> None:
        """Handle one key press (a prompt first, then the bindings, else matplotlib's keys)."""
        key = event.key
        if key is None:
            return
        if self.prompt is not None:
            self._prompt_key(key)
            if self.prompt is not None:  # still typing: only the prompt line changes
                self._draw_text()
                self._show()
            else:
                self.redraw()
            return
        binding = BINDINGS.get(key)
        if binding is None:
            from matplotlib.backend_bases import key_press_handler

            key_press_handler(event, self.fig.canvas, getattr(self.fig.canvas, "toolbar", None))
            return
        try:
            getattr(self, "_do_" + binding[0])(event)
        except (ZsieveError, ValueError) as exc:
            self.session.message = f"not done: {exc}"
            log.info("%s", exc)
        self.redraw()

    def on_click(self, event) -> None:
        """Left click on the spectrum pins a feature; on the candidate panel selects a row."""
        toolbar = getattr(self.fig.canvas, "toolbar", None)
        if toolbar is not None and getattr(toolbar, "mode", ""):
            return  # zoom or pan is active: the click is theirs
        if event.button != 1 or event.inaxes is None or self.prompt is not None:
            return
        if event.inaxes is self.ax_spec and event.xdata is not None:
            self.session.pin(float(event.xdata))
        elif event.inaxes is self.ax_cand and event.ydata is not None:
            row = int(math.floor(event.ydata))
            cands = self.session.state.candidates
            if 0 <= row < len(cands):
                self.session.state.cursor = row
                self.session.select_candidate(0)
        self.redraw()

    def _prompt_key(self, key: str) -> None:
        p = self.prompt
        if key == "escape":
            self.prompt = None
            self.session.message = "cancelled"
        elif key == "enter":
            self.prompt = None
            try:
                p.done(p.text)
            except (ZsieveError, ValueError) as exc:
                self.session.message = f"not done: {exc}"
        elif key == "backspace":
            p.text = p.text[:-1]
        elif len(key) == 1 and key.isprintable():
            p.text += key
        elif key == "space":  # some backends name it
            p.text += " "

    def _ask(self, label: str, done: Callable[[str], None], menu: str = "") -> None:
        self.prompt = _Prompt(label, done, menu=menu)

    # ------------------------------------------------------------------ actions
    def _do_help(self, event):
        self.show_help = not self.show_help

    def _do_cand_next(self, event):
        self.session.select_candidate(+1)

    def _do_cand_prev(self, event):
        self.session.select_candidate(-1)

    def _do_adopt(self, event):
        self.session.adopt()

    def _pointer_wave(self, event) -> float | None:
        if event.inaxes is self.ax_spec and event.xdata is not None:
            return float(event.xdata)
        return None

    def _do_name(self, event):
        s = self.session
        if s.state.pin is None:
            wave = self._pointer_wave(event)
            if wave is None:
                raise ZsieveError("click the feature first (or press n with the pointer on it)")
            s.pin(wave)
        choices = s.line_choices()
        menu = "   ".join(f"{i}: {n} (z={z:.4f})" for i, (n, _, z) in enumerate(choices, 1))
        self._ask(f"feature at {s.state.pin:.1f} A is (name or number):", lambda t: s.name_line(t), menu)

    def _do_type_z(self, event):
        self._ask("z =", lambda t: self.session.set_z(float(t)))

    def _do_narrow(self, event):
        self.session.narrow()

    def _do_widen(self, event):
        self.session.widen()

    def _do_cycle_class(self, event):
        self.session.cycle_template()

    def _do_mask_edge(self, event):
        wave = self._pointer_wave(event)
        if wave is None:
            raise ZsieveError("point at the spectrum to mark a mask edge")
        if self.mask_start is None:
            self.mask_start = wave
            self.session.message = f"mask from {wave:.1f} A: press m at the other edge"
        else:
            lo, self.mask_start = self.mask_start, None
            self.session.mask(lo, wave)

    def _do_unmask(self, event):
        self.session.unmask(self._pointer_wave(event))

    def _do_sky(self, event):
        self.session.toggle_sky_mask()

    def _do_bootstrap(self, event):
        self.session.rerun_bootstrap()

    def _grade(self, grade: str):
        s = self.session
        s.set_grade(grade)
        self._ask(f"grade {grade}; comment (enter to leave it):",
                  lambda t: s.set_comment(t) if t.strip() else None)

    def _do_grade_secure(self, event):
        self._grade(GRADES[0])

    def _do_grade_likely(self, event):
        self._grade(GRADES[1])

    def _do_grade_tentative(self, event):
        self._grade(GRADES[2])

    def _do_grade_none(self, event):
        self._grade(GRADES[3])

    def _do_comment(self, event):
        self._ask("comment:", self.session.set_comment)

    def _do_accept(self, event):
        self.session.accept()
        self._after_move()

    def _do_done(self, event):
        self.session.save_and_next()
        self._after_move()

    def _do_skip(self, event):
        self.session.skip()
        self._after_move()

    def _do_back(self, event):
        self.session.back()

    def _do_revert(self, event):
        self.session.revert()

    def _do_withdraw(self, event):
        self.session.withdraw()

    def _do_quit(self, event):
        self.session.finished = True
        self._after_move()

    def _do_cancel(self, event):
        self.mask_start = None
        self.session.state.pin = None
        self.session.message = "cancelled"

    def _after_move(self):
        self.mask_start = None
        if self.session.finished:
            import matplotlib.pyplot as plt

            plt.close(self.fig)

    # ------------------------------------------------------------------ drawing
    def redraw(self) -> None:
        """Draw the object on screen from the session's state."""
        s = self.session
        st = s.state
        same = self._drawn_key == (s.position, st.item.key)
        limits = (self.ax_spec.get_xlim(), self.ax_spec.get_ylim()) if same else None
        self._draw_spectrum()
        if limits is not None:  # keep the person's zoom while working on one object
            self.ax_spec.set_xlim(limits[0])
            self.ax_spec.set_ylim(limits[1])
        self._drawn_key = (s.position, st.item.key)
        self._draw_candidates()
        self._draw_curve()
        self._draw_text()
        self.help.set_visible(self.show_help)
        self._show()

    def _show(self) -> None:
        """Ask an interactive canvas to repaint; a non-interactive one (Agg) renders on save."""
        canvas = self.fig.canvas
        if getattr(type(canvas), "required_interactive_framework", None) is not None:
            canvas.draw_idle()

    def _draw_spectrum(self):
        from ..engine.prepare import sky_ranges
        from ..report import figure as repfig

        s = self.session
        st = s.state
        spec = s.spectrum
        cur = st.current
        ax = self.ax_spec
        ax.clear()
        w, f, sig = spec.wavelength, spec.flux, spec.sigma
        ok = np.isfinite(f) & np.isfinite(sig)
        band = np.where(ok, sig, np.nan)
        ax.fill_between(w, f - band, f + band, color="#9db4cc", alpha=0.55, lw=0, step="mid",
                        label="flux +- 1 sigma")
        ax.plot(w, np.where(np.isfinite(f), f, np.nan), color="#1b1b1b", lw=0.6, drawstyle="steps-mid")
        lo_y, hi_y = _robust_limits(f[spec.good] if spec.good.any() else f)
        # masked pixels: the file's own, the sky, and the person's
        for a, b in _runs(w, spec.mask):
            ax.axvspan(a, b, color="#d9d9d9", alpha=0.8, lw=0, zorder=0)
        if st.mask_sky:
            for a, b in sky_ranges():
                if b >= w[0] and a <= w[-1]:
                    ax.axvspan(a, b, color="#cfe3f7", alpha=0.7, lw=0, zorder=0)
        for a, b in st.masks:
            ax.axvspan(a, b, facecolor="#f6c28b", edgecolor="#c0661e", hatch="//", alpha=0.5, lw=0.8, zorder=0.5)
        model = s.model_flux()
        if model is not None:
            ax.plot(w, model, color=_EMISSION, lw=1.1, label="model")
        if model is not None and np.isfinite(model).any():
            hi_y = max(hi_y, float(np.nanmax(model)) + 0.1 * (hi_y - lo_y))
        # lines expected at the current z, named on staggered rows so that no two names overlap
        lines = s.expected_lines()
        trans = ax.get_xaxis_transform()
        span = w[-1] - w[0]
        char = span * 0.0062  # width of one 7.5 pt character in data units on this axes
        levels = repfig.stagger_levels([o for _, o, _, _ in lines], [char * (len(n) + 1) for n, _, _, _ in lines],
                                       n_levels=_LABEL_ROWS)
        for (name, obs, kind, _), level in zip(lines, levels):
            col = _EMISSION if kind == "emission" else _ABSORPTION
            ax.axvline(obs, color=col, lw=0.8, ls=":", alpha=0.9)
            ax.text(obs, 0.99 - 0.045 * level, name, transform=trans, ha="center", va="top",
                    fontsize=7.5, color=col, clip_on=True,
                    bbox=dict(boxstyle="square,pad=0.05", fc="white", ec="none", alpha=0.75))
        hi_y = hi_y + (_LABEL_ROWS * 0.05) * (hi_y - lo_y)  # room for the names
        if st.pin is not None:
            ax.axvline(st.pin, color="#b0128a", lw=1.4)
            ax.text(st.pin, 0.02, f" {st.pin:.1f}", transform=trans, color="#b0128a", fontsize=8)
        if self.mask_start is not None:
            ax.axvline(self.mask_start, color="#c0661e", lw=1.2, ls="--")
        ax.set_xlim(w[0], w[-1])
        ax.set_ylim(lo_y, hi_y)
        ax.set_xlabel("vacuum wavelength (Angstrom)", loc="left")
        ax.set_ylabel(f"flux ({spec.meta.flux_unit})" if spec.meta.flux_unit else "flux")
        name = cur.object_name or spec.meta.object_name or st.item.key
        z_txt = "z = ?" if not math.isfinite(cur.z) else f"z = {cur.z:.5f}" + (
            f" +- {cur.z_err:.5f}" if math.isfinite(cur.z_err) else "")
        who = "person" if (st.recorded.hand and not st.steps) else ("edited" if st.steps else "pipeline")
        ax.set_title(f"{name}   {z_txt}   {st.grade}   {cur.template or ''}   [{who}]", fontsize=11, loc="left")
        from matplotlib.patches import Patch

        handles, labels = ax.get_legend_handles_labels()
        handles += [Patch(color="#d9d9d9"), Patch(color="#cfe3f7"), Patch(facecolor="#f6c28b", hatch="//")]
        labels += ["bad pixels", "sky (masked)", "your masks"]
        ax.legend(handles, labels, loc="upper right", bbox_to_anchor=(1.0, -0.045), ncol=5, fontsize=7.5,
                  frameon=False, borderaxespad=0.0)

    def _draw_candidates(self):
        st = self.session.state
        ax = self.ax_cand
        ax.clear()
        n = len(st.candidates)
        rows = max(n, 1)
        ax.set_xlim(0, 1)
        ax.set_ylim(max(rows, 6), 0)
        ax.set_xticks([])
        ax.set_yticks([])
        ax.set_title("candidates: #, z, class, lines, p (bootstrap)\n* = shown now", fontsize=9, loc="left")
        cur_z = st.current.z
        for i, c in enumerate(st.candidates):
            y = i + 0.5
            if i == st.cursor:
                ax.axhspan(i, i + 1, color="#fff1a8", zorder=0)
            p = c.probability if math.isfinite(c.probability) else 0.0
            ax.barh(y, 0.2 * p, left=0.78, height=0.45, color=_ABSORPTION, alpha=0.6)
            ax.text(0.985, y, f"{p:.2f}", va="center", ha="right", fontsize=8, family="monospace")
            here = (math.isfinite(cur_z) and c.template == st.current.template
                    and abs(c.z - cur_z) <= max(3 * (c.z_err if math.isfinite(c.z_err) else 0), 2e-4 * (1 + c.z)))
            mark = "*" if here else " "
            cls = _SHORT_CLASS.get(c.template, c.template[:10])
            ax.text(0.01, y, f"{mark}{i + 1:>2} {c.z:8.5f} {cls:<10} {c.n_lines:>2}",
                    va="center", fontsize=8, family="monospace")
        if not n:
            ax.text(0.05, 0.5, "no candidates", va="center", fontsize=9)

    def _draw_curve(self):
        st = self.session.state
        ax = self.ax_curve
        ax.clear()
        xc = (st.current.extra or {}).get("xcorr") or (st.recorded.extra or {}).get("xcorr") or {}
        zz, rr = np.asarray(xc.get("z", []), dtype=float), np.asarray(xc.get("r", []), dtype=float)
        if zz.size and zz.size == rr.size:
            ax.plot(zz, rr, color="#444444", lw=0.7)
            ax.set_ylabel("r (Tonry-Davis)", fontsize=8)
            ax.set_title("correlation over z", fontsize=9.5, loc="left")
        else:
            samples = np.asarray(st.current.z_samples, dtype=float)
            samples = samples[np.isfinite(samples)]
            if samples.size:
                ax.hist(samples, bins=30, color="#8fa9c7")
            ax.set_title("bootstrap z values", fontsize=9.5, loc="left")
        marks = [c.z for c in st.candidates]
        for z in marks:
            ax.axvline(z, color=_ABSORPTION, lw=0.6, alpha=0.6)
        if math.isfinite(st.current.z):
            ax.axvline(st.current.z, color=_EMISSION, lw=1.3)
            marks.append(st.current.z)
        ax.axvspan(*st.z_range, color="#f3f3f3", zorder=0)
        span = [v for v in [*marks, *(zz[[0, -1]] if zz.size else [])] if math.isfinite(v)]
        if span:
            lo, hi = min(span), max(span)
            pad = 0.05 * (hi - lo) + 0.01
            ax.set_xlim(lo - pad, hi + pad)
        ax.set_xlabel("z", fontsize=8)
        ax.tick_params(labelsize=7)

    def _draw_text(self):
        s = self.session
        st = s.state
        masks = ", ".join(f"{a:.0f}-{b:.0f}" for a, b in st.masks) or "none"
        changes = f"{len(st.steps)} unsaved change(s)" if st.steps else "no unsaved changes"
        line1 = (f"object {s.position + 1}/{len(s.items)} {st.item.key}   z range {st.z_range[0]:.4f}..{st.z_range[1]:.4f}"
                 f"   class {st.template_choice or 'any'}   sky mask {'on' if st.mask_sky else 'off'}"
                 f"   your masks {masks}")
        line2 = (f"grade {st.grade}{' (by hand)' if st.hand_grade else ''}   comment: {st.comment or '-'}   "
                 f"{changes}   press ? for keys")
        self.status.set_text(line1 + "\n" + line2)
        if self.prompt is not None:
            txt = f"{self.prompt.label} {self.prompt.text}_"
            if self.prompt.menu:
                txt += "\n" + self.prompt.menu
            self.line2.set_text(txt)
        else:
            self.line2.set_text(s.message)

    def show(self) -> None:
        """Show the window and wait until the session ends or the window is closed."""
        import matplotlib.pyplot as plt

        plt.show(block=True)


def _robust_limits(flux) -> tuple[float, float]:
    """y limits that show the spectrum without letting a few spikes flatten it."""
    f = np.asarray(flux, dtype=float)
    f = f[np.isfinite(f)]
    if not f.size:
        return 0.0, 1.0
    lo, hi = np.percentile(f, [0.5, 99.7])
    pad = 0.12 * (hi - lo if hi > lo else abs(hi) + 1.0)
    return float(lo - pad), float(hi + 2 * pad)


def _runs(wave, flag) -> list[tuple[float, float]]:
    """Wavelength extent of each run of ``True`` in ``flag``.

    >>> _runs(np.arange(6.0), np.array([0, 1, 1, 0, 0, 1], bool))
    [(1.0, 2.0), (5.0, 5.0)]
    """
    flag = np.asarray(flag, dtype=bool)
    if not flag.any():
        return []
    d = np.diff(np.concatenate(([0], flag.astype(np.int8), [0])))
    starts, ends = np.flatnonzero(d == 1), np.flatnonzero(d == -1) - 1
    return [(float(wave[a]), float(wave[b])) for a, b in zip(starts, ends)]


def snapshot(session, path, *, dpi: int = 110, show_help: bool = False) -> str:
    """Render the window for the session's current object to an image file (no display needed)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(14, 8))
    FigureCanvasAgg(fig)
    win = RefitWindow(session, figure=fig)
    win.show_help = show_help
    win.redraw()
    fig.savefig(path, dpi=dpi)
    log.info("snapshot of %s written to %s", session.item.key, path)
    return str(path)
