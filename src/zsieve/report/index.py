"""``DIR/index.html``: one self-contained page to browse a run's results.

Plain HTML with inline CSS and a few lines of inline JavaScript: no server, no fonts or scripts
fetched from anywhere. Every object is a table row with its figure as a thumbnail (the PNG
itself, scaled by CSS), z, its error, grade, confidence, class, status and links to the figure
and the JSON record (relative links, only to files that exist). Clicking a column header sorts
by it (again: reverse order); the grade and status menus and the text box hide non-matching
rows. All text that came from files (object names, paths, messages) is escaped.

Examples
--------
>>> page = render_index([{"key": "a.fits", "file": "a.fits", "object": "<b>", "status": "ok",
...     "z": 0.1, "z_err": 1e-4, "grade": "secure", "confidence": 0.99}], {"a.fits": {"json"}})
>>> "&lt;b&gt;" in page and "<b>" not in page
True
"""

from __future__ import annotations

import datetime as _dt
import html
import logging
import math
import os
from pathlib import Path
from typing import Any, Iterable, Iterator
from urllib.parse import quote

from .atomic import open_atomic, write_atomic
from .record import OBJECTS, is_key

__all__ = ["render_index", "write_index", "existing_outputs"]

log = logging.getLogger(__name__)

_GRADES = ("secure", "likely", "tentative", "none")

_CSS = """
body{font:14px/1.35 system-ui,-apple-system,"Segoe UI",sans-serif;margin:1.2em;color:#1b1b1b;background:#fff}
h1{font-size:1.35em;margin:0 0 .3em}
.meta{color:#555;margin:0 0 .8em}
.controls{display:flex;gap:1.2em;flex-wrap:wrap;align-items:center;margin:.6em 0}
table{border-collapse:collapse;width:100%}
th,td{border-bottom:1px solid #ddd;padding:.3em .5em;text-align:left;vertical-align:middle}
th{background:#f2f4f7;cursor:pointer;user-select:none;position:sticky;top:0}
th[aria-sort=ascending]::after{content:" \\25B2"}
th[aria-sort=descending]::after{content:" \\25BC"}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
img.thumb{width:220px;height:auto;display:block;border:1px solid #ccc}
.g-secure{color:#0b5d1e;font-weight:600}.g-likely{color:#1f4f99;font-weight:600}
.g-tentative{color:#8a4b00}.g-none{color:#666}
.s-failed{color:#a0001c;font-weight:600}.s-skipped{color:#666}
.msg{max-width:28em;overflow-wrap:anywhere;color:#444;font-size:.92em}
.hand{font-size:.85em;color:#6a1b9a}
"""

_JS = r"""
(function(){
  var table=document.getElementById('objects');
  var body=table.tBodies[0];
  var heads=table.tHead.rows[0].cells;
  function value(row,i,type){
    var v=row.cells[i].getAttribute('data-v');
    if(type==='num'){var x=parseFloat(v);return isNaN(x)?null:x;}
    return (v===null?row.cells[i].textContent:v).toLowerCase();
  }
  function sortBy(i){
    var th=heads[i], type=th.getAttribute('data-type')||'text';
    var dir=th.getAttribute('aria-sort')==='ascending'?-1:1;
    for(var k=0;k<heads.length;k++){heads[k].removeAttribute('aria-sort');}
    th.setAttribute('aria-sort',dir===1?'ascending':'descending');
    var rows=Array.prototype.slice.call(body.rows);
    rows.sort(function(a,b){
      var x=value(a,i,type), y=value(b,i,type);
      if(x===null&&y===null)return 0; if(x===null)return 1; if(y===null)return -1;
      return x<y?-dir:(x>y?dir:0);
    });
    rows.forEach(function(r){body.appendChild(r);});
  }
  for(var i=0;i<heads.length;i++){
    if(heads[i].hasAttribute('data-type')){
      heads[i].addEventListener('click',(function(k){return function(){sortBy(k);};})(i));
    }
  }
  var grade=document.getElementById('grade-filter');
  var status=document.getElementById('status-filter');
  var text=document.getElementById('text-filter');
  var shown=document.getElementById('shown');
  function filter(){
    var g=grade.value, s=status.value, t=text.value.toLowerCase(), n=0;
    Array.prototype.forEach.call(body.rows,function(r){
      var ok=(!g||r.getAttribute('data-grade')===g)&&(!s||r.getAttribute('data-status')===s)&&
             (!t||r.textContent.toLowerCase().indexOf(t)>=0);
      r.hidden=!ok; if(ok)n++;
    });
    shown.textContent=n;
  }
  grade.addEventListener('change',filter);
  status.addEventListener('change',filter);
  text.addEventListener('input',filter);
})();
"""


def _num(v, fmt: str) -> tuple[str, str]:
    """(data-v, shown text) of a number; missing values sort last and show as an en dash."""
    try:
        x = float(v)
    except (TypeError, ValueError):
        return "", "\u2013"
    if not math.isfinite(x):
        return "", "\u2013"
    return repr(x), format(x, fmt)


def existing_outputs(out_dir: str | os.PathLike) -> dict[str, set[str]]:
    """For each key in ``DIR/objects``, which of ``json``, ``png``, ``pdf`` exist."""
    folder = Path(out_dir) / OBJECTS
    out: dict[str, set[str]] = {}
    if not folder.is_dir():
        return out
    with os.scandir(folder) as it:
        for e in it:
            stem, dot, ext = e.name.rpartition(".")
            if dot and ext in ("json", "png", "pdf") and is_key(stem):
                out.setdefault(stem, set()).add(ext)
    return out


def _row_html(row: dict[str, Any], files: set[str]) -> str:
    e = html.escape
    key = str(row.get("key") or "")
    grade = row.get("grade") if row.get("grade") in _GRADES else "none"
    status = str(row.get("status") or "ok")
    href = quote(key, safe="")
    if "png" in files:
        thumb = (f'<a href="{OBJECTS}/{href}.png"><img class="thumb" loading="lazy" '
                 f'src="{OBJECTS}/{href}.png" alt="figure of {e(key)}"></a>')
    else:
        thumb = "<span class='msg'>no figure</span>"
    links = []
    if "png" in files:
        links.append(f'<a href="{OBJECTS}/{href}.png">figure</a>')
    if "pdf" in files:
        links.append(f'<a href="{OBJECTS}/{href}.pdf">PDF</a>')
    if "json" in files:
        links.append(f'<a href="{OBJECTS}/{href}.json">JSON</a>')
    zv, zt = _num(row.get("z"), ".5f")
    ev, et = _num(row.get("z_err"), ".1e")
    cv, ct = _num(row.get("confidence"), ".2f")
    hand = " <span class='hand' title='decided by hand'>(hand)</span>" if row.get("hand") else ""
    msg = row.get("message") or row.get("flags") or ""
    name = row.get("object") or ""
    return (
        f'<tr data-grade="{e(grade)}" data-status="{e(status)}">'
        f"<td>{thumb}</td>"
        f"<td>{e(str(name))}</td>"
        f"<td class='msg'>{e(str(row.get('file') or ''))}</td>"
        f'<td class="num" data-v="{zv}">{zt}{hand}</td>'
        f'<td class="num" data-v="{ev}">{et}</td>'
        f'<td class="g-{e(grade)}">{e(grade)}</td>'
        f'<td class="num" data-v="{cv}">{ct}</td>'
        f"<td>{e(str(row.get('template') or ''))}</td>"
        f'<td class="s-{e(status)}">{e(status)}</td>'
        f"<td class='msg'>{e(str(msg))}</td>"
        f"<td>{' '.join(links)}</td></tr>"
    )


def _counts(rows: Iterable[dict[str, Any]]) -> tuple[dict[str, int], dict[str, int], int]:
    counts = {g: 0 for g in _GRADES}
    nstat = {"ok": 0, "failed": 0, "skipped": 0}
    n = 0
    for r in rows:
        n += 1
        if r.get("status") == "ok":
            counts[r.get("grade") if r.get("grade") in _GRADES else "none"] += 1
        nstat[r.get("status") if r.get("status") in nstat else "skipped"] += 1
    return counts, nstat, n


def _page_parts(pairs: Iterable[tuple[dict[str, Any], set[str]]], counts: dict[str, int], nstat: dict[str, int],
                n: int, *, title: str, note: str) -> Iterator[str]:
    """The page in pieces: head, one piece per row (``(row, outputs)`` in display order), tail."""
    e = html.escape
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    grade_opts = "".join(f'<option value="{g}">{g} ({counts[g]})</option>' for g in _GRADES)
    status_opts = "".join(f'<option value="{s}">{s} ({k})</option>' for s, k in nstat.items())
    heads = [("figure", None), ("object", "text"), ("file", "text"), ("z", "num"), ("\u03c3<sub>z</sub>", "num"),
             ("grade", "text"), ("confidence", "num"), ("class", "text"), ("status", "text"),
             ("message / flags", "text"), ("files", None)]
    head_html = "".join(
        f'<th data-type="{t}" title="click to sort">{h}</th>' if t else f"<th>{h}</th>" for h, t in heads
    )
    yield f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{e(title)}</title>
<style>{_CSS}</style></head>
<body>
<h1>{e(title)}</h1>
<p class="meta">{n} entries: {nstat['ok']} fitted ({', '.join(f'{counts[g]} {g}' for g in _GRADES)}),
{nstat['failed']} failed, {nstat['skipped']} skipped. Written {e(when)}. {e(note)}
Showing <span id="shown">{n}</span>.</p>
<div class="controls">
<label>grade <select id="grade-filter"><option value="">all</option>{grade_opts}</select></label>
<label>status <select id="status-filter"><option value="">all</option>{status_opts}</select></label>
<label>contains <input id="text-filter" type="search" size="24"></label>
<span class="meta">Click a column header to sort.</span>
</div>
<table id="objects"><thead><tr>{head_html}</tr></thead>
<tbody>
"""
    first = True
    for row, files in pairs:
        yield ("" if first else "\n") + _row_html(row, files)
        first = False
    yield f"""
</tbody></table>
<script>{_JS}</script>
</body></html>
"""


def _row_order(r: dict[str, Any]):
    return (str(r.get("file") or ""), int(r.get("index") or 0), str(r.get("key") or ""))


def render_index(rows: Iterable[dict[str, Any]], files: dict[str, set[str]], *, title: str = "zsieve results",
                 note: str = "") -> str:
    """The page as a string. ``files`` maps key -> existing outputs (see :func:`existing_outputs`)."""
    rows = sorted(rows, key=_row_order)
    counts, nstat, n = _counts(rows)
    pairs = ((r, files.get(str(r.get("key") or ""), set())) for r in rows)
    return "".join(_page_parts(pairs, counts, nstat, n, title=title, note=note))


def write_index(out_dir: str | os.PathLike, rows: Iterable[dict[str, Any]], *, title: str | None = None,
                note: str = "") -> str:
    """Write ``DIR/index.html`` atomically for these rows; links only to files that exist.

    ``rows`` is a list (or any iterable) of summary rows, or the folder's catalogue rows
    (:class:`zsieve.report.summary.StoredRows` or a :class:`~zsieve.report.summary.Catalogue`):
    those are streamed to the file in order, with the outputs the catalogue knows of, so the
    page of a run of any size is written in bounded memory.
    """


    out_dir = Path(out_dir)
    title = title or f"zsieve results: {out_dir.name}"
    path = out_dir / "index.html"
    if hasattr(rows, "tally") and hasattr(rows, "rows") or hasattr(rows, "with_outputs"):
        tal = rows.tally()
        counts = {g: tal[g] for g in _GRADES}
        nstat = {"ok": tal["fitted"], "failed": tal["failed"], "skipped": tal["skipped"]}
        pairs = rows.with_outputs() if hasattr(rows, "with_outputs") else rows.rows(outputs=True)
        with open_atomic(path) as fh:
            for part in _page_parts(pairs, counts, nstat, sum(nstat.values()), title=title, note=note):
                fh.write(part)
        return str(path)
    page = render_index(rows, existing_outputs(out_dir), title=title, note=note)
    return write_atomic(path, page)
