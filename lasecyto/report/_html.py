"""Static, self-contained HTML report of a run."""

from __future__ import annotations

import base64
import html
import io
import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from .. import tables as _tables
from ..exceptions import InputError
from ..features import CHANGE_RULE, wilson_interval
from ._figures import plot_kymograph, plot_onsets, plot_trace, plot_traces_by_condition
from ._mpl import require_matplotlib

__all__ = ["write_html_report"]

_TABLE_NAMES = ("lines", "tracks", "cell_frames", "cells")
_MAX_CELL_PANELS = 12
_OK_STATUSES = {"ok", "done", "success", "skipped", "cached"}

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:2em auto;max-width:1100px;
color:#222;line-height:1.4;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em}h2{font-size:1.25em;border-bottom:1px solid #ccc;margin-top:1.6em}
h3{font-size:1.05em;margin-bottom:.3em}
table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
th,td{border:1px solid #ccc;padding:.25em .6em;text-align:right}th{background:#f2f2f2}
td.t,th.t{text-align:left}
.banner{background:#fff3cd;border:1px solid #e0c36a;padding:.6em 1em;margin:1em 0;font-weight:600}
.note{color:#666;font-style:italic}
.cells{display:grid;grid-template-columns:1fr 1fr;gap:.6em 1.2em}
img{max-width:100%;height:auto}
.flag{color:#b00020;font-weight:600}
"""


def _read_tables(run_dir, given):
    out = {}
    given = dict(given or {})
    for name in _TABLE_NAMES:
        if given.get(name) is not None:
            out[name] = _tables.validate(given[name], name)
            continue
        path = run_dir / "tables" / f"{name}.parquet"
        if path.is_file():
            out[name] = _tables.validate(pd.read_parquet(path), name, path=path)
    return out


def _read_record(run_dir):
    path = run_dir / "run_record.json"
    if not path.is_file():
        return {}
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError("run record is not valid JSON", path=path, expected="a JSON object",
                         found=str(exc)) from None
    if not isinstance(record, dict):
        raise InputError("run record is not a JSON object", path=path, expected="an object",
                         found=type(record).__name__)
    return record


def _png(fig):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _figure_html(draw, alt, size=(7.5, 3.6)):
    from matplotlib.figure import Figure

    fig = Figure(figsize=size, layout="constrained")
    ax = fig.add_subplot()
    draw(ax)
    return f'<img src="data:image/png;base64,{_png(fig)}" alt="{_e(alt)}">'


def _fmt(value, spec):
    try:
        v = float(value)
    except (TypeError, ValueError):
        return html.escape(str(value))
    if math.isnan(v):
        return "&ndash;"
    return format(v, spec)


def _e(text):
    return html.escape(str(text), quote=True)


def _quantity(cell_frames, preferred=None):
    """Column to draw: the cells' stated quantity, else index_change when it has finite values."""
    if preferred in ("index_change", "relative_shift"):
        return preferred
    las = cell_frames
    if "lasing" in las.columns:
        las = las[las["lasing"].to_numpy(dtype=bool)]
    if np.isfinite(las["index_change"].to_numpy(dtype=float)).any():
        return "index_change"
    return "relative_shift"


def _summary_html(cells):
    n_cells = len(cells)
    dishes = pd.unique(cells["dish"].astype(str))
    rows = []
    for cond, g in cells.groupby(cells["condition"].astype(str), sort=True):
        n = len(g)
        k = int(g["changed"].to_numpy(dtype=bool).sum())
        low, high = wilson_interval(k, n)
        rows.append(f'<tr><td class="t">{_e(cond)}</td><td>{pd.unique(g["dish"].astype(str)).size}</td>'
                    f"<td>{n}</td><td>{k}</td><td>{_fmt(k / n, '.2f')}</td>"
                    f"<td>{_fmt(low, '.2f')} &ndash; {_fmt(high, '.2f')}</td></tr>")
    k_all = int(cells["changed"].to_numpy(dtype=bool).sum())
    return (f"<p>{n_cells} cells in {len(dishes)} dishes, {cells['condition'].astype(str).nunique()} "
            f"conditions; flagged as changed: {k_all} of {n_cells}.</p>"
            '<table><tr><th class="t">condition</th><th>dishes</th><th>cells</th><th>flagged</th>'
            "<th>fraction</th><th>Wilson 95 % interval</th></tr>" + "".join(rows) + "</table>")


def _cell_table_html(cells):
    rows = []
    for r in cells.itertuples(index=False):
        flag = '<span class="flag">yes</span>' if bool(r.changed) else "no"
        rows.append(f'<tr><td class="t">{_e(r.cell_id)}</td><td class="t">{_e(r.dish)}</td>'
                    f'<td class="t">{_e(r.condition)}</td><td>{_fmt(r.index_change, ".3e")}</td>'
                    f"<td>{_fmt(r.change_z, '.1f')}</td><td>{_fmt(r.onset_s, '.1f')}</td>"
                    f"<td>{flag}</td></tr>")
    return ('<table id="cells"><tr><th class="t">cell_id</th><th class="t">dish</th><th class="t">condition</th>'
            "<th>index_change</th><th>change_z</th><th>onset_s</th><th>changed</th></tr>"
            + "".join(rows) + "</table>")


def _failures_html(record):
    items = record.get("items") or []
    rows = []
    for it in items:
        if not isinstance(it, dict):
            continue
        status = str(it.get("status", "") or "")
        error = it.get("error") or ""
        if status.lower() in _OK_STATUSES and not error:
            continue
        if not status and not error:
            continue
        rows.append(f'<tr><td class="t">{_e(it.get("item", ""))}</td>'
                    f'<td class="t">{_e(error or status)}</td></tr>')
    if not rows:
        return f'<p class="note">No failed items ({len(items)} items in the run record).</p>'
    return ('<table><tr><th class="t">item</th><th class="t">reason</th></tr>' + "".join(rows) + "</table>")


def _select_cells(cells):
    changed = cells["changed"].to_numpy(dtype=bool)
    ids = cells["cell_id"].astype(str).to_numpy()
    flagged = sorted(ids[changed].tolist())
    others = sorted(ids[~changed].tolist())
    return (flagged + others)[:_MAX_CELL_PANELS]


def _cell_panels_html(cells, tabs):
    lines = tabs.get("lines")
    tracks = tabs.get("tracks")
    frames = tabs.get("cell_frames")
    by_id = {str(r["cell_id"]): r for _, r in cells.iterrows()}
    parts = []
    for cid in _select_cells(cells):
        row = by_id[cid]
        status = "changed" if bool(row["changed"]) else "not changed"
        parts.append(f"<h3>{_e(cid)} &middot; {_e(row['condition'])} &middot; {_e(row['dish'])} &middot; "
                     f"{status}</h3>")
        figs = []
        pts = None
        if lines is not None:
            pts = lines[lines["cell_id"].astype(str).to_numpy() == cid]
        cell_tracks = None
        if tracks is not None:
            cell_tracks = tracks[tracks["cell_id"].astype(str).to_numpy() == cid]
            if pts is None:
                pts = cell_tracks
        if pts is not None and len(pts):
            figs.append(_figure_html(lambda ax, p=pts, tr=cell_tracks: plot_kymograph(p, ax=ax, tracks=tr),
                                     f"kymograph of cell {cid}", size=(5.4, 3.4)))
        if frames is not None:
            cf = frames[frames["cell_id"].astype(str).to_numpy() == cid]
            if len(cf):
                q = _quantity(cf, row.get("quantity"))
                onset = float(row["onset_s"])
                pert = float(row["perturbation_s"])
                figs.append(_figure_html(
                    lambda ax, c=cf, q=q, o=onset, p=pert: plot_trace(c, ax=ax, quantity=q, onset_s=o,
                                                                      perturbation_s=p),
                    f"trace of cell {cid}", size=(5.4, 3.4)))
        if figs:
            parts.append('<div class="cells">' + "".join(f"<div>{f}</div>" for f in figs) + "</div>")
        else:
            parts.append('<p class="note">No lines or frames for this cell.</p>')
        note = row.get("note")
        if isinstance(note, str) and note:
            parts.append(f'<p class="note">{_e(note)}</p>')
    return "".join(parts)


def write_html_report(run_dir, *, tables=None, title=None) -> Path:
    """Write a run's static HTML report to ``run_dir/report.html``.

    Parameters
    ----------
    run_dir : str or os.PathLike
        Run directory holding ``tables/{lines,tracks,cell_frames,cells}.parquet``
        and ``run_record.json``; each is optional.
    tables : dict of str to pandas.DataFrame, optional
        Tables to use instead of those on disk, by name; missing names are read.
    title : str, optional
        Page title; by default built from the experiment name.

    Returns
    -------
    pathlib.Path
        Path of the report.  The file is self-contained (figures as base64
        PNG, inline CSS, no scripts, no network) and written atomically.

    Raises
    ------
    InputError
        When ``run_dir`` is not a directory, a table fails its schema or the
        run record is not a JSON object.
    ImportError
        When matplotlib is missing.
    """
    require_matplotlib()
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputError("run directory not found", path=run_dir, expected="a directory",
                         found="nothing")
    tabs = _read_tables(run_dir, tables)
    record = _read_record(run_dir)
    experiment = record.get("experiment") if isinstance(record.get("experiment"), dict) else {}
    name = experiment.get("name") or run_dir.name
    title = title or f"lasecyto report: {name}"

    body = [f"<h1>{_e(title)}</h1>"]
    if experiment.get("synthetic"):
        body.append('<div class="banner">Synthetic data: this experiment was generated by a simulator, '
                    "not measured.</div>")
    if experiment.get("description"):
        body.append(f"<p>{_e(experiment['description'])}</p>")

    cells = tabs.get("cells")
    frames = tabs.get("cell_frames")
    body.append("<h2>Experiment summary</h2>")
    if cells is not None and len(cells):
        body.append(_summary_html(cells))
        rule = record.get("change_rule") or CHANGE_RULE
        body.append(f'<p class="note">Verdict rule: {_e(rule)}</p>')
    else:
        body.append('<p class="note">No cells table in this run.</p>')

    if cells is not None and len(cells) and frames is not None and len(frames):
        q = _quantity(frames)
        body.append("<h2>Traces by condition</h2>")
        body.append(_figure_html(lambda ax: plot_traces_by_condition(frames, cells, ax=ax, quantity=q),
                                 "traces by condition"))
    if cells is not None and len(cells):
        body.append("<h2>Onset distribution</h2>")
        body.append(_figure_html(lambda ax: plot_onsets(cells, ax=ax), "onset distribution",
                                 size=(7.5, 0.9 + 0.5 * cells["condition"].astype(str).nunique())))
        n_panel = min(len(cells), _MAX_CELL_PANELS)
        body.append(f"<h2>Cells ({n_panel} of {len(cells)} shown, flagged first)</h2>")
        body.append(_cell_panels_html(cells, tabs))
        body.append("<h2>All cells</h2>")
        body.append(_cell_table_html(cells))

    body.append("<h2>Failures</h2>")
    body.append(_failures_html(record))

    page = ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            + "\n".join(body) + "\n</body>\n</html>\n")

    target = run_dir / "report.html"
    fd, tmp = tempfile.mkstemp(prefix=".report-", suffix=".html.tmp", dir=run_dir)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(page)
        os.chmod(tmp, 0o644)  # mkstemp creates the file private; a report is meant to be read
        os.replace(tmp, target)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return target
