"""The decisions log and the single-file use of `zsieve inspect`.

Outside references: the JSON Lines convention (one complete JSON value per line, common
practice); ISO 8601 UTC timestamps as produced by ``datetime.isoformat`` (standard library);
``getpass.getuser`` for the login name; the NIST Atomic Spectra Database vacuum wavelength of
[O III] 5008.24 A (from memory); 1 + z = lambda_obs / lambda_rest (common practice).
"""

from __future__ import annotations

import datetime as dt
import getpass
import json

import numpy as np
import pytest

from zsieve.cli import main as zsieve_main
from zsieve.refit.decisions import append_decision, in_force, make_decision, read_decisions
from zsieve.refit.session import RefitSession, match_line_name

O3_5008_VAC = 5008.24  # NIST ASD, vacuum, Angstrom (from memory)


def _rec(**kw):
    base = dict(key="CDX-0042.fits", file="in/CDX-0042.fits", action="type-z", z=0.25, grade="likely")
    base.update(kw)
    return make_decision(**base)


def test_log_lines_are_json_with_who_and_when(tmp_path):
    path = append_decision(tmp_path, _rec(comment="  two\nlines  typed "))
    line = open(path, encoding="utf-8").read()
    assert line.endswith("\n") and line.count("\n") == 1
    rec = json.loads(line)
    assert rec["user"] == getpass.getuser()
    when = dt.datetime.fromisoformat(rec["time"].replace("Z", "+00:00"))
    assert when.tzinfo is not None and abs((dt.datetime.now(dt.timezone.utc) - when).total_seconds()) < 120
    assert rec["comment"] == "two lines typed"  # one line, whatever was typed
    assert list(rec)[:5] == ["time", "user", "key", "file", "action"]  # readable order


def test_log_is_append_only_and_survives_a_torn_line(tmp_path):
    append_decision(tmp_path, _rec(z=0.25))
    first = (tmp_path / "decisions.log").read_text()
    with open(tmp_path / "decisions.log", "a", encoding="utf-8") as fh:
        fh.write('{"time": "2026-03-02T01:00:00Z", "key": "CDX-')  # a write cut short
    append_decision(tmp_path, _rec(key="CDX-0107.fits", z=0.347, action="adopt-candidate"))
    text = (tmp_path / "decisions.log").read_text()
    assert text.startswith(first)
    recs = read_decisions(tmp_path)
    assert [r["key"] for r in recs] == ["CDX-0042.fits", "CDX-0107.fits"]


def test_the_last_decision_is_in_force_and_undo_withdraws(tmp_path):
    append_decision(tmp_path, _rec(z=0.25))
    append_decision(tmp_path, _rec(z=0.2501, action="bootstrap"))
    append_decision(tmp_path, _rec(key="CDX-0107.fits", z=0.3))
    append_decision(tmp_path, _rec(key="CDX-0107.fits", action="undo", z=None, grade="none"))
    now = in_force(read_decisions(tmp_path))
    assert set(now) == {"CDX-0042.fits"} and now["CDX-0042.fits"]["z"] == 0.2501


def test_unknown_action_or_grade_is_refused():
    with pytest.raises(ValueError, match="action"):
        _rec(action="guess")
    with pytest.raises(ValueError, match="grade"):
        _rec(grade="probable")


def test_typed_names_find_lines_of_the_bundled_list():
    from zsieve.lines import load_linelist

    names = sorted({str(n) for n in load_linelist()["name"]})
    assert match_line_name("ha", names) == "H-alpha"
    assert match_line_name("Hbeta", names) == "H-beta"
    assert match_line_name("oiii5008", names) == "[O III] 5008"
    assert match_line_name("lya", names) == "Ly-alpha"
    assert match_line_name("civ", names) == "C IV 1549"
    assert match_line_name("nii", names) is None  # two [N II] lines: ambiguous, not a guess


def test_one_file_inspected_and_saved_to_an_output_folder(tmp_path):
    """A lone [O III] 5008 line: the file measured on opening, named by hand, saved as a batch would."""
    from zsieve.io.writers import write_text
    from zsieve.simulate import mock_spectrum

    spec, truth = mock_spectrum("single-line", 0.2281, 14.0, np.random.default_rng(11), line="[O III] 5008")
    src = tmp_path / "CDX-0904.csv"
    write_text(spec, src)
    out = tmp_path / "look"
    session = RefitSession.from_file(src, out_dir=out, overrides={"n_resamples": 20, "seed": 2})
    assert session.item.key == "CDX-0904.csv"
    lam = O3_5008_VAC * (1 + truth["z"])
    session.pin(lam)
    session.name_line("[O III] 5008")
    res = session.result
    assert abs(res.z - (lam / O3_5008_VAC - 1)) <= 3 * res.z_err  # 1 + z = lambda_obs / lambda_rest
    session.set_grade("likely", "[O III] 4960 at a third of 5008")
    session.save_and_next()
    assert session.finished
    assert (out / "objects" / "CDX-0904.csv.json").exists() and (out / "objects" / "CDX-0904.csv.png").exists()
    rows = (out / "summary.csv").read_text().splitlines()
    assert len(rows) == 2 and ",True," in rows[1]
    # the folder now opens like a batch output; the decided object is left out by default
    assert zsieve_main(["inspect", str(out), "--redo", "--snapshot", str(tmp_path / "s.png")]) == 0
    assert zsieve_main(["inspect", str(out), "--snapshot", str(tmp_path / "t.png")]) == 1
