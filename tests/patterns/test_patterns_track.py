"""Region linking (drift, missed frames), manifest matching, decorrelation time."""

import math

import numpy as np
import pandas as pd
import pytest

from lasecyto.patterns import RegionLinker, decorrelation_time, link_regions, match_tracks_to_cells


def test_linking_follows_drift_and_gaps():
    rng = np.random.default_rng(9)
    start = np.array([[20.0, 20.0], [20.0, 40.0], [60.0, 30.0]])
    frames, rows, cols, truth = [], [], [], []
    for f in range(40):
        pos = start + np.array([0.8, -0.5]) * f + rng.normal(0, 0.2, start.shape)
        for c in range(3):
            if (c == 1 and f in (10, 11, 12)) or (c == 2 and f == 25):
                continue  # missed frames
            frames.append(f)
            rows.append(pos[c, 0])
            cols.append(pos[c, 1])
            truth.append(c)
    ids = link_regions(frames, rows, cols, max_displacement_px=3.0, max_gap_frames=3)
    assert len(set(ids)) == 3
    pairs = pd.crosstab(np.array(truth), ids)
    assert (pairs.to_numpy() > 0).sum() == 3  # one track per cell, none shared


def test_gap_longer_than_allowed_starts_a_new_track():
    lk = RegionLinker(max_displacement_px=2.0, max_gap_frames=1)
    assert lk.update(0, [[5.0, 5.0]]).tolist() == [0]
    assert lk.update(1, [[5.2, 5.0]]).tolist() == [0]
    assert lk.update(4, [[5.4, 5.0]]).tolist() == [1]


def test_match_to_manifest_positions_and_rois():
    tracks = pd.DataFrame({"track_id": [0, 1, 2], "row_px": [10.0, 50.0, 90.0], "col_px": [10.0, 50.0, 90.0]})
    cells = pd.DataFrame({"cell_id": ["a", "b"], "row_px": [52.0, 11.0], "col_px": [49.0, 9.0]})
    m = match_tracks_to_cells(tracks, cells, max_distance_px=5.0)
    assert m["track_id"].tolist() == [0, 1] and m["cell_id"].tolist() == ["b", "a"]
    rois = pd.DataFrame({"cell_id": ["x"], "roi_row0_px": [80], "roi_col0_px": [80], "roi_row1_px": [100],
                         "roi_col1_px": [100]})
    m = match_tracks_to_cells(tracks, rois)
    assert m["track_id"].tolist() == [2] and m["cell_id"].tolist() == ["x"]


def test_decorrelation_time_of_an_exponential():
    lag = np.arange(1, 21) * 0.5
    corr = 0.95 * np.exp(-(lag - 0.5) / 3.0)
    tau, msg = decorrelation_time(lag, corr)
    # falls to 1/e of the first-lag value 3 s after the first lag; linear interpolation error < 0.05 s
    assert msg == "" and tau == pytest.approx(3.5, abs=0.05)
    tau, msg = decorrelation_time(lag, np.full(20, 0.9))
    assert math.isnan(tau) and "stays above" in msg
