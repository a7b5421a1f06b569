"""The feature catalogue: per-series, per-track and per-cell features."""

import math

import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.exceptions import InputError
from lasecyto.features import CELL_FEATURE_KEYS, TRACK_FEATURE_COLUMNS, cell_features, track_features

from cellgen import make_cell_frames



def test_responder_features_recover_truth():
    rng = np.random.default_rng(21)
    tau_err, onset_err = [], []
    for _ in range(20):
        cf, truth = make_cell_frames("c", rng=rng, responder=True, n_frames=80, bleach_tau_s=4000.0)
        f = cell_features(cf, perturbation_s=200.0)
        assert set(f) == set(CELL_FEATURE_KEYS) | {"features_note"} and f["features_note"] == ""
        tau_err.append(abs(f["dn_tau_s"] - truth["tau_s"]) / truth["tau_s"])
        onset_err.append(abs(f["dn_onset_s"] - truth["onset_s"]) / 10.0)
        assert f["dn_amplitude"] == pytest.approx(truth["amplitude"], rel=0.05)
        assert f["dn_change"] > 0.5 * truth["amplitude"]
        assert f["dropout_fraction"] == pytest.approx(1 - cf["lasing"].mean())
        # Theil-Sen bleaching rate of the summed area, pump fluctuation 5 %: within 25 % of 1/4000 per s
        assert f["bleach_rate_per_s"] == pytest.approx(1 / 4000.0, rel=0.25)
        assert f["optical_length_baseline_um"] == pytest.approx(27.66, abs=0.01)
        assert math.isnan(f["diameter_baseline_um"])  # no such column for a Fabry-Perot cell
    # generator truth: time constant within 10 % for the median cell, onset within 2 frames for every cell
    assert np.median(tau_err) < 0.10
    assert max(onset_err) <= 2.0


def test_control_has_no_onset():
    rng = np.random.default_rng(8)
    n_onsets = 0
    for _ in range(20):
        cf, _ = make_cell_frames("c", rng=rng, responder=False)
        f = cell_features(cf, perturbation_s=200.0)
        n_onsets += np.isfinite(f["dn_onset_s"])
        assert abs(f["dn_change"]) < 1e-4
        assert f["dn_adev_m1"] < 1e-5
    assert n_onsets <= 2


def test_too_few_frames_and_bad_tables():
    cf, _ = make_cell_frames("c", rng=np.random.default_rng(0), responder=True, n_frames=6)
    with pytest.raises(InputError, match=r"cell c: frame: too few frames .*expected at least 10 frames, found 6"):
        cell_features(cf, perturbation_s=20.0)
    a, _ = make_cell_frames("a", rng=np.random.default_rng(0), responder=False)
    b, _ = make_cell_frames("b", rng=np.random.default_rng(1), responder=False)
    with pytest.raises(InputError, match="more than one cell"):
        cell_features(pd.concat([a, b], ignore_index=True), perturbation_s=200.0)
    with pytest.raises(InputError, match="missing columns"):
        cell_features(a.drop(columns=["index_change"]), perturbation_s=200.0)
    f = cell_features(a, perturbation_s=float("nan"))
    assert f["features_note"] == "no perturbation time" and math.isnan(f["dn_change"])


def _tracks_table():
    """Two tracks of one cell: track 0 shifts by +0.02 nm at t = 100 s, track 1 is dimmer and has gaps."""
    rows = []
    rng = np.random.default_rng(3)
    for frame in range(40):
        t = 5.0 * frame
        for tid, c0, area in ((0, 610.0, 1e4), (1, 613.0, 4e3)):
            if tid == 1 and frame % 5 == 4:
                continue
            if tid == 0 and frame in (10, 11):  # track 1 is brighter in these frames: two dominant-mode hops
                area = 1e3
            c = c0 + (0.02 if t >= 100.0 else 0.0) + 1e-4 * rng.standard_normal()
            rows.append({"cell_id": "x", "frame": frame, "time_s": t, "line_id": tid, "center_px": 0.0,
                         "center_err_px": 0.01, "center_nm": c, "center_err_nm": 1e-4, "fwhm_px": 2.0,
                         "fwhm_nm": 0.1 + (0.01 if t >= 100.0 else 0.0), "area_counts": area * np.exp(-t / 1000),
                         "area_err_counts": 10.0, "amplitude_counts": area / 3, "background_counts": 10.0,
                         "snr": 50.0, "chi2_red": 1.0, "lasing": True, "saturated": False, "fit_ok": True,
                         "fit_message": "", "track_id": tid, "mode_family": 0})
    return tables.validate(pd.DataFrame(rows), "tracks")


def test_track_features():
    tf = track_features(_tracks_table(), perturbation_s=100.0)
    assert list(tf.columns) == list(TRACK_FEATURE_COLUMNS) and len(tf) == 2
    t0, t1 = tf.iloc[0], tf.iloc[1]
    assert t0["lifetime_s"] == 195.0 and t0["dropout_fraction"] == 0.0
    assert t1["dropout_fraction"] == pytest.approx(1 - 32 / 39)
    assert t0["shift_nm"] == pytest.approx(0.02, abs=1e-4)
    assert t0["relative_shift"] == pytest.approx(0.02 / 610.0, rel=0.01)
    assert t0["fwhm_change_nm"] == pytest.approx(0.01, abs=1e-9)
    assert t1["bleach_rate_per_s"] == pytest.approx(1e-3, rel=1e-6)
    assert t0["adev_m1_nm"] == pytest.approx(1e-4, rel=0.5)


def test_cell_features_with_tracks_and_patterns():
    tr = _tracks_table()
    cf, _ = make_cell_frames("x", rng=np.random.default_rng(4), responder=False, n_frames=40, dt_s=5.0)
    pt = pd.DataFrame({"decorrelation_time_s": [50.0, 70.0, np.nan], "mean_pattern_corr": [0.9, 0.8, 0.7],
                       "n_pattern_changes": [1, 0, 2]})
    f = cell_features(cf, tr, perturbation_s=100.0, pattern_tracks=pt)
    assert f["n_feature_tracks"] == 2
    assert f["mode_hop_rate_per_s"] == pytest.approx(2 / 195.0)
    assert f["track_shift_median_nm"] == pytest.approx(0.02, abs=1e-4)
    assert f["pattern_decorrelation_time_s"] == 60.0 and f["pattern_corr_mean"] == pytest.approx(0.8)
    assert f["pattern_change_rate_per_s"] == pytest.approx(3 / f["lasing_lifetime_s"])
    with pytest.raises(InputError, match="n_pattern_changes"):
        cell_features(cf, tr, perturbation_s=100.0, pattern_tracks=pt.drop(columns=["n_pattern_changes"]))


@pytest.mark.slow
def test_catalogue_on_pipeline_run(fp_run, fp_experiment):
    # the default generated experiment through the whole pipeline; truth from lasecyto.synth (truth/cells.csv)
    truth = pd.read_csv(fp_experiment.parent / "truth" / "cells.csv").set_index("cell_id")
    cf, tr = fp_run.tables["cell_frames"], fp_run.tables["tracks"]
    onset_err, tau_err = [], []
    for cid, g in cf.groupby("cell_id", sort=True):
        f = cell_features(g, tr[tr["cell_id"] == cid], perturbation_s=300.0)
        if truth.loc[cid, "responder"]:
            onset_err.append(abs(f["dn_onset_s"] - truth.loc[cid, "onset_s"]) / 10.0)
            tau_err.append(abs(f["dn_tau_s"] - truth.loc[cid, "response_tau_s"]) / truth.loc[cid, "response_tau_s"])
        else:
            assert math.isnan(f["dn_onset_s"])
    assert np.median(onset_err) <= 2.0 and max(onset_err) <= 2.0
    assert np.median(tau_err) < 0.10
