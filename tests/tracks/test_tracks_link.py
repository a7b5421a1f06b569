import numpy as np
import pandas as pd
import pytest
from scipy.optimize import linear_sum_assignment

from lasecyto import tables
from lasecyto.exceptions import InputError
from lasecyto.tracks import link_lines, link_positions
from lasecyto.tracks._link import _assign


def _lines_table(frame, center_nm, *, lasing=None, fit_ok=None, cell_id="c0", err_nm=0.002):
    frame = np.asarray(frame, dtype=np.int64)
    center_nm = np.asarray(center_nm, dtype=float)
    n = frame.size
    line_id = np.zeros(n, dtype=np.int64)
    for f in np.unique(frame):
        sel = np.flatnonzero(frame == f)
        line_id[sel[np.argsort(center_nm[sel], kind="stable")]] = np.arange(sel.size)
    df = pd.DataFrame({
        "cell_id": [cell_id] * n, "frame": frame, "time_s": 10.0 * frame, "line_id": line_id,
        "center_px": (center_nm - 582.0) / 0.05, "center_err_px": np.full(n, err_nm / 0.05),
        "center_nm": center_nm, "center_err_nm": np.full(n, err_nm), "fwhm_px": np.full(n, 2.5),
        "fwhm_nm": np.full(n, 0.125), "area_counts": np.full(n, 1e4), "area_err_counts": np.full(n, 100.0),
        "amplitude_counts": np.full(n, 3e3), "background_counts": np.full(n, 30.0),
        "snr": np.full(n, 100.0), "chi2_red": np.ones(n),
        "lasing": np.ones(n, bool) if lasing is None else np.asarray(lasing, bool),
        "saturated": np.zeros(n, bool),
        "fit_ok": np.ones(n, bool) if fit_ok is None else np.asarray(fit_ok, bool),
        "fit_message": [""] * n,
    })
    return tables.validate(df, "lines")


def test_scipy_doc_example_through_wrapper():
    # check-values.md section 14 (scipy.optimize.linear_sum_assignment docs example):
    # C = [[4,1,3],[2,0,5],[3,2,2]] -> rows [0,1,2], cols [1,0,2], cost 5 (exact)
    c = np.array([[4.0, 1, 3], [2, 0, 5], [3, 2, 2]])
    rows, cols = linear_sum_assignment(c)
    assert cols.tolist() == [1, 0, 2] and c[rows, cols].sum() == 5
    # our augmented matrix must choose the same links (no-link cost 1.05 x 5 never pays here)
    links = _assign(c)
    assert sorted(links) == [(0, 1), (1, 0), (2, 2)]
    assert sum(c[r, k] for r, k in links) == 5


def test_worked_check_section_14():
    # check-values.md section 14 worked check: gate 0.5 nm, cost (d lambda)^2, no-link 1.05 x max = 0.01512 nm^2
    # -> 600.00->600.12, 607.50->607.58, 615.20->615.31, 612.00 is a birth (exact identities)
    f = [0, 0, 0, 1, 1, 1, 1]
    p = [600.00, 607.50, 615.20, 600.12, 607.58, 612.00, 615.31]
    tid = link_positions(f, p, max_step=0.5)
    assert tid.tolist() == [0, 1, 2, 0, 1, 3, 2]
    # input order must not matter (only the stable (frame, position) sort)
    perm = np.array([6, 3, 0, 5, 1, 4, 2])
    tid_p = link_positions(np.asarray(f)[perm], np.asarray(p)[perm], max_step=0.5)
    assert tid_p.tolist() == tid[perm].tolist()


def test_conflict_resolved_by_total_cost_and_death():
    # two tracks, one detection between them: the nearer track takes it, the other pauses
    f = [0, 0, 1]
    p = [10.0, 10.3, 10.2]
    tid = link_positions(f, p, max_step=0.5, velocity=False)
    assert tid.tolist() == [0, 1, 1]


def test_gap_closing_and_gap_limit():
    f = [0, 1, 5, 6]
    p = [1.0, 1.0, 1.0, 1.0]
    assert link_positions(f, p, max_step=0.1, max_gap=3).tolist() == [0, 0, 0, 0]
    assert link_positions(f, p, max_step=0.1, max_gap=2).tolist() == [0, 0, 1, 1]


def test_velocity_prediction_follows_fast_drift():
    # a first step of 0.09, then 0.12 per frame, gate 0.1: only the velocity prediction can follow
    f = np.arange(10)
    p = 5.0 + np.r_[0.0, np.cumsum(np.r_[0.09, np.full(8, 0.12)])]
    assert np.unique(link_positions(f, p, max_step=0.1, velocity=True)).size == 1
    assert np.unique(link_positions(f, p, max_step=0.1, velocity=False)).size > 1


def test_weights_break_a_near_tie():
    # two tracks at 0.0 and 1.0 move to 0.52 / 0.48 crossing-like ambiguity; intensities decide
    f = [0, 0, 1, 1]
    p = [0.0, 1.0, 0.47, 0.53]
    w = [100.0, 10000.0, 10000.0, 100.0]
    no_w = link_positions(f, p, max_step=0.6, velocity=False)
    with_w = link_positions(f, p, max_step=0.6, velocity=False, weights=w)
    assert no_w.tolist() == [0, 1, 0, 1]
    assert with_w.tolist() == [0, 1, 1, 0]


def test_nan_and_bad_input():
    tid = link_positions([0, 0, 1], [1.0, np.nan, 1.01], max_step=0.1)
    assert tid.tolist() == [0, -1, 0]
    with pytest.raises(InputError, match="max_step"):
        link_positions([0], [1.0], max_step=0.0)
    with pytest.raises(InputError, match="position"):
        link_positions([0, 1], [1.0], max_step=0.1)


def _synthetic_modes(rng, n_frames=90, n_modes=20):
    """Seeded mode trajectories: common red drift with acceleration, per-mode scatter, dropouts, edge births."""
    rng = np.random.default_rng(rng)
    base = 600.0 + np.cumsum(rng.uniform(0.4, 0.9, n_modes))
    t = np.arange(n_frames, dtype=float)
    # smooth drift: accelerates then decelerates, peak speed 0.08 nm/frame
    t0, width = rng.uniform(25, 45), 12.0
    drift = 0.08 * width * np.logaddexp(0, (t - t0) / width)
    drift -= drift[0]
    drift = np.minimum(drift, 1.5)
    scale = 1.0 + 0.05 * rng.standard_normal(n_modes)
    true_f, true_p, true_id = [], [], []
    for k in range(n_modes):
        present = np.ones(n_frames, bool)
        if k < 3 or k >= n_modes - 3:  # gain-edge modes: born late or die early
            a = rng.integers(0, 40)
            b = rng.integers(a + 20, n_frames + 1)
            present[:a] = False
            present[b:] = False
        for _ in range(rng.integers(1, 4)):  # 1-3 dropouts of 1-3 frames
            s = rng.integers(0, n_frames)
            present[s:s + rng.integers(1, 4)] = False
        ff = np.flatnonzero(present)
        true_f.append(ff)
        true_p.append(base[k] + scale[k] * drift[ff] + 0.004 * rng.standard_normal(ff.size))
        true_id.append(np.full(ff.size, k))
    f = np.concatenate(true_f)
    p = np.concatenate(true_p)
    i = np.concatenate(true_id)
    pump_off = rng.choice(n_frames, 2, replace=False)  # whole-frame dropouts
    keep = ~np.isin(f, pump_off)
    perm = rng.permutation(keep.sum())
    return f[keep][perm], p[keep][perm], i[keep][perm]


def _link_accuracy(frame, truth, found, max_gap):
    """Fractions of true successive links recovered and of found links that are true."""
    def pairs(ids):
        out = set()
        for t in np.unique(ids):
            sel = np.flatnonzero(ids == t)
            sel = sel[np.argsort(frame[sel], kind="stable")]
            for a, b in zip(sel[:-1], sel[1:]):
                if frame[b] - frame[a] <= max_gap + 1:
                    out.add((a, b))
        return out
    true_pairs, found_pairs = pairs(truth), pairs(found)
    return len(true_pairs & found_pairs) / len(true_pairs), len(true_pairs & found_pairs) / len(found_pairs)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_identity_accuracy_synthetic(seed):
    # check-values.md section 14 test use: identity accuracy >= 99 % on seeded synthetic trajectories
    f, p, truth = _synthetic_modes(seed)
    found = link_positions(f, p, max_step=0.15, max_gap=3)
    recall, precision = _link_accuracy(f, truth, found, 3)
    assert recall >= 0.99 and precision >= 0.99
    # majority identity: fraction of detections carrying their track's majority true mode
    correct = 0
    for t in np.unique(found):
        sel = truth[found == t]
        correct += np.bincount(sel).max()
    assert correct / truth.size >= 0.99


def test_link_lines_table():
    f, p, truth = _synthetic_modes(7)
    lasing = np.ones(f.size, bool)
    lasing[::50] = False
    fit_ok = np.ones(f.size, bool)
    fit_ok[7::60] = False
    lines = _lines_table(f, p, lasing=lasing, fit_ok=fit_ok)
    tr = link_lines(lines, min_length_frames=3)
    tables.validate(tr, "tracks")
    assert tr["lasing"].all() and tr["fit_ok"].all()
    assert (tr["mode_family"] == -1).all()
    ids = tr["track_id"].to_numpy()
    assert ids.min() == 0 and np.array_equal(np.unique(ids), np.arange(ids.max() + 1))
    assert tr.groupby("track_id").size().min() >= 3
    first = tr.groupby("track_id").agg(f0=("frame", "min"))
    assert np.all(np.diff(first["f0"].to_numpy()) >= 0)
    # same table twice -> identical output (determinism)
    pd.testing.assert_frame_equal(tr, link_lines(lines, min_length_frames=3))
    # all lines, not only lasing ones, when asked
    assert len(link_lines(lines, only_lasing=False)) > len(tr)


def test_link_lines_empty_and_short():
    empty = link_lines(_lines_table([], []))
    assert len(empty) == 0 and list(empty.columns) == [c.name for c in tables.SCHEMAS["tracks"]]
    short = link_lines(_lines_table([0, 1], [600.0, 600.01]), min_length_frames=3)
    assert len(short) == 0
    two_cells = pd.concat([_lines_table([0], [600.0]), _lines_table([0], [601.0], cell_id="c1")],
                          ignore_index=True)
    with pytest.raises(InputError, match="cell_id"):
        link_lines(two_cells)
