"""Speed benchmark: zsieve against the general-library route and a brute-force chi-square grid.

All routes run in one go on the same mock spectra (:func:`zsieve.simulate.mock_set`, the four
object classes at their default z and S/N ranges), in the same pool of worker processes, with
the same line templates (:func:`zsieve.engine.templates.build_bank` at the data's ln-lambda
step and the mocks' resolution):

* ``zsieve measure (N resamples)`` - the whole measurement
  (:func:`zsieve.engine.measure.measure`) with the bootstrap on (200 resamples) and off;
* ``zsieve xcorr stage (201 rows)`` / ``(1 row)`` - zsieve's own preparation, the drawing of
  200 resamples from the uncertainties, and the batched Tonry-Davis correlation of the data
  plus those resamples (:func:`correlate_peaks`, top 5 peaks per row and template, r for
  each), and of the data alone: the correlation stage by itself (its z is row 0's best r);
* ``bare FFTs only (201 rows)`` - the preparation and just the transforms (one rfft of the
  201 rows, one irfft per template): the floor under any FFT correlation of these rows, to
  show what the xcorr stage adds (no z, so no accuracy);
* ``specutils route (direct|fft)`` - the same preparation, then
  ``specutils.analysis.correlation.template_correlate`` with each template, the best peak per
  template inside the z range (3-point parabola on the peak, common practice) and the best
  template by correlation value; it gives no uncertainty. ``direct`` is the library default,
  ``fft`` its faster option; the targets are judged against the faster one;
* ``brute chi2 grid`` - the same preparation, then for each template and every trial z on a
  grid of one pixel in ln(1+z) the best-amplitude chi-square, minimum over z and templates,
  refined by a parabola through the three grid points.

Printed per route: spectra per second on the wall clock with the pool, CPU milliseconds per
spectrum (summed over workers; steadier on a shared machine), the ratio of throughputs, and
accuracy against the truth: median |dz|/(1+z), fraction within 0.001(1+z) and catastrophic
fraction (|dz| > 0.001(1+z), quasars 0.01(1+z), as in accuracy.py).

Usage::

    python tests/benchmarks/speed.py [--n 40] [--seed 11] [--workers 2] [--skip-direct] [--rounds 1]

Targets (issue 3): with 200 resamples at least the specutils route's throughput and >= 20
spectra/s on 2 cores; with resampling off >= 10x the specutils route; accuracy at least the
route's on every figure.
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import sys
import time

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")  # one thread per worker process: the pool owns the cores

import numpy as np  # noqa: E402

C_KMS = 299792.458
CLASSES = ("emission-galaxy", "absorption-galaxy", "quasar", "star")
Z_LO, Z_HI = -0.005, 6.0  # stars are blueshifted too

_STATE: dict = {}


# ------------------------------------------------------------------ shared preparation
def _prepared(spec):
    """zsieve's preparation on a uniform ln-lambda grid: (grid, flux, weight=1/sigma)."""
    from zsieve.engine.prepare import LoglamMap, prepare

    prep = prepare(spec)
    step = float(np.median(np.diff(prep.lnwave)))
    lmap = LoglamMap.build(prep.lnwave, step)
    f, ivar = lmap.apply(prep.resid[None, :], prep.ivar)
    return lmap.grid, f[0], np.sqrt(ivar)


def _bank(grid, resolution_kms):
    from zsieve.engine.templates import build_bank, rest_range_for

    step = float(grid[1] - grid[0])
    key = (round(step, 10), round(float(grid[0]), 6), grid.size)
    bank = _STATE.get(key)
    if bank is None:
        rr = rest_range_for(float(np.exp(grid[0])), float(np.exp(grid[-1])), Z_LO, Z_HI)
        bank = build_bank(None, CLASSES, step, resolution_kms, rr)
        _STATE[key] = bank
    return bank


def _parabola(y, i):
    """Sub-grid offset of a maximum at index i from a parabola through three points."""
    if i <= 0 or i >= len(y) - 1:
        return 0.0
    d = y[i - 1] - 2 * y[i] + y[i + 1]
    return 0.0 if d >= 0 else float(np.clip(0.5 * (y[i - 1] - y[i + 1]) / d, -1, 1))


# ------------------------------------------------------------------ routes (one spectrum each)
def route_measure(spec, n_res):
    from zsieve.engine.measure import MeasureConfig, measure

    r = measure(spec, MeasureConfig(n_resamples=n_res, seed=1, z_min=0.0, z_max=Z_HI))
    return float(r.z) if r.z is not None else float("nan")


def route_xcorr(spec, n_rows, resolution_kms):
    from zsieve.engine.correlate import correlate_peaks

    grid, f, w = _prepared(spec)
    bank = _bank(grid, resolution_kms)
    if n_rows > 1:
        rng = np.random.default_rng(1)
        with np.errstate(divide="ignore"):
            sig = np.where(w > 0, 1.0 / w, 0.0)
        rows = f[None, :] + sig[None, :] * rng.standard_normal((n_rows - 1, f.size))
        f = np.vstack([f[None, :], rows])
    res = correlate_peaks(f, w, grid, bank, Z_LO, Z_HI, n_peaks=5)
    t, p = res.best()
    return float(res.z[0, t[0], p[0]]) if t[0] >= 0 else float("nan")


def route_fft_floor(spec, n_rows, resolution_kms):
    """Only the transforms any FFT correlation of these rows must do: one batched rfft of the
    rows and one batched irfft per template, at the FFT length the xcorr stage uses."""
    from scipy import fft as sfft

    from zsieve.engine.correlate import lag_window

    grid, f, w = _prepared(spec)
    bank = _bank(grid, resolution_kms)
    n = lag_window(f.size, grid, bank, Z_LO, Z_HI)[-1]
    ft, _ = bank.spectra(n)
    x = np.zeros((n_rows, n), np.float32)
    x[:, :f.size] = f
    fx = sfft.rfft(x, axis=-1)
    for t in range(ft.shape[0]):
        sfft.irfft(fx * ft[t], n=n, axis=-1)
    return float("nan")


def route_specutils(spec, method, resolution_kms):
    import astropy.units as u
    from astropy.nddata import StdDevUncertainty
    from specutils import Spectrum
    from specutils.analysis.correlation import template_correlate

    grid, f, w = _prepared(spec)
    bank = _bank(grid, resolution_kms)
    with np.errstate(divide="ignore"):
        sig = np.where(w > 0, 1.0 / w, 1e30 * np.max(np.abs(f) + 1))
    obs = Spectrum(flux=f * u.Jy, spectral_axis=np.exp(grid) * u.AA,
                   uncertainty=StdDevUncertainty(sig * u.Jy))
    best = (-np.inf, float("nan"))
    for t in range(len(bank.classes)):
        tpl = Spectrum(flux=np.asarray(bank.flux[t]) * u.Jy, spectral_axis=bank.wavelength * u.AA)
        corr, lag = template_correlate(obs, tpl, lag_units=u.one, method=method)
        c = np.asarray(corr.value, float)
        z = np.asarray(lag.value, float)
        inside = np.flatnonzero((z >= Z_LO) & (z <= Z_HI))
        if inside.size == 0:
            continue
        i = inside[np.argmax(c[inside])]
        if c[i] > best[0]:
            dx = _parabola(c, i)
            lz = np.log1p(z)
            best = (c[i], float(np.expm1(lz[i] + dx * (lz[1] - lz[0]))))
    # template_correlate resamples both spectra onto a grid that starts at the bluer of the
    # two; its lag is the shift between them, so z = (1 + lag) - 1 needs no origin correction
    return best[1]


def route_chi2(spec, resolution_kms):
    from numpy.lib.stride_tricks import sliding_window_view

    grid, f, w = _prepared(spec)
    bank = _bank(grid, resolution_kms)
    d = float(grid[1] - grid[0])
    n = f.size
    w2 = w * w
    fw2 = f * w2
    delta0 = grid[0] - bank.loglam0
    k_lo = int(np.ceil((np.log1p(Z_LO) - delta0) / d))
    k_hi = int(np.floor((np.log1p(Z_HI) - delta0) / d))
    k_lo, k_hi = max(k_lo, -(bank.n_pix - 1)), min(k_hi, n - 1)
    ks = np.arange(k_lo, k_hi + 1)
    best = (-np.inf, float("nan"))
    for t in range(len(bank.classes)):
        tpl = np.asarray(bank.flux[t], float)
        # model at trial lag k on data pixel i is T[i - k]; pad so every window exists
        pad_l = max(0, k_hi)
        pad_r = max(0, n - 1 - k_lo - (bank.n_pix - 1))
        tp = np.concatenate([np.zeros(pad_l), tpl, np.zeros(pad_r)])
        win = sliding_window_view(tp, n)  # win[s][i] = tp[s + i] = T[s + i - pad_l]
        starts = pad_l - ks  # s = pad_l - k
        dchi = np.empty(ks.size)
        for c0 in range(0, ks.size, 512):  # chunks of trial z (memory), not pixels
            m = win[starts[c0:c0 + 512]]
            num = m @ fw2
            den = (m * m) @ w2
            with np.errstate(invalid="ignore", divide="ignore"):
                # chi2(best amplitude) = chi2(0) - num^2/den; emission/absorption sign fixed
                dchi[c0:c0 + 512] = np.where((den > 0) & (num > 0), num * num / den, 0.0)
        i = int(np.argmax(dchi))
        if dchi[i] > best[0]:
            dx = _parabola(dchi, i)
            best = (dchi[i], float(np.expm1(delta0 + (ks[i] + dx) * d)))
    return best[1]


ROUTES = {
    "zsieve measure (200 resamples)": lambda s, r: route_measure(s, 200),
    "zsieve measure (no resampling)": lambda s, r: route_measure(s, 0),
    "zsieve xcorr stage (201 rows)": lambda s, r: route_xcorr(s, 201, r),
    "zsieve xcorr stage (1 row)": lambda s, r: route_xcorr(s, 1, r),
    "bare FFTs only (201 rows)": lambda s, r: route_fft_floor(s, 201, r),
    "specutils route (fft)": lambda s, r: route_specutils(s, "fft", r),
    "specutils route (direct)": lambda s, r: route_specutils(s, "direct", r),
    "brute chi2 grid": lambda s, r: route_chi2(s, r),
}


def _task(args):
    name, spec, resolution_kms = args
    import logging

    logging.disable(logging.WARNING)
    t0 = time.process_time()
    try:
        z = ROUTES[name](spec, resolution_kms)
        err = ""
    except Exception as exc:  # a benchmark reports a failing route instead of stopping
        z, err = float("nan"), f"{type(exc).__name__}: {exc}"
    return z, time.process_time() - t0, err


def _warm(_):
    # build the template bank and caches once per worker before the clock starts
    from zsieve.simulate import mock_spectrum

    spec, _t = mock_spectrum("emission-galaxy", 0.3, 20.0, 0)
    for name in ROUTES:
        if "direct" not in name:
            _task((name, spec, C_KMS / 2000.0))
    return os.getpid()


def _accuracy(zs, truth):
    z_true = np.array([t["z"] for t in truth])
    kind = np.array([t["kind"] for t in truth])
    zs = np.asarray(zs, float)
    dz = np.abs(zs - z_true) / (1 + z_true)
    dz = np.where(np.isfinite(dz), dz, np.inf)
    tol = np.where(kind == "quasar", 0.01, 0.001)
    return float(np.median(dz)), float(np.mean(dz <= 0.001)), float(np.mean(dz > tol))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=40, help="number of mock spectra")
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--resolution", type=float, default=2000.0, help="resolving power of the mocks")
    ap.add_argument("--skip-direct", action="store_true", help="leave out the slow direct route")
    ap.add_argument("--routes", default="", help="comma-separated substrings selecting routes")
    ap.add_argument("--rounds", type=int, default=1,
                    help="run all routes this many times, interleaved, and report medians (a shared "
                         "machine drifts between routes run minutes apart; the CPU ratio of each "
                         "round is printed too)")
    args = ap.parse_args(argv)

    from zsieve.simulate import mock_set

    mocks = list(mock_set(args.n, seed=args.seed, kinds=CLASSES, resolution=args.resolution))
    specs = [m[0] for m in mocks]
    truth = [m[1] for m in mocks]
    res_kms = C_KMS / args.resolution
    names = [k for k in ROUTES if not (args.skip_direct and "direct" in k)]
    if args.routes:
        keys = [s.strip() for s in args.routes.split(",") if s.strip()]
        names = [k for k in names if any(s in k for s in keys)]
    print(f"{args.n} mock spectra ({', '.join(CLASSES)}), seed {args.seed}, R = {args.resolution:g}, "
          f"{specs[0].n_pix} pixels each; {args.workers} worker processes; z range {Z_LO}..{Z_HI}")
    ctx = mp.get_context("fork")
    runs = {name: [] for name in names}
    with ctx.Pool(args.workers) as pool:
        pool.map(_warm, range(args.workers))
        for k in range(max(1, args.rounds)):
            for name in names:
                t0 = time.perf_counter()
                out = pool.map(_task, [(name, s, res_kms) for s in specs], chunksize=1)
                wall = time.perf_counter() - t0
                zs = [o[0] for o in out]
                cpu = sum(o[1] for o in out)
                errs = [o[2] for o in out if o[2]]
                runs[name].append(dict(rate=args.n / wall, cpu_ms=1e3 * cpu / args.n, acc=_accuracy(zs, truth),
                                       errors=errs, no_z=name.startswith("bare FFTs")))
                print(f"  done: {name:34s} {wall:7.1f} s wall (round {k + 1})", file=sys.stderr, flush=True)
    # medians over the rounds (the answers, hence the accuracy, are the same in every round)
    rows = {name: dict(r[0], rate=float(np.median([x["rate"] for x in r])),
                       cpu_ms=float(np.median([x["cpu_ms"] for x in r]))) for name, r in runs.items()}

    ref = "specutils route (fft)" if "specutils route (fft)" in rows else None
    print()
    print(f"{'route':34s} {'spectra/s':>9s} {'CPU ms/spec':>11s} {'x route':>8s} "
          f"{'median|dz|/(1+z)':>17s} {'<=0.001(1+z)':>12s} {'catastrophic':>12s}")
    for name, r in rows.items():
        ratio = r["rate"] / rows[ref]["rate"] if ref else float("nan")
        med, ok, cat = r["acc"]
        if r["no_z"]:  # the bare-FFT line measures time only
            acc = f"{'-':>17s} {'-':>12s} {'-':>12s}"
        else:
            acc = f"{med:17.2e} {ok:12.1%} {cat:12.1%}"
        print(f"{name:34s} {r['rate']:9.2f} {r['cpu_ms']:11.1f} {ratio:8.2f} {acc}")
        if r["errors"]:
            print(f"    {len(r['errors'])} failures, first: {r['errors'][0]}")
    if ref:
        print()
        print("Ratios of CPU time per spectrum (route / zsieve; steadier than wall-clock rates):")
        for name in rows:
            if name.startswith("zsieve"):
                line = f"  {name:34s} {rows[ref]['cpu_ms'] / rows[name]['cpu_ms']:8.2f}x the specutils (fft) route"
                if len(runs[name]) > 1:
                    per = [a["cpu_ms"] / b["cpu_ms"] for a, b in zip(runs[ref], runs[name])]
                    line += "  (rounds: " + ", ".join(f"{x:.2f}x" for x in per) + ")"
                print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
