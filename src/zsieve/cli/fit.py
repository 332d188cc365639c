"""``zsieve fit``: measure every spectrum under some paths into an output folder.

    zsieve fit PATH... --out DIR [engine options] [cosmology options] [--jobs N] [--no-figures]

PATH may be files, folders (searched recursively) or quoted glob patterns. DIR receives
``summary.csv``, ``summary.ecsv``, ``index.html`` and ``objects/<key>.json|png`` (see
:mod:`zsieve.batch`). A rerun with the same arguments only measures what changed.

Exit status: 0 when the batch completed (files that failed are rows with ``status=failed``),
2 for unusable arguments or an output folder that cannot be written, 1 with ``--strict`` when
any file failed, 130 when interrupted.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys

from .distances import _ArgError, _cosmology_spec, _float, _int

__all__ = ["register", "run", "options_from"]

log = logging.getLogger(__name__)

_EPILOG = """\
A TOML file given with --config may set any long option, with '_' or '-' in the names, at the top
level or in a [fit] table, e.g.:

  z_max = 3.0
  classes = ["emission-galaxy", "quasar"]
  mask = [[6860, 6890], "7590-7630"]
  resamples = 100
  cosmology = "WMAP9"
  jobs = 2
  figures = false

Options on the command line override the file.
"""

#: Options a config file may set, with their built-in defaults (None = the engine's default).
DEFAULTS = {
    "z_min": None, "z_max": None, "classes": None, "linelist": None, "medium": None,
    "resamples": None, "seed": None, "mask": None, "sky_mask": None, "band_lines": None, "snr_threshold": None,
    "cosmology": None, "H0": None, "Om0": None, "Ode0": None, "w0": None, "Tcmb0": None,
    "jobs": None, "figures": True, "pdf": False, "force": False, "strict": False, "keep_hand": True,
    "progress": None, "scheduler": None,
}


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``fit`` subcommand to the ``zsieve`` parser."""
    p = subparsers.add_parser(
        "fit",
        help="measure redshifts of every spectrum in files/folders into an output folder",
        description="Measure the redshift of every spectrum found under PATH (files, folders searched "
        "recursively, glob patterns) and write per-object records and figures, summary tables "
        "(CSV and ECSV) and a browsable index.html into DIR. Reruns skip unchanged inputs.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    S = argparse.SUPPRESS
    p.add_argument("paths", nargs="+", metavar="PATH", help="spectrum files, folders or glob patterns")
    p.add_argument("--out", "-o", required=True, metavar="DIR", help="output folder (created if needed)")
    p.add_argument("--config", metavar="FILE", help="TOML file of options (command line overrides it)")
    g = p.add_argument_group("measurement")
    g.add_argument("--z-min", metavar="Z", default=S, help="lowest redshift searched (engine default 0)")
    g.add_argument("--z-max", metavar="Z", default=S, help="highest redshift searched (engine default 6)")
    g.add_argument("--classes", metavar="LIST", default=S,
                   help="comma-separated object classes: emission-galaxy,absorption-galaxy,quasar,star")
    g.add_argument("--linelist", metavar="NAME|FILE", default=S, help="line list (bundled name or a file)")
    g.add_argument("--medium", choices=("air", "vacuum"), default=S,
                   help="treat the files' wavelengths as air or vacuum whatever their headers say")
    g.add_argument("--resamples", metavar="N", default=S, help="bootstrap resamples (engine default 200)")
    g.add_argument("--seed", metavar="K", default=S, help="random seed of the bootstrap (reproducible runs)")
    g.add_argument("--snr-threshold", metavar="X", default=S, help="S/N for a feature to count as detected")
    g.add_argument("--mask", metavar="LO-HI", action="append", default=S,
                   help="leave out a vacuum wavelength range in Angstrom (repeatable), e.g. 7590-7630")
    g.add_argument("--no-sky-mask", dest="sky_mask", action="store_false", default=S,
                   help="do not mask bright night-sky lines and telluric bands")
    g.add_argument("--close-bands", dest="band_lines", action="store_false", default=S,
                   help="mask the shallow telluric bands for emission lines too (by default emission "
                        "lines are measured in them, with a correction residual in their noise)")
    c = p.add_argument_group("cosmology (as in `zsieve distances`)")
    c.add_argument("--cosmology", metavar="NAME", default=S, help="astropy realization name (default Planck18)")
    for name, what in (("H0", "Hubble constant, km/s/Mpc"), ("Om0", "matter density today"),
                       ("Ode0", "dark-energy density today (default: flat)"), ("w0", "dark-energy w (default -1)"),
                       ("Tcmb0", "CMB temperature today, K (default 0)")):
        c.add_argument(f"--{name}", metavar="X", default=S, help=what)
    r = p.add_argument_group("run")
    r.add_argument("--jobs", "-j", metavar="N", default=S, help="worker processes (default: all cores)")
    r.add_argument("--scheduler", metavar="ADDRESS", default=S,
                   help="run the fits on a Dask cluster: local:N, tcp://host:port or a scheduler file "
                        "(needs zsieve[dask]; DIR must be shared with the workers)")
    r.add_argument("--no-figures", dest="figures", action="store_false", default=S,
                   help="records and summary only, no figures")
    r.add_argument("--pdf", action="store_true", default=S, help="figures also as PDF (the PNG stays: it is the index page's thumbnail)")
    r.add_argument("--force", action="store_true", default=S, help="refit everything, even unchanged inputs")
    r.add_argument("--strict", action="store_true", default=S, help="exit with status 1 if any file failed")
    r.add_argument("--keep-hand", dest="keep_hand", action="store_true", default=S,
                   help="keep decisions made by hand on refitted objects (the default)")
    r.add_argument("--drop-hand-decisions", dest="keep_hand", action="store_false", default=S,
                   help="refitted objects show the engine's answer; decisions.log itself is kept")
    r.add_argument("--progress", dest="progress", action="store_true", default=S,
                   help="show the progress bar even when not on a terminal")
    r.add_argument("--no-progress", dest="progress", action="store_false", default=S, help="no progress bar")
    p.set_defaults(func=run)
    return p


def _read_config(path: str) -> dict:
    import tomllib

    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except OSError as exc:
        raise _ArgError(f"{path}: cannot read the config file ({exc.strerror or exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise _ArgError(f"{path}: not valid TOML ({exc})") from None
    if isinstance(data.get("fit"), dict):
        data = {**{k: v for k, v in data.items() if k != "fit"}, **data["fit"]}
    out = {}
    for k, v in data.items():
        name = k.replace("-", "_")
        if name == "no_figures":
            name, v = "figures", not v
        if name not in DEFAULTS:
            raise _ArgError(f"{path}: unknown option {k!r}; known: {', '.join(sorted(DEFAULTS))}")
        out[name] = v
    return out


def _mask(value) -> tuple[float, float]:
    if isinstance(value, (list, tuple)) and len(value) == 2:
        lo, hi = (_float(str(v), "--mask") for v in value)
    else:
        text = str(value).strip()
        for sep in (":", ",", "-"):
            left, mid, right = text[1:].partition(sep)  # skip a leading sign
            if mid:
                lo, hi = _float(text[0] + left, "--mask"), _float(right, "--mask")
                break
        else:
            raise _ArgError(f"--mask wants LO-HI in Angstrom, got {text!r}")
    if not (0 < lo < hi):
        raise _ArgError(f"--mask range must have 0 < LO < HI, got {lo:g}-{hi:g}")
    return (lo, hi)


def options_from(args) -> dict:
    """The run's options: command line over config file over built-in defaults."""
    opts = dict(DEFAULTS)
    if getattr(args, "config", None):
        opts.update(_read_config(args.config))
    for k in DEFAULTS:
        if hasattr(args, k):
            opts[k] = getattr(args, k)
    return opts


def _settings(opts: dict):
    from ..batch import BatchSettings
    from ..engine.config import MeasureConfig

    cfg = {}
    if opts["z_min"] is not None:
        cfg["z_min"] = _float(str(opts["z_min"]), "--z-min")
    if opts["z_max"] is not None:
        cfg["z_max"] = _float(str(opts["z_max"]), "--z-max")
    if cfg.get("z_min", MeasureConfig.z_min) >= cfg.get("z_max", MeasureConfig.z_max):
        raise _ArgError("--z-min must be below --z-max")
    if opts["classes"] is not None:
        classes = opts["classes"]
        items = classes.split(",") if isinstance(classes, str) else list(classes)
        items = tuple(s.strip() for s in items if str(s).strip())
        known = MeasureConfig.classes
        bad = [c for c in items if c not in known]
        if bad or not items:
            raise _ArgError(f"unknown class(es) {', '.join(bad) or '(none given)'}; choose from {', '.join(known)}")
        cfg["classes"] = items
    if opts["linelist"] is not None:
        cfg["linelist"] = str(opts["linelist"])
    if opts["resamples"] is not None:
        cfg["n_resamples"] = _int(str(opts["resamples"]), "--resamples", 0)
    if opts["seed"] is not None:
        cfg["seed"] = _int(str(opts["seed"]), "--seed", 0)
    if opts["snr_threshold"] is not None:
        cfg["snr_threshold"] = _float(str(opts["snr_threshold"]), "--snr-threshold")
    if opts["mask"]:
        masks = opts["mask"] if isinstance(opts["mask"], (list, tuple)) else [opts["mask"]]
        cfg["extra_masks"] = tuple(_mask(m) for m in masks)
    if opts["sky_mask"] is not None:
        cfg["mask_sky"] = bool(opts["sky_mask"])
    if opts["band_lines"] is not None:
        cfg["emission_in_bands"] = bool(opts["band_lines"])
    ns = argparse.Namespace(**{k: (None if opts[k] is None else str(opts[k]))
                               for k in ("cosmology", "H0", "Om0", "Ode0", "w0", "Tcmb0")})
    cosmology = _cosmology_spec(ns)
    if opts["medium"] is not None and opts["medium"] not in ("air", "vacuum"):
        raise _ArgError(f"medium must be air or vacuum, got {opts['medium']!r}")
    jobs = (os.cpu_count() or 1) if opts["jobs"] is None else _int(str(opts["jobs"]), "--jobs", 1)
    return BatchSettings(
        config=MeasureConfig(**cfg),
        medium=opts["medium"],
        cosmology=cosmology,
        jobs=jobs,
        figures=bool(opts["figures"]),
        figure_format="pdf" if opts["pdf"] else "png",
        force=bool(opts["force"]),
        keep_hand=bool(opts["keep_hand"]),
        progress=opts["progress"],
        scheduler=opts["scheduler"] or None,
    )


def run(args) -> int:
    """Run the batch; print the closing tally. Returns the exit status."""
    from ..batch import BatchError, run_batch

    try:
        opts = options_from(args)
        settings = _settings(opts)
    except _ArgError as exc:
        print(f"zsieve fit: {exc}", file=sys.stderr)
        return 2
    import signal

    def _terminate(signum, frame):  # `kill` winds down like Ctrl-C: records kept, summary written
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        summary = run_batch(args.paths, args.out, settings)
    except BatchError as exc:
        print(f"zsieve fit: {exc}", file=sys.stderr)
        return 2
    finally:
        signal.signal(signal.SIGTERM, previous)
    print(summary.line())
    if summary.interrupted:
        return 130
    if opts["strict"] and summary.counts.get("failed", 0):
        print(f"zsieve fit: {summary.counts['failed']} file(s) failed (--strict)", file=sys.stderr)
        return 1
    return 0
