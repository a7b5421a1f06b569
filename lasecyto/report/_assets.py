"""Inline CSS and JavaScript of the HTML report (no external resources of any kind)."""

from __future__ import annotations

__all__ = ["CSS", "SCRIPT"]

CSS = """
:root{--ink:#1b1b1b;--muted:#5c5c5c;--rule:#c9c9c9;--head:#eef1f4;--accent:#133b57;--flag:#91100d;
--warn-bg:#fff4dc;--warn-rule:#c98a1a}
*{box-sizing:border-box}
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:0 auto;max-width:1180px;
color:var(--ink);line-height:1.45;padding:1em 1.2em 3em}
h1{font-size:1.55em;margin:.3em 0 .1em}h2{font-size:1.25em;border-bottom:2px solid var(--accent);
margin-top:1.8em;padding-bottom:.1em}h3{font-size:1.05em;margin:1.2em 0 .3em}
a{color:var(--accent)}a:focus,button:focus,input:focus,summary:focus{outline:3px solid #f89161;outline-offset:1px}
nav ol{columns:3;margin:.4em 0;padding-left:1.4em}
.facts{color:var(--muted);margin:.2em 0 .8em}
table{border-collapse:collapse;margin:.6em 0;font-size:.88em}
th,td{border:1px solid var(--rule);padding:.22em .55em;text-align:right;vertical-align:top}
th{background:var(--head);font-weight:600}td.t,th.t{text-align:left}
caption{caption-side:top;text-align:left;font-weight:600;padding:.2em 0}
.banner{background:var(--warn-bg);border:1px solid var(--warn-rule);padding:.6em 1em;margin:1em 0;font-weight:600}
.caution{background:var(--warn-bg);border-left:6px solid var(--warn-rule);padding:.5em 1em;margin:.8em 0;
font-size:.9em}
.caution pre{white-space:pre-wrap;font-family:inherit;margin:.2em 0}
.note{color:var(--muted);font-style:italic}
.flag{color:var(--flag);font-weight:700}
.flag::before{content:"\\25CF\\00a0"}
.side{display:flex;flex-wrap:wrap;gap:1.2em;align-items:flex-start}
.side>*{flex:1 1 420px;min-width:0}
img{max-width:100%;height:auto}
figure{margin:.6em 0}figcaption{color:var(--muted);font-size:.88em}
details{margin:.5em 0}summary{cursor:pointer;font-weight:600;padding:.2em 0}
section.cell{border-top:1px solid var(--rule);padding:.4em 0 .6em}
section.cell h4{margin:.2em 0;font-size:.98em;font-weight:600}
.tablewrap{overflow-x:auto;max-height:80vh;overflow-y:auto;border:1px solid var(--rule)}
.tablewrap table{margin:0}.tablewrap td{white-space:nowrap}
#cell-table thead th{position:sticky;top:0;z-index:1}
#cell-table th button{all:unset;cursor:pointer;display:block;width:100%;padding:0}
#cell-table th button::after{content:" \\2195";color:var(--muted)}
#cell-table th[aria-sort=ascending] button::after{content:" \\25B2";color:var(--ink)}
#cell-table th[aria-sort=descending] button::after{content:" \\25BC";color:var(--ink)}
#cell-table th button:focus{outline:3px solid #f89161}
#cell-table tbody tr:nth-child(even){background:#f7f7f7}
.controls{display:flex;flex-wrap:wrap;gap:1.2em;align-items:center;margin:.5em 0}
pre.params{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.82em}
@media print{details{display:block}.tablewrap{max-height:none;overflow:visible}}
"""

# The cell table: sort by any column (button in each header: click, Enter or Space; again to reverse;
# missing values always last), filter by text and by the flag.  Panels of a cell open when its link
# is followed.  Plain ES5-level JavaScript, no library, no network.
SCRIPT = r"""
(function () {
  "use strict";
  var table = document.getElementById("cell-table");
  if (table) {
    var tbody = table.tBodies[0];
    var heads = table.tHead.rows[0].cells;
    var status = document.getElementById("cell-table-status");
    var filter = document.getElementById("cell-filter");
    var flagged = document.getElementById("flagged-only");
    var keyOf = function (row, col, numeric) {
      var td = row.cells[col];
      var v = td.getAttribute("data-v");
      if (v === null) { v = td.textContent; }
      if (numeric) {
        var x = parseFloat(v);
        return isNaN(x) ? null : x;
      }
      v = v.trim().toLowerCase();
      return v === "" ? null : v;
    };
    var sortBy = function (col, dir) {
      var numeric = heads[col].getAttribute("data-kind") === "num";
      var rows = Array.prototype.slice.call(tbody.rows);
      var keyed = rows.map(function (row, i) { return [keyOf(row, col, numeric), i, row]; });
      keyed.sort(function (a, b) {
        if (a[0] === null && b[0] === null) { return a[1] - b[1]; }
        if (a[0] === null) { return 1; }
        if (b[0] === null) { return -1; }
        if (a[0] < b[0]) { return -dir; }
        if (a[0] > b[0]) { return dir; }
        return a[1] - b[1];
      });
      keyed.forEach(function (k) { tbody.appendChild(k[2]); });
      for (var j = 0; j < heads.length; j++) {
        if (j === col) { heads[j].setAttribute("aria-sort", dir > 0 ? "ascending" : "descending"); }
        else { heads[j].removeAttribute("aria-sort"); }
      }
      if (status) {
        status.textContent = "Sorted by " + heads[col].textContent.trim() + ", " +
          (dir > 0 ? "ascending" : "descending") + ".";
      }
    };
    Array.prototype.forEach.call(heads, function (th, col) {
      var button = th.querySelector("button");
      if (!button) { return; }
      button.addEventListener("click", function () {
        sortBy(col, th.getAttribute("aria-sort") === "ascending" ? -1 : 1);
      });
    });
    var applyFilter = function () {
      var text = filter ? filter.value.trim().toLowerCase() : "";
      var only = flagged ? flagged.checked : false;
      var shown = 0;
      Array.prototype.forEach.call(tbody.rows, function (row) {
        var ok = (!text || row.textContent.toLowerCase().indexOf(text) >= 0) &&
                 (!only || row.getAttribute("data-flagged") === "1");
        row.hidden = !ok;
        if (ok) { shown += 1; }
      });
      if (status) { status.textContent = shown + " of " + tbody.rows.length + " cells shown."; }
    };
    if (filter) { filter.addEventListener("input", applyFilter); }
    if (flagged) { flagged.addEventListener("change", applyFilter); }
  }
  var openTarget = function () {
    var id = decodeURIComponent(window.location.hash.slice(1));
    var el = id ? document.getElementById(id) : null;
    for (var p = el; p; p = p.parentElement) {
      if (p.tagName === "DETAILS") { p.open = true; }
    }
    if (el) { el.scrollIntoView(); }
  };
  window.addEventListener("hashchange", openTarget);
  if (window.location.hash) { openTarget(); }
})();
"""
