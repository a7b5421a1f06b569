"""Static, self-contained HTML report of a run.

The page has no external resource of any kind: CSS and JavaScript are inline
(:mod:`._assets`), figures are palette PNGs embedded as ``data:`` URIs
(:mod:`._render`).  Sections, in order: summary (counts, flagged fractions
with Wilson intervals, the verdict and control rule), failures, traces by
condition, onset distribution, pump thresholds with the laser-safety cautions,
classifier metrics, the sortable cell table, one panel per cell, run details.

Size rule: every cell gets one compact panel (kymograph with its tracked
modes and hops, its trace(s) with onset and perturbation, the threshold curves
of a pump series, a strip of emission patches where images exist).  Panels are
grouped by condition in collapsible blocks, open when the run has at most
:data:`OPEN_PANELS_MAX` cells; the images load lazily.  Above
:data:`FULL_DPI_MAX` cells the panels are drawn at :data:`SMALL_DPI` dots per
inch instead of :data:`FULL_DPI`, so that the page grows by about 15-25 kB per
cell.  Tables are read as :mod:`._read` states (memory bounded by one row
group of the per-cell tables).
"""

from __future__ import annotations

import logging
import time
from collections import Counter
from pathlib import Path

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ..io import atomic_path
from ._assets import CSS, SCRIPT
from ._figures import plot_onsets, plot_traces_by_condition, plot_values_by_condition
from ._mpl import require_matplotlib
from ._panels import (FRAME_COLUMNS, LINE_COLUMNS, PATTERN_COLUMNS, TRACK_COLUMNS, CellData, PatternImages,
                      draw_cell_panel, thin_trace)
from ._read import RunTables, read_record
from ._render import img_tag, new_figure
from ._sections import (cautions_html, cell_heading_html, cell_table_html, classifier_html, condition_order, esc,
                        failures_html, rule_html, run_details_html, summary_html, thresholds_html)

__all__ = ["write_html_report", "OPEN_PANELS_MAX", "FULL_DPI_MAX", "FULL_DPI", "SMALL_DPI"]

logger = logging.getLogger("lasecyto.report")

OPEN_PANELS_MAX = 40
FULL_DPI_MAX = 100
FULL_DPI = 80
SMALL_DPI = 60
_QUANTITY_WORDS = {"index_change": "refractive-index change", "relative_shift": "relative wavelength shift",
                   "diameter_change_um": "change of the bead diameter", "medium_index": "medium refractive index",
                   "pattern_baseline_corr": "pattern correlation with the baseline"}


def _anchor(i):
    return f"cell-{i}"


def _overview_quantity(cells, run, resonator, kind):
    """The ``cell_frames`` column of the traces-by-condition figure, or None."""
    if kind == "pump-series" or not run.has("cell_frames"):
        return None
    available = set(run.columns("cell_frames"))
    candidates = []  # changes from each cell's own baseline overlay well; absolute bead diameters do not
    if "quantity" in cells.columns:
        counted = Counter(q for q in cells["quantity"].astype(str) if q and q != "nan")
        candidates += [q for q, _n in counted.most_common()]
    candidates += ["index_change", "relative_shift", "diameter_change_um", "pattern_baseline_corr"]
    for q in candidates:
        if q in available:
            return q
    return None


def _figure(draw, alt, size, *, dpi=FULL_DPI):
    fig = new_figure(*size)
    draw(fig.add_subplot())
    return img_tag(fig, alt, dpi=dpi)


def _quantity_words(quantity, resonator):
    if quantity == "index_change" and resonator == "sphere":
        return "change of the medium's refractive index"
    return _QUANTITY_WORDS.get(quantity, quantity.replace("_", " "))


def _traces_section(cells, run, quantity, conditions, resonator):
    parts = []
    for cid in cells["cell_id"].astype(str):
        cf = run.cell("cell_frames", cid, ["time_s", "lasing", quantity])
        if cf is None or quantity not in cf.columns:
            continue
        t, y = thin_trace(cf, quantity)
        if t.size:
            parts.append(pd.DataFrame({"cell_id": cid, "time_s": t, quantity: y}))
    if not parts:
        return None
    frames = pd.concat(parts, ignore_index=True)
    words = _quantity_words(quantity, resonator)
    img = _figure(lambda ax: plot_traces_by_condition(frames, cells, ax=ax, quantity=quantity,
                                                      conditions=conditions),
                  f"{words} of every cell against time, by condition", (9.0, 3.8))
    return (f"<figure>{img}<figcaption>{esc(words.capitalize())} of every lasing frame: thin lines one cell each, "
            "thick lines the median of each condition; dashed: perturbation.</figcaption></figure>")


def _onsets_section(cells, conditions):
    if not np.isfinite(cells["onset_s"].to_numpy(float)).any():
        return '<p class="note">No cell has an onset.</p>'
    height = 0.9 + 0.55 * len(conditions)
    img = _figure(lambda ax: plot_onsets(cells, ax=ax, conditions=conditions), "onset distribution",
                  (9.0, height))
    return (f"<figure>{img}<figcaption>Onset after the perturbation of each cell with an onset (bars: 1 sigma); "
            "under each row the quartiles and the median.</figcaption></figure>")


def _pump_section(cells, thresholds, record, conditions):
    out = [cautions_html(record)]
    if thresholds is None or not len(thresholds):
        out.append('<p class="note">No mode threshold was fitted.</p>')
        return "".join(out)
    if "threshold_nj" in cells.columns and np.isfinite(cells["threshold_nj"].to_numpy(float)).any():
        img = _figure(lambda ax: plot_values_by_condition(cells, "threshold_nj", ax=ax, err_column="threshold_err_nj"
                                                          if "threshold_err_nj" in cells.columns else None,
                                                          conditions=conditions, log=True),
                      "lasing thresholds by condition", (9.0, 0.9 + 0.55 * len(conditions)))
        out.append(f"<figure>{img}<figcaption>Lasing threshold of each cell (its lowest-threshold mode), "
                   "by condition.</figcaption></figure>")
    out.append(thresholds_html(thresholds))
    return "".join(out)


def _panel_groups(cells, run, record, conditions, anchors, *, kind, resonator, thresholds, images, dpi):
    open_attr = " open" if len(cells) <= OPEN_PANELS_MAX else ""
    cond = cells["condition"].astype(str).to_numpy()
    changed = cells["changed"].fillna(False).to_numpy(bool)
    fits_by_cell = {}
    if thresholds is not None and len(thresholds):
        fits_by_cell = {str(k): g.reset_index(drop=True) for k, g in thresholds.groupby("cell_id", sort=False)}
    groups = []
    for c in conditions:
        rows = np.flatnonzero(cond == c)
        rows = rows[np.lexsort((cells["cell_id"].astype(str).to_numpy()[rows], ~changed[rows]))]  # flagged first
        parts = []
        for i in rows:
            cell = cells.iloc[i].to_dict()
            cid = str(cell["cell_id"])
            data = CellData(lines=run.cell("lines", cid, LINE_COLUMNS), tracks=run.cell("tracks", cid, TRACK_COLUMNS),
                            frames=run.cell("cell_frames", cid, FRAME_COLUMNS),
                            patterns=run.cell("patterns", cid, PATTERN_COLUMNS))
            fig, notes = draw_cell_panel(data, cell, kind=kind, resonator=resonator, fits=fits_by_cell.get(cid),
                                         images=images)
            body = ""
            if fig is not None:
                body = img_tag(fig, f"panel of cell {cid}", dpi=dpi, lazy=True)
            body += "".join(f'<p class="note">{esc(n)}</p>' for n in notes)
            parts.append(f'<section class="cell" id="{anchors[cid]}" aria-label="cell {esc(cid)}">'
                         f"<h4>{cell_heading_html(cell, verdict=kind != 'pump-series', resonator=resonator)}</h4>{body}</section>")
        k = int(changed[cond == c].sum())
        groups.append(f"<details{open_attr}><summary>{esc(c)}: {rows.size} cells, {k} flagged</summary>"
                      + "".join(parts) + "</details>")
    return "".join(groups)


def _pattern_images(record, run):
    if not run.has("patterns"):
        return None, None
    experiment = record.get("experiment") if isinstance(record.get("experiment"), dict) else {}
    path = experiment.get("manifest")
    if not path:
        return None, "emission images not shown: the run record names no manifest"
    from ..io import read_manifest

    try:
        return PatternImages(read_manifest(path)), None
    except (InputError, OSError) as exc:
        return None, f"emission images not shown: {exc}"


def write_html_report(run_dir, *, tables=None, title=None) -> Path:
    """Write a run's static HTML report to ``run_dir/report.html``.

    Parameters
    ----------
    run_dir : str or os.PathLike
        Run directory holding ``tables/<name>.parquet`` and ``run_record.json``
        (each optional); emission patches are cut from the image stacks named
        by the run's manifest when it can still be read.
    tables : dict of str to pandas.DataFrame, optional
        Tables to use instead of those on disk, by name; missing names are read.
    title : str, optional
        Page title; by default built from the experiment name.

    Returns
    -------
    pathlib.Path
        Path of the report.  The file is self-contained (figures as inline
        PNG, inline CSS and JavaScript, no network) and written atomically.

    Raises
    ------
    InputError
        When ``run_dir`` is not a directory, a table fails its schema or the
        run record is not a JSON object.
    ImportError
        When matplotlib is missing.
    """
    require_matplotlib()
    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputError("run directory not found", path=run_dir, expected="a directory", found="nothing")
    run = RunTables(run_dir, tables)
    record = read_record(run_dir)
    experiment = record.get("experiment") if isinstance(record.get("experiment"), dict) else {}
    kind = str(experiment.get("kind") or "time-lapse")
    resonator = str(experiment.get("resonator") or "")
    name = experiment.get("name") or run_dir.name
    title = title or f"lasecyto report: {name}"
    analysis = record.get("analysis") if isinstance(record.get("analysis"), dict) else {}

    cells = run.whole("cells")
    thresholds = run.whole("thresholds")
    sections = []  # (anchor, heading, html)

    if cells is not None and len(cells):
        cells = cells.reset_index(drop=True)
        conditions = condition_order(cells, analysis.get("control_conditions") or ())
        sections.append(("summary", "Experiment summary", summary_html(cells, record, conditions)
                         + rule_html(record)))
    else:
        conditions = []
        sections.append(("summary", "Experiment summary", '<p class="note">No cells table in this run.</p>'))
    sections.append(("failures", "Failures", failures_html(record, cells)))
    n_cells = 0 if cells is None else len(cells)
    if n_cells:
        quantity = _overview_quantity(cells, run, resonator, kind)
        if quantity is not None:
            html_ = _traces_section(cells, run, quantity, conditions, resonator)
            if html_:
                sections.append(("traces", "Traces by condition", html_))
        if kind != "pump-series" and "onset_s" in cells.columns:
            sections.append(("onsets", "Onset distribution", _onsets_section(cells, conditions)))
        if kind == "pump-series":
            sections.append(("thresholds", "Lasing thresholds", _pump_section(cells, thresholds, record, conditions)))
    clf = classifier_html(record)
    if clf:
        sections.append(("classifier", "Classifier", clf))
    if n_cells:
        anchors = {cid: _anchor(i) for i, cid in enumerate(cells["cell_id"].astype(str))}
        sections.append(("cell-list", "All cells", cell_table_html(cells, anchors=anchors,
                                                                     pump=kind == "pump-series")))
        images, why = _pattern_images(record, run)
        dpi = FULL_DPI if n_cells <= FULL_DPI_MAX else SMALL_DPI
        try:
            panels = _panel_groups(cells, run, record, conditions, anchors, kind=kind, resonator=resonator,
                                   thresholds=thresholds, images=images, dpi=dpi)
        finally:
            if images is not None:
                images.close()
        intro = ("<p>One panel per cell: the kymograph of its fitted lines (time by wavelength; dots coloured "
                 "by line area, lasing lines only, other fits grey) with its tracked modes drawn over it "
                 "and mode hops marked with a cross")
        if kind == "pump-series":
            intro += ", and its modes' output against pump energy (log-log) with the fitted S-curves"
        else:
            intro += ("; its trace with the 1-sigma band, the perturbation (dashed) and the onset "
                      "(solid, shaded by its uncertainty)")
        intro += ("; where images exist, patches of its emission pattern (* marks a pattern change). "
                  "Flagged cells come first in each condition.</p>")
        if kind == "pump-series":
            intro += ('<p class="caution" role="note">Pump energies and fluences: read the '
                      '<a href="#thresholds">laser-safety cautions</a> under Lasing thresholds.</p>')
        if why:
            intro += f'<p class="note">{esc(why)}</p>'
        sections.append(("cells", f"Cells ({n_cells})", intro + panels))
    sections.append(("run", "Run details", run_details_html(record)))

    head = [f"<h1>{esc(title)}</h1>"]
    facts = [f"{n_cells} cells", f"{len(conditions)} conditions"]
    if resonator:
        facts.append(f"resonator: {esc(resonator)}")
    facts.append(f"kind: {esc(kind)}")
    head.append(f'<p class="facts">{" &middot; ".join(facts)}</p>')
    if experiment.get("synthetic"):
        head.append('<div class="banner" role="note">Synthetic data: this experiment was generated by a '
                    "simulator, not measured.</div>")
    if experiment.get("description"):
        head.append(f"<p>{esc(experiment['description'])}</p>")
    head.append('<nav aria-label="sections"><ol>' + "".join(f'<li><a href="#{a}">{esc(h)}</a></li>'
                                                           for a, h, _ in sections) + "</ol></nav>")
    body = head + [f'<section id="{a}"><h2>{esc(h)}</h2>{content}</section>' for a, h, content in sections]
    page = ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{esc(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<main>\n"
            + "\n".join(body) + f"\n</main>\n<script>{SCRIPT}</script>\n</body>\n</html>\n")

    target = run_dir / "report.html"
    with atomic_path(target) as tmp:
        tmp.write_text(page, encoding="utf-8")
    logger.info("report written: %s (%d cells, %.0f kB, %.1f s)", target, n_cells, len(page.encode()) / 1024,
                time.perf_counter() - t0)
    return target
