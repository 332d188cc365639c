"""The per-object figure (zsieve.report.figure): complete, legible, cheap helpers that stay faithful.

Outside references: matplotlib's own renderer (text extents as drawn by the Agg backend, and
its PNG reader), scipy.ndimage.label (runs of masked pixels), the PNG file signature (PNG
specification, RFC 2083 section 3.1) and the PDF header (ISO 32000-1, 7.5.2).
"""

import math

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from scipy import ndimage

from zsieve.report import complete_result
from zsieve.report import figure as F
from zsieve.result import Candidate, FitResult, LineMatch
from zsieve.spectrum import Spectrum, SpectrumMeta

# vacuum rest wavelengths (NIST ASD, from memory) of a crowded absorption-line galaxy
_REST = {"H10": 3798.98, "H9": 3836.47, "H8": 3890.15, "Ca II K": 3934.78, "Ca II H": 3969.59,
         "H-epsilon": 3971.20, "H-delta": 4102.89, "G band": 4305.6, "H-gamma": 4341.69, "H-beta": 4862.69,
         "Mg b 5169": 5168.76, "Mg b 5185": 5185.05, "Fe I 5272": 5271.0, "Na D2": 5891.58, "Na D1": 5897.56,
         "H-alpha": 6564.61, "Ca II 8544": 8544.44, "Ca II 8665": 8664.52}


def _crowded(z=0.05, n_pix=5000, seed=4):
    """A spectrum with many absorption lines at z, a masked band and a result naming them all."""
    rng = np.random.default_rng(seed)
    wave = np.geomspace(3700.0, 9600.0, n_pix)
    flux = np.ones_like(wave)
    lines = []
    for k, (name, lam) in enumerate(_REST.items()):
        mu, sig, f = lam * (1 + z), 2.5, -3.0
        flux += f / (math.sqrt(2 * math.pi) * sig) * np.exp(-0.5 * ((wave - mu) / sig) ** 2)
        lines.append(LineMatch(name=name, rest_wavelength=lam, observed_wavelength=mu, sigma_A=sig, flux=f,
                               snr=20.0 - k, z_line=z, kind="absorption"))
    sigma = np.full_like(wave, 0.05)
    flux += rng.normal(0, 0.05, wave.size)
    mask = (wave > 7594) & (wave < 7621)  # telluric A band (design notes, section 3)
    spec = Spectrum(wave, flux, sigma, mask=mask, meta=SpectrumMeta(object_name="CDX-0311", source="c.fits"))
    zz = np.linspace(0, 2, 3000)
    res = FitResult(file="c.fits", object_name="CDX-0311", z=z, z_err=3e-5, z_p16=z - 3e-5, z_p50=z, z_p84=z + 3e-5,
                    grade="secure", confidence=0.99, template="absorption-galaxy", lines=lines,
                    candidates=[Candidate(z=z, template="absorption-galaxy", probability=0.95),
                                Candidate(z=z + 0.004, template="absorption-galaxy", probability=0.03),
                                Candidate(z=z + 0.008, template="star", probability=0.01),
                                Candidate(z=1.98, template="quasar", probability=0.01)],
                    z_samples=list(z + rng.normal(0, 3e-5, 200)), n_resamples=200,
                    flags=["sky-contaminated", "template-disagreement"],
                    extra={"xcorr": {"z": list(zz), "r": list(np.exp(-((zz - z) / 0.01) ** 2) * 9
                                                              + rng.normal(0, 0.3, zz.size))}},
                    provenance={"key": "c.fits", "index": 0})
    return spec, complete_result(res, spec)


def _drawn_texts(fig, monkeypatch):
    """Every text the renderer actually draws, with its extent (pixels) as drawn."""
    import matplotlib.text as mtext

    seen = []
    orig = mtext.Text.draw

    def record(self, renderer):
        if self.get_visible() and self.get_text():
            seen.append((self.get_text(), self.get_window_extent(renderer)))
        return orig(self, renderer)

    monkeypatch.setattr(mtext.Text, "draw", record)
    canvas = fig.canvas if isinstance(fig.canvas, FigureCanvasAgg) else FigureCanvasAgg(fig)
    canvas.draw()
    monkeypatch.setattr(mtext.Text, "draw", orig)
    return seen


def _overlaps(seen, tol=0.5):
    out = []
    for i in range(len(seen)):
        for j in range(i + 1, len(seen)):
            a, b = seen[i][1], seen[j][1]
            dx = min(a.x1, b.x1) - max(a.x0, b.x0)
            dy = min(a.y1, b.y1) - max(a.y0, b.y0)
            if dx > tol and dy > tol:
                out.append((seen[i][0], seen[j][0]))
    return out


def test_crowded_figure_names_every_line_and_no_text_overlaps(monkeypatch):
    spec, res = _crowded()
    fig = F.draw_figure(res, spec)
    seen = _drawn_texts(fig, monkeypatch)
    texts = [t for t, _ in seen]
    for m in res.lines:
        assert m.name in texts, m.name
    assert _overlaps(seen) == []
    w, h = fig.bbox.width, fig.bbox.height
    for t, bb in seen:  # everything drawn lies inside the figure
        assert bb.x0 >= -0.5 and bb.y0 >= -0.5 and bb.x1 <= w + 0.5 and bb.y1 <= h + 0.5, t
    block = next(t for t in texts if t.startswith("CDX-0311\n"))
    for piece in ("z = 0.05000", "grade secure", "confidence 0.99", "runner-up z = 0.0540", "D_L =", "lookback"):
        assert piece in block


def test_measured_mocks_have_no_text_overlaps(monkeypatch):
    """Real engine output: an absorption-line galaxy (many lines) and a quasar."""
    from zsieve.engine.measure import MeasureConfig, measure
    from zsieve.simulate import mock_spectrum

    for kind, z, seed in (("absorption-galaxy", 0.048, 3), ("quasar", 2.3, 8)):
        spec, _ = mock_spectrum(kind, z, 15.0, np.random.default_rng(seed))
        res = complete_result(measure(spec, MeasureConfig(n_resamples=20, seed=1)), spec)
        seen = _drawn_texts(F.draw_figure(res, spec), monkeypatch)
        texts = [t for t, _ in seen]
        assert all(m.name in texts for m in res.lines)
        assert _overlaps(seen) == [], kind


def test_envelope_keeps_every_column_extreme_and_a_lone_spike():
    rng = np.random.default_rng(0)
    x = np.sort(rng.uniform(3600.0, 9800.0, 20_000))
    y = rng.normal(0, 1, x.size)
    y[12_345] = 40.0  # one wild pixel
    y[777] = -25.0
    y[5000:5050] = np.nan  # a gap
    n_cols = 1000
    xe, ye = F.envelope(x, y, 3600.0, 9800.0, n_cols)
    assert xe.size <= 2 * n_cols
    assert 40.0 in ye and -25.0 in ye
    col = np.clip(np.floor((x - 3600.0) / 6200.0 * n_cols), 0, n_cols - 1)
    cole = np.clip(np.floor((xe - 3600.0) / 6200.0 * n_cols), 0, n_cols - 1)
    for c in np.unique(col):
        vals = y[col == c]
        env = ye[cole == c]
        if np.isfinite(vals).any():
            assert np.nanmax(env) == np.nanmax(vals) and np.nanmin(env) == np.nanmin(vals)
        else:
            assert np.isnan(env).all()
    # the points are the data's own (x, y) pairs, in the data's order
    assert np.all(np.diff(xe) >= 0)
    fin = np.isfinite(ye)
    idx = np.searchsorted(x, xe[fin])
    assert np.array_equal(y[idx], ye[fin])


def test_envelope_leaves_short_data_alone():
    x = np.arange(100.0)
    y = np.sin(x)
    xe, ye = F.envelope(x, y, 0.0, 100.0, 60)
    assert np.array_equal(xe, x) and np.array_equal(ye, y)


def test_mask_spans_are_the_runs_of_bad_pixels():
    rng = np.random.default_rng(2)
    wave = np.geomspace(3600.0, 9800.0, 3000)
    bad = rng.random(wave.size) < 0.05
    bad[100:180] = True
    bad[-3:] = True
    spans = F.mask_spans(wave, bad)
    labels, n = ndimage.label(bad)  # scipy's connected runs
    assert len(spans) == n
    for k, (lo, hi) in enumerate(spans, start=1):
        idx = np.flatnonzero(labels == k)
        inside = (wave >= lo) & (wave <= hi)
        assert np.array_equal(np.flatnonzero(inside), idx)


def test_text_width_matches_the_renderer():
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6, 2), dpi=100)
    canvas = FigureCanvasAgg(fig)
    renderer = canvas.get_renderer()
    for name in ("[O III] 5008", "Si IV+O IV] 1400", "H-alpha", "#3 p=0.01", "Mg b 5169"):
        t = fig.text(0.1, 0.5, name, fontsize=7.5)
        drawn = t.get_window_extent(renderer).width
        est = F.text_width_px(name, 7.5, 100.0)
        assert drawn - 1.0 <= est <= 1.1 * drawn + 2.0  # never short (labels cannot collide), barely long


def test_png_and_pdf_both_written(tmp_path):
    import matplotlib.image as mpimg

    spec, res = _crowded()
    png, pdf = tmp_path / "o.png", tmp_path / "o.pdf"
    F.write_figure(png, res, spec, also=[pdf])
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # RFC 2083, 3.1
    assert pdf.read_bytes()[:5] == b"%PDF-"  # ISO 32000-1, 7.5.2
    assert mpimg.imread(png).shape[:2] == (840, 1200)


def test_reused_sheet_draws_exactly_what_a_fresh_figure_draws(tmp_path):
    """write_figure reuses its axes: a figure drawn after another is pixel-identical to a fresh one."""
    import matplotlib.image as mpimg

    a_spec, a_res = _crowded()
    wave = np.geomspace(3800.0, 9200.0, 3000)
    b_flux = 1.0 + np.random.default_rng(9).normal(0, 0.1, wave.size)
    b_spec = Spectrum(wave, b_flux, np.full_like(wave, 0.1), meta=SpectrumMeta(object_name="CDX-0815"))
    b_res = FitResult(file="b.fits", object_name="CDX-0815", z=2.1, z_err=0.3, grade="none", confidence=0.1,
                      lines=[], candidates=[Candidate(z=2.1, probability=0.1)], z_samples=[2.0, 2.1, 2.4],
                      provenance={"key": "b.fits"})
    F.write_figure(tmp_path / "a.png", a_res, a_spec)
    F.write_figure(tmp_path / "b.png", b_res, b_spec)
    fresh = F.draw_figure(b_res, b_spec)
    fresh.savefig(tmp_path / "b_fresh.png", format="png", dpi=100)
    reused, fresh = mpimg.imread(tmp_path / "b.png"), mpimg.imread(tmp_path / "b_fresh.png")
    assert np.array_equal(reused[..., :3], fresh[..., :3])


def test_display_scale_keeps_tick_labels_short():
    spec, res = _crowded()
    small = spec.replace(flux=spec.flux * 1e-17, sigma=spec.sigma * 1e-17)
    fig = F.draw_figure(res, small)
    FigureCanvasAgg(fig).draw() if not isinstance(fig.canvas, FigureCanvasAgg) else fig.canvas.draw()
    ax = fig.axes[0]
    assert "10\u207b\u00b9\u2077" in ax.get_ylabel()  # flux shown in units of 1e-17
    assert not ax.yaxis.get_offset_text().get_text()
