"""``lasecyto classify train`` and ``lasecyto classify apply``: cell classifiers on a cells table."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser("classify", help="train a cell classifier with grouped cross-validation, or apply one",
                       description="Classifiers of cells from the features of a cells table (lasecyto run "
                                   "writes one): 'train' scores a classifier with cross-validation that holds "
                                   "whole groups (dishes) out and saves it as JSON; 'apply' predicts with a saved "
                                   "model.")
    csub = p.add_subparsers(dest="classify_command", metavar="ACTION", required=True)

    t = csub.add_parser("train", help="cross-validate by group, then fit on all cells and save the model",
                        description="Score a classifier of LABEL with grouped cross-validation (a group, e.g. a "
                                    "dish, never sits in both training and test folds): ROC AUC, balanced "
                                    "accuracy, confusion matrix and permutation importances; then fit it on all "
                                    "cells and write the model (JSON, numbers and names only) and the metrics. "
                                    "Nothing is written when the input is unusable.")
    t.add_argument("cells", type=Path, help="cells table (.parquet or .csv)")
    t.add_argument("--label", required=True, metavar="COLUMN", help="column to learn (e.g. condition)")
    t.add_argument("--group", required=True, metavar="COLUMN", help="grouping column held out together (e.g. dish)")
    t.add_argument("--out", type=Path, required=True, metavar="MODEL.json", help="model file to write")
    t.add_argument("--metrics", type=Path, default=None, metavar="FILE",
                   help="cross-validation metrics (JSON; default: the model path with suffix .metrics.json)")
    t.add_argument("--features", default="response", metavar="SET",
                   help="'response' (default: the response features of docs/features.md), 'all' (every "
                        "catalogue feature) or a comma-separated list of columns")
    t.add_argument("--estimator", choices=("logistic", "forest"), default="logistic",
                   help="logistic regression (default) or random forest")
    t.add_argument("--positive", default=None, metavar="CLASS",
                   help="class whose ROC AUC is reported (default: the last class in sorted order)")
    t.add_argument("--splits", type=int, default=5, metavar="N", help="folds (at most the number of groups)")
    t.add_argument("--min-frames", type=int, default=10, metavar="N",
                   help="refuse cells with fewer frames (column n_frames; default 10, 0 to accept all)")
    t.add_argument("--seed", type=int, default=0, help="seed of the fold shuffling and the forest")
    t.set_defaults(handler=handle_train)

    a = csub.add_parser("apply", help="predict the cells of a table with a saved model",
                        description="Predict every cell of a cells table with a model written by 'lasecyto "
                                    "classify train'. The table must carry the model's feature columns; a model "
                                    "of another feature schema or lasecyto version is refused. Cells whose model "
                                    "features are all NaN, or with too few frames, get no prediction and a note.")
    a.add_argument("model", type=Path, help="model file (JSON)")
    a.add_argument("cells", type=Path, help="cells table (.parquet or .csv)")
    a.add_argument("--out", type=Path, required=True, metavar="TABLE", help="predictions table path stem")
    a.add_argument("--min-frames", type=int, default=10, metavar="N",
                   help="cells with fewer frames (column n_frames) are not predicted (default 10)")
    a.set_defaults(handler=handle_apply)


def read_cells_table(path) -> pd.DataFrame:
    """A cells table from Parquet or CSV (any columns; the command checks the ones it needs)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in (".parquet", ".csv"):
        raise InputError("unknown table format", path=path, field="suffix", expected="'.parquet' or '.csv'",
                         found=repr(path.suffix))
    if not path.is_file():
        raise InputError("table file not found", path=path, expected="an existing file", found="nothing")
    try:
        df = pd.read_parquet(path, engine="pyarrow") if suffix == ".parquet" else pd.read_csv(path)
    except Exception as exc:  # pyarrow and the CSV parser raise many unrelated types for damaged files
        raise InputError("not a readable table", path=path, found=" ".join(str(exc).split())[:200]) from None
    if df.empty:
        raise InputError("table holds no cells", path=path, expected="one row per cell", found="no rows")
    return df.reset_index(drop=True)


def _column(cells, name, path, what):
    if name not in cells.columns:
        raise InputError(f"no {what} column", path=path, field=name, expected="a column of the table",
                         found=f"columns {', '.join(map(str, cells.columns[:8]))}" +
                         (" ..." if len(cells.columns) > 8 else ""))


def _ids(cells, idx):
    col = cells["cell_id"] if "cell_id" in cells.columns else pd.Series(cells.index.astype(str))
    names = [str(col.iloc[i]) for i in idx[:5]]
    return ", ".join(names) + (" ..." if len(idx) > 5 else "")


def _select_features(cells, spec, path):
    from ..classify import default_features
    from ..features import RESPONSE_FEATURE_KEYS

    if spec == "all":
        feats = default_features(cells)
    elif spec == "response":
        feats = tuple(k for k in RESPONSE_FEATURE_KEYS if k in cells.columns
                      and np.isfinite(pd.to_numeric(cells[k], errors="coerce").to_numpy(float)).any())
    else:
        feats = tuple(f.strip() for f in spec.split(",") if f.strip())
        missing = [f for f in feats if f not in cells.columns]
        if missing:
            raise InputError("feature columns not in the table", path=path, field=", ".join(missing),
                             expected="columns of the table", found="absent")
    if not feats:
        raise InputError("no feature with a finite value", path=path, field="features",
                         expected=f"feature set {spec!r} to hold finite values", found="all NaN or absent")
    return feats


def _check_cells(cells, feats, min_frames, path):
    if min_frames and "n_frames" in cells.columns:
        nf = pd.to_numeric(cells["n_frames"], errors="coerce").to_numpy(float)
        few = np.flatnonzero(~(nf >= min_frames))
        if few.size:
            raise InputError(f"{few.size} cell(s) with too few frames", path=path, field="n_frames",
                             expected=f"at least {min_frames} frames (or --min-frames)",
                             found=f"{_ids(cells, few)}")
    x = np.column_stack([pd.to_numeric(cells[f], errors="coerce").to_numpy(float) for f in feats])
    empty = np.flatnonzero(~np.isfinite(x).any(axis=1))
    if empty.size:
        raise InputError(f"{empty.size} cell(s) whose features are all NaN", path=path, field="features",
                         expected="at least one finite feature per cell", found=_ids(cells, empty))


def handle_train(args):
    from ..classify import evaluate_grouped, save_model, train_classifier
    from ..io import write_json

    cells = read_cells_table(args.cells)
    _column(cells, args.label, args.cells, "label")
    _column(cells, args.group, args.cells, "group")
    feats = _select_features(cells, args.features, args.cells)
    _check_cells(cells, feats, args.min_frames, args.cells)
    ev = evaluate_grouped(cells, label=args.label, groups=args.group, features=feats, estimator=args.estimator,
                          n_splits=args.splits, positive=args.positive, rng=args.seed)
    model = train_classifier(cells, label=args.label, groups=args.group, features=feats,
                             estimator=args.estimator, rng=args.seed)
    metrics = {"cells_table": str(args.cells), "label": args.label, "group": args.group,
               "estimator": args.estimator, "features": list(feats), "n_cells": int(len(cells)),
               "n_groups": int(cells[args.group].astype(str).nunique()), "n_splits": ev.n_splits,
               "positive": ev.positive, "roc_auc": ev.roc_auc, "balanced_accuracy": ev.balanced_accuracy,
               "confusion": {"rows_true_columns_predicted": list(ev.classes),
                             "counts": ev.confusion.to_numpy().tolist()},
               "importances": ev.importances.to_dict(orient="records"), "seed": args.seed}
    metrics_path = args.metrics if args.metrics is not None else args.out.with_suffix(".metrics.json")
    args.out.parent.mkdir(parents=True, exist_ok=True)
    save_model(model, args.out)
    write_json(metrics, metrics_path)
    print(f"grouped cross-validation ({ev.n_splits} folds by {args.group}, {len(cells)} cells, "
          f"{len(feats)} features, {args.estimator}):")
    print(f"  ROC AUC ({ev.positive} positive)  {ev.roc_auc:.3f}")
    print(f"  balanced accuracy         {ev.balanced_accuracy:.3f}")
    print("  confusion matrix (rows true, columns predicted):")
    for line in ev.confusion.to_string().splitlines():
        print("    " + line)
    print("  permutation importances (drop of the out-of-fold AUC):")
    for r in ev.importances.head(8).itertuples():
        print(f"    {r.feature:<32} {r.importance_mean:+.3f} +- {r.importance_std:.3f}")
    print(args.out)
    print(metrics_path)
    return EXIT_OK


def handle_apply(args):
    from ..classify import load_model_for_table, predict_cells
    from ..io import write_table

    cells = read_cells_table(args.cells)
    model = load_model_for_table(args.model, cells)
    pred = predict_cells(model, cells, min_frames=args.min_frames or None)
    if (pred["prediction"] == "").all():
        reasons = pred["prediction_note"].value_counts()
        raise InputError("no cell could be predicted", path=args.cells, field=", ".join(model.features[:3]) +
                         (" ..." if len(model.features) > 3 else ""), expected="cells with finite features",
                         found="; ".join(f"{n} cell(s): {why}" for why, n in reasons.items()))
    ids = cells["cell_id"].astype(str) if "cell_id" in cells.columns else pd.Series(cells.index.astype(str))
    table = pd.DataFrame({"cell_id": ids.to_numpy(object), "label": model.label})
    table = pd.concat([table, pred], axis=1)
    for extra in ("dish", "condition"):
        if extra in cells.columns:
            table[extra] = cells[extra].to_numpy(object)
    for path in write_table(table, args.out, name="predictions"):
        print(path)
    n_ok = int((pred["prediction"] != "").sum())
    print(f"{n_ok} of {len(cells)} cells predicted ({model.label}: " +
          ", ".join(f"{c} {int((pred['prediction'] == c).sum())}" for c in model.classes) + ")")
    for why, n in pred.loc[pred["prediction"] == "", "prediction_note"].value_counts().items():
        print(f"  not predicted, {why}: {n}")
    return EXIT_OK
