"""Classifiers of cells from their features, scored with grouped cross-validation; safe model files.

train_classifier   fit logistic regression or a random forest on labelled cells
evaluate_grouped   out-of-fold ROC AUC, balanced accuracy, confusion matrix, permutation importances
split_leak         grouped versus ungrouped AUC: how much a split ignoring dishes over-reports
anomaly_scores     unsupervised isolation-forest score against reference cells
save_model         write a model as JSON (numbers and names only)
load_model         read it back, refusing another feature schema or package version
load_model_for_table  the same, checking that a cells table carries the model's features
predict_cells      per-cell predictions of a model (cells it cannot judge get a note)

Needs scikit-learn (the optional extra ``classify``); prediction of a loaded model uses numpy only.
"""

from ._apply import load_model_for_table, model_features, predict_cells
from ._model import CellClassifier, feature_matrix
from ._persist import MODEL_FORMAT, MODEL_FORMAT_VERSION, load_model, save_model
from ._train import (
    GroupedEvaluation,
    anomaly_scores,
    default_features,
    evaluate_grouped,
    split_leak,
    train_classifier,
)

__all__ = [
    "CellClassifier",
    "GroupedEvaluation",
    "MODEL_FORMAT",
    "MODEL_FORMAT_VERSION",
    "anomaly_scores",
    "default_features",
    "evaluate_grouped",
    "feature_matrix",
    "load_model",
    "load_model_for_table",
    "model_features",
    "predict_cells",
    "save_model",
    "split_leak",
    "train_classifier",
]
