"""Applying a saved classifier to a cells table: schema check against the table, per-cell predictions."""

from __future__ import annotations

import json
import pathlib

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ._model import feature_matrix
from ._persist import MODEL_FORMAT, load_model

__all__ = ["model_features", "load_model_for_table", "predict_cells"]


def model_features(path) -> list:
    """The feature schema (column names, in order) stored in a model file, without building the model."""
    path = pathlib.Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("model file not found", path=path, expected="an existing JSON file",
                         found="nothing") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError("not a model file", path=path, expected="JSON", found=type(exc).__name__) from None
    if not isinstance(doc, dict) or doc.get("format") != MODEL_FORMAT:
        raise InputError("not a lasecyto classifier", path=path, field="format", expected=repr(MODEL_FORMAT),
                         found=repr(doc.get("format") if isinstance(doc, dict) else type(doc).__name__))
    feats = doc.get("features")
    if not (isinstance(feats, list) and feats and all(isinstance(f, str) for f in feats)):
        raise InputError("malformed model file", path=path, field="features", expected="a list of column names",
                         found=repr(feats)[:40])
    return feats


def load_model_for_table(path, cells):
    """Load a model and check that ``cells`` carries its feature schema.

    Raises
    ------
    InputError
        A file that is not a model, of another format or lasecyto version, or a
        model using feature columns the table does not have (the schema differs).
    """
    feats = model_features(path)
    missing = [f for f in feats if f not in cells.columns]
    if missing:
        raise InputError("model feature schema does not match the cells table", path=path, field="features",
                         expected=f"the table to carry the model's {len(feats)} feature columns",
                         found=f"{len(missing)} missing: {', '.join(missing[:5])}" + (" ..." if len(missing) > 5
                                                                                     else ""))
    return load_model(path, feature_schema=feats)


def predict_cells(model, cells, *, min_frames=None) -> pd.DataFrame:
    """Predictions of ``model`` for every row of ``cells``.

    A cell is not predicted (empty ``prediction``, NaN probabilities, a
    ``prediction_note``) when every model feature is NaN for it, or when the
    table has ``n_frames`` and the cell has fewer than ``min_frames``;
    missing values of single features are replaced by the training medians.

    Returns
    -------
    pandas.DataFrame
        ``prediction`` (class name), ``probability`` (of that class),
        ``prediction_note`` and ``p_<class>`` per class, one row per cell, in order.
    """
    x = feature_matrix(cells, model.features)
    note = np.full(len(cells), "", dtype=object)
    empty = ~np.isfinite(x).any(axis=1) if x.shape[1] else np.ones(len(cells), bool)
    note[empty] = "every model feature is NaN"
    if min_frames is not None and "n_frames" in cells.columns:
        nf = pd.to_numeric(cells["n_frames"], errors="coerce").to_numpy(float)
        few = ~(nf >= float(min_frames))
        for i in np.flatnonzero(few):
            note[i] = f"too few frames ({nf[i]:g}, need {int(min_frames)})"
        empty |= few
    proba = np.full((len(cells), len(model.classes)), np.nan)
    ok = ~empty
    if ok.any():
        proba[ok] = model.predict_proba(cells[ok] if isinstance(cells, pd.DataFrame) else x[ok])
    best = np.argmax(np.nan_to_num(proba, nan=-1.0), axis=1)
    classes = np.asarray(model.classes, dtype=object)
    out = pd.DataFrame({"prediction": np.where(ok, classes[best], ""),
                        "probability": np.where(ok, proba[np.arange(len(cells)), best], np.nan),
                        "prediction_note": note})
    for j, c in enumerate(model.classes):
        out[f"p_{c}"] = proba[:, j]
    return out
