"""The ``zsieve`` command: parses arguments, then calls the library layers.

Each subcommand lives in its own module of this package (``fit``, ``distances``,
``inspect``) exposing ``register(subparsers)``; the parser is assembled from the ones present.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys

from .. import __version__

SUBCOMMANDS = ("fit", "distances", "inspect")

log = logging.getLogger("zsieve")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="zsieve",
        description="Measure redshifts of 1-D spectra and say what they mean in a cosmology. "
        "Wavelengths are handled as vacuum Angstrom (air files are converted on load).",
    )
    parser.add_argument("--version", action="version", version=f"zsieve {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output (-vv for debug)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in SUBCOMMANDS:
        try:
            module = importlib.import_module(f"{__name__}.{name}")
        except ModuleNotFoundError as exc:
            if exc.name == f"{__name__}.{name}":
                continue
            raise
        module.register(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    level = logging.WARNING - 10 * min(args.verbose, 2)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    if not getattr(args, "command", None):
        parser.print_help()
        return 0
    return int(args.func(args) or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
