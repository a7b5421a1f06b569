"""Saving and loading classifiers as JSON: plain numbers and names only, nothing is executed on load."""

from __future__ import annotations

import hashlib
import json
import math
import os
import pathlib
import tempfile

import numpy as np

from .._version import __version__
from ..exceptions import InputError
from ._model import KINDS, CellClassifier

__all__ = ["save_model", "load_model", "MODEL_FORMAT", "MODEL_FORMAT_VERSION"]

MODEL_FORMAT = "lasecyto-cell-classifier"
MODEL_FORMAT_VERSION = 1


def _num(a):
    """JSON-safe list of floats (NaN and infinities as strings)."""
    def one(v):
        v = float(v)
        if math.isfinite(v):
            return v
        return "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    arr = np.asarray(a, dtype=float)
    return [one(v) for v in arr.ravel()] if arr.ndim else one(arr)


def schema_digest(features, classes) -> str:
    """SHA-256 of the feature and class lists: binds a model file's arrays to the columns they were fitted on."""
    text = json.dumps({"features": [str(f) for f in features], "classes": [str(c) for c in classes]},
                      separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _to_doc(model: CellClassifier) -> dict:
    if model.kind == "logistic":
        params = {"coef": _num(model.params["coef"]), "coef_shape": list(np.shape(model.params["coef"])),
                  "intercept": _num(model.params["intercept"])}
    else:
        params = {"trees": [{"children_left": [int(v) for v in t["children_left"]],
                             "children_right": [int(v) for v in t["children_right"]],
                             "feature": [int(v) for v in t["feature"]],
                             "threshold": _num(t["threshold"]),
                             "value": _num(t["value"])} for t in model.params["trees"]]}
    return {"format": MODEL_FORMAT, "format_version": MODEL_FORMAT_VERSION, "lasecyto_version": __version__,
            "kind": model.kind, "label": model.label, "features": list(model.features),
            "classes": list(model.classes), "schema_sha256": schema_digest(model.features, model.classes),
            "impute": _num(model.impute), "mean": _num(model.mean),
            "scale": _num(model.scale), "params": params, "metadata": model.metadata}


def save_model(model: CellClassifier, path) -> pathlib.Path:
    """Write ``model`` to ``path`` as JSON (atomically: a temporary file is renamed)."""
    if not isinstance(model, CellClassifier):
        raise InputError("not a cell classifier", field="model", expected="a CellClassifier",
                         found=type(model).__name__)
    path = pathlib.Path(path)
    text = json.dumps(_to_doc(model), allow_nan=False, separators=(",", ":")) + "\n"
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def _floats(doc, key, n, path):
    v = doc.get(key)
    if not isinstance(v, list) or len(v) != n or not all(isinstance(x, (int, float, str)) for x in v):
        raise InputError("malformed model file", path=path, field=key, expected=f"{n} numbers",
                         found=f"{type(v).__name__} of length {len(v) if isinstance(v, list) else '-'}")
    try:
        return np.array([float(x) for x in v], dtype=float)
    except ValueError:
        raise InputError("malformed model file", path=path, field=key, expected="numbers",
                         found="text") from None


def _ints(v, n, field, path, low, high):
    if not isinstance(v, list) or len(v) != n or not all(isinstance(x, int) and not isinstance(x, bool) for x in v):
        raise InputError("malformed model file", path=path, field=field, expected=f"{n} integers", found="other")
    a = np.asarray(v, dtype=np.int64)
    if a.size and (a.min() < low or a.max() >= high):
        raise InputError("malformed model file", path=path, field=field, expected=f"integers in [{low}, {high})",
                         found=f"[{a.min()}, {a.max()}]")
    return a


def load_model(path, *, feature_schema, check_version=True) -> CellClassifier:
    """Read a model written by :func:`save_model` and check it against ``feature_schema``.

    Parameters
    ----------
    path : str or os.PathLike
        Model file (JSON).
    feature_schema : sequence of str
        The feature columns the caller will supply, in order; the model must use exactly these.
    check_version : bool
        Refuse a model written by another lasecyto version (default).

    Raises
    ------
    InputError
        A file that is not a lasecyto model, of another format version, package
        version or feature schema, or whose arrays are malformed.
    """
    path = pathlib.Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError("model file not found", path=path) from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError("not a model file", path=path, expected="JSON", found=type(exc).__name__) from None
    if not isinstance(doc, dict) or doc.get("format") != MODEL_FORMAT:
        raise InputError("not a lasecyto classifier", path=path, field="format", expected=repr(MODEL_FORMAT),
                         found=repr(doc.get("format") if isinstance(doc, dict) else type(doc).__name__))
    if doc.get("format_version") != MODEL_FORMAT_VERSION:
        raise InputError("unsupported model format version", path=path, field="format_version",
                         expected=MODEL_FORMAT_VERSION, found=repr(doc.get("format_version")))
    if check_version and doc.get("lasecyto_version") != __version__:
        raise InputError("model written by another lasecyto version", path=path, field="lasecyto_version",
                         expected=repr(__version__), found=repr(doc.get("lasecyto_version")))
    feats = doc.get("features")
    schema = [str(f) for f in feature_schema]
    if feats != schema:
        extra = [f for f in (feats or []) if f not in schema]
        lack = [f for f in schema if f not in (feats or [])]
        detail = f"model features {feats}" + (f"; not in schema: {extra}" if extra else "") + \
            (f"; schema features not in model: {lack}" if lack else "")
        raise InputError("model feature schema does not match", path=path, field="features",
                         expected=f"{schema}", found=detail)
    if doc.get("schema_sha256") != schema_digest(feats, doc.get("classes") or []):
        raise InputError("model file altered: its feature or class list does not match its schema digest",
                         path=path, field="schema_sha256", expected="the digest written with the model",
                         found="a different feature or class list")
    kind = doc.get("kind")
    if kind not in KINDS:
        raise InputError("unknown model kind", path=path, field="kind", expected=f"one of {KINDS}", found=repr(kind))
    classes = doc.get("classes")
    if not (isinstance(classes, list) and len(classes) >= 2 and all(isinstance(c, str) for c in classes)):
        raise InputError("malformed model file", path=path, field="classes", expected="two or more names",
                         found=repr(classes))
    p, k = len(feats), len(classes)
    impute, mean, scale = (_floats(doc, key, p, path) for key in ("impute", "mean", "scale"))
    params_doc = doc.get("params") if isinstance(doc.get("params"), dict) else {}
    if kind == "logistic":
        rows = 1 if k == 2 else k
        coef = _floats(params_doc, "coef", rows * p, path).reshape(rows, p)
        params = {"coef": coef, "intercept": _floats(params_doc, "intercept", rows, path)}
    else:
        trees_doc = params_doc.get("trees")
        if not isinstance(trees_doc, list) or not trees_doc:
            raise InputError("malformed model file", path=path, field="params.trees", expected="a list of trees",
                             found=repr(type(trees_doc).__name__))
        trees = []
        for i, t in enumerate(trees_doc):
            n = len(t.get("children_left", [])) if isinstance(t, dict) else 0
            if n == 0:
                raise InputError("malformed model file", path=path, field=f"params.trees[{i}]",
                                 expected="node arrays", found="none")
            left = _ints(t["children_left"], n, f"trees[{i}].children_left", path, -1, n)
            right = _ints(t.get("children_right"), n, f"trees[{i}].children_right", path, -1, n)
            if np.any((left < 0) != (right < 0)) or np.any((left >= 0) & (left <= np.arange(n))) \
                    or np.any((right >= 0) & (right <= np.arange(n))):
                raise InputError("malformed model file", path=path, field=f"trees[{i}]",
                                 expected="children after their parent", found="a loop or a half leaf")
            trees.append({"children_left": left, "children_right": right,
                          "feature": _ints(t.get("feature"), n, f"trees[{i}].feature", path, 0, max(p, 1)),
                          "threshold": _floats(t, "threshold", n, path),
                          "value": _floats(t, "value", n * k, path).reshape(n, k)})
        params = {"trees": trees}
    meta = doc.get("metadata") if isinstance(doc.get("metadata"), dict) else {}
    return CellClassifier(kind=kind, label=str(doc.get("label", "label")), features=tuple(feats),
                          classes=tuple(classes), impute=impute, mean=mean, scale=scale, params=params, metadata=meta)
