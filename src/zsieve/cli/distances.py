"""``zsieve distances``: what one or more redshifts mean in a cosmology.

Usage::

    zsieve distances Z [Z ...] [--cosmology NAME | --H0 H --Om0 M [--Ode0 L] [--w0 W] [--Tcmb0 T]]
                     [--z-err S [S ...]] [--samples N] [--seed K] [--json]

Prints a table (distances, times, scales, recession velocities, Doppler figures, with units)
or, with ``--json``, a single JSON object for one redshift and a JSON list of objects, in
the order given, for several. ``--z-err`` takes one σ for all redshifts or one per redshift.
Bad arguments give one line on stderr and exit code 2.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import re
import sys

__all__ = ["register", "run"]

log = logging.getLogger(__name__)

_EPILOG = (
    "--json prints one object for a single Z and a list of objects for several. "
    "A custom model needs --H0 and --Om0; without --Ode0 it is flat; Tcmb0 defaults to 0 K "
    "(no radiation). A Z between -1 and 0 is allowed (blueshifted stars): distances are then "
    "undefined and only the Doppler figures are given; values such as -0.0001 or -1e-4 "
    "are read as redshifts."
)


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``distances`` subcommand to the ``zsieve`` parser."""
    p = subparsers.add_parser(
        "distances",
        help="distances, ages and recession velocities for redshifts in a cosmology",
        description="Distances, times, scales and recession velocities (rates of change of proper "
        "distance) for redshifts, in a chosen cosmology, with Doppler figures labelled for what "
        "they are.",
        epilog=_EPILOG,
    )
    p.add_argument("z", nargs="+", metavar="Z", help="redshift(s), each > -1")
    p.add_argument("--cosmology", metavar="NAME", help="astropy realization name (default Planck18)")
    for name, what in (
        ("H0", "Hubble constant, km/s/Mpc"),
        ("Om0", "matter density parameter today"),
        ("Ode0", "dark-energy density parameter today (default 1 - Om0: flat)"),
        ("w0", "dark-energy equation of state (default -1)"),
        ("Tcmb0", "CMB temperature today, K (default 0: radiation neglected)"),
    ):
        p.add_argument(f"--{name}", metavar="X", help=what)
    p.add_argument("--z-err", nargs="+", metavar="S", help="1-sigma redshift uncertainty (one, or one per Z)")
    p.add_argument("--samples", default="2000", metavar="N", help="draws of z +/- S for the uncertainties (default 2000)")
    p.add_argument("--seed", default="0", metavar="K", help="random seed of those draws (default 0)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    # Let "-1e-4" be read as a (negative) redshift, not an option: argparse's own pattern
    # only knows plain decimals. Harmless where argparse already accepts it.
    p._negative_number_matcher = re.compile(r"^-(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$")
    p.set_defaults(func=run)
    return p


def _float(text: str, what: str) -> float:
    from ..cosmology.models import finite_number

    return finite_number(text, what, error=_ArgError)


class _ArgError(Exception):
    pass


def _int(text: str, what: str, minimum: int) -> int:
    try:
        value = int(text)
    except (TypeError, ValueError):
        raise _ArgError(f"{what} must be a whole number, got {text!r}") from None
    if value < minimum:
        raise _ArgError(f"{what} must be >= {minimum}, got {value}")
    return value


def _cosmology_spec(args):
    params = {k: getattr(args, k) for k in ("H0", "Om0", "Ode0", "w0", "Tcmb0")}
    given = {k: v for k, v in params.items() if v is not None}
    if args.cosmology is not None and given:
        raise _ArgError(f"give either --cosmology or parameters ({', '.join('--' + k for k in given)}), not both")
    if not given:
        return args.cosmology
    missing = [k for k in ("H0", "Om0") if k not in given]
    if missing:
        raise _ArgError(f"a custom cosmology needs {' and '.join('--' + k for k in missing)}")
    return {k: _float(v, f"--{k}") for k, v in given.items()}


def _parse(args):
    zs = []
    for text in args.z:
        z = _float(text, "redshift")
        if z <= -1.0:
            raise _ArgError(f"redshift must be > -1 (1+z is a ratio of wavelengths), got {text}")
        zs.append(z)
    errs = [None] * len(zs)
    if args.z_err is not None:
        vals = [_float(t, "--z-err") for t in args.z_err]
        if any(v < 0 for v in vals):
            raise _ArgError("--z-err must be >= 0")
        if len(vals) == 1:
            errs = vals * len(zs)
        elif len(vals) == len(zs):
            errs = vals
        else:
            raise _ArgError(f"--z-err takes one value or one per redshift ({len(zs)}), got {len(vals)}")
    n = _int(args.samples, "--samples", 2)
    seed = _int(args.seed, "--seed", 0)
    return zs, errs, _cosmology_spec(args), n, seed


def run(args) -> int:
    """Execute ``zsieve distances`` for parsed arguments; returns the exit code."""
    from ..cosmology import CosmologyError, describe, get_cosmology
    from ..cosmology.text import format_table

    try:
        zs, errs, spec, n, seed = _parse(args)
        cosmo = get_cosmology(spec)
        records = [describe(z, z_err=e, cosmology=cosmo, n_samples=n, seed=seed) for z, e in zip(zs, errs)]
    except (_ArgError, CosmologyError) as exc:
        print(f"zsieve distances: error: {exc}", file=sys.stderr)
        return 2
    if args.json:
        payload = records[0] if len(records) == 1 else records
        text = json.dumps(payload, indent=2, allow_nan=False)
    else:
        text = format_table(records)
    try:
        print(text)
        sys.stdout.flush()
    except BrokenPipeError:  # e.g. piped into `head`: stop quietly (Python docs, signal module)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    return 0
