"""The refit session: a person looks at doubtful objects, corrects them, and the decisions last.

:class:`RefitSession` is the model of ``zsieve inspect``. It is a plain Python object with one
method per action (adopt a candidate, name a feature as a rest line, type a z, narrow or widen
the z range, choose the template class, mask a wavelength range, rerun the bootstrap, grade by
hand, approve, skip, go back, save). The matplotlib window (:mod:`zsieve.refit.window`) only
binds keys and clicks to these methods and redraws; everything it can do can be done from
Python without a display.

Every refit calls the engine (:func:`zsieve.engine.measure.measure`) with a
:class:`~zsieve.engine.measure.MeasureConfig` built from the object's batch settings and the
person's choices: a window of z around the chosen value (``z_min``/``z_max``), the chosen
class (``classes``), the person's masks (``extra_masks``) and the sky masking switch.

Saving writes one line to ``DIR/decisions.log`` (:mod:`zsieve.refit.decisions`) and rewrites
the object's JSON record, its figure, the summary tables and the index page through the report
layer, each atomically.

Examples
--------
Matching what a person types to a line of the list:

>>> names = ["H-alpha", "H-beta", "[O III] 5008", "[O II] 3727", "Ly-alpha", "[N II] 6585"]
>>> [match_line_name(t, names) for t in ("ha", "Halpha", "oiii5008", "lya", "n ii")]
['H-alpha', 'H-alpha', '[O III] 5008', 'Ly-alpha', '[N II] 6585']
"""

from __future__ import annotations

import dataclasses
import fnmatch
import logging
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from ..errors import SpectrumFileError, ZsieveError
from ..result import GRADES, Candidate, FitResult, LineMatch, to_jsonable
from . import decisions as _dec

__all__ = [
    "RefitSession",
    "Item",
    "ObjectState",
    "match_line_name",
    "short_line_name",
    "CLASSES",
    "C_KMS",
]

log = logging.getLogger(__name__)

#: Speed of light in km/s (astropy.constants.c, exact by definition of the metre).
C_KMS = 299792.458

#: Object classes the engine knows, in the order the class key cycles through them.
CLASSES = ("emission-galaxy", "absorption-galaxy", "quasar", "star")

#: Widest z range the widen action may reach (stars are slightly blueshifted).
Z_LIMITS = (-0.01, 10.0)

_GREEK = {"alpha": "a", "beta": "b", "gamma": "g", "delta": "d", "epsilon": "e"}


# ----------------------------------------------------------------------------- line names
def _squash(text: str) -> str:
    return re.sub(r"[^0-9a-z]", "", text.lower())


def short_line_name(name: str) -> str:
    """The short typed form of a line name: lower case, no brackets or spaces, Greek to a letter.

    >>> short_line_name("H-alpha"), short_line_name("[O III] 5008"), short_line_name("Ly-alpha")
    ('ha', 'oiii5008', 'lya')
    """
    low = name.lower()
    for word, letter in _GREEK.items():
        low = low.replace(word, letter)
    return _squash(low)


def match_line_name(text: str, names: Sequence[str]) -> str | None:
    """The one line name of ``names`` that the typed ``text`` stands for, or ``None``.

    Tried in order: the exact name (case and punctuation ignored), the exact short form
    (:func:`short_line_name`), then a unique prefix of either form. An ambiguous prefix
    gives ``None`` (the caller shows the choices).

    >>> match_line_name("hb", ["H-alpha", "H-beta"])
    'H-beta'
    >>> match_line_name("h", ["H-alpha", "H-beta"]) is None
    True
    """
    t = _squash(text)
    if not t:
        return None
    full = {n: _squash(n) for n in names}
    short = {n: short_line_name(n) for n in names}
    for table in (full, short):
        exact = [n for n, s in table.items() if s == t]
        if len(exact) == 1:
            return exact[0]
    pref = sorted({n for n in names if full[n].startswith(t) or short[n].startswith(t)})
    if len(pref) == 1:
        return pref[0]
    return None


# ----------------------------------------------------------------------------- items
@dataclass
class Item:
    """One object the session steps through.

    Attributes
    ----------
    key : str
        The object's key in the output folder (``objects/<key>.json``).
    file : str
        The input spectrum file.
    index : int
        Which spectrum of the file.
    result : FitResult or None
        The answer on record (``None`` until measured, for a file opened directly).
    spectrum : Spectrum or None
        Loaded on first use.
    """

    key: str
    file: str
    index: int = 0
    result: FitResult | None = None
    spectrum: Any = None
    medium: str | None = None


@dataclass
class ObjectState:
    """What the person has done to the object on screen since it was opened or last saved."""

    item: Item
    recorded: FitResult  # the answer on record when the object was opened (the "previous")
    current: FitResult  # the answer shown, which a save would write
    candidates: list[Candidate]  # ranked candidates of the last full search (the panel)
    cursor: int = 0  # highlighted candidate
    z_range: tuple[float, float] = (0.0, 6.0)
    classes: tuple[str, ...] = CLASSES
    template_choice: str | None = None  # None: all classes
    masks: list[tuple[float, float]] = field(default_factory=list)
    mask_sky: bool = True
    hand_grade: str | None = None
    comment: str = ""
    approved: bool = False
    pin: float | None = None  # wavelength of the feature the person clicked
    steps: list[tuple[str, str]] = field(default_factory=list)  # (action, what) since last save
    seed: int = 0
    n_resamples: int = 0

    @property
    def dirty(self) -> bool:
        """True when there is something a save would record."""
        return bool(self.steps) or self.approved

    @property
    def grade(self) -> str:
        """The grade a save would write: the person's if set, else the fit's."""
        return self.hand_grade or self.current.grade or "none"


# ----------------------------------------------------------------------------- the session
class RefitSession:
    """Step through objects, refit them as a person directs, and record the decisions.

    Parameters
    ----------
    items : sequence of Item
        The objects to look at, in order.
    out_dir : path, optional
        The batch output folder the decisions, records, figures and summary go to. Without it
        decisions are kept in :attr:`decisions` only.
    config : MeasureConfig or dict, optional
        Engine settings to start from (a dict gives ``MeasureConfig`` fields); by default the
        settings the batch recorded in each object's provenance, else the engine's defaults.
    window_kms : float
        Half-width, in km/s, of the z window searched when refitting around a chosen z.
    user : str, optional
        Who is deciding (default: the login name).
    measure : callable, optional
        ``measure(spectrum, config) -> FitResult``; default the engine's.
    overrides : dict, optional
        ``MeasureConfig`` fields to change on top of the object's settings (e.g. fewer
        resamples for a quick look).
    """

    def __init__(
        self,
        items: Sequence[Item],
        out_dir: str | os.PathLike | None = None,
        *,
        config=None,
        window_kms: float = 800.0,
        user: str | None = None,
        measure: Callable | None = None,
        overrides: dict[str, Any] | None = None,
    ):
        if not items:
            raise ZsieveError("nothing to inspect: no objects were selected")
        self.items = list(items)
        self.out_dir = Path(out_dir) if out_dir is not None else None
        self._config = config
        self.window_kms = float(window_kms)
        self.user = user or _dec.login_name()
        self._measure = measure
        self._overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
        self.position = 0
        self.finished = False
        self.decisions: list[dict[str, Any]] = []
        self.message = ""  # last thing worth telling the person (shown in the window)
        self._linelist = None
        self._prepared = None
        self._state: ObjectState | None = None
        if not self._open_readable(0, +1):
            raise ZsieveError("nothing to inspect: none of the selected spectra could be read")

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_file(cls, path, *, out_dir=None, index: int | None = None, medium: str | None = None, **kw):
        """A session over the spectra of one file (all of them, or the one at ``index``).

        Each spectrum is measured with the engine when it comes up.
        """
        from ..io import read_spectra

        spectra = read_spectra(path, medium=medium)
        if index is not None:
            if not 0 <= index < len(spectra):
                raise SpectrumFileError(path, f"has {len(spectra)} spectra; there is no index {index}")
            chosen = [(index, spectra[index])]
        else:
            chosen = list(enumerate(spectra))
        items = [
            Item(key=_object_key(path, i, len(spectra)), file=str(path), index=i, spectrum=s, medium=medium)
            for i, s in chosen
        ]
        return cls(items, out_dir, **kw)

    @classmethod
    def from_folder(
        cls,
        folder,
        *,
        grades: Iterable[str] | None = None,
        flags: Iterable[str] | None = None,
        name: str | None = None,
        include_all: bool = False,
        include_decided: bool = False,
        **kw,
    ):
        """A session over the objects of a batch output folder that need a look.

        By default: every object whose grade is not ``secure`` and that no person has decided
        yet. ``grades`` picks by grade instead, ``flags`` keeps objects carrying any of those
        flags, ``name`` is a shell pattern matched against the key, the object name and the
        file name; ``include_all`` drops the grade rule, ``include_decided`` keeps objects with a
        decision in force.
        """
        items = select_items(
            folder,
            grades=grades,
            flags=flags,
            name=name,
            include_all=include_all,
            include_decided=include_decided,
        )
        if not items:
            raise ZsieveError(f"{folder}: no objects match the selection")
        return cls(items, folder, **kw)

    # ------------------------------------------------------------------ engine access
    def _engine(self):
        from ..engine import measure as _m

        return _m

    def _base_config(self, item: Item):
        """The engine settings of this object: the session's, else what the batch recorded."""
        eng = self._engine()
        cfg = self._config
        if cfg is None:
            prov = (item.result.provenance if item.result is not None else {}) or {}
            cfg = prov.get("config") or prov.get("measure_config") or {}
        if not isinstance(cfg, eng.MeasureConfig):
            names = {f.name for f in dataclasses.fields(eng.MeasureConfig)}
            kw = {k: (tuple(map(tuple, v)) if k == "extra_masks" else tuple(v) if k == "classes" else v)
                  for k, v in dict(cfg).items() if k in names and v is not None}
            cfg = eng.MeasureConfig(**kw)
        return dataclasses.replace(cfg, **self._overrides) if self._overrides else cfg

    def _run(self, z_lo: float, z_hi: float, classes: Sequence[str], *, n_resamples=None, seed=None) -> FitResult:
        st = self.state
        base = self._base_config(st.item)
        cfg = dataclasses.replace(
            base,
            z_min=float(z_lo),
            z_max=float(z_hi),
            classes=tuple(classes),
            extra_masks=tuple(tuple(map(float, m)) for m in st.masks) + tuple(base.extra_masks or ()),
            mask_sky=bool(st.mask_sky),
            n_resamples=int(n_resamples if n_resamples is not None else st.n_resamples or base.n_resamples),
            seed=seed if seed is not None else st.seed,
        )
        measure = self._measure or self._engine().measure
        log.info("refit %s: z in [%.5f, %.5f], classes %s, %d masks", st.item.key, z_lo, z_hi,
                 ",".join(cfg.classes), len(cfg.extra_masks))
        result = measure(self.spectrum, cfg)
        # keep what the batch knew about the object (file, provenance) on the new answer
        rec = st.recorded
        return result.replace(
            file=rec.file or result.file,
            object_name=result.object_name or rec.object_name,
            provenance=dict(rec.provenance or {}),
            cosmology=None,
            frames=None,
        )

    # ------------------------------------------------------------------ state
    @property
    def state(self) -> ObjectState:
        """The object on screen."""
        assert self._state is not None
        return self._state

    @property
    def item(self) -> Item:
        return self.state.item

    @property
    def result(self) -> FitResult:
        """The answer shown for the object on screen."""
        return self.state.current

    @property
    def spectrum(self):
        """The spectrum of the object on screen (read from its file on first use)."""
        item = self.state.item
        if item.spectrum is None:
            from ..io import read_spectrum

            path = _resolve_input(item, self.out_dir)
            item.spectrum = read_spectrum(path, medium=item.medium, index=item.index)
        return item.spectrum

    @property
    def linelist(self):
        """The rest-frame line list (vacuum Angstrom)."""
        if self._linelist is None:
            from ..lines import load_linelist

            cfg_path = None
            try:
                cfg_path = self._base_config(self.state.item).linelist
            except Exception:  # engine absent: the bundled list
                cfg_path = None
            self._linelist = load_linelist(cfg_path)
        return self._linelist

    def _open(self, position: int) -> None:
        self.position = position
        item = self.items[position]
        if item.result is None:  # a file opened directly: measure it with the base settings
            self._state = ObjectState(item=item, recorded=FitResult(file=item.file), current=FitResult(file=item.file),
                                      candidates=[])
            base = self._base_config(item)
            self._state.n_resamples = base.n_resamples
            self._state.seed = base.seed if base.seed is not None else 0
            measured = self._run(base.z_min, base.z_max, base.classes)
            item.result = measured.replace(file=item.file, provenance=dict(
                key=item.key, index=item.index, input=item.file, path=os.path.abspath(item.file),
                config=to_jsonable(dataclasses.asdict(base)), medium_option=item.medium, tool="zsieve inspect",
                time=_dec.utc_now()))
        rec = item.result
        shown = in_force_result(rec)
        base = None
        try:
            base = self._base_config(item)
        except ImportError:
            base = None
        z_range = (base.z_min, base.z_max) if base is not None else (0.0, 6.0)
        classes = tuple(base.classes) if base is not None else CLASSES
        hand = rec.hand or {}
        masks = [tuple(m) for m in hand.get("masks", [])]
        self._state = ObjectState(
            item=item,
            recorded=rec,
            current=shown,
            candidates=list(rec.candidates),
            z_range=tuple(hand.get("z_range") or z_range),
            classes=classes,
            template_choice=hand.get("template_choice"),
            masks=masks,
            mask_sky=bool(hand.get("mask_sky", base.mask_sky if base is not None else True)),
            seed=(rec.seed if rec.seed is not None else (base.seed if base is not None and base.seed is not None else 0)),
            n_resamples=rec.n_resamples or (base.n_resamples if base is not None else 100),
        )
        self.message = f"object {position + 1} of {len(self.items)}: {item.key}"
        log.info("opened %s (%s)", item.key, item.file)

    def _step(self, action: str, what: str) -> None:
        self.state.steps.append((action, what))
        self.message = what
        log.info("%s: %s", self.item.key, what)

    # ------------------------------------------------------------------ candidates
    def select_candidate(self, step: int = 1) -> Candidate | None:
        """Move the highlight through the ranked candidates (wraps around); returns it."""
        st = self.state
        if not st.candidates:
            self.message = "no candidates to choose from"
            return None
        st.cursor = (st.cursor + step) % len(st.candidates)
        c = st.candidates[st.cursor]
        self.message = f"candidate {st.cursor + 1}: z = {c.z:.5f} ({c.template}, p = {c.probability:.2f})"
        return c

    def adopt(self, rank: int | None = None) -> FitResult:
        """Adopt the highlighted candidate (or the one at 0-based ``rank``) and refit around it."""
        st = self.state
        if not st.candidates:
            raise ZsieveError("no candidates to adopt")
        if rank is not None:
            if not 0 <= rank < len(st.candidates):
                raise ZsieveError(f"there are {len(st.candidates)} candidates; no number {rank + 1}")
            st.cursor = rank
        cand = st.candidates[st.cursor]
        self._refit_around(cand.z, cand.z_err, classes=(cand.template,) if cand.template else None)
        self._step("adopt-candidate", f"adopted candidate {st.cursor + 1} (z = {cand.z:.5f}, {cand.template})")
        return st.current

    # ------------------------------------------------------------------ naming a feature
    def pin(self, wavelength: float) -> None:
        """Mark the feature at ``wavelength`` (vacuum Angstrom) to be named."""
        self.state.pin = float(wavelength)
        self.message = f"feature at {wavelength:.1f} A: name it (n)"

    def prepared(self):
        """The engine's preparation (masks, continuum) of the spectrum with the session's masks
        and sky switch; cached until those change."""
        from ..engine.prepare import prepare

        st = self.state
        key = (self.position, id(self.spectrum), tuple(st.masks), st.mask_sky)
        if self._prepared is None or self._prepared[0] != key:
            base = self._base_config(st.item)
            prep = prepare(self.spectrum, mask_sky=st.mask_sky,
                           extra_masks=tuple(st.masks) + tuple(base.extra_masks or ()),
                           sky_min_strength=base.sky_min_strength, continuum_kms=base.continuum_kms,
                           open_bands_to_emission=base.emission_in_bands)
            self._prepared = (key, prep)
        return self._prepared[1]

    def feature_kind(self, wavelength: float) -> str:
        """``"emission"`` or ``"absorption"``: the sign of the flux above the engine's continuum
        within three pixels of ``wavelength``."""
        spec = self.spectrum
        prep = self.prepared()
        i = int(np.clip(np.searchsorted(spec.wavelength, wavelength), 0, spec.n_pix - 1))
        sl = slice(max(i - 3, 0), i + 4)
        return "emission" if float(np.sum(prep.resid[sl])) >= 0 else "absorption"

    def line_choices(self, wavelength: float | None = None, limit: int = 9) -> list[tuple[str, float, float]]:
        """Rest lines the feature at ``wavelength`` could be: ``(name, rest, z)``, likeliest first.

        Only lines of the feature's kind (emission or absorption, from the data) that put z
        inside the widest range the session allows are offered, ordered by how strong the line
        typically is for the class chosen (or any class).
        """
        wave = self.state.pin if wavelength is None else float(wavelength)
        if wave is None:
            return []
        names, rest, strength = self._lines_by_name(self._classes_now(), self.feature_kind(wave))
        z = wave / rest - 1.0
        ok = (z >= Z_LIMITS[0]) & (z <= Z_LIMITS[1]) & (strength > 0)
        order = np.argsort(-np.where(ok, strength, -np.inf), kind="stable")[: int(ok.sum())]
        return [(names[i], float(rest[i]), float(z[i])) for i in order[:limit]]

    def _lines_by_name(self, classes: Sequence[str], kind: str | None = None):
        """One entry per line name: ``(names, rest, strength)``, strength the largest typical
        strength over ``classes`` among the rows of that ``kind`` (all rows if ``None``)."""
        from ..lines import CLASS_COLUMNS

        tab = self.linelist
        cols = [CLASS_COLUMNS[c] for c in classes if CLASS_COLUMNS.get(c) in tab.colnames]
        strength = np.max([np.asarray(tab[c], dtype=float) for c in cols], axis=0) if cols else np.ones(len(tab))
        if kind is not None:
            strength = np.where(np.asarray(tab["kind"]).astype(str) == kind, strength, 0.0)
        allnames = np.asarray(tab["name"]).astype(str)
        order = np.lexsort((-strength, allnames))  # by name, strongest row first
        names, first = np.unique(allnames[order], return_index=True)
        rows = order[first]
        return list(names), np.asarray(tab["wave_vac"], dtype=float)[rows], strength[rows]

    def _classes_for_line(self, name: str, kind: str) -> tuple[str, ...]:
        """The class to refit with after naming a line: the person's choice if made, else the
        first class listing the line with the feature's kind, narrow-line classes first
        (emission: emission-galaxy, quasar; absorption: absorption-galaxy, star)."""
        from ..lines import CLASS_COLUMNS

        st = self.state
        if st.template_choice:
            return (st.template_choice,)
        tab = self.linelist
        rows = np.asarray(tab["name"]).astype(str) == name
        same = rows & (np.asarray(tab["kind"]).astype(str) == kind)
        prefer = CLASSES if kind == "emission" else ("absorption-galaxy", "star", "emission-galaxy", "quasar")
        for pick in (same, rows):
            for cls in prefer:
                col = CLASS_COLUMNS.get(cls)
                if cls in st.classes and col in tab.colnames and np.any(np.asarray(tab[col], dtype=float)[pick] > 0):
                    return (cls,)
        return self._classes_now()

    def name_line(self, name: str, wavelength: float | None = None) -> FitResult:
        """Say the feature at ``wavelength`` (default: the pinned one) is the rest line ``name``.

        ``name`` is a line name, its short form (``"ha"``, ``"oiii5008"``) or the number of a
        choice from :meth:`line_choices`. Sets z = wavelength / rest - 1 and refits in a narrow
        window around it with the class the line belongs to (:meth:`_classes_for_line`).
        """
        st = self.state
        wave = st.pin if wavelength is None else float(wavelength)
        if wave is None:
            raise ZsieveError("click the feature first, then name it")
        names, rests, _ = self._lines_by_name(CLASSES)
        text = str(name).strip()
        chosen = None
        if text.isdigit():
            choices = self.line_choices(wave)
            k = int(text) - 1
            if not 0 <= k < len(choices):
                raise ZsieveError(f"no choice number {text} (there are {len(choices)})")
            chosen = choices[k][0]
        else:
            chosen = match_line_name(text, names)
        if chosen is None:
            opts = ", ".join(n for n in names if short_line_name(n).startswith(_squash(text)))[:200]
            raise ZsieveError(f"no single line matches {text!r}" + (f" (could be: {opts})" if opts else ""))
        rest = float(rests[names.index(chosen)])
        z = wave / rest - 1.0
        kind = self.feature_kind(wave)
        self._refit_around(z, math.nan, classes=self._classes_for_line(chosen, kind))
        self._step("name-line", f"{kind} feature at {wave:.2f} A named {chosen} ({rest:.2f} A): z = {z:.5f}")
        st.pin = None
        return st.current

    def set_z(self, z: float) -> FitResult:
        """Take a z typed by the person and refit around it."""
        z = float(z)
        if not (Z_LIMITS[0] <= z <= Z_LIMITS[1]):
            raise ZsieveError(f"z = {z} is outside {Z_LIMITS[0]} .. {Z_LIMITS[1]}")
        self._refit_around(z, math.nan)
        self._step("type-z", f"z typed as {z:.5f}")
        return self.state.current

    def _window(self, z: float, z_err: float) -> tuple[float, float]:
        half = self.window_kms / C_KMS * (1.0 + z)
        if math.isfinite(z_err) and z_err > 0:
            half = max(half, 5.0 * z_err)
        return max(Z_LIMITS[0], z - half), min(Z_LIMITS[1], z + half)

    def _classes_now(self) -> tuple[str, ...]:
        st = self.state
        return (st.template_choice,) if st.template_choice else tuple(st.classes)

    def _refit_around(self, z: float, z_err: float, classes: Sequence[str] | None = None, **kw) -> None:
        """Refit in a narrow window around ``z``; keep the person's z if the fit finds nothing there."""
        st = self.state
        lo, hi = self._window(z, z_err)
        classes = _classes_for_range(tuple(classes) if classes else self._classes_now(), lo, hi)
        result = self._run(lo, hi, classes, **kw)
        if result.status == "ok" and math.isfinite(result.z) and lo <= result.z <= hi:
            st.current = result
        else:
            why = result.message or "no fit in the window"
            log.warning("%s: refit around z = %.5f found nothing (%s); keeping the z as given", self.item.key, z, why)
            st.current = st.recorded.replace(
                z=float(z), z_err=math.nan, z_p16=math.nan, z_p50=math.nan, z_p84=math.nan,
                z_formal_err=math.nan, lines=[], template=classes[0] if len(classes) == 1 else "",
                flags=sorted(set(st.recorded.flags) | {"not-refit"}), z_samples=[], hand=None,
            )
            self.message = f"no fit found near z = {z:.5f}; z kept as given"

    # ------------------------------------------------------------------ range, class, masks
    def _refit_wide(self, what: str) -> FitResult:
        st = self.state
        result = self._run(st.z_range[0], st.z_range[1], _classes_for_range(self._classes_now(), *st.z_range))
        st.current = result
        st.candidates = list(result.candidates)
        st.cursor = 0
        self._step("refit", what)
        return result

    def set_z_range(self, z_lo: float, z_hi: float) -> FitResult:
        """Search ``z_lo <= z <= z_hi`` afresh."""
        lo, hi = sorted((float(z_lo), float(z_hi)))
        lo, hi = max(lo, Z_LIMITS[0]), min(hi, Z_LIMITS[1])
        if not hi > lo:
            raise ZsieveError(f"empty z range {z_lo} .. {z_hi}")
        self.state.z_range = (lo, hi)
        return self._refit_wide(f"z range set to {lo:.4f} .. {hi:.4f}")

    def narrow(self, factor: float = 0.5) -> FitResult:
        """Shrink the z range around the current z by ``factor`` and search again."""
        return self._scale_range(factor)

    def widen(self, factor: float = 2.0) -> FitResult:
        """Grow the z range around the current z by ``factor`` and search again."""
        return self._scale_range(factor)

    def _scale_range(self, factor: float) -> FitResult:
        st = self.state
        lo, hi = st.z_range
        zc = st.current.z if math.isfinite(st.current.z) else 0.5 * (lo + hi)
        half = 0.5 * (hi - lo) * float(factor)
        half = max(half, 2.0 * self.window_kms / C_KMS * (1.0 + zc))
        return self.set_z_range(zc - half, zc + half)

    def set_template(self, cls: str | None) -> FitResult:
        """Restrict the search to one class (``None``: all classes) and search again."""
        if cls is not None and cls not in self.state.classes:
            raise ZsieveError(f"unknown class {cls!r}; expected one of {', '.join(self.state.classes)}")
        self.state.template_choice = cls
        return self._refit_wide(f"class set to {cls or 'any'}")

    def cycle_template(self) -> FitResult:
        """Next class in the list (after the last: all classes again)."""
        st = self.state
        order = [None, *st.classes]
        nxt = order[(order.index(st.template_choice) + 1) % len(order)]
        return self.set_template(nxt)

    def mask(self, lo: float, hi: float) -> FitResult:
        """Leave out the pixels between ``lo`` and ``hi`` (vacuum Angstrom) and search again."""
        lo, hi = sorted((float(lo), float(hi)))
        if not hi > lo:
            raise ZsieveError("a mask needs two different wavelengths")
        self.state.masks.append((lo, hi))
        return self._refit_wide(f"masked {lo:.1f} .. {hi:.1f} A")

    def unmask(self, wavelength: float | None = None) -> FitResult | None:
        """Remove the person's mask covering ``wavelength`` (default: the last one), search again."""
        st = self.state
        if not st.masks:
            self.message = "no masks of yours to remove"
            return None
        if wavelength is None:
            k = len(st.masks) - 1
        else:
            hits = [i for i, (a, b) in enumerate(st.masks) if a <= wavelength <= b]
            if not hits:
                self.message = f"no mask of yours covers {wavelength:.1f} A"
                return None
            k = hits[-1]
        lo, hi = st.masks.pop(k)
        return self._refit_wide(f"unmasked {lo:.1f} .. {hi:.1f} A")

    def toggle_sky_mask(self) -> FitResult:
        """Switch the automatic masking of night-sky lines and telluric bands off or on."""
        st = self.state
        st.mask_sky = not st.mask_sky
        return self._refit_wide("sky masking " + ("on" if st.mask_sky else "off"))

    def pixels_used(self) -> np.ndarray:
        """Boolean array: pixels the next refit may use (not bad, not in a mask of the person)."""
        from ..engine.prepare import range_mask

        spec = self.spectrum
        return spec.good & ~range_mask(spec.wavelength, self.state.masks)

    # ------------------------------------------------------------------ bootstrap
    def rerun_bootstrap(self, n_resamples: int | None = None) -> FitResult:
        """Redo the bootstrap for the current choice (same z window and class), fresh seed."""
        st = self.state
        cur = st.current
        if not math.isfinite(cur.z):
            raise ZsieveError("no z to rerun the bootstrap for")
        st.seed = int(st.seed) + 1
        if n_resamples is not None:
            st.n_resamples = int(n_resamples)
        classes = (cur.template,) if cur.template else None
        self._refit_around(cur.z, cur.z_err, classes=classes)
        self._step("bootstrap", f"bootstrap rerun ({st.n_resamples} resamples, seed {st.seed}): "
                                f"z = {st.current.z:.5f} +- {st.current.z_err:.1e}")
        return st.current

    # ------------------------------------------------------------------ grade, approve
    def set_grade(self, grade: str, comment: str | None = None) -> None:
        """Set the grade by hand (secure, likely, tentative, none), optionally with a comment."""
        if grade not in GRADES:
            raise ZsieveError(f"unknown grade {grade!r}; expected one of {', '.join(GRADES)}")
        self.state.hand_grade = grade
        if comment is not None:
            self.state.comment = " ".join(comment.split())
        self._step("grade", f"grade set to {grade}")

    def set_comment(self, text: str) -> None:
        """Attach a short comment to the decision."""
        self.state.comment = " ".join(str(text).split())
        self.message = f"comment: {self.state.comment}"

    def approve(self) -> None:
        """Endorse the answer shown as it stands."""
        self.state.approved = True
        self.message = "approved"

    def revert(self) -> None:
        """Forget the edits made since the object was opened."""
        self._open(self.position)
        self.message = "edits dropped"

    # ------------------------------------------------------------------ moving on
    def accept(self) -> dict[str, Any] | None:
        """Approve what is shown, save it and move to the next object."""
        self.approve()
        return self.save_and_next()

    def skip(self) -> None:
        """Move to the next object without recording anything."""
        self._move(+1)

    def back(self) -> None:
        """Go back to the previous object (unsaved edits of this one are dropped)."""
        if self.position == 0:
            self.message = "this is the first object"
            return
        self._move(-1)

    def save_and_next(self) -> dict[str, Any] | None:
        """Save the decision on this object (if there is one) and move to the next."""
        rec = self.save()
        self._move(+1)
        return rec

    def _move(self, step: int) -> None:
        here = self.position
        new = here + step
        if new >= len(self.items):
            self.finished = True
            self.message = "that was the last object"
            return
        if not self._open_readable(max(new, 0), step):
            if step > 0:
                self.finished = True
                self.message = "no readable object after this one"
            else:
                self._open(here)
                self.message = "no readable object before this one"

    def _open_readable(self, position: int, step: int) -> bool:
        """Open the first object from ``position`` on (in direction ``step``) whose spectrum can
        be read; an unreadable one is logged and passed over. False if there is none."""
        while 0 <= position < len(self.items):
            try:
                self._open(position)
                _ = self.spectrum
                return True
            except SpectrumFileError as exc:
                log.warning("passed over %s: %s", self.items[position].key, exc)
                position += 1 if step >= 0 else -1
        return False

    # ------------------------------------------------------------------ saving
    def decision(self) -> dict[str, Any] | None:
        """The decision a save would record now, or ``None`` if nothing was decided."""
        st = self.state
        if not st.dirty:
            return None
        kinds = {a for a, _ in st.steps}
        if not kinds:
            action = "approve"
        elif len(kinds) == 1:
            action = kinds.pop()
        else:
            action = "edit"
        cur, before = st.current, in_force_result(st.recorded)
        return _dec.make_decision(
            key=st.item.key,
            file=st.item.file,
            index=st.item.index,
            action=action,
            z=cur.z,
            z_err=cur.z_err,
            grade=st.grade,
            template=cur.template,
            previous_z=before.z,
            previous_grade=before.grade,
            previous_template=before.template,
            comment=st.comment,
            user=self.user,
            changes=[w for _, w in st.steps] or ["approved as shown"],
            masks=[list(m) for m in st.masks],
            z_range=list(st.z_range),
            template_choice=st.template_choice,
            mask_sky=st.mask_sky,
        )

    def save(self) -> dict[str, Any] | None:
        """Record the decision on the object on screen; returns it (``None`` if none).

        The object's record keeps the engine's automatic answer in its top-level fields; the
        decision goes into its ``hand`` field (with the refit's lines, percentiles and the
        cosmology for the hand z), which the summary and index then show. With an output
        folder: appends to ``decisions.log``, then rewrites the record, its figure, the summary
        tables and the index page through the report layer.
        """
        st = self.state
        rec = self.decision()
        if rec is None:
            self.message = "nothing to save"
            return None
        cur = st.current
        before = st.recorded
        hand = dict(rec)
        hand.update(
            z_p16=cur.z_p16, z_p50=cur.z_p50, z_p84=cur.z_p84, z_formal_err=cur.z_formal_err,
            confidence=cur.confidence, n_resamples=cur.n_resamples, seed=cur.seed,
            flags=list(cur.flags), lines=[dataclasses.asdict(m) for m in cur.lines],
            z_samples=list(cur.z_samples),
            auto=(before.hand or {}).get("auto") or dict(
                z=before.z, z_err=before.z_err, grade=before.grade, template=before.template,
                confidence=before.confidence),
        )
        from ..report import hand_cosmology

        prov = dict(before.provenance or {})
        hand = hand_cosmology(to_jsonable(hand), prov.get("cosmology_spec"))
        final = before.replace(hand=to_jsonable(hand), provenance=prov)
        self.decisions.append(rec)
        if self.out_dir is not None:
            _dec.append_decision(self.out_dir, rec)
            _write_outputs(self.out_dir, st.item.key, final, self.display_result(in_force_result(final)),
                           self.spectrum)
        st.item.result = final
        st.recorded = final
        st.steps.clear()
        st.approved = False
        self.message = f"saved: z = {cur.z:.5f}, {st.grade}"
        return rec

    def withdraw(self) -> dict[str, Any] | None:
        """Withdraw the person's decision on record for this object: an ``undo`` line in the
        log, and the record, figure and summary back to the automatic answer."""
        st = self.state
        before = st.recorded
        if not before.hand:
            self.message = "no decision on record to withdraw"
            return None
        shown = in_force_result(before)
        rec = _dec.make_decision(
            key=st.item.key, file=st.item.file, index=st.item.index, action="undo", z=before.z,
            z_err=before.z_err, grade=before.grade or "none", template=before.template,
            previous_z=shown.z, previous_grade=shown.grade, previous_template=shown.template,
            comment=st.comment, user=self.user, changes=["decision withdrawn: back to the automatic answer"],
        )
        final = before.replace(hand=None)
        self.decisions.append(rec)
        if self.out_dir is not None:
            _dec.append_decision(self.out_dir, rec)
            st.masks, st.mask_sky = [], True
            _write_outputs(self.out_dir, st.item.key, final, self.display_result(final), self.spectrum)
        st.item.result = final
        self._open(self.position)
        self.message = f"decision withdrawn: z = {final.z:.5f}, {final.grade} (automatic)"
        return rec

    # ------------------------------------------------------------------ what to draw
    def expected_lines(self) -> list[tuple[str, float, str, float]]:
        """Lines expected at the current z inside the data: ``(name, observed, kind, strength)``."""
        z = self.state.current.z
        if not math.isfinite(z):
            return []
        spec = self.spectrum
        template = self.state.current.template
        classes = (template,) if template in CLASSES else self._classes_now()
        tab = self.linelist
        names, rest, strength = self._lines_by_name(classes)
        kinds = dict(zip(np.asarray(tab["name"]).astype(str), np.asarray(tab["kind"]).astype(str)))
        kind = [kinds[n] for n in names]
        obs = rest * (1.0 + z)
        inside = (obs >= spec.wavelength[0]) & (obs <= spec.wavelength[-1])
        keep = np.flatnonzero(inside & (strength > 0))
        keep = keep[np.argsort(obs[keep])]
        return [(names[i], float(obs[i]), kind[i], float(strength[i])) for i in keep]

    def display_result(self, result: FitResult | None = None) -> FitResult:
        """The current answer with the session's masks and sky switch in its recorded settings,
        as the report layer's figure and model read them."""
        st = self.state
        result = st.current if result is None else result
        prov = dict(result.provenance or {})
        cfg = dict(prov.get("config") or {})
        base = [list(m) for m in cfg.get("extra_masks") or () if tuple(m) not in {tuple(x) for x in st.masks}]
        cfg["extra_masks"] = base + [list(m) for m in st.masks]
        cfg["mask_sky"] = bool(st.mask_sky)
        prov["config"] = cfg
        return result.replace(provenance=prov)

    def model_flux(self) -> np.ndarray | None:
        """The current model on the spectrum's pixels: the engine's continuum (with the
        session's masks) plus every fitted line of the current answer (report layer)."""
        from ..report.figure import model_flux

        return model_flux(self.spectrum, self.display_result(), prepared=self.prepared())


# ----------------------------------------------------------------------------- helpers
def _classes_for_range(classes: tuple[str, ...], lo: float, hi: float) -> tuple[str, ...]:
    """The classes worth searching in ``lo <= z <= hi``: stars only where the range reaches
    their velocities (the engine searches stars near z = 0 whatever the range).

    >>> _classes_for_range(("emission-galaxy", "star"), 0.29, 0.31)
    ('emission-galaxy',)
    """
    from ..engine.measure import STAR_MAX_KMS

    v = STAR_MAX_KMS / C_KMS
    keep = tuple(c for c in classes if c != "star" or (lo <= v and hi >= -v))
    if not keep:
        raise ZsieveError(f"stars sit within {STAR_MAX_KMS:.0f} km/s of z = 0, outside z = {lo:.4f} .. {hi:.4f}")
    return keep


def in_force_result(result: FitResult) -> FitResult:
    """The answer in force for a record: the person's (its ``hand`` field) over the engine's.

    >>> r = FitResult(z=0.9, grade="tentative", hand={"z": 0.31, "z_err": 1e-4, "grade": "likely"})
    >>> shown = in_force_result(r)
    >>> shown.z, shown.grade, r.z
    (0.31, 'likely', 0.9)
    """
    hand = result.hand
    if not hand:
        return result.replace()
    fields = {f.name for f in dataclasses.fields(FitResult)}
    plain = {k: hand[k] for k in ("z_err", "z_p16", "z_p50", "z_p84", "z_formal_err", "confidence")
             if k in hand}
    changes: dict[str, Any] = {k: (math.nan if v is None else float(v)) for k, v in plain.items()}
    changes["z"] = math.nan if hand.get("z") is None else float(hand["z"])
    for k in ("grade", "template", "flags", "z_samples", "n_resamples", "seed"):
        if k in hand and k in fields:
            changes[k] = hand[k]
    if "lines" in hand:
        names = {f.name for f in dataclasses.fields(LineMatch)}
        changes["lines"] = [LineMatch(**{k: (math.nan if v is None else v) for k, v in d.items() if k in names})
                            for d in hand["lines"]]
    return result.replace(**changes)


def _object_key(path, index: int, n_in_file: int) -> str:
    """The key the report layer gives spectrum ``index`` of a file opened on its own."""
    from ..report.record import make_key

    return make_key(Path(path).name, index)


def _resolve_input(item: Item, out_dir: Path | None) -> str:
    """Find the input file of an object: as recorded, else relative to the output folder."""
    res = item.result
    prov = (res.provenance if res is not None else {}) or {}
    tried = []
    for cand in (prov.get("path"), prov.get("input"), item.file):
        if not cand:
            continue
        p = Path(cand)
        options = [p] if p.is_absolute() else [p, *( [out_dir / p, out_dir.parent / p] if out_dir else [])]
        for o in options:
            tried.append(str(o))
            if o.exists():
                return str(o)
    raise SpectrumFileError(item.file, "input spectrum not found (looked at " + ", ".join(tried) + ")")


def select_items(folder, *, grades=None, flags=None, name=None, include_all=False, include_decided=False) -> list[Item]:
    """The objects of a batch output folder chosen for a look (see :meth:`RefitSession.from_folder`)."""
    folder = Path(folder)
    objdir = folder / "objects"
    if not objdir.is_dir():
        raise ZsieveError(f"{folder}: not a zsieve output folder (no objects/ inside)")
    decided = _dec.in_force(_dec.read_decisions(folder / _dec.LOG_NAME))
    grades = {g.strip() for g in grades} if grades else None
    if grades and not grades <= set(GRADES):
        raise ZsieveError(f"unknown grade in {sorted(grades)}; expected {', '.join(GRADES)}")
    flags = {f.strip() for f in flags} if flags else None
    items = []
    for path in sorted(objdir.glob("*.json")):
        try:
            result = FitResult.from_json(path.read_text(encoding="utf-8"))
        except (ValueError, TypeError, KeyError) as exc:
            log.warning("%s: not a readable object record (%s); skipped", path, exc)
            continue
        key = path.stem
        if result.status != "ok" and not include_all:
            continue
        grade = in_force_result(result).grade
        if grades is not None:
            if grade not in grades:
                continue
        elif not include_all and grade == "secure":
            continue
        if flags is not None and not (flags & set(result.flags)):
            continue
        if name and not any(
            fnmatch.fnmatch(str(s).lower(), name.lower())
            for s in (key, result.object_name or "", Path(result.file).name, result.file)
        ):
            continue
        if key in decided and not (include_decided or include_all):
            continue
        prov = result.provenance or {}
        items.append(Item(key=key, file=result.file, index=int(prov.get("index", 0) or 0), result=result,
                          medium=prov.get("medium_option")))
    return items


def _write_outputs(out_dir: Path, key: str, record: FitResult, shown: FitResult, spectrum) -> None:
    """Rewrite the object's figure (showing the answer in force), then its record, the summary
    tables and the index page, each atomically, with the report layer's functions."""
    from ..report import figure_suffix, update_object
    from ..report.figure import write_figure
    from ..report.record import object_path

    fig_path = object_path(out_dir, key, figure_suffix(record))
    fig_path.parent.mkdir(parents=True, exist_ok=True)
    write_figure(fig_path, shown, spectrum)
    update_object(out_dir, key, record, spectrum, figure=False)
