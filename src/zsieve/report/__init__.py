"""Everything zsieve writes for people: records, figures, summary tables and the index page.

* :mod:`~zsieve.report.atomic` - :func:`write_atomic` (temporary file + rename);
* :mod:`~zsieve.report.record` - output keys, the JSON record per object, file checksums;
* :mod:`~zsieve.report.figure` - the per-object figure (matplotlib, Agg);
* :mod:`~zsieve.report.summary` - ``summary.csv`` / ``summary.ecsv`` from the records;
* :mod:`~zsieve.report.index` - ``index.html``.

:func:`complete_result` adds the frames and cosmology to an engine result, and
:func:`update_object` rewrites one object's record, figure, the summary and the index (what the
refit session calls after a decision).
"""

from __future__ import annotations

import logging
import math
import os
from pathlib import Path
from typing import Any

from .atomic import write_atomic
from .record import make_key, object_path, write_record

__all__ = ["write_atomic", "make_key", "complete_result", "hand_cosmology", "update_object", "figure_suffix", "figure_suffixes"]

log = logging.getLogger(__name__)


def _finite(v) -> bool:
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _cosmology_for(z: float, z_err=None, z_samples=None, cosmology=None, frames: dict | None = None) -> dict | None:
    """``zsieve.cosmology`` description of z in the frame the frames chose (the CMB frame where
    the header allows), samples and error moved by the same factor. Returns ``None`` (and logs
    why) where no description is possible.
    """
    from ..cosmology.measurement import describe_in_frame

    if not _finite(z):
        return None
    try:
        out = describe_in_frame(float(z), frames, z_err=float(z_err) if _finite(z_err) else None,
                                z_samples=z_samples if z_samples is not None and len(z_samples) else None,
                                cosmology=cosmology)
    except Exception as exc:  # the cosmology layer refuses (e.g. z <= -1): say so, keep going
        log.debug("no cosmology for z=%r: %s", z, exc)
        return None
    out["z_frame"] = out["frame"]
    return out


def complete_result(result, spectrum=None, cosmology=None):
    """The result with ``frames`` (from the spectrum's header) and ``cosmology`` filled in.

    Fields already present are kept. Works on failed results too (it then changes nothing).
    """
    if result.status != "ok" or not _finite(result.z):
        return result
    frames = result.frames
    if frames is None and spectrum is not None:
        from ..cosmology.frames import frame_info

        try:
            frames = frame_info(spectrum.meta, float(result.z))
        except Exception as exc:  # header facts unusable for a correction: keep the fit
            log.debug("%s: no frame information (%s)", result.file, exc)
            frames = {"correction_applied": False, "correction_note": f"frame information failed: {exc}"}
    cosmo = result.cosmology
    if cosmo is None:
        cosmo = _cosmology_for(result.z, result.z_err, result.z_samples, cosmology, frames)
    return result.replace(frames=frames, cosmology=cosmo)


def hand_cosmology(hand: dict[str, Any] | None, cosmology=None) -> dict[str, Any] | None:
    """A hand decision with the cosmology of the hand redshift added (``hand['cosmology']``)."""
    if not hand:
        return hand
    hand = dict(hand)
    if _finite(hand.get("z")) and not hand.get("cosmology"):
        hand["cosmology"] = _cosmology_for(float(hand["z"]), hand.get("z_err"), None, cosmology)
    return hand


def figure_suffix(result) -> str:
    """Suffix of an object's main figure: ``.png`` (the index thumbnail; a PDF may sit beside it)."""
    return figure_suffixes(result)[0]


def figure_suffixes(result) -> tuple[str, ...]:
    """Figure files an object has: ``(".png",)``, plus ``".pdf"`` when the batch was asked for PDF."""
    fmt = str((result.provenance or {}).get("figure_format") or "png").lower()
    return (".png", ".pdf") if fmt == "pdf" else (".png",)


def update_object(out_dir: str | os.PathLike, key: str, result, spectrum=None, *, figure: bool | None = None) -> str:
    """Rewrite one object's JSON record and figure, then the summary tables and the index page.

    ``result`` is a :class:`~zsieve.result.FitResult` (typically after a hand decision). Frames and
    cosmology are added if missing, in the cosmology the batch recorded. The figure is redrawn
    when ``figure`` is true, or (``None``) when the object already had one and a spectrum is
    given. Returns the record's path.
    """
    from .index import write_index
    from .summary import rebuild_summary

    out_dir = Path(out_dir)
    prov = dict(result.provenance or {})
    prov.setdefault("key", key)
    result = complete_result(result.replace(provenance=prov), spectrum, prov.get("cosmology_spec"))
    paths = [object_path(out_dir, key, x) for x in figure_suffixes(result)]
    draw = figure if figure is not None else (spectrum is not None and paths[0].exists())
    if draw and spectrum is not None and result.status == "ok":
        from .figure import write_figure

        write_figure(paths[0], result, spectrum, also=paths[1:])
    path = write_record(out_dir, key, result.to_dict())
    rows = rebuild_summary(out_dir)
    write_index(out_dir, rows)
    return path
