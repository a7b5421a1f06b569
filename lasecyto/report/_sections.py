"""HTML of the report's sections that are tables and text (numbers in tables, pictures elsewhere)."""

from __future__ import annotations

import html
import json
import math

import numpy as np
import pandas as pd

from ..features import CHANGE_RULE, wilson_interval

__all__ = ["esc", "fmt", "summary_html", "rule_html", "failures_html", "classifier_html", "thresholds_html",
           "cautions_html", "cell_table_html", "run_details_html", "cell_heading_html", "condition_order",
           "FAILED_STATUSES"]

OK_STATUSES = {"ok", "resumed"}
FAILED_STATUSES = {"failed", "error"}


def esc(text):
    return html.escape(str(text), quote=True)


def fmt(value, spec=".3g", *, signed=False):
    """A number formatted with ``spec`` ('&ndash;' for missing or non-numeric NaN)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if math.isnan(v):
        return "&ndash;"
    if signed and v > 0:
        return "+" + format(v, spec)
    return format(v, spec)


def _finite(x):
    try:
        return math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def condition_order(cells, controls=()):
    """Conditions in the report's order: the control conditions first, then the others sorted."""
    present = sorted(set(cells["condition"].astype(str)))
    ctrl = [c for c in controls if c in present]
    if not ctrl and "is_control" in cells.columns:
        is_c = cells["is_control"].fillna(False).to_numpy(bool)
        ctrl = sorted(set(cells["condition"].astype(str).to_numpy()[is_c]))
    return ctrl + [c for c in present if c not in ctrl]


def summary_html(cells, record, conditions):
    """Counts, and per condition the flagged fraction with its Wilson 95 % interval."""
    analysis = record.get("analysis") if isinstance(record.get("analysis"), dict) else {}
    controls = set(analysis.get("control_conditions") or [])
    if not controls and "is_control" in cells.columns:
        is_c = cells["is_control"].fillna(False).to_numpy(bool)
        controls = set(cells["condition"].astype(str).to_numpy()[is_c])
    n_cells = len(cells)
    dishes = pd.unique(cells["dish"].astype(str))
    changed = cells["changed"].fillna(False).to_numpy(bool)
    self_changed = cells["self_changed"].fillna(False).to_numpy(bool) if "self_changed" in cells.columns \
        else changed
    cond = cells["condition"].astype(str).to_numpy()
    items = [it for it in record.get("items") or [] if isinstance(it, dict)]
    failed = sum(1 for it in items if str(it.get("status", "")).lower() in FAILED_STATUSES)
    rows = []
    for c in conditions:
        sel = cond == c
        n = int(sel.sum())
        k = int(changed[sel].sum())
        low, high = wilson_interval(k, n)
        role = "control" if c in controls else ""
        rows.append(
            f'<tr><td class="t">{esc(c)}</td><td class="t">{role}</td>'
            f'<td>{pd.unique(cells["dish"].astype(str).to_numpy()[sel]).size}</td><td>{n}</td>'
            f'<td>{k}</td><td>{fmt(k / n if n else math.nan, ".2f")}</td>'
            f'<td>{fmt(low, ".2f")} &ndash; {fmt(high, ".2f")}</td><td>{int(self_changed[sel].sum())}</td></tr>')
    head = (f"<p><strong>{n_cells}</strong> cells analysed in <strong>{len(dishes)}</strong> dishes under "
            f"<strong>{len(conditions)}</strong> conditions; <strong>{int(changed.sum())}</strong> flagged as "
            f"changed.")
    if items:
        head += (f" {len(items)} items in the run record, <strong>{failed}</strong> failed"
                 f"{' (listed under Failures)' if failed else ''}.")
    head += "</p>"
    table = ('<table><caption>Cells flagged as changed, by condition</caption>'
             '<thead><tr><th class="t">condition</th><th class="t">role</th><th>dishes</th><th>cells</th>'
             '<th>flagged</th><th>fraction</th><th>Wilson 95 % interval</th>'
             '<th title="significant and large against the cell\'s own baseline">per-cell rule</th></tr></thead>'
             "<tbody>" + "".join(rows) + "</tbody></table>")
    return head + table


def rule_html(record):
    """How ``changed`` was decided in this run: the flags' settings, and the whole rule in a details block."""
    analysis = record.get("analysis") if isinstance(record.get("analysis"), dict) else {}
    params = record.get("parameters") if isinstance(record.get("parameters"), dict) else {}
    flags = analysis.get("flags") if isinstance(analysis.get("flags"), dict) else {}
    verdict = params.get("verdict") if isinstance(params.get("verdict"), dict) else {}
    controls = analysis.get("control_conditions") or []
    parts = []
    if analysis.get("changed_rule"):
        parts.append(f"<li><strong>Verdict used:</strong> {esc(analysis['changed_rule'])}.</li>")
    if controls:
        parts.append(f"<li><strong>Control rule:</strong> cells of condition{'s' if len(controls) > 1 else ''} "
                     f"{', '.join(esc(c) for c in controls)} form the null population "
                     f"({esc(analysis.get('n_controls', flags.get('n_controls', '?')))} control cells).</li>")
    else:
        parts.append("<li><strong>Control rule:</strong> no control condition named in the manifest "
                     "(<code>experiment.control_condition</code>): each cell is judged against its own "
                     "baseline only.</li>")
    if flags:
        fdr = flags.get("fdr", params.get("flags", {}).get("fdr") if isinstance(params.get("flags"), dict)
                        else None)
        method = flags.get("method", "")
        method_text = {"gaussian": "the score's distribution for normally distributed controls (Monte Carlo)",
                       "rank": "the rank of the cell's deviation among the controls'"}.get(method, method)
        text = (f"<li><strong>Flags:</strong> feature <code>{esc(flags.get('feature', ''))}</code> against the "
                f"controls, Benjamini-Hochberg FDR level <strong>{fmt(100 * float(fdr), 'g')} %</strong>"
                if _finite(fdr) else f"<li><strong>Flags:</strong> feature <code>{esc(flags.get('feature', ''))}</code>")
        if method_text:
            text += f"; p-values from {esc(method_text)}"
        if _finite(flags.get("controls_ks_pvalue")):
            text += (f"; the controls' fit to a normal distribution: KS p = "
                     f"{fmt(flags['controls_ks_pvalue'], '.2g')}")
        if "n_scored" in flags:
            text += (f"; {esc(flags.get('n_scored'))} cells scored, {esc(flags.get('n_significant', '?'))} "
                     f"significant, {esc(flags.get('n_changed', '?'))} changed after the size threshold")
        text += ".</li>"
        parts.append(text)
        if flags.get("note"):
            parts.append(f'<li class="note">{esc(flags["note"])}</li>')
    sizes = [f"{k} = {fmt(verdict[k], 'g')}" for k in ("z_min", "min_index_change", "min_relative_shift",
                                                          "min_pattern_change") if _finite(verdict.get(k))]
    if sizes:
        parts.append(f"<li><strong>Per-cell rule thresholds:</strong> {esc(', '.join(sizes))}.</li>")
    rule = record.get("change_rule") or CHANGE_RULE
    return ("<ul>" + "".join(parts) + "</ul>"
            f"<details><summary>The whole rule</summary><p>{esc(rule)}</p></details>")


def failures_html(record, cells):
    """Failed items with their reasons, and cells whose processing left a note."""
    items = [it for it in record.get("items") or [] if isinstance(it, dict)]
    rows = []
    for it in items:
        status = str(it.get("status", "") or "")
        error = str(it.get("error") or "")
        if status.lower() in OK_STATUSES and not error:
            continue
        rows.append(f'<tr><td class="t">{esc(it.get("item", ""))}</td><td class="t">{esc(status)}</td>'
                    f'<td class="t">{esc(error or status)}</td></tr>')
    out = []
    if rows:
        out.append(f"<p><strong>{len(rows)}</strong> of {len(items)} items did not complete; the other items "
                   "are analysed as usual.</p>"
                   '<table><thead><tr><th class="t">item</th><th class="t">status</th><th class="t">reason</th>'
                   "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
    else:
        out.append(f'<p class="note">No failed items ({len(items)} items in the run record).</p>')
    notes = []
    if cells is not None:
        for r in cells.itertuples(index=False):
            for col in ("pattern_note", "features_note"):
                text = getattr(r, col, "")
                if isinstance(text, str) and text:
                    notes.append(f'<tr><td class="t">{esc(r.cell_id)}</td><td class="t">{esc(col)}</td>'
                                 f'<td class="t">{esc(text)}</td></tr>')
    if notes:
        out.append("<details><summary>Cells analysed with a reservation "
                   f"({len(notes)} notes)</summary><table><thead><tr><th class=\"t\">cell</th>"
                   '<th class="t">stage</th><th class="t">note</th></tr></thead><tbody>' + "".join(notes)
                   + "</tbody></table></details>")
    return "".join(out)


def classifier_html(record):
    """Grouped cross-validation scores, the confusion matrix and the permutation importances; None without them."""
    analysis = record.get("analysis") if isinstance(record.get("analysis"), dict) else {}
    clf = analysis.get("classifier")
    if not isinstance(clf, dict) or not clf:
        return None
    out = []
    if clf.get("note"):
        out.append(f'<p class="note">{esc(clf["note"])}</p>')
    metrics = [("label predicted", esc(clf.get("label", ""))), ("estimator", esc(clf.get("estimator", ""))),
               ("cross-validation", f"{esc(clf.get('n_splits', '?'))} folds, each holding out whole groups "
                                    f"(by {esc(clf.get('grouped_by', 'group'))})")]
    if "n_cells" in clf:
        metrics.append(("cells / features", f"{esc(clf.get('n_cells'))} / {esc(clf.get('n_features', '?'))}"))
    if _finite(clf.get("roc_auc")):
        pos = f" ({esc(clf['positive'])} as positive)" if clf.get("positive") else ""
        metrics.append(("ROC AUC" + pos, fmt(clf["roc_auc"], ".3f")))
    if _finite(clf.get("balanced_accuracy")):
        metrics.append(("balanced accuracy", fmt(clf["balanced_accuracy"], ".3f")))
    if not any(k in clf for k in ("roc_auc", "balanced_accuracy")) and not clf.get("note"):
        return None
    out.append('<div class="side"><div><table><caption>Grouped cross-validation</caption><tbody>'
               + "".join(f'<tr><th class="t">{k}</th><td class="t">{v}</td></tr>' for k, v in metrics)
               + "</tbody></table></div>")
    conf = clf.get("confusion") if isinstance(clf.get("confusion"), dict) else None
    if conf and conf.get("counts"):
        labels = conf.get("rows_true_columns_predicted") or clf.get("classes") or []
        counts = conf["counts"]
        head = "".join(f"<th>{esc(c)}</th>" for c in labels)
        body = "".join(f'<tr><th class="t">{esc(labels[i]) if i < len(labels) else i}</th>'
                       + "".join(f"<td>{esc(v)}</td>" for v in row) + "</tr>" for i, row in enumerate(counts))
        out.append('<div><table><caption>Confusion matrix (out-of-fold; rows: true, columns: predicted)'
                   f'</caption><thead><tr><th class="t">true \\ predicted</th>{head}</tr></thead><tbody>{body}'
                   "</tbody></table></div>")
    imp = clf.get("importances") or []
    if imp:
        rows = "".join(f'<tr><td class="t"><code>{esc(d.get("feature", ""))}</code></td>'
                       f'<td>{fmt(d.get("importance_mean"), ".3f")}</td><td>{fmt(d.get("importance_std"), ".3f")}</td>'
                       "</tr>" for d in imp[:10] if isinstance(d, dict))
        out.append('<div><table><caption>Permutation importances (decrease of the score, top 10)</caption>'
                   '<thead><tr><th class="t">feature</th><th>mean</th><th>s.d.</th></tr></thead>'
                   f"<tbody>{rows}</tbody></table></div>")
    out.append("</div>")
    return "".join(out)


def cautions_html(record):
    """The laser-safety cautions (shown beside every pump energy, dose or fluence)."""
    from ..safety import CAUTIONS

    text = record.get("pump_safety") or CAUTIONS
    return (f'<aside class="caution" role="note" aria-label="laser safety"><pre>{esc(text)}</pre></aside>')


def thresholds_html(thresholds):
    """The thresholds table of a pump series, numbers only (fluences in mJ/cm2)."""
    rows = []
    for r in thresholds.itertuples(index=False):
        ok = "yes" if bool(r.fit_ok) else '<span class="flag">no</span>'
        rows.append(
            f'<tr><td class="t">{esc(r.cell_id)}</td><td>{fmt(r.center_nm, ".3f")}</td><td>{r.n_points}</td>'
            f"<td>{fmt(r.threshold_nj, '.4g')} &plusmn; {fmt(r.threshold_err_nj, '.2g')}</td>"
            f"<td>{fmt(r.beta, '.3g')} &plusmn; {fmt(r.beta_err, '.2g')}</td>"
            f"<td>{fmt(r.slope_counts_per_s_per_nj, '.3g')}</td>"
            f"<td>{fmt(r.linear_threshold_nj, '.4g')} ({fmt(100 * r.linear_bias, '+.0f')} %)</td>"
            f"<td>{fmt(1e3 * r.threshold_fluence_j_cm2, '.3g')}</td><td>{fmt(1e3 * r.max_fluence_j_cm2, '.3g')}</td>"
            f"<td>{fmt(r.max_fluence_skin_mpe_ratio, '.2g')}</td><td>{fmt(r.narrowing_ratio, '.2g')}</td>"
            f"<td>{ok}</td><td class=\"t\">{esc(r.fit_message)}</td></tr>")
    return ('<div class="tablewrap"><table><caption>Fitted modes (S-curve: rate-equation steady state; '
            'straight line above threshold with its expected bias)</caption><thead><tr>'
            '<th class="t">cell</th><th>mode (nm)</th><th>points</th><th>threshold (nJ)</th><th>&beta;</th>'
            "<th>slope (counts/s/nJ)</th><th>straight-line threshold (nJ, expected bias)</th>"
            "<th>threshold fluence (mJ/cm&sup2;)</th><th>largest fluence (mJ/cm&sup2;)</th>"
            "<th>largest fluence / skin MPE</th><th>line narrowing</th><th>fit ok</th>"
            '<th class="t">message</th></tr></thead><tbody>' + "".join(rows) + "</tbody></table></div>")


def _text(value):
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value)


def cell_table_html(cells, *, anchors, pump=False):
    """The sortable table of every cell (sorting and filtering by the inline script; plain table without it)."""
    cols = []

    def add(header, kind, values, sort_values=None, title=None):
        cols.append((header, kind, values, sort_values, title))

    n = len(cells)
    get = lambda c, default=np.nan: cells[c].to_numpy() if c in cells.columns else np.full(n, default)  # noqa: E731
    ids = cells["cell_id"].astype(str).to_numpy()
    links = [f'<a href="#{anchors[i]}">{esc(i)}</a>' if i in anchors else esc(i) for i in ids]
    add("cell", "text", links, ids)
    add("dish", "text", [esc(v) for v in cells["dish"].astype(str)])
    add("condition", "text", [esc(v) for v in cells["condition"].astype(str)])
    ctrl = cells["is_control"].fillna(False).to_numpy(bool) if "is_control" in cells.columns else np.zeros(n, bool)
    if ctrl.any():
        add("control", "text", ["yes" if c else "" for c in ctrl])
    changed = cells["changed"].fillna(False).to_numpy(bool)
    add("changed", "text", ['<span class="flag">changed</span>' if c else "no" for c in changed],
        ["1 changed" if c else "0 no" for c in changed], "verdict (rule under Experiment summary)")
    if "self_changed" in cells.columns:
        sc = cells["self_changed"].fillna(False).to_numpy(bool)
        add("per-cell rule", "text", ["yes" if c else "no" for c in sc], title="significant against own baseline")
    numeric = [("quantity", "text", None), ("index_change", "num", ".3g"), ("index_change_err", "num", ".2g"),
               ("change_z", "num", ".3g"), ("change_score", "num", ".3g"), ("q_value", "num", ".2g"),
               ("onset_s", "num", ".4g"), ("onset_err_s", "num", ".2g"), ("baseline_diameter_um", "num", ".4g"),
               ("diameter_change_um", "num", ".3g")]
    headers = {"index_change": "change", "index_change_err": "&plusmn;", "change_z": "z",
               "change_score": "score vs controls", "q_value": "q", "onset_s": "onset (s)",
               "onset_err_s": "&plusmn; (s)", "quantity": "judged on", "baseline_diameter_um": "bead (&micro;m)",
               "diameter_change_um": "bead change (&micro;m)"}
    for col, kind, spec in numeric:
        if col not in cells.columns:
            continue
        v = cells[col].to_numpy()
        if kind == "num":
            fv = v.astype(float)
            if not np.isfinite(fv).any():
                continue
            add(headers[col], kind, [fmt(x, spec) for x in fv], [repr(float(x)) for x in fv])
        else:
            tv = [_text(x) for x in v]
            if any(tv):
                add(headers[col], kind, [esc(x) for x in tv])
    lasing, frames = get("n_frames_lasing"), get("n_frames")
    add("lasing frames", "num", [f"{fmt(a, '.0f')}/{fmt(b, '.0f')}" for a, b in zip(lasing, frames)],
        [repr(float(a)) for a in lasing])
    if "n_tracks" in cells.columns:
        t = cells["n_tracks"].to_numpy(float)
        add("tracks", "num", [fmt(x, ".0f") for x in t], [repr(float(x)) for x in t])
    if "pattern_dominant_order" in cells.columns and cells["pattern_dominant_order"].fillna("").astype(str).any():
        add("pattern", "text", [esc(_text(x)) for x in cells["pattern_dominant_order"]])
        pc = cells["pattern_change_count"].to_numpy(float)
        add("pattern changes", "num", [fmt(x, ".0f") for x in pc], [repr(float(x)) for x in pc])
    if "cv_prediction" in cells.columns and cells["cv_prediction"].fillna("").astype(str).any():
        add("predicted (CV)", "text", [esc(_text(x)) for x in cells["cv_prediction"]])
        p = cells["cv_probability"].to_numpy(float)
        add("probability", "num", [fmt(x, ".2f") for x in p], [repr(float(x)) for x in p])
    if "model_prediction" in cells.columns and cells["model_prediction"].fillna("").astype(str).any():
        add("predicted (model)", "text", [esc(_text(x)) for x in cells["model_prediction"]])
    if pump and "threshold_nj" in cells.columns:
        th, te = cells["threshold_nj"].to_numpy(float), get("threshold_err_nj")
        add("threshold (nJ)", "num", [f"{fmt(a, '.4g')} &plusmn; {fmt(b, '.2g')}" for a, b in zip(th, te)],
            [repr(float(x)) for x in th])
        b = get("beta")
        add("&beta;", "num", [fmt(x, ".3g") for x in b.astype(float)], [repr(float(x)) for x in b])
    notes = [_text(x) for x in get("note", "")]
    if any(notes):
        add("note", "text", [esc(x) for x in notes])

    head = []
    for header, kind, _values, _sort, title in cols:
        cls = ' class="t"' if kind == "text" else ""
        t = f' title="{esc(title)}"' if title else ""
        head.append(f'<th scope="col"{cls} data-kind="{kind}"{t}><button type="button">{header}</button></th>')
    body = []
    for i in range(n):
        cells_html = []
        for _header, kind, values, sort_values, _title in cols:
            cls = ' class="t"' if kind == "text" else ""
            data = f' data-v="{esc(sort_values[i])}"' if sort_values is not None else ""
            cells_html.append(f"<td{cls}{data}>{values[i]}</td>")
        body.append(f'<tr data-flagged="{int(changed[i])}">' + "".join(cells_html) + "</tr>")
    controls = ('<div class="controls" role="group" aria-label="table filters">'
                '<label>Filter rows <input type="search" id="cell-filter" title="text in any column: cell, dish, condition, ..."'
                ' aria-controls="cell-table"></label>'
                '<label><input type="checkbox" id="flagged-only" aria-controls="cell-table"> flagged cells only'
                '</label><span id="cell-table-status" role="status" aria-live="polite"></span></div>')
    return (controls + '<div class="tablewrap"><table id="cell-table"><caption>Every cell: use the column '
            "buttons to sort (again to reverse); missing values sort last</caption><thead><tr>"
            + "".join(head) + "</tr></thead><tbody>" + "".join(body) + "</tbody></table></div>")


def cell_heading_html(cell, *, verdict=True, resonator=""):
    """The one-line heading of a cell's panel (``verdict=False``: without changed / not changed)."""
    parts = [f"<strong>{esc(cell['cell_id'])}</strong>", esc(cell.get("condition", "")),
             f"dish {esc(cell.get('dish', ''))}"]
    if verdict and bool(cell.get("changed", False)):
        parts.append('<span class="flag">changed</span>')
    elif verdict:
        parts.append("not changed")
    q = str(cell.get("quantity", "") or "")
    if _finite(cell.get("index_change")):
        what = {"index_change": "index change", "relative_shift": "relative shift",
                "pattern_baseline_corr": "pattern correlation change"}.get(q, q.replace("_", " ") or "change")
        if q == "index_change" and resonator == "sphere":
            what = "medium index change"
        text = f"{what} {fmt(cell['index_change'], '.3g', signed=True)}"
        if _finite(cell.get("change_z")):
            text += f" (z {fmt(cell['change_z'], '.3g')})"
        parts.append(text)
    if _finite(cell.get("diameter_change_um")):
        parts.append(f"diameter change {fmt(cell['diameter_change_um'], '.3g', signed=True)} &micro;m")
    if _finite(cell.get("onset_s")):
        parts.append(f"onset {fmt(cell['onset_s'], '.4g')} &plusmn; {fmt(cell.get('onset_err_s'), '.2g')} s")
    if _finite(cell.get("threshold_nj")):
        parts.append(f"threshold {fmt(cell['threshold_nj'], '.4g')} &plusmn; "
                     f"{fmt(cell.get('threshold_err_nj'), '.2g')} nJ")
    return " &middot; ".join(parts)


def run_details_html(record):
    """Versions, engine, timing and the resolved parameters of the run."""
    if not record:
        return '<p class="note">No run record.</p>'
    facts = []
    for key, label in (("command", "command"), ("started_utc", "started (UTC)"), ("finished_utc", "finished (UTC)"),
                       ("elapsed_s", "elapsed (s)"), ("recipe", "recipe"), ("n_resumed", "items kept by resume")):
        if record.get(key) not in (None, ""):
            value = record[key]
            if isinstance(value, list):
                value = " ".join(str(v) for v in value)
            facts.append((label, fmt(value, ".1f") if key == "elapsed_s" else esc(value)))
    engine = record.get("engine")
    if isinstance(engine, dict):
        facts.append(("engine", esc(", ".join(f"{k} {v}" for k, v in engine.items()))))
    versions = record.get("versions")
    if isinstance(versions, dict):
        facts.append(("versions", esc(", ".join(f"{k} {v}" for k, v in versions.items()))))
    table = ('<table><tbody>' + "".join(f'<tr><th class="t">{k}</th><td class="t">{v}</td></tr>' for k, v in facts)
             + "</tbody></table>")
    params = record.get("parameters")
    if isinstance(params, dict):
        table += ("<details><summary>Resolved stage parameters</summary>"
                  f'<pre class="params">{esc(json.dumps(params, indent=1, sort_keys=True))}</pre></details>')
    return table
