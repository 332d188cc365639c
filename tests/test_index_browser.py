"""index.html in a real browser: headless Chromium (Debian's ``chromium``) loads the page from
disk, a click on the z header sorts the rows by z and the grade menu hides non-secure rows.

The test writes its own copy of the page with a driver script appended (the shipped page has
no test hooks), runs ``chromium --headless --dump-dom`` on it and reads the resulting DOM with
Python's html.parser. Skipped, saying why, only where no Chromium binary is installed.
"""

import math
import os
import shutil
import subprocess
from html.parser import HTMLParser

import pytest

from zsieve.report.index import write_index
from zsieve.report.record import write_record
from zsieve.report.summary import rebuild_summary
from zsieve.result import FitResult

CHROMIUM = next((shutil.which(n) for n in ("chromium", "chromium-browser") if shutil.which(n)), None)

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(CHROMIUM is None, reason="no chromium binary on PATH (Debian package 'chromium')"),
]

DRIVER = """
<script>
window.addEventListener('load', function () {
  var heads = document.querySelectorAll('#objects thead th');
  for (var i = 0; i < heads.length; i++) {
    if (heads[i].textContent.trim() === 'z') { heads[i].click(); break; }
  }
  var g = document.getElementById('grade-filter');
  g.value = 'secure';
  g.dispatchEvent(new Event('change'));
  document.body.setAttribute('data-driven', 'yes');
});
</script>
"""


class _Rows(HTMLParser):
    """Rows of the objects table: (z text from data-v, grade, hidden?) in document order."""

    def __init__(self):
        super().__init__()
        self.rows, self.cell, self.driven, self.z_sort = [], -1, False, None
        self._z_seen = False
        self._th = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "body" and a.get("data-driven") == "yes":
            self.driven = True
        if tag == "th":
            self._th = a
        if tag == "tr" and "data-grade" in a:
            self.rows.append({"grade": a["data-grade"], "hidden": "hidden" in a, "z": None})
            self.cell = -1
        if tag == "td" and self.rows:
            self.cell += 1
            if self.cell == 3:
                v = a.get("data-v") or ""
                self.rows[-1]["z"] = float(v) if v else math.nan

    def handle_data(self, data):
        # the z header is the first whose text is exactly "z" (the sigma header has a <sub>z</sub>)
        if self._th is not None and data.strip() == "z" and not self._z_seen:
            self.z_sort = self._th.get("aria-sort")
            self._z_seen = True

    def handle_endtag(self, tag):
        if tag == "th":
            self._th = None


def test_sort_by_z_and_filter_secure(tmp_path):
    specs = [(0.9, "secure"), (0.1, "likely"), (2.5, "secure"), (0.4, "none"), (1.7, "tentative"),
             (0.05, "secure"), (float("nan"), "none")]
    for i, (z, grade) in enumerate(specs):
        key = f"obj-{i}.fits"
        status = "ok" if math.isfinite(z) else "failed"
        r = FitResult(file=key, object_name=f"CDX-{i:04d}", z=z, z_err=1e-4, grade=grade, confidence=0.5,
                      status=status, provenance={"key": key, "index": 0})
        write_record(tmp_path, key, r.to_dict())
    rows = rebuild_summary(tmp_path, {})
    write_index(tmp_path, rows)
    page = (tmp_path / "index.html").read_text()
    driven = tmp_path / "driven.html"
    driven.write_text(page.replace("</body>", DRIVER + "</body>"))
    profile = tmp_path / "profile"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
           f"--user-data-dir={profile}", "--virtual-time-budget=5000", "--dump-dom", driven.as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120, env=dict(os.environ, HOME=str(tmp_path)))
    assert proc.returncode == 0, proc.stderr[-2000:]
    p = _Rows()
    p.feed(proc.stdout)
    assert p.driven, "the driver script did not run: " + proc.stderr[-1000:]
    assert p.z_sort == "ascending"
    zs = [r["z"] for r in p.rows]
    finite = [z for z in zs if not math.isnan(z)]
    assert finite == sorted(z for z, _ in specs if math.isfinite(z))  # sorted ascending by z
    assert math.isnan(zs[-1])  # the row without a redshift sorts last
    shown = [r for r in p.rows if not r["hidden"]]
    assert [r["grade"] for r in shown] == ["secure"] * 3
    assert [r["z"] for r in shown] == [0.05, 0.9, 2.5]
    assert all(r["hidden"] for r in p.rows if r["grade"] != "secure")
