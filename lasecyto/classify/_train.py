"""Training on labelled cells and grouped cross-validation (a dish never in both train and test folds)."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .._version import __version__
from ..exceptions import InputError
from ._model import KINDS, CellClassifier, feature_matrix

__all__ = ["train_classifier", "evaluate_grouped", "split_leak", "anomaly_scores", "GroupedEvaluation",
           "default_features"]


def _sklearn():
    try:
        import sklearn  # noqa: F401
    except ImportError:
        raise ImportError("lasecyto.classify needs scikit-learn: pip install 'lasecyto[classify]'") from None


def default_features(cells) -> tuple:
    """The catalogue features (:data:`lasecyto.features.CELL_FEATURE_KEYS`) present in ``cells`` with a finite value."""
    from ..features._catalogue import CELL_FEATURE_KEYS

    out = []
    for k in CELL_FEATURE_KEYS:
        if k in cells.columns and np.isfinite(pd.to_numeric(cells[k], errors="coerce").to_numpy(float)).any():
            out.append(k)
    return tuple(out)


def _labels(cells, label):
    if not isinstance(cells, pd.DataFrame):
        raise InputError("not a table", field="cells", expected="a pandas DataFrame", found=type(cells).__name__)
    if isinstance(label, str):
        if label not in cells.columns:
            raise InputError("missing label column", path="table 'cells'", field=label, expected="present",
                             found="absent")
        name, y = label, cells[label].to_numpy(object)
    else:
        y = np.asarray(label, dtype=object)
        name = "label"
        if y.shape != (len(cells),):
            raise InputError("labels do not match the cells", field="label", expected=f"{len(cells)} labels",
                             found=f"shape {y.shape}")
    if pd.isna(y).any():
        raise InputError("missing labels", field=name, expected="a label for every cell",
                         found=f"{int(pd.isna(y).sum())} missing")
    y = np.asarray([str(v) for v in y], dtype=object)
    classes = tuple(sorted(set(y)))
    if len(classes) < 2:
        raise InputError("labels have only one class", field=name, expected="at least two classes",
                         found=f"only {classes[0]!r}" if classes else "no cells")
    return name, y, classes


def _features(cells, features):
    feats = default_features(cells) if features is None else tuple(features)
    if not feats:
        raise InputError("no features to train on", field="features", expected="at least one feature column",
                         found="none")
    x = feature_matrix(cells, feats)
    bad = [f for f, ok in zip(feats, np.isfinite(x).any(axis=0)) if not ok]
    if bad:
        raise InputError("features are NaN for every cell", path="table 'cells'", field=", ".join(bad),
                         expected="finite values", found="all NaN")
    return feats, x


def _estimator(kind, rng, options):
    from sklearn.ensemble import RandomForestClassifier
    from sklearn.linear_model import LogisticRegression

    seed = int(np.random.default_rng(rng).integers(2**31 - 1))
    if kind == "logistic":
        return LogisticRegression(C=float(options.get("C", 1.0)), max_iter=2000)
    if kind == "forest":
        return RandomForestClassifier(n_estimators=int(options.get("n_estimators", 100)),
                                      max_depth=options.get("max_depth", 6),
                                      min_samples_leaf=int(options.get("min_samples_leaf", 2)),
                                      random_state=seed, n_jobs=1)
    raise InputError("unknown estimator", field="estimator", expected=f"one of {KINDS}", found=repr(kind))


def _fit(x, y, classes, kind, rng, options):
    # a feature without any finite training value (possible within a fold) is held at 0
    impute = np.array([np.median(c[np.isfinite(c)]) if np.isfinite(c).any() else 0.0 for c in x.T])
    xi = np.where(np.isfinite(x), x, impute[None, :])
    mean = xi.mean(axis=0)
    scale = xi.std(axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    xs = (xi - mean) / scale
    est = _estimator(kind, rng, options)
    yi = np.searchsorted(np.asarray(classes, dtype=object), y)
    est.fit(xs, yi)
    if list(est.classes_) != list(range(len(classes))):
        raise InputError("a class is missing from the training cells", field="label",
                         expected=f"all of {classes}", found=f"{[classes[i] for i in est.classes_]}")
    if kind == "logistic":
        params = {"coef": np.asarray(est.coef_, dtype=float), "intercept": np.asarray(est.intercept_, dtype=float)}
    else:
        trees = []
        for t in est.estimators_:
            tr = t.tree_
            v = np.asarray(tr.value[:, 0, :], dtype=float)
            v = v / np.where(v.sum(axis=1, keepdims=True) > 0, v.sum(axis=1, keepdims=True), 1.0)
            trees.append({"children_left": tr.children_left.astype(np.int64),
                          "children_right": tr.children_right.astype(np.int64),
                          "feature": np.where(tr.feature >= 0, tr.feature, 0).astype(np.int64),
                          "threshold": tr.threshold.astype(float), "value": v})
        params = {"trees": trees}
    return impute, mean, scale, params, est


def train_classifier(cells, *, label, features=None, groups=None, estimator="logistic", rng=0, **options):
    """Train a classifier of cells on a label (condition, or an annotated state).

    Parameters
    ----------
    cells : pandas.DataFrame
        One row per cell.
    label : str or array_like
        Label column name, or the labels themselves.
    features : sequence of str, optional
        Feature columns; default :func:`default_features`. Missing values are
        replaced by training medians; a column without any finite value is an error.
    groups : str or array_like, optional
        Group (dish) of every cell; only recorded in the metadata here (use
        :func:`evaluate_grouped` to score).
    estimator : {"logistic", "forest"}
        Logistic regression on standardised features (option ``C``) or a random
        forest (options ``n_estimators``, ``max_depth``, ``min_samples_leaf``).
    rng : int or numpy.random.Generator
        Seeds the forest.

    Returns
    -------
    CellClassifier
    """
    _sklearn()
    name, y, classes = _labels(cells, label)
    feats, x = _features(cells, features)
    impute, mean, scale, params, est = _fit(x, y, classes, estimator, rng, options)
    n_groups = None
    if groups is not None:
        g = cells[groups].to_numpy(object) if isinstance(groups, str) else np.asarray(groups, dtype=object)
        n_groups = int(len(set(map(str, g))))
    import sklearn

    meta = {"lasecyto_version": __version__, "sklearn_version": sklearn.__version__, "n_cells": int(len(y)),
            "n_groups": n_groups, "class_counts": {c: int(np.sum(y == c)) for c in classes},
            "options": {k: (None if v is None else float(v) if isinstance(v, float) else int(v))
                        for k, v in options.items()}}
    return CellClassifier(kind=estimator, label=name, features=feats, classes=classes, impute=impute, mean=mean,
                          scale=scale, params=params, metadata=meta, estimator=est)


@dataclass(frozen=True)
class GroupedEvaluation:
    """Out-of-fold scores of :func:`evaluate_grouped`.

    ``roc_auc`` (binary: of ``positive``; more classes: one-vs-rest macro average),
    ``balanced_accuracy``, ``confusion`` (rows true, columns predicted class),
    ``importances`` (feature, importance_mean, importance_std: drop of the pooled
    out-of-fold score when the feature is permuted within the test folds),
    ``fold`` and ``probability`` (out-of-fold, per cell), ``n_splits``, ``grouped``.
    """

    roc_auc: float
    balanced_accuracy: float
    confusion: pd.DataFrame
    importances: pd.DataFrame
    fold: np.ndarray
    probability: np.ndarray
    classes: tuple
    positive: str
    n_splits: int
    grouped: bool


def _score(y_idx, proba, n_classes, pos):
    from sklearn.metrics import roc_auc_score

    if n_classes == 2:
        return float(roc_auc_score(y_idx == pos, proba[:, pos]))
    return float(roc_auc_score(y_idx, proba, multi_class="ovr", average="macro", labels=list(range(n_classes))))


def evaluate_grouped(cells, *, label, groups, features=None, estimator="logistic", n_splits=5, positive=None,
                     grouped=True, n_repeats=5, rng=0, **options) -> GroupedEvaluation:
    """Cross-validated scores with whole groups (dishes) held out together.

    ``grouped=False`` uses an ordinary stratified split of cells instead: it exists
    to measure how much a split that ignores dishes over-reports (see :func:`split_leak`).
    Folds are built with scikit-learn's ``StratifiedGroupKFold`` (``StratifiedKFold``
    when ungrouped), shuffled with ``rng``; ``n_splits`` is reduced to the number of
    groups when there are fewer. Every training fold must hold every class.
    """
    _sklearn()
    from sklearn.metrics import balanced_accuracy_score, confusion_matrix
    from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold

    name, y, classes = _labels(cells, label)
    feats, x = _features(cells, features)
    g = cells[groups].to_numpy(object) if isinstance(groups, str) else np.asarray(groups, dtype=object)
    if g.shape != (len(cells),) or pd.isna(g).any():
        raise InputError("invalid groups", field="groups", expected=f"a group for each of {len(cells)} cells",
                         found=f"shape {g.shape}")
    g = np.asarray([str(v) for v in g], dtype=object)
    n_groups = len(set(g))
    pos_name = classes[-1] if positive is None else str(positive)
    if pos_name not in classes:
        raise InputError("unknown positive class", field="positive", expected=f"one of {classes}",
                         found=repr(positive))
    pos = classes.index(pos_name)
    gen = np.random.default_rng(rng)
    seed = int(gen.integers(2**31 - 1))
    y_idx = np.searchsorted(np.asarray(classes, dtype=object), y)
    if grouped:
        k = min(int(n_splits), n_groups)
        if k < 2:
            raise InputError("too few groups for grouped cross-validation", field="groups",
                             expected="at least 2 groups", found=f"{n_groups}")
        splitter = StratifiedGroupKFold(n_splits=k, shuffle=True, random_state=seed)
        splits = list(splitter.split(x, y_idx, g))
    else:
        k = min(int(n_splits), int(np.bincount(y_idx).min()))
        if k < 2:
            raise InputError("too few cells per class for cross-validation", field="label",
                             expected="at least 2 cells of each class", found=f"{np.bincount(y_idx).min()}")
        splits = list(StratifiedKFold(n_splits=k, shuffle=True, random_state=seed).split(x, y_idx))
    fold = np.full(len(y), -1, dtype=np.int64)
    proba = np.zeros((len(y), len(classes)))
    models = []
    for f, (tr, te) in enumerate(splits):
        if len(set(y[tr])) < len(classes):
            raise InputError("a training fold lacks a class", field="groups",
                             expected="every class in several groups", found=f"fold {f} holds {sorted(set(y[tr]))}")
        impute, mean, scale, params, est = _fit(x[tr], y[tr], classes, estimator, gen, options)
        m = CellClassifier(kind=estimator, label=name, features=feats, classes=classes, impute=impute, mean=mean,
                           scale=scale, params=params)
        proba[te] = m.predict_proba(x[te])
        fold[te] = f
        models.append((m, te))
    auc = _score(y_idx, proba, len(classes), pos)
    pred = np.argmax(proba, axis=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # a class never predicted is legitimate here
        bacc = float(balanced_accuracy_score(y_idx, pred))
    cm = confusion_matrix(y_idx, pred, labels=list(range(len(classes))))
    confusion = pd.DataFrame(cm, index=pd.Index(classes, name=f"true_{name}"),
                             columns=pd.Index(classes, name=f"predicted_{name}"))
    imp_rng = np.random.default_rng(gen.integers(2**31 - 1))
    imp = np.zeros((len(feats), int(n_repeats)))
    for j in range(len(feats)):
        for r in range(int(n_repeats)):
            pp = np.zeros_like(proba)
            for m, te in models:
                xp = x[te].copy()
                xp[:, j] = xp[imp_rng.permutation(te.size), j]
                pp[te] = m.predict_proba(xp)
            imp[j, r] = auc - _score(y_idx, pp, len(classes), pos)
    importances = pd.DataFrame({"feature": list(feats), "importance_mean": imp.mean(axis=1),
                                "importance_std": imp.std(axis=1)})
    importances = importances.sort_values(["importance_mean", "feature"], ascending=[False, True],
                                          kind="stable").reset_index(drop=True)
    return GroupedEvaluation(roc_auc=auc, balanced_accuracy=bacc, confusion=confusion, importances=importances,
                             fold=fold, probability=proba, classes=classes, positive=pos_name, n_splits=len(splits),
                             grouped=bool(grouped))


def split_leak(cells, *, label, groups, features=None, estimator="forest", n_splits=5, rng=0, **options) -> dict:
    """ROC AUC with grouped and with ungrouped folds, and their difference (the leak)."""
    a = evaluate_grouped(cells, label=label, groups=groups, features=features, estimator=estimator,
                         n_splits=n_splits, grouped=True, n_repeats=1, rng=rng, **options)
    b = evaluate_grouped(cells, label=label, groups=groups, features=features, estimator=estimator,
                         n_splits=n_splits, grouped=False, n_repeats=1, rng=rng, **options)
    return {"grouped_auc": a.roc_auc, "ungrouped_auc": b.roc_auc, "leak_auc": b.roc_auc - a.roc_auc}


def anomaly_scores(cells, *, features=None, reference_mask=None, rng=0, n_estimators=200) -> np.ndarray:
    """Unsupervised anomaly score of every cell (higher is more unusual), by an isolation forest.

    The forest is fitted on the reference cells (default all), after median imputation
    and standardisation on them; the score is minus scikit-learn's ``score_samples``.
    """
    _sklearn()
    from sklearn.ensemble import IsolationForest

    feats, x = _features(cells, features)
    ref = np.ones(len(cells), bool) if reference_mask is None else np.asarray(reference_mask, dtype=bool)
    if ref.shape != (len(cells),) or ref.sum() < 4:
        raise InputError("invalid reference mask", field="reference_mask", expected="at least 4 reference cells",
                         found=f"{int(ref.sum()) if ref.shape == (len(cells),) else ref.shape}")
    xr = x[ref]
    if not np.isfinite(xr).any(axis=0).all():
        raise InputError("a feature is NaN for every reference cell", field="features", expected="finite values",
                         found="all NaN")
    impute = np.array([np.median(c[np.isfinite(c)]) for c in xr.T])
    xi = np.where(np.isfinite(x), x, impute[None, :])
    mean, sd = xi[ref].mean(axis=0), xi[ref].std(axis=0)
    xs = (xi - mean) / np.where(sd > 0, sd, 1.0)
    seed = int(np.random.default_rng(rng).integers(2**31 - 1))
    forest = IsolationForest(n_estimators=int(n_estimators), random_state=seed).fit(xs[ref])
    return -forest.score_samples(xs)
