"""Cell-state analytics of a run: per-item features, then the population steps over all cells.

:func:`complete_cell` runs inside each item (a worker process may run it): the
pattern stage of a cell that has spectra and images, then the feature
catalogue of :func:`lasecyto.features.cell_features`.  :func:`finish_experiment`
is a pure function of the gathered tables: it needs every cell at once for the
flags against the control population (Benjamini-Hochberg FDR), the change-point
onset of the flagged cells, the out-of-fold classifier predictions and a
classifier model named in the manifest.  The rule it applies is
:data:`lasecyto.features.CHANGE_RULE`.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from ..features import CELL_FEATURE_KEYS, cell_features, flag_cells
from ._patterns import PATTERN_TRACKS_KEY, attach_patterns

__all__ = ["complete_cell", "finish_experiment", "QUANTITY_PREFIX"]

logger = logging.getLogger("lasecyto.pipeline")

#: catalogue prefix of the series each judged quantity comes from
QUANTITY_PREFIX = {"index_change": "dn", "relative_shift": "rs", "pattern_baseline_corr": "pc"}

_MIN_CONTROLS = 4


def complete_cell(job, result):
    """Per-item analytics of a processed cell: pattern stage (when it has images too) and feature catalogue.

    A problem of the images becomes ``pattern_note``; a cell the catalogue
    cannot describe (too few frames) keeps its other results, with NaN features
    and the reason in ``features_note``.
    """
    if result.status != "ok":
        return result
    if getattr(job, "images", None) is not None and job.stack is not None:
        result = attach_patterns(job, result)
    pattern_tracks = result.tables.pop(PATTERN_TRACKS_KEY, None)
    fp, vp = job.parameters["features"], job.parameters["verdict"]
    try:
        feats = cell_features(result.tables["cell_frames"], result.tables.get("tracks"),
                              perturbation_s=job.perturbation_s, pattern_tracks=pattern_tracks,
                              settle_fraction=vp["settle_fraction"], min_frames=fp["min_frames"],
                              penalty_factor=fp["penalty_factor"], min_step_sigma=fp["min_step_sigma"])
    except InputError as exc:
        feats = dict.fromkeys(CELL_FEATURE_KEYS, math.nan)
        feats["features_note"] = str(exc)
    if "pattern_decorrelation_time_s" in result.cell:  # the stage's value (same tracks) wins over NaN
        feats.pop("pattern_decorrelation_time_s", None)
    result.cell.update(feats)
    result.cell.setdefault("pattern_note", "")
    return result


def _series_prefix(feature, quantity):
    head = feature.split("_", 1)[0]
    if head in QUANTITY_PREFIX.values():
        return head
    return QUANTITY_PREFIX.get(quantity, "dn")


def _append_note(notes, i, text):
    notes[i] = f"{notes[i]}; {text}" if notes[i] else text


def _pattern_self_rule(cells, verdict_p):
    """Per-cell rule of a cell seen only in images, on its pattern_baseline_corr series (catalogue ``pc_``)."""
    change = pd.to_numeric(cells.get("pc_change", np.nan), errors="coerce")
    noise = pd.to_numeric(cells.get("pc_baseline_noise", np.nan), errors="coerce")
    change = np.asarray(change, dtype=float) * np.ones(len(cells))
    noise = np.asarray(noise, dtype=float) * np.ones(len(cells))
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.abs(change) / noise
    return (z >= float(verdict_p["z_min"])) & (np.abs(change) >= float(verdict_p["min_pattern_change"]))


def _effect_floor(cells, flags_p, verdict_p, quantity):
    """Smallest |flag feature| that counts as a change, per cell.

    For the default feature ``index_change`` (the settled change of the judged
    quantity) the per-cell rule's thresholds apply: ``verdict.min_index_change``
    or, for cells judged on relative_shift, ``verdict.min_relative_shift``; for
    any other feature ``flags.min_effect``.
    """
    if flags_p["feature"] != "index_change":
        return np.full(len(cells), float(flags_p["min_effect"]))
    return np.where(quantity == "relative_shift", float(verdict_p["min_relative_shift"]),
                    float(verdict_p["min_index_change"]))


def _flags(cells, controls, p):
    """Flags against the controls, or None and the reason they could not be computed."""
    feature = p["feature"]
    if not controls.any():
        return None, "no control cells (set experiment.control_condition in the manifest)"
    if feature not in cells.columns:
        return None, f"flag feature {feature!r} is not a column of the cells table"
    x = pd.to_numeric(cells[feature], errors="coerce").to_numpy(float)
    n_c = int((controls & np.isfinite(x)).sum())
    if n_c < _MIN_CONTROLS:
        return None, f"{n_c} control cell(s) with a finite {feature}, need {_MIN_CONTROLS}"
    try:
        flags = flag_cells(cells, control_mask=controls, feature=feature, fdr=p["fdr"], method=p["method"],
                           n_draws=p["n_draws"], rng=p["seed"])
    except InputError as exc:
        return None, str(exc)
    return flags, ""


def _classifier_features(cells, which):
    """Catalogue columns with a finite value: the response features, or every catalogue feature."""
    from ..features import RESPONSE_FEATURE_KEYS

    if which not in ("response", "all"):
        raise InputError("unknown feature set", field="classify.features", expected="'response' or 'all'",
                         found=repr(which))
    keys = RESPONSE_FEATURE_KEYS if which == "response" else CELL_FEATURE_KEYS
    return tuple(k for k in keys if k in cells.columns
                 and np.isfinite(pd.to_numeric(cells[k], errors="coerce").to_numpy(float)).any())


def _classifier(cells, controls, p):
    """Out-of-fold predictions with dishes held out together; (columns or None, summary)."""
    label = p["label"]
    summary = {"label": label, "estimator": p["estimator"]}
    if not label:
        summary["note"] = "disabled (classify.label is empty)"
        return None, summary
    if label not in cells.columns:
        summary["note"] = f"label column {label!r} not in the cells table"
        return None, summary
    from ..classify import evaluate_grouped
    labelled = cells[label].astype(str).str.len().to_numpy() > 0
    has_feat = ~cells["features_note"].astype(str).str.startswith("too few frames").to_numpy(bool)
    use = labelled & has_feat
    sub = cells[use].reset_index(drop=True)
    classes = sorted(set(sub[label].astype(str)))
    dishes_per_class = sub.groupby(sub[label].astype(str))["dish"].nunique() if len(sub) else pd.Series(dtype=int)
    if len(classes) < 2 or (dishes_per_class < 2).any():
        summary["note"] = (f"labels do not allow grouped cross-validation: classes {classes}, dishes per class "
                           f"{ {k: int(v) for k, v in dishes_per_class.items()} } (need 2 classes, 2 dishes each)")
        return None, summary
    positive = None
    if len(classes) == 2 and controls.any():
        ctrl = set(cells.loc[controls, label].astype(str))
        others = [c for c in classes if c not in ctrl]
        positive = others[0] if len(others) == 1 else None
    try:
        feats = _classifier_features(sub, p["features"])
        ev = evaluate_grouped(sub, label=label, groups="dish", features=feats, estimator=p["estimator"],
                              n_splits=p["n_splits"], positive=positive, rng=p["seed"])
    except (InputError, ImportError) as exc:  # ImportError: scikit-learn (extra "classify") not installed
        summary["note"] = str(exc)
        return None, summary
    best = np.argmax(ev.probability, axis=1)
    pred = np.full(len(cells), "", dtype=object)
    prob = np.full(len(cells), np.nan)
    pred[use] = np.asarray(ev.classes, dtype=object)[best]
    prob[use] = ev.probability[np.arange(len(sub)), best]
    top = ev.importances.head(10)
    summary.update({"roc_auc": ev.roc_auc, "positive": ev.positive, "balanced_accuracy": ev.balanced_accuracy,
                    "n_splits": ev.n_splits, "grouped_by": "dish", "n_cells": int(len(sub)),
                    "n_features": len(feats), "classes": list(ev.classes),
                    "confusion": {"rows_true_columns_predicted": list(ev.classes),
                                  "counts": ev.confusion.to_numpy().tolist()},
                    "importances": [{"feature": r.feature, "importance_mean": float(r.importance_mean),
                                     "importance_std": float(r.importance_std)} for r in top.itertuples()],
                    "note": ""})
    return (pred, prob), summary


def _apply_model(cells, path, min_frames):
    summary = {"path": str(path)}
    try:
        from ..classify import load_model_for_table, predict_cells

        model = load_model_for_table(path, cells)
    except (InputError, ImportError) as exc:
        summary["error"] = str(exc)
        logger.warning("classifier model not applied: %s", exc)
        return None, summary
    pred = predict_cells(model, cells, min_frames=min_frames)
    summary.update({"label": model.label, "classes": list(model.classes), "kind": model.kind,
                    "n_predicted": int((pred["prediction"] != "").sum()), "error": ""})
    return pred, summary


def finish_experiment(out_tables, *, manifest, parameters):
    """Population steps of a run over the gathered item tables (pure: no file is read or written).

    Parameters
    ----------
    out_tables : dict of str to pandas.DataFrame
        The run's tables, concatenated over items (``cells`` included).
    manifest : lasecyto.io.Manifest
        For the control conditions and the classifier model.
    parameters : dict
        Resolved stage parameters (``flags``, ``classify``, ``features``).

    Returns
    -------
    (dict, dict)
        The tables with the ``cells`` table completed (``self_changed``,
        ``is_control``, ``change_score``, ``p_value``, ``q_value``, ``changed``,
        ``onset_s``, ``onset_err_s``, classifier columns) and a summary for the
        run record.
    """
    out = dict(out_tables)
    cells = out["cells"].copy()
    summary = {"control_conditions": list(manifest.control_conditions),
               "seeds": {"flags": parameters["flags"]["seed"], "classify": parameters["classify"]["seed"]}}
    n = len(cells)
    if n == 0:
        summary["changed_rule"] = "none: no cell was processed"
        return out, summary
    if "features_note" not in cells.columns:
        cells["features_note"] = ""
    cells["features_note"] = cells["features_note"].fillna("").astype(object)
    notes = cells["note"].fillna("").astype(str).to_numpy(object) if "note" in cells.columns \
        else np.full(n, "", object)
    quantity = cells["quantity"].fillna("").astype(str).to_numpy(object) if "quantity" in cells.columns \
        else np.full(n, "index_change", object)

    # per-cell rule: the verdict of summarize_cell; image-only cells: the same rule on pattern_baseline_corr
    self_changed = cells["changed"].to_numpy(bool).copy()
    image_only = quantity == "pattern_baseline_corr"
    if image_only.any():
        self_changed[image_only] = _pattern_self_rule(cells[image_only], parameters["verdict"])
    cells["self_changed"] = self_changed
    controls = cells["condition"].astype(str).isin(manifest.control_conditions).to_numpy()
    cells["is_control"] = controls
    summary["n_controls"] = int(controls.sum())

    fp = parameters["flags"]
    flags, why = _flags(cells, controls, fp)
    changed = self_changed.copy()
    if flags is not None:
        scored = np.isfinite(flags["p_value"].to_numpy(float))
        cells["change_score"] = flags["change_score"].to_numpy(float)
        cells["p_value"] = flags["p_value"].to_numpy(float)
        cells["q_value"] = flags["q_value"].to_numpy(float)
        effect = _effect_floor(cells, fp, parameters["verdict"], quantity)
        large = np.abs(pd.to_numeric(cells[fp["feature"]], errors="coerce").to_numpy(float)) >= effect
        changed = np.where(scored, flags["changed"].to_numpy(bool) & large, self_changed)
        for i in np.flatnonzero(~scored):
            _append_note(notes, i, f"not scored against the controls ({fp['feature']} is NaN): "
                                   "changed is the per-cell rule")
        summary["flags"] = {**flags.attrs["calibration"], "n_scored": int(scored.sum()),
                            "n_significant": int(flags["changed"].sum()),
                            "n_changed": int((changed & scored).sum()), "note": ""}
        summary["changed_rule"] = "fdr flag against the controls"
    else:
        summary["flags"] = {"feature": fp["feature"], "fdr": fp["fdr"], "note": why}
        summary["changed_rule"] = f"per-cell rule (no flags: {why})"
    cells["changed"] = changed

    # onset of a changed cell: the first significant change point of its judged series
    onset = np.full(n, np.nan)
    onset_err = np.full(n, np.nan)
    for i in np.flatnonzero(changed):
        pre = _series_prefix(fp["feature"], quantity[i])
        t = cells[f"{pre}_onset_s"].iloc[i] if f"{pre}_onset_s" in cells.columns else np.nan
        if np.isfinite(t):
            onset[i], onset_err[i] = t, cells[f"{pre}_onset_err_s"].iloc[i]
        else:
            _append_note(notes, i, "changed, but no change point qualifies as onset")
    cells["onset_s"] = onset
    cells["onset_err_s"] = onset_err
    cells["note"] = notes

    cp = parameters["classify"]
    cv, summary["classifier"] = _classifier(cells, controls, cp)
    if cv is not None:
        cells["cv_prediction"], cells["cv_probability"] = cv
    if manifest.classifier_model is not None:
        pred, summary["model"] = _apply_model(cells, manifest.classifier_model, parameters["features"]["min_frames"])
        if pred is not None:
            cells["model_prediction"] = pred["prediction"].to_numpy(object)
            cells["model_probability"] = pred["probability"].to_numpy(float)
    if cp["anomaly"]:
        summary["anomaly"] = _anomaly(cells, controls, cp)
    out["cells"] = tables.validate(cells, "cells")
    return out, summary


def _anomaly(cells, controls, p):
    try:
        from ..classify import anomaly_scores

        feats = _classifier_features(cells, p["features"])
        cells["anomaly_score"] = anomaly_scores(cells, features=feats, reference_mask=controls, rng=p["seed"])
    except (InputError, ImportError) as exc:
        return {"note": str(exc)}
    return {"reference": "control cells", "n_features": len(feats), "note": ""}
