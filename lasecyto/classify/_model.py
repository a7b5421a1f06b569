"""A fitted cell classifier held as plain arrays, predicting with numpy only."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..exceptions import InputError

__all__ = ["CellClassifier", "feature_matrix"]

KINDS = ("logistic", "forest")


def feature_matrix(cells, features) -> np.ndarray:
    """The (n_cells, n_features) float matrix of ``features`` (NaN kept), checking every column exists."""
    if isinstance(cells, np.ndarray):
        x = np.asarray(cells, dtype=float)
        if x.ndim != 2 or x.shape[1] != len(features):
            raise InputError("feature matrix has the wrong shape", field="cells",
                             expected=f"(n, {len(features)})", found=f"{x.shape}")
        return x
    if not isinstance(cells, pd.DataFrame):
        raise InputError("not a table", field="cells", expected="a pandas DataFrame", found=type(cells).__name__)
    missing = [f for f in features if f not in cells.columns]
    if missing:
        raise InputError("missing feature columns", path="table 'cells'", field=", ".join(missing),
                         expected="present (the model's feature schema)", found="absent")
    return np.column_stack([pd.to_numeric(cells[f], errors="coerce").to_numpy(float) for f in features]) \
        if len(features) else np.zeros((len(cells), 0))


def _forest_proba(xs, trees, n_classes):
    # trees compare float32 inputs with float64 thresholds (as scikit-learn's trees do)
    x32 = xs.astype(np.float32).astype(np.float64)
    total = np.zeros((xs.shape[0], n_classes))
    rows = np.arange(xs.shape[0])
    for tree in trees:
        left, right, feat, thr, value = (tree["children_left"], tree["children_right"], tree["feature"],
                                         tree["threshold"], tree["value"])
        node = np.zeros(xs.shape[0], dtype=np.int64)
        active = left[node] >= 0
        while active.any():
            idx = rows[active]
            nd = node[idx]
            go_left = x32[idx, feat[nd]] <= thr[nd]
            node[idx] = np.where(go_left, left[nd], right[nd])
            active = left[node] >= 0
        total += value[node]
    return total / len(trees)


@dataclass(frozen=True)
class CellClassifier:
    """A trained classifier of cells: imputation, standardisation and estimator parameters.

    Attributes
    ----------
    kind : {"logistic", "forest"}
        Logistic regression on standardised features, or a random forest.
    label : str
        Name of the label it predicts.
    features : tuple of str
        The feature schema: columns used, in order.
    classes : tuple of str
        Class names, in the order of the probability columns.
    impute : ndarray
        Training medians that replace missing feature values.
    mean, scale : ndarray
        Standardisation applied after imputation.
    params : dict
        Estimator arrays: ``coef``, ``intercept`` (logistic) or ``trees`` (forest:
        a list of dicts of node arrays with leaf class fractions).
    metadata : dict
        Package version, training size, options.
    estimator : object, optional
        The fitted scikit-learn pipeline when trained in this session (never persisted).
    """

    kind: str
    label: str
    features: tuple
    classes: tuple
    impute: np.ndarray
    mean: np.ndarray
    scale: np.ndarray
    params: dict
    metadata: dict = field(default_factory=dict)
    estimator: object = field(default=None, compare=False, repr=False)

    def transform(self, cells) -> np.ndarray:
        """Imputed and standardised feature matrix."""
        x = feature_matrix(cells, self.features)
        x = np.where(np.isfinite(x), x, self.impute[None, :])
        return (x - self.mean[None, :]) / self.scale[None, :]

    def predict_proba(self, cells) -> np.ndarray:
        """Class probabilities, shape (n_cells, n_classes), columns in :attr:`classes` order."""
        xs = self.transform(cells)
        if self.kind == "logistic":
            z = xs @ self.params["coef"].T + self.params["intercept"][None, :]
            if z.shape[1] == 1:
                p1 = 1.0 / (1.0 + np.exp(-z[:, 0]))
                return np.column_stack([1.0 - p1, p1])
            z = z - z.max(axis=1, keepdims=True)
            ez = np.exp(z)
            return ez / ez.sum(axis=1, keepdims=True)
        return _forest_proba(xs, self.params["trees"], len(self.classes))

    def predict(self, cells) -> np.ndarray:
        """Most probable class name of every cell (ties go to the first class)."""
        return np.asarray(self.classes, dtype=object)[np.argmax(self.predict_proba(cells), axis=1)]

    def predictions_table(self, cells) -> pd.DataFrame:
        """``predicted_<label>`` and ``p_<label>_<class>`` columns, one row per cell."""
        p = self.predict_proba(cells)
        out = {f"predicted_{self.label}": np.asarray(self.classes, dtype=object)[np.argmax(p, axis=1)]}
        for j, c in enumerate(self.classes):
            out[f"p_{self.label}_{c}"] = p[:, j]
        return pd.DataFrame(out)
