"""Identify line patterns: from detected features to candidate redshifts.

Every pairing of a detected feature (observed centroid) with a rest line of a class proposes
ln(1+z) = ln(lambda_obs) - ln(lambda_rest). Proposals vote: two proposals agree when their
ln(1+z) differ by less than a tolerance set by the centroid errors (3 sigma, plus a floor for
the intrinsic scatter of the class: a few tens of km/s for narrow lines, ~1500 km/s for quasar
broad lines, whose offsets differ). A candidate keeps the largest set of *distinct* features
and *distinct* lines that agree. Each is then scored by

* the number of independent lines (members of a fixed-ratio group count once),
* expected companions that are present (``COMPANIONS``: [O III] 4960 with 5008, H-beta with
  [O III], [N II] around H-alpha, the other member of a doublet),
* plausible ratios: a fixed-ratio group member must not be much *stronger* than its leader
  would allow (e.g. [O III] 4960 at ~1/3 of 5008),

and single strong features also propose the "lone line" hypotheses (the feature is any one of
the class's strong lines), so an ambiguous object gets several candidates, not a guess.

Examples
--------
>>> from astropy.table import Table
>>> tab = Table(dict(name=["H-beta", "[O III] 5008", "H-alpha"], species=["H I", "O III", "H I"],
...     wave_vac=[4862.68, 5008.24, 6564.61], kind=["emission"] * 3, group=["", "", ""],
...     ratio=[1.0] * 3, strength_emission_galaxy=[1.0] * 3, strength_absorption_galaxy=[0.0] * 3,
...     strength_quasar=[0.0] * 3, strength_star=[0.0] * 3, width_kms=[0.0] * 3,
...     qso_offset_kms=[0.0] * 3, source=["NIST"] * 3))
>>> sets = build_linesets(tab, ("emission-galaxy",))
>>> sets["emission-galaxy"].names
['H-beta', '[O III] 5008', 'H-alpha']
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np

from ..lines.catalog import CLASS_COLUMNS
from .prepare import C_KMS

__all__ = ["LineSet", "build_linesets", "Seed", "propose", "COMPANIONS", "STRENGTH_COLUMN"]

log = logging.getLogger(__name__)

#: Which line-list column gives a line's typical strength in each class (the line lists' own map).
STRENGTH_COLUMN = CLASS_COLUMNS

#: Lines whose presence is expected when the key line is strong (common practice in nebular
#: spectroscopy; names as in the line list, matched by prefix so small naming differences pass).
COMPANIONS = {
    "[O III] 5008": ("[O III] 4960", "H-beta"),
    "H-alpha": ("[N II] 6585", "[N II] 6550", "H-beta"),
    "H-beta": ("[O III] 5008", "H-alpha"),
    "[O II] 3727": ("[O II] 3730",),
    "[O II] 3730": ("[O II] 3727",),
    "[S II] 6718": ("[S II] 6733",),
    "Mg II 2796": ("Mg II 2804",),
    "C IV 1548": ("C IV 1551",),
    "Ca II K": ("Ca II H",),
    "Ca II H": ("Ca II K",),
}

#: Intrinsic scatter floor of line positions in ln(1+z), per class (velocity / c).
CLASS_TOLERANCE = {
    "emission-galaxy": 60.0 / C_KMS,
    "absorption-galaxy": 150.0 / C_KMS,
    "quasar": 1500.0 / C_KMS,
    "star": 60.0 / C_KMS,
}

#: Classes whose lines have widths of their own, and the listed FWHM (km/s) above which a line
#: is modelled with its listed width (times one fitted scale) instead of the shared narrow
#: width: the broad lines of quasars; in stars the pressure-broadened Balmer lines and the
#: G band, several times wider than the metal lines (common practice).
BROAD_MIN_KMS = {"quasar": 1000.0, "star": 300.0}


@dataclass
class LineSet:
    """The lines of one class as arrays (vacuum rest Angstrom)."""

    cls: str
    names: list[str]
    wave: np.ndarray
    sign: np.ndarray  # +1 emission, -1 absorption
    group: np.ndarray  # integer group per line; lines of a group share one amplitude
    ratio: np.ndarray  # strength of the line within its group
    strength: np.ndarray  # typical relative strength in this class
    width_kms: np.ndarray  # typical intrinsic FWHM (0 = narrow)
    offset_kms: np.ndarray  # mean velocity offset from systemic (quasars)
    strong: np.ndarray = field(default=None)  # bool: may stand alone as a lone line

    @property
    def n_groups(self) -> int:
        return int(self.group.max()) + 1 if self.group.size else 0

    @property
    def broad(self) -> np.ndarray:
        """Lines whose own listed width is modelled (one scale factor for all of them)."""
        return self.width_kms > BROAD_MIN_KMS.get(self.cls, 1000.0)

    def leader(self) -> np.ndarray:
        """Index of the strongest member of each group."""
        lead = np.zeros(self.n_groups, dtype=int)
        for g in range(self.n_groups):
            m = np.flatnonzero(self.group == g)
            lead[g] = m[np.argmax(self.ratio[m] * self.strength[m])]
        return lead


def _col(tab, name, default):
    if name in tab.colnames:
        return np.asarray(tab[name])
    return np.full(len(tab), default)


def build_linesets(table, classes) -> dict[str, LineSet]:
    """One :class:`LineSet` per class, from a line-list table (columns per the contract)."""
    out = {}
    wave_all = np.asarray(table["wave_vac"], dtype=float)
    names_all = [str(n) for n in table["name"]]
    kind_all = np.array([str(k).strip().lower() for k in table["kind"]])
    group_all = np.array([str(g).strip() if g is not None else "" for g in _col(table, "group", "")])
    ratio_all = np.asarray(_col(table, "ratio", 1.0), dtype=float)
    width_all = np.nan_to_num(np.asarray(_col(table, "width_kms", 0.0), dtype=float))
    off_all = np.nan_to_num(np.asarray(_col(table, "qso_offset_kms", 0.0), dtype=float))
    for cls in classes:
        col = STRENGTH_COLUMN[cls]
        strength = np.nan_to_num(np.asarray(_col(table, col, 0.0), dtype=float))
        sel = np.flatnonzero(strength > 0)
        if sel.size == 0:
            log.warning("line list has no lines for class %s", cls)
            continue
        sel = sel[np.argsort(wave_all[sel])]
        labels = {}
        gidx = np.empty(sel.size, dtype=int)
        for i, k in enumerate(sel):  # over lines (tens)
            key = group_all[k] if group_all[k] else f"__{k}"
            gidx[i] = labels.setdefault(key, len(labels))
        ratio = np.where(ratio_all[sel] > 0, ratio_all[sel], 1.0)
        st = strength[sel]
        width = width_all[sel] if cls in BROAD_MIN_KMS else np.zeros(sel.size)
        offs = off_all[sel] if cls == "quasar" else np.zeros(sel.size)
        ls = LineSet(cls, [names_all[k] for k in sel], wave_all[sel],
                     np.where(kind_all[sel] == "absorption", -1, 1), gidx, ratio, st, width, offs)
        # the lines that may stand alone: the strongest third of the class (at least three)
        order = np.argsort(-st)
        n_strong = max(3, int(math.ceil(sel.size / 3)))
        strong = np.zeros(sel.size, dtype=bool)
        strong[order[:n_strong]] = True
        ls.strong = strong
        out[cls] = ls
    return out


@dataclass
class Seed:
    """A redshift proposed by the line pattern (or by the correlation, or a class prior)."""

    z: float
    cls: str
    origin: str  # 'lines' | 'xcorr' | 'prior' | 'lone'
    n_features: int = 0
    features: list[int] = field(default_factory=list)
    lines: list[str] = field(default_factory=list)
    score: float = 0.0
    r_tdr: float = math.nan


def propose(features, linesets: dict[str, LineSet], z_min: float, z_max: float, *,
            n_lone: int = 3, tol_sigma: float = 3.0, max_features: int = 16,
            max_seeds_per_class: int = 12, class_z_range: dict | None = None) -> list[Seed]:
    """Candidate redshifts from feature-line pairings, voted in ln(1+z).

    Parameters
    ----------
    features : list of :class:`zsieve.engine.detect.Feature`
    linesets : dict class -> :class:`LineSet`
    z_min, z_max : float
    n_lone : int
        The strongest ``n_lone`` features (not on sky) also propose every strong line of each
        class alone.
    max_features : int
        Only the strongest features vote (weak ones join later through the line model).
    max_seeds_per_class : int
        Multi-line proposals kept per class, best supported first.
    class_z_range : dict class -> (z_min, z_max), optional
        A narrower range for some classes (stars: near rest), used in place of
        ``z_min, z_max`` for them.
    """
    if not features:
        return []
    features = sorted(features, key=lambda f: -f.snr)[:max_features]
    mu = np.array([f.centroid for f in features])
    emu = np.array([max(f.centroid_err, 1e-6) for f in features])
    fsign = np.array([1 if f.kind == "emission" else -1 for f in features])
    fsnr = np.array([f.snr for f in features])
    seeds: list[Seed] = []
    for cls, ls in linesets.items():
        zlo, zhi = (class_z_range or {}).get(cls, (z_min, z_max))
        lo, hi = math.log1p(zlo), math.log1p(zhi)
        # all pairings (features x lines) with matching sign, inside the z range
        v = np.log(mu)[:, None] - np.log(ls.wave)[None, :]
        ok = (fsign[:, None] == ls.sign[None, :]) & (v >= lo) & (v <= hi)
        fi, li = np.nonzero(ok)
        if fi.size == 0:
            continue
        vv = v[fi, li]
        ev = emu[fi] / mu[fi]
        floor = CLASS_TOLERANCE[cls]
        # pairwise agreement matrix (pairs ~ hundreds): |dv| < tol
        tol = tol_sigma * np.sqrt(ev[:, None] ** 2 + ev[None, :] ** 2) + floor
        agree = np.abs(vv[:, None] - vv[None, :]) < tol
        agree &= fi[:, None] != fi[None, :]  # another feature ...
        agree &= li[:, None] != li[None, :]  # ... as another line
        n_agree = agree.sum(axis=1)
        order = np.argsort(-(n_agree * 1000 + fsnr[fi]))
        used_z: list[float] = []
        n_cls = 0
        for p in order:  # over pairings that have support (tens)
            if n_agree[p] == 0 or n_cls >= max_seeds_per_class:
                break
            members = np.flatnonzero(agree[p])
            # one line per feature and one feature per line: keep the closest in ln(1+z)
            chosen_f = {fi[p]: li[p]}
            for m in members[np.argsort(np.abs(vv[members] - vv[p]))]:
                if fi[m] not in chosen_f and li[m] not in chosen_f.values():
                    chosen_f[fi[m]] = li[m]
            ff = np.array(list(chosen_f.keys()))
            pairs = list(chosen_f.items())
            vals = np.array([math.log(mu[f]) - math.log(ls.wave[l]) for f, l in pairs])
            wts = np.array([1.0 / ((emu[f] / mu[f]) ** 2 + floor**2) for f, l in pairs])
            zz = float(np.expm1(np.sum(vals * wts) / np.sum(wts)))
            if any(abs(zz - u) < 3 * floor * (1 + u) + 1e-5 for u in used_z):
                continue
            used_z.append(zz)
            n_cls += 1
            groups = {int(ls.group[l]) for l in chosen_f.values()}
            seeds.append(Seed(zz, cls, "lines", n_features=len(groups), features=sorted(map(int, ff)),
                              lines=[ls.names[l] for l in chosen_f.values()],
                              score=float(len(groups) + 0.1 * companion_count(ls, chosen_f.values()))))
        # lone-line hypotheses for the strongest features
        strong_f = [i for i in np.argsort(-fsnr)[:n_lone] if not features[i].on_sky]
        for i in strong_f:
            for l in np.flatnonzero(ls.strong & (ls.sign == fsign[i])):
                zz = float(mu[i] / ls.wave[l] - 1.0)
                if zlo <= zz <= zhi:
                    seeds.append(Seed(zz, cls, "lone", n_features=1, features=[int(i)],
                                      lines=[ls.names[l]], score=0.5))
    return dedupe(seeds)


def companion_count(ls: LineSet, line_idx) -> int:
    """How many expected companions of the matched lines are also matched."""
    names = {ls.names[l] for l in line_idx}
    n = 0
    for nm in names:
        for key, comps in COMPANIONS.items():
            if nm.startswith(key):
                n += sum(any(o.startswith(c) for o in names) for c in comps)
    return n


def dedupe(seeds: list[Seed], tol_kms: float = 100.0) -> list[Seed]:
    """Drop seeds of the same class within ``tol_kms`` of a better one."""
    seeds = sorted(seeds, key=lambda s: -s.score)
    out: list[Seed] = []
    for s in seeds:
        t = max(tol_kms, CLASS_TOLERANCE[s.cls] * C_KMS) / C_KMS
        if any(o.cls == s.cls and abs(math.log1p(o.z) - math.log1p(s.z)) < t for o in out):
            continue
        out.append(s)
    return out
