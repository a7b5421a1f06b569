"""``lasecyto classify train`` and ``apply`` on a cells table, and their bad inputs (nothing written)."""

import json

import numpy as np
import pytest

from lasecyto.cli import main
from lasecyto.io import read_table

from cellgen import make_run_cells


@pytest.fixture(scope="module")
def cells_file(tmp_path_factory):
    """A cells table of 8 dishes x 10 cells (4 control dishes) as a run writes it."""
    cells = make_run_cells(n_dishes=8, cells_per_dish=10, rng=31)
    path = tmp_path_factory.mktemp("classify_cli") / "cells.parquet"
    cells.to_parquet(path)
    return path, cells


def test_train_then_apply(cells_file, tmp_path, capsys):
    path, cells = cells_file
    model = tmp_path / "model.json"
    assert main(["classify", "train", str(path), "--label", "condition", "--group", "dish",
                 "--out", str(model)]) == 0
    out = capsys.readouterr().out
    assert "ROC AUC (treated positive)" in out and "confusion matrix" in out and "permutation importances" in out
    metrics = json.loads(model.with_suffix(".metrics.json").read_text())
    assert metrics["n_groups"] == 8 and metrics["n_splits"] == 5
    # condition labels include non-responding treated cells, so the AUC is below the responder-only one
    assert metrics["roc_auc"] >= 0.8 and sum(map(sum, metrics["confusion"]["counts"])) == len(cells)
    assert json.loads(model.read_text())["format"] == "lasecyto-cell-classifier"
    csv = tmp_path / "cells.csv"
    cells.to_csv(csv, index=False)
    assert main(["classify", "apply", str(model), str(csv), "--out", str(tmp_path / "pred")]) == 0
    pred = read_table(tmp_path / "pred.parquet", name="predictions")
    assert len(pred) == len(cells) and (pred["label"] == "condition").all()
    responders = cells["responder"].to_numpy(bool)
    assert (pred.loc[responders, "prediction"] == "treated").mean() >= 0.9
    assert np.allclose(pred["p_control"] + pred["p_treated"], 1.0)


def test_bad_inputs_write_nothing(cells_file, tmp_path, capsys):
    path, cells = cells_file
    out = tmp_path / "m.json"
    # labels with one class
    one = tmp_path / "one.parquet"
    cells[cells["condition"] == "control"].to_parquet(one)
    assert main(["classify", "train", str(one), "--label", "condition", "--group", "dish", "--out", str(out)]) == 1
    assert "labels have only one class" in capsys.readouterr().err
    # all-NaN features (for the chosen feature and for some cells)
    nan = tmp_path / "nan.parquet"
    cells.assign(dn_change=np.nan).to_parquet(nan)
    assert main(["classify", "train", str(nan), "--label", "condition", "--group", "dish", "--out", str(out),
                 "--features", "dn_change,rs_change"]) == 1
    assert "dn_change: features are NaN for every cell" in capsys.readouterr().err
    holes = cells.copy()
    holes.loc[3, ["dn_change", "rs_change"]] = np.nan
    holes.to_parquet(nan)
    assert main(["classify", "train", str(nan), "--label", "condition", "--group", "dish", "--out", str(out),
                 "--features", "dn_change,rs_change"]) == 1
    assert "1 cell(s) whose features are all NaN" in capsys.readouterr().err
    # a cell with too few frames
    few = tmp_path / "few.parquet"
    cells.assign(n_frames=np.where(np.arange(len(cells)) == 0, 6, cells["n_frames"])).to_parquet(few)
    assert main(["classify", "train", str(few), "--label", "condition", "--group", "dish", "--out", str(out)]) == 1
    assert "1 cell(s) with too few frames" in capsys.readouterr().err
    assert not out.exists() and not out.with_suffix(".metrics.json").exists()
    # a model file from another feature schema
    assert main(["classify", "train", str(path), "--label", "condition", "--group", "dish", "--out", str(out),
                 "--features", "dn_change,rs_change,bleach_rate_per_s"]) == 0
    capsys.readouterr()
    other = tmp_path / "other.parquet"
    cells.drop(columns=["bleach_rate_per_s"]).to_parquet(other)
    assert main(["classify", "apply", str(out), str(other), "--out", str(tmp_path / "p")]) == 1
    assert "model feature schema does not match the cells table" in capsys.readouterr().err
    doc = json.loads(out.read_text())
    doc["features"] = ["dn_change", "rs_change", "dropout_fraction"]
    (tmp_path / "edited.json").write_text(json.dumps(doc))
    assert main(["classify", "apply", str(tmp_path / "edited.json"), str(path), "--out", str(tmp_path / "p")]) == 1
    # a feature list edited in the file no longer matches the digest written with the model's arrays
    assert "model file altered" in capsys.readouterr().err
    # every cell without features: no predictions table
    empty = tmp_path / "empty.parquet"
    cells.assign(dn_change=np.nan, rs_change=np.nan, bleach_rate_per_s=np.nan).to_parquet(empty)
    assert main(["classify", "apply", str(out), str(empty), "--out", str(tmp_path / "p")]) == 1
    assert "no cell could be predicted" in capsys.readouterr().err
    assert not list(tmp_path.glob("p.*"))
    # some cells without features or with too few frames: predicted except those, with a note
    part = tmp_path / "part.parquet"
    c2 = cells.copy()
    c2.loc[0, ["dn_change", "rs_change", "bleach_rate_per_s"]] = np.nan
    c2.loc[1, "n_frames"] = 4
    c2.to_parquet(part)
    assert main(["classify", "apply", str(out), str(part), "--out", str(tmp_path / "q")]) == 0
    pred = read_table(tmp_path / "q.csv", name="predictions")
    assert pred.loc[0, "prediction_note"] == "every model feature is NaN"
    assert pred.loc[1, "prediction_note"].startswith("too few frames")
    assert (pred.loc[2:, "prediction"] != "").all()
