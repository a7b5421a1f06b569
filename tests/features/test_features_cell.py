import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.exceptions import InputError
from lasecyto.features import CHANGE_RULE, summarize_cell

DT_S = 10.0
N_FRAMES = 200
PERTURBATION_S = 595.0   # between frames 59 and 60


def _cell_frames(index_change, *, err=1e-5, lasing=None, cell_id="cell-01", relative=None):
    n = len(index_change)
    t = np.arange(n) * DT_S
    rel = index_change / 1.37 if relative is None else relative
    return pd.DataFrame({
        "cell_id": [cell_id] * n, "frame": np.arange(n), "time_s": t,
        "n_lines": np.full(n, 24), "n_lasing": np.full(n, 20),
        "total_area_counts": np.full(n, 4.0e5),
        "lasing": np.ones(n, bool) if lasing is None else lasing,
        "fsr_nm": np.full(n, 2.1), "optical_length_um": 64.0 + np.arange(n) * 1e-4,
        "optical_length_err_um": np.full(n, 0.002),
        "relative_shift": rel, "relative_shift_err": np.full(n, err / 1.37),
        "delta_optical_length_um": index_change * 8.0, "delta_optical_length_err_um": np.full(n, err * 8.0),
        "index_change": index_change, "index_change_err": np.full(n, err),
    })


def _responder(seed, amplitude=2e-3, tau_s=100.0, noise=1e-5):
    rng = np.random.default_rng(seed)
    t = np.arange(N_FRAMES) * DT_S
    rise = np.where(t >= PERTURBATION_S, amplitude * (1.0 - np.exp(-(t - PERTURBATION_S) / tau_s)), 0.0)
    return rise + rng.normal(0.0, noise, N_FRAMES)


def _control(seed, noise=1e-5, walk=1e-5):
    # white noise plus a random walk whose rms excursion over the record is `walk`
    rng = np.random.default_rng(seed)
    steps = rng.normal(0.0, walk / np.sqrt(N_FRAMES), N_FRAMES)
    return rng.normal(0.0, noise, N_FRAMES) + np.cumsum(steps)


def test_result_has_the_cells_schema_feature_keys():
    res = summarize_cell(_cell_frames(_responder(0)), perturbation_s=PERTURBATION_S, n_tracks=7)
    # the required columns (optional ones, with a fill value, come from other stages)
    feature_keys = {c.name for c in tables.SCHEMAS["cells"] if c.fill is None} - {
        "cell_id", "dish", "condition", "perturbation_s"}
    assert feature_keys | {"quantity", "note"} == set(res)
    assert res["n_tracks"] == 7 and res["n_frames"] == N_FRAMES and res["n_frames_lasing"] == N_FRAMES
    # the median of the baseline optical lengths 64 + i 1e-4, i = 0..59
    assert res["baseline_optical_length_um"] == pytest.approx(64.0 + 29.5e-4)
    # the row builds a valid cells table
    row = {"cell_id": "cell-01", "dish": "d1", "condition": "drug", "perturbation_s": PERTURBATION_S, **res}
    tables.validate(pd.DataFrame([row]), "cells")


@pytest.mark.parametrize("seed", range(5))
def test_responder_changed_with_onset_within_two_frames(seed):
    res = summarize_cell(_cell_frames(_responder(seed)), perturbation_s=PERTURBATION_S)
    assert res["quantity"] == "index_change" and res["note"] == ""
    assert res["changed"]
    # settled window (last 25 % of 140 post frames) is > 10 time constants after the perturbation:
    # change = 2e-3 within a few noise / sqrt(n) units
    assert res["index_change"] == pytest.approx(2e-3, abs=1e-5)
    assert res["baseline_noise"] == pytest.approx(1e-5, rel=0.35)
    assert res["change_z"] > 100
    assert res["index_change_err"] == pytest.approx(np.sqrt(1e-10 / 60 + 1e-10 / 35), rel=0.35)
    # true onset is PERTURBATION_S
    assert abs(res["onset_s"] - PERTURBATION_S) <= 2 * DT_S
    assert res["onset_err_s"] == pytest.approx(DT_S / 2)


def test_decrease_is_detected_with_negative_sign():
    res = summarize_cell(_cell_frames(-_responder(3)), perturbation_s=PERTURBATION_S)
    assert res["changed"] and res["index_change"] < 0 and res["change_z"] < -100
    assert abs(res["onset_s"] - PERTURBATION_S) <= 2 * DT_S


@pytest.mark.parametrize("seed", range(20))
def test_control_not_changed(seed):
    res = summarize_cell(_cell_frames(_control(seed)), perturbation_s=PERTURBATION_S)
    assert res["note"] == ""
    assert not res["changed"]
    assert np.isnan(res["onset_s"]) and np.isnan(res["onset_err_s"])
    assert abs(res["change_z"]) < 5


def test_significant_but_small_change_is_not_flagged():
    # a 1e-4 step is 10 sigma but below min_index_change = 2e-4
    res = summarize_cell(_cell_frames(_responder(4, amplitude=1e-4)), perturbation_s=PERTURBATION_S)
    assert res["change_z"] > 5 and not res["changed"]
    res = summarize_cell(_cell_frames(_responder(4, amplitude=1e-4)), perturbation_s=PERTURBATION_S,
                         min_index_change=5e-5)
    assert res["changed"]


def test_no_baseline_frames_gives_nan_and_note():
    q = _responder(0)
    lasing = np.arange(N_FRAMES) * DT_S > PERTURBATION_S   # no lasing frame before the perturbation
    res = summarize_cell(_cell_frames(q, lasing=lasing), perturbation_s=PERTURBATION_S)
    for key in ("baseline_optical_length_um", "baseline_noise", "index_change", "index_change_err",
                "change_z", "onset_s", "onset_err_s"):
        assert np.isnan(res[key]), key
    assert res["changed"] is False
    assert "baseline" in res["note"]
    assert res["n_frames_lasing"] == int(lasing.sum())


def test_no_perturbation_and_too_few_settled_frames():
    res = summarize_cell(_cell_frames(_responder(0)), perturbation_s=float("nan"))
    assert np.isnan(res["index_change"]) and not res["changed"] and "perturbation" in res["note"]
    res = summarize_cell(_cell_frames(_responder(0)), perturbation_s=(N_FRAMES - 3) * DT_S)
    assert np.isnan(res["change_z"]) and not res["changed"] and "after perturbation" in res["note"]
    res = summarize_cell(_cell_frames(_responder(0), lasing=np.zeros(N_FRAMES, bool)),
                         perturbation_s=PERTURBATION_S)
    assert res["note"] == "no lasing frames" and res["n_frames_lasing"] == 0


def test_relative_shift_fallback_when_index_change_is_nan():
    rel = _responder(2, amplitude=1.5e-3, noise=8e-6)
    res = summarize_cell(_cell_frames(np.full(N_FRAMES, np.nan), relative=rel, err=1.37e-5),
                         perturbation_s=PERTURBATION_S)
    assert res["quantity"] == "relative_shift"
    assert res["changed"]
    assert res["index_change"] == pytest.approx(1.5e-3, abs=1e-5)   # in relative_shift units
    assert abs(res["onset_s"] - PERTURBATION_S) <= 2 * DT_S
    # a relative shift between min_relative_shift and min_index_change is flagged as relative_shift
    rel = _responder(2, amplitude=1.7e-4, noise=8e-6)
    res = summarize_cell(_cell_frames(np.full(N_FRAMES, np.nan), relative=rel, err=1.37e-5),
                         perturbation_s=PERTURBATION_S)
    assert res["quantity"] == "relative_shift" and res["changed"]


def test_noise_floor_is_the_median_reported_error():
    rng = np.random.default_rng(5)
    q = rng.normal(0.0, 1e-6, N_FRAMES)   # scatter far below the reported errors of 1e-4
    res = summarize_cell(_cell_frames(q, err=1e-4), perturbation_s=PERTURBATION_S)
    assert res["baseline_noise"] == pytest.approx(1e-4)


def test_input_errors_for_wrong_tables_and_options():
    with pytest.raises(InputError, match="missing columns"):
        summarize_cell(pd.DataFrame({"cell_id": ["a"], "frame": [0]}), perturbation_s=0.0)
    two = pd.concat([_cell_frames(_control(0)), _cell_frames(_control(1), cell_id="cell-02")],
                    ignore_index=True)
    with pytest.raises(InputError, match="more than one cell"):
        summarize_cell(two, perturbation_s=PERTURBATION_S)
    with pytest.raises(InputError, match="settle_fraction"):
        summarize_cell(_cell_frames(_control(0)), perturbation_s=PERTURBATION_S, settle_fraction=0.0)


def test_change_rule_documents_the_defaults():
    for word in ("z_min", "min_index_change", "relative_shift", "onset", "baseline_noise", "2e-4"):
        assert word in CHANGE_RULE
    assert "\n" not in CHANGE_RULE
