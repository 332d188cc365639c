"""``zsieve inspect``: look at spectra in a window, correct their redshifts, keep the decisions.

    zsieve inspect FILE [--out DIR] [--index N]
    zsieve inspect DIR [--grade G] [--flag F] [--name GLOB] [--all] [--redo]
    ... [--snapshot PNG]

With a batch output folder (made by ``zsieve fit``) the session steps through the objects that
need a look: by default those not graded ``secure`` that no person has decided yet. Every
decision goes to ``DIR/decisions.log`` and the object's record, figure, the summary tables
and ``index.html`` are rewritten; a later ``zsieve fit`` over the folder keeps the decisions.

With a single spectrum file the session measures it first; decisions are written to ``--out``
(a folder laid out like a batch output) or, without it, printed when the session ends.

``--snapshot PNG`` draws the window for the first selected object into an image and exits
(no display needed). Press ``?`` in the window for the keys.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import sys

__all__ = ["register", "run"]

log = logging.getLogger(__name__)

_NON_INTERACTIVE = {"agg", "pdf", "ps", "svg", "pgf", "cairo", "template"}


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``inspect`` subcommand to the ``zsieve`` parser."""
    from ..refit.window import help_text

    p = subparsers.add_parser(
        "inspect",
        help="look at one spectrum or the doubtful objects of an output folder and decide by hand",
        description="Open a window on one spectrum file, or on the objects of a zsieve output folder "
        "that need a look (default: not graded secure and not yet decided by a person). Adopt another "
        "candidate, name a line, type a z, change the z range, class or masks, rerun the bootstrap, "
        "grade by hand. Decisions are appended to DIR/decisions.log and the records, figures, "
        "summary and index page are rewritten.",
        epilog=help_text(),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("target", metavar="FILE|DIR", help="a spectrum file, or an output folder of zsieve fit")
    g = p.add_argument_group("choosing objects (output folder)")
    g.add_argument("--grade", action="append", metavar="G",
                   help="only objects with this grade (repeatable or comma-separated: secure,likely,...)")
    g.add_argument("--flag", action="append", metavar="F", help="only objects carrying this flag (repeatable)")
    g.add_argument("--name", metavar="GLOB", help="only objects whose key, name or file matches this pattern")
    g.add_argument("--all", action="store_true", help="every object, whatever its grade or status")
    g.add_argument("--redo", action="store_true", help="include objects a person has already decided")
    f = p.add_argument_group("one spectrum file")
    f.add_argument("--out", "-o", metavar="DIR", help="folder for the decisions, record and figure")
    f.add_argument("--index", type=int, metavar="N", help="only spectrum N of a multi-spectrum file (0-based)")
    f.add_argument("--medium", choices=("air", "vacuum"), help="the file's wavelength medium, if its header is wrong")
    m = p.add_argument_group("refits")
    m.add_argument("--resamples", type=int, metavar="N", help="bootstrap resamples of each refit")
    m.add_argument("--seed", type=int, metavar="K", help="random seed of the refits")
    m.add_argument("--window-kms", type=float, default=800.0, metavar="V",
                   help="half-width of the z window searched around a chosen z (default 800 km/s)")
    p.add_argument("--snapshot", metavar="PNG", help="draw the window for the first object into PNG and exit")
    p.add_argument("--snapshot-help", action="store_true", help="with --snapshot: show the list of keys too")
    p.set_defaults(func=run)
    return p


def _split(values):
    if not values:
        return None
    out = []
    for v in values:
        out += [s.strip() for s in str(v).split(",") if s.strip()]
    return out or None


def build_session(args):
    """The :class:`~zsieve.refit.session.RefitSession` the arguments ask for."""
    from ..refit.session import RefitSession

    overrides = {"n_resamples": args.resamples, "seed": args.seed}
    common = dict(window_kms=args.window_kms, overrides=overrides)
    if os.path.isdir(args.target):
        return RefitSession.from_folder(
            args.target, grades=_split(args.grade), flags=_split(args.flag), name=args.name,
            include_all=args.all, include_decided=args.redo, **common,
        )
    if not os.path.exists(args.target):
        from ..errors import SpectrumFileError

        raise SpectrumFileError(args.target, "no such file or folder")
    return RefitSession.from_file(args.target, out_dir=args.out, index=args.index, medium=args.medium, **common)


def run(args) -> int:
    """Run ``zsieve inspect``; returns the exit status (0 done, 1 nothing to show, 2 bad input)."""
    from ..errors import ZsieveError

    try:
        session = build_session(args)
    except ZsieveError as exc:
        print(f"zsieve inspect: {exc}", file=sys.stderr)
        return 1 if "no objects" in str(exc) or "nothing to inspect" in str(exc) else 2
    if args.snapshot:
        from ..refit.window import snapshot

        try:
            path = snapshot(session, args.snapshot, show_help=args.snapshot_help)
        except (ZsieveError, OSError) as exc:
            print(f"zsieve inspect: no snapshot: {exc}", file=sys.stderr)
            return 2
        print(f"snapshot of {session.item.key} written to {path}")
        return 0
    import matplotlib

    backend = matplotlib.get_backend().lower()
    if backend.split(".")[-1].replace("module://", "") in _NON_INTERACTIVE:
        print(f"zsieve inspect: matplotlib backend {backend!r} cannot open a window; set MPLBACKEND "
              "(e.g. TkAgg or QtAgg) or use --snapshot PNG", file=sys.stderr)
        return 2
    from ..refit.window import RefitWindow

    print(f"{len(session.items)} object(s) to look at; press ? in the window for the keys")
    RefitWindow(session).show()
    n = len(session.decisions)
    if session.out_dir is not None:
        print(f"{n} decision(s) recorded in {session.out_dir / 'decisions.log'}")
    else:
        for rec in session.decisions:
            print(json.dumps(rec, ensure_ascii=False))
        print(f"{n} decision(s); give --out DIR to keep them", file=sys.stderr)
    return 0
