"""Classifiers: grouped cross-validation, the leak of an ungrouped split, safe model files, bad input."""

import json

import numpy as np
import pytest

from lasecyto.classify import (
    anomaly_scores,
    evaluate_grouped,
    load_model,
    save_model,
    split_leak,
    train_classifier,
)
from lasecyto.exceptions import InputError

RESPONSE_FEATURES = ["dn_change", "dn_amplitude", "dn_slope_per_s", "rs_change", "bleach_rate_per_s"]
DISH_FEATURES = ["optical_length_baseline_um", "bleach_rate_per_s"]  # carry the dish, not the condition

from cellgen import make_experiment



@pytest.fixture(scope="module")
def experiment():
    """12 dishes x 12 cells (6 control dishes, 6 treated); every dish has its own gap and dye batch."""
    return make_experiment(n_dishes=12, cells_per_dish=12, rng=2)


def test_grouped_auc_responders_vs_controls(experiment):
    sub = experiment[(experiment["condition"] == "control") | experiment["responder"]].reset_index(drop=True)
    ev = evaluate_grouped(sub, label="condition", groups="dish", features=RESPONSE_FEATURES, positive="treated",
                          n_splits=4, rng=0)
    # Acceptance: grouped-CV ROC AUC >= 0.95, responders vs controls
    assert ev.roc_auc >= 0.95 and ev.grouped and ev.n_splits == 4
    assert ev.balanced_accuracy >= 0.9
    assert int(ev.confusion.to_numpy().sum()) == len(sub)
    for f in range(ev.n_splits):  # no dish in two folds
        dishes_in = set(sub["dish"][ev.fold == f])
        assert not dishes_in & set(sub["dish"][ev.fold != f])
    assert set(ev.importances["feature"]) == set(RESPONSE_FEATURES)
    assert ev.importances["importance_mean"].iloc[0] >= ev.importances["importance_mean"].iloc[-1]


def test_ungrouped_split_leaks(experiment):
    # Features that carry only the dish (gap, dye batch): with dishes held out the condition cannot be
    # predicted; a split of cells that ignores dishes learns the dishes and over-reports. The leak is measured.
    leak = split_leak(experiment, label="condition", groups="dish", features=DISH_FEATURES, n_splits=4, rng=0)
    assert leak["ungrouped_auc"] >= 0.85
    assert leak["grouped_auc"] <= 0.70
    assert leak["leak_auc"] >= 0.3


@pytest.mark.parametrize("kind", ["logistic", "forest"])
def test_model_file_round_trip(experiment, tmp_path, kind):
    model = train_classifier(experiment, label="condition", groups="dish", features=RESPONSE_FEATURES,
                             estimator=kind, rng=1, n_estimators=30)
    p = model.predict_proba(experiment)
    # the numpy prediction equals scikit-learn's on the same standardised inputs
    assert np.allclose(p, model.estimator.predict_proba(model.transform(experiment)), atol=1e-12)
    path = save_model(model, tmp_path / "model.json")
    text = path.read_text()
    assert json.loads(text)["features"] == RESPONSE_FEATURES
    back = load_model(path, feature_schema=RESPONSE_FEATURES)
    assert back.estimator is None
    assert np.array_equal(back.predict_proba(experiment), p)
    assert back.predict(experiment).tolist() == model.predict(experiment).tolist()
    table = back.predictions_table(experiment)
    assert list(table.columns) == ["predicted_condition", "p_condition_control", "p_condition_treated"]


def test_model_file_refusals(experiment, tmp_path):
    model = train_classifier(experiment, label="condition", features=RESPONSE_FEATURES)
    path = save_model(model, tmp_path / "m.json")
    with pytest.raises(InputError, match="feature schema does not match"):
        load_model(path, feature_schema=RESPONSE_FEATURES[:-1])
    doc = json.loads(path.read_text())
    doc["lasecyto_version"] = "0.0.0-other"
    (tmp_path / "v.json").write_text(json.dumps(doc))
    with pytest.raises(InputError, match="another lasecyto version"):
        load_model(tmp_path / "v.json", feature_schema=RESPONSE_FEATURES)
    doc = json.loads(path.read_text())
    doc["params"]["coef"] = doc["params"]["coef"][:-1]
    (tmp_path / "c.json").write_text(json.dumps(doc))
    with pytest.raises(InputError, match="coef"):
        load_model(tmp_path / "c.json", feature_schema=RESPONSE_FEATURES)
    (tmp_path / "p.json").write_bytes(b"\x80\x04\x95pickle")
    with pytest.raises(InputError, match="not a model file"):
        load_model(tmp_path / "p.json", feature_schema=RESPONSE_FEATURES)


def test_bad_training_input(experiment, tmp_path):
    one = experiment[experiment["condition"] == "control"]
    with pytest.raises(InputError, match="labels have only one class"):
        train_classifier(one, label="condition", features=RESPONSE_FEATURES)
    with pytest.raises(InputError, match="labels have only one class"):
        evaluate_grouped(one, label="condition", groups="dish", features=RESPONSE_FEATURES)
    bad = experiment.assign(diameter_baseline_um=np.nan)
    with pytest.raises(InputError, match="diameter_baseline_um: features are NaN for every cell"):
        train_classifier(bad, label="condition", features=RESPONSE_FEATURES + ["diameter_baseline_um"])
    with pytest.raises(InputError, match="missing feature columns"):
        train_classifier(experiment, label="condition", features=["nope"])
    with pytest.raises(InputError, match="too few groups"):
        evaluate_grouped(experiment.assign(dish="one"), label="condition", groups="dish",
                         features=RESPONSE_FEATURES)
    assert list(tmp_path.iterdir()) == []  # nothing written on failure


def test_anomaly_scores_rank_responders(experiment):
    ctrl = (experiment["condition"] == "control").to_numpy()
    s = anomaly_scores(experiment, features=RESPONSE_FEATURES, reference_mask=ctrl, rng=0)
    resp = experiment["responder"].to_numpy(bool)
    # responders score above every control's median anomaly score
    assert np.mean(s[resp] > np.median(s[ctrl])) >= 0.95
