"""The interactive refit (`zsieve inspect`): the window driven by synthetic key and mouse events.

Every test runs on the Agg backend: events are built with matplotlib's own
``KeyEvent``/``MouseEvent`` and sent through ``canvas.callbacks.process``, exactly as a GUI
backend delivers them. The spectra come from ``zsieve.simulate`` (mock data, written as FITS
with the project's writer) and are measured by ``zsieve fit`` into a batch folder once per
module; each test works on its own copy of that folder.

Outside references: the NIST Atomic Spectra Database vacuum wavelength of H-alpha,
6564.61 A (from memory); 1 + z = lambda_obs / lambda_rest (the definition of redshift,
common practice); the login name from the standard library's ``getpass.getuser``; the
luminosity distance of astropy.cosmology's Planck18 (Planck 2018 results VI).
"""

from __future__ import annotations

import csv
import getpass
import json
import math
import shutil

import numpy as np
import pytest

from zsieve.cli import main as zsieve_main
from zsieve.refit.decisions import in_force, read_decisions
from zsieve.refit.session import RefitSession
from zsieve.refit.window import BINDINGS, RefitWindow

H_ALPHA_VAC = 6564.61  # NIST ASD, vacuum, Angstrom (from memory)
FIT_ARGS = ["--resamples", "20", "--seed", "1", "--jobs", "1"]


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    """A batch folder of two mock CDFS-X objects: one lone H-alpha line, one rich emission galaxy."""
    from zsieve.io.writers import write_fits_image
    from zsieve.simulate import mock_spectrum

    root = tmp_path_factory.mktemp("refit")
    inputs = root / "in"
    inputs.mkdir()
    # a single emission line at z = 0.14 puts H-alpha at 7483.7 A, clear of the bright sky lines
    lone, _ = mock_spectrum("single-line", 0.14, 12.0, np.random.default_rng(4), line="H-alpha")
    rich, _ = mock_spectrum("emission-galaxy", 0.30, 15.0, np.random.default_rng(5))
    write_fits_image(lone, inputs / "CDX-0042.fits", sampling="log")
    write_fits_image(rich, inputs / "CDX-0043.fits", sampling="log")
    out = root / "out"
    assert zsieve_main(["fit", str(inputs), "--out", str(out), *FIT_ARGS]) == 0
    return dict(inputs=inputs, out=out)


@pytest.fixture
def folder(batch, tmp_path):
    """A private copy of the batch output folder (its records point at the same inputs)."""
    dest = tmp_path / "out"
    shutil.copytree(batch["out"], dest)
    return dest


def _window(session):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(14, 8))
    FigureCanvasAgg(fig)
    win = RefitWindow(session, figure=fig)
    fig.canvas.draw()
    return win


def _key(win, key, wave=None):
    """Press ``key``, with the pointer over the spectrum at ``wave`` if given."""
    from matplotlib.backend_bases import KeyEvent

    x, y = _pixel(win, wave) if wave is not None else (5, 5)
    ev = KeyEvent("key_press_event", win.fig.canvas, key, x=x, y=y)
    win.fig.canvas.callbacks.process("key_press_event", ev)
    return ev


def _click(win, wave):
    from matplotlib.backend_bases import MouseEvent

    x, y = _pixel(win, wave)
    ev = MouseEvent("button_press_event", win.fig.canvas, x, y, button=1)
    win.fig.canvas.callbacks.process("button_press_event", ev)
    return ev


def _pixel(win, wave):
    ax = win.ax_spec
    y = float(np.mean(ax.get_ylim()))
    return tuple(ax.transData.transform((wave, y)))


def _type(win, text):
    for ch in text:
        _key(win, ch)
    _key(win, "enter")


def _summary_row(folder, key):
    with open(folder / "summary.csv", newline="") as fh:
        return next(r for r in csv.DictReader(fh) if r["key"] == key)


# ----------------------------------------------------------------------------- candidates
def test_adopting_the_second_candidate_changes_z_and_is_recorded(folder):
    session = RefitSession.from_folder(folder, name="*0043*", include_all=True)
    win = _window(session)
    before = session.result.z
    second = session.state.candidates[1]
    assert abs(second.z - before) > 0.01  # the test means something only if they differ
    _key(win, "down")
    assert session.state.cursor == 1
    _key(win, "enter")
    after = session.result.z
    # the refit stays in the window around the adopted candidate (800 km/s, common practice)
    assert abs(after - second.z) <= 800.0 / 299792.458 * (1 + second.z) + 5 * max(second.z_err, 0)
    assert abs(after - before) > 0.01
    _key(win, "d")  # save, next object
    rec = read_decisions(folder)[-1]
    assert rec["action"] == "adopt-candidate"
    assert rec["key"] == "CDX-0043.fits"
    assert rec["z"] == pytest.approx(after) and rec["previous_z"] == pytest.approx(before)
    assert rec["user"] == getpass.getuser()
    row = _summary_row(folder, "CDX-0043.fits")
    assert row["hand"] == "True" and float(row["z"]) == pytest.approx(after)
    assert float(row["z_engine"]) == pytest.approx(before)  # the automatic answer is kept beside it
    record = json.loads((folder / "objects" / "CDX-0043.fits.json").read_text())
    assert record["hand"]["z"] == pytest.approx(after)
    assert "(hand)" in (folder / "index.html").read_text()
    assert session.finished  # it was the only object selected


# ----------------------------------------------------------------------------- naming a line
def test_naming_a_clicked_feature_h_alpha_gives_its_redshift(folder):
    session = RefitSession.from_folder(folder, name="*0042*", include_all=True)
    win = _window(session)
    click = _click(win, H_ALPHA_VAC * 1.14)  # the lone line of the mock, from its truth z
    assert session.state.pin == pytest.approx(click.xdata)
    choices = [n for n, _, _ in session.line_choices()]
    assert "H-alpha" in choices and "Ca II K" not in choices  # an emission feature: emission lines only
    _key(win, "n")
    assert win.prompt is not None
    _type(win, "ha")
    res = session.result
    z_click = click.xdata / H_ALPHA_VAC - 1.0  # 1 + z = lambda_obs / lambda_rest
    assert math.isfinite(res.z_err) and 0 < res.z_err < 1e-3
    assert abs(res.z - z_click) <= 3.0 * res.z_err
    assert res.template == "emission-galaxy"
    assert any(m.name == "H-alpha" for m in res.lines)
    assert session.state.steps[-1][0] == "name-line"


def test_a_prompt_takes_every_key_and_escape_cancels(folder):
    session = RefitSession.from_folder(folder, name="*0042*", include_all=True)
    win = _window(session)
    z0 = session.result.z
    _key(win, "z")
    for ch in "0.5q":  # 'q' would close the window outside a prompt
        _key(win, ch)
    assert win.prompt.text == "0.5q"
    _key(win, "escape")
    assert win.prompt is None and session.result.z == z0 and not session.state.steps
    # grade by hand with a comment: key 3 then the typed comment
    _key(win, "3")
    _type(win, "lone line, width fits")
    assert session.state.hand_grade == "tentative" and session.state.comment == "lone line, width fits"


def test_typed_z_and_unbound_keys_reach_matplotlib(folder):
    session = RefitSession.from_folder(folder, name="*0042*", include_all=True)
    win = _window(session)
    assert not set(BINDINGS) & {"o", "p", "h", "r", "s", "f", "g", "q", "k", "l", "left", "right", "c", "v"}
    grid_before = win.ax_spec.xaxis._major_tick_kw.get("gridOn", False)
    _key(win, "g", 6000.0)  # matplotlib's own grid toggle still works
    assert win.ax_spec.xaxis._major_tick_kw.get("gridOn", False) != grid_before
    _key(win, "z")
    _type(win, "0.14")
    assert abs(session.result.z - 0.14) < 800.0 / 299792.458 * 1.14
    _key(win, "?")
    assert win.help.get_visible() and "adopt the highlighted candidate" in win.help.get_text()


# ----------------------------------------------------------------------------- masks
def test_masking_a_range_excludes_its_pixels_from_the_refit(folder):
    session = RefitSession.from_folder(folder, name="*0043*", include_all=True)
    win = _window(session)
    lo, hi = 8490.0, 8585.0  # [N II] 6550, H-alpha and [N II] 6585 at z = 0.3
    inside = lambda w: lo <= w <= hi  # noqa: E731
    assert any(inside(f["centroid"]) for f in session.result.features)  # seen before masking
    _key(win, "m", lo)
    assert win.mask_start == pytest.approx(lo, abs=2.0)
    _key(win, "m", hi)
    st = session.state
    assert len(st.masks) == 1
    m_lo, m_hi = st.masks[0]
    res = session.result
    assert not any(m_lo <= f["centroid"] <= m_hi for f in res.features)
    fitted_inside = [m for m in res.lines if m_lo <= m.observed_wavelength <= m_hi and math.isfinite(m.snr)
                     and m.snr > 0]
    assert not fitted_inside
    assert abs(res.z - 0.30) < 5e-4  # still found from the other lines
    w = session.spectrum.wavelength
    assert not session.pixels_used()[(w >= m_lo) & (w <= m_hi)].any()
    _key(win, "u", 0.5 * (lo + hi))  # and the mask comes off again
    assert not st.masks
    assert any(inside(f["centroid"]) for f in session.result.features)


# ----------------------------------------------------------------------------- decisions last
def test_a_saved_decision_survives_a_later_fit(batch, folder):
    session = RefitSession.from_folder(folder, name="*0042*", include_all=True)
    session.pin(H_ALPHA_VAC * 1.14)
    session.name_line("H-alpha")
    session.set_grade("likely", "H-alpha: [N II] too faint to see")
    rec = session.save()
    z_hand = rec["z"]
    row = _summary_row(folder, "CDX-0042.fits")
    assert row["hand"] == "True"
    # the distances follow the person's z: astropy's Planck 2018 cosmology, the batch default
    from astropy.cosmology import Planck18

    d_l = Planck18.luminosity_distance(z_hand).to_value("Mpc")
    assert float(row["lum_distance"]) == pytest.approx(d_l, rel=1e-3)
    log_before = (folder / "decisions.log").read_text()
    # an unchanged rerun reuses the record; a forced rerun measures again; both keep the decision
    for extra in ([], ["--force"]):
        assert zsieve_main(["fit", str(batch["inputs"]), "--out", str(folder), *FIT_ARGS, *extra]) == 0
        row = _summary_row(folder, "CDX-0042.fits")
        assert row["hand"] == "True", extra
        assert float(row["z"]) == pytest.approx(z_hand) and row["grade"] == "likely"
        assert float(row["lum_distance"]) == pytest.approx(d_l, rel=1e-3)
        assert (folder / "decisions.log").read_text() == log_before  # the log is never rewritten
    # the session then leaves it out by default: it has been decided
    with pytest.raises(Exception, match="no objects"):
        RefitSession.from_folder(folder, name="*0042*")
    # told to drop the decisions, the fit goes back to the automatic answer
    assert zsieve_main(["fit", str(batch["inputs"]), "--out", str(folder), *FIT_ARGS, "--force",
                        "--drop-hand-decisions"]) == 0
    row = _summary_row(folder, "CDX-0042.fits")
    assert row["hand"] == "False" and float(row["z"]) == pytest.approx(float(row["z_engine"]))


def test_two_saves_append_two_lines(folder):
    session = RefitSession.from_folder(folder, name="*0043*", include_all=True)
    session.set_grade("likely", "first look")
    first = session.save()
    first_line = (folder / "decisions.log").read_text()
    session.set_grade("secure", "second look")
    second = session.save()
    text = (folder / "decisions.log").read_text()
    assert text.startswith(first_line) and len(text.splitlines()) == len(first_line.splitlines()) + 1
    assert second["previous_grade"] == "likely" and first["grade"] == "likely"
    assert _summary_row(folder, "CDX-0043.fits")["grade"] == "secure"


# ----------------------------------------------------------------------------- headless
def test_snapshot_png_is_written_and_not_blank(folder, tmp_path):
    import matplotlib.image as mpimg

    png = tmp_path / "window.png"
    assert zsieve_main(["inspect", str(folder), "--snapshot", str(png), "--snapshot-help"]) == 0
    img = mpimg.imread(png)
    assert img.shape[0] > 400 and img.shape[1] > 800
    grey = img[..., :3].mean(axis=2)
    assert grey.std() > 0.05  # not a blank canvas
    assert (grey < 0.3).mean() > 0.005  # ink: data, labels and text


# ----------------------------------------------------------------------------- moving around
def test_skip_back_and_accept_move_through_the_objects(folder):
    session = RefitSession.from_folder(folder, include_all=True)
    assert [it.key for it in session.items] == ["CDX-0042.fits", "CDX-0043.fits"]
    win = _window(session)
    _key(win, "j")  # skip: nothing written
    assert session.position == 1 and not (folder / "decisions.log").exists()
    _key(win, "b")
    assert session.position == 0
    # a click on the second row of the candidate panel highlights that candidate
    from matplotlib.backend_bases import MouseEvent

    x, y = win.ax_cand.transData.transform((0.5, 1.5))
    win.fig.canvas.callbacks.process("button_press_event",
                                     MouseEvent("button_press_event", win.fig.canvas, x, y, button=1))
    assert session.state.cursor == 1
    _key(win, "a")  # accept what is shown: an approval is recorded, then the next object
    assert session.position == 1
    rec = read_decisions(folder)[-1]
    assert rec["action"] == "approve" and rec["key"] == "CDX-0042.fits"
    assert rec["z"] == pytest.approx(rec["previous_z"])


def test_an_unreadable_input_is_passed_over(batch, tmp_path):
    dest = tmp_path / "out"
    shutil.copytree(batch["out"], dest)
    rec_path = dest / "objects" / "CDX-0042.fits.json"
    rec = json.loads(rec_path.read_text())
    rec["file"] = str(tmp_path / "gone.fits")
    rec["provenance"]["path"] = rec["provenance"]["input"] = str(tmp_path / "gone.fits")
    rec_path.write_text(json.dumps(rec))
    session = RefitSession.from_folder(dest, include_all=True)
    assert session.item.key == "CDX-0043.fits"


def test_a_withdrawn_decision_gives_back_the_automatic_answer(folder):
    session = RefitSession.from_folder(folder, name="*0043*", include_all=True)
    win = _window(session)
    auto_z = session.result.z
    session.set_z(0.31)
    session.save()
    assert _summary_row(folder, "CDX-0043.fits")["hand"] == "True"
    session.back()  # the only object: stays
    _key(win, "W")
    row = _summary_row(folder, "CDX-0043.fits")
    assert row["hand"] == "False" and float(row["z"]) == pytest.approx(auto_z)
    recs = read_decisions(folder)
    assert [r["action"] for r in recs] == ["type-z", "undo"]
    assert "CDX-0043.fits" not in in_force(recs)


def test_selection_by_grade_flag_and_name(folder):
    from zsieve.refit.session import select_items

    everything = select_items(folder, include_all=True)
    grades = {it.key: it.result.grade for it in everything}
    flags = {it.key: set(it.result.flags) for it in everything}
    default = {it.key for it in select_items(folder)}
    assert default == {k for k, g in grades.items() if g != "secure"}
    for g in set(grades.values()):
        assert {it.key for it in select_items(folder, grades=[g])} == {k for k, v in grades.items() if v == g}
    some_flag = next((f for fs in flags.values() for f in fs), None)
    if some_flag is not None:
        got = {it.key for it in select_items(folder, flags=[some_flag], include_all=True)}
        assert got == {k for k, fs in flags.items() if some_flag in fs}
    assert [it.key for it in select_items(folder, name="cdx-0043*", include_all=True)] == ["CDX-0043.fits"]


def test_rerunning_the_bootstrap_keeps_the_choice_and_draws_afresh(folder):
    session = RefitSession.from_folder(folder, name="*0042*", include_all=True)
    win = _window(session)
    session.pin(H_ALPHA_VAC * 1.14)
    session.name_line("ha")
    first = session.result
    seed = session.state.seed
    _key(win, "e")
    again = session.result
    assert session.state.seed == seed + 1 and again.seed == seed + 1
    assert again.template == first.template and 0 < len(again.z_samples) <= again.n_resamples
    # the same choice: the two bootstrap medians agree within their spreads (common practice)
    assert abs(again.z - first.z) <= 3 * max(first.z_err, again.z_err)
    assert session.state.steps[-1][0] == "bootstrap"
