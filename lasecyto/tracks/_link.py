"""Frame-to-frame linking of detections into tracks by linear assignment.

The core, :func:`link_positions`, works on plain arrays of frame indices and
positions in any unit.  At each frame the active tracks (seen within the last
``max_gap + 1`` frames) and the new detections are matched by solving one
linear assignment problem on an augmented cost matrix

    [[C,  D ],
     [B,  C']]

where ``C`` holds the squared distances between predicted track positions and
detections (forbidden beyond the gate), ``D`` and ``B`` are diagonal "no link"
blocks (a track pauses or ends, a detection starts a track) and ``C'`` is the
transpose of the allowed pattern of ``C``, which keeps the problem square and
feasible.  This is the structure of Jaqaman et al. (2008), Nat. Methods 5,
695-702; the no-link cost is 1.05 times the largest gated link cost.

:func:`link_lines` applies it to one cell's ``lines`` table.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment

from .. import tables
from ..exceptions import InputError

__all__ = ["link_positions", "link_lines"]

_NO_LINK_FACTOR = 1.05


def _as_1d(name, values, dtype):
    a = np.asarray(values)
    if a.ndim != 1:
        raise InputError("must be a 1-D array", field=name, expected="1-D array",
                         found=f"shape {a.shape}")
    try:
        return a.astype(dtype, copy=False)
    except (TypeError, ValueError):
        raise InputError("cannot be read as numbers", field=name, expected=f"{dtype} values",
                         found=str(a.dtype)) from None


def _assign(cost, *, fallback_cost=1.0):
    """Solve the augmented assignment for a (n_tracks, n_detections) cost matrix.

    ``cost`` holds ``inf`` where a link is forbidden.  The no-link cost is
    1.05 x the largest allowed cost (``fallback_cost`` when that is 0).
    Returns the list of (track_row, detection_col) links chosen.
    """
    n, m = cost.shape
    allowed = np.isfinite(cost)
    if n == 0 or m == 0 or not allowed.any():
        return []
    no_link = _NO_LINK_FACTOR * float(cost[allowed].max())
    if no_link <= 0.0:  # every gated candidate sits exactly on its prediction
        no_link = fallback_cost
    big = np.full((n + m, m + n), np.inf)
    big[:n, :m] = cost
    big[:n, m:][np.diag_indices(n)] = no_link          # D: track gets no detection
    big[n:, :m][np.diag_indices(m)] = no_link          # B: detection starts a track
    lower_right = np.where(allowed.T, 0.0, np.inf)     # C': keeps the matrix feasible
    big[n:, m:] = lower_right
    rows, cols = linear_sum_assignment(big)
    keep = (rows < n) & (cols < m)
    return list(zip(rows[keep].tolist(), cols[keep].tolist()))


def link_positions(frame, position, *, max_step, max_gap=3, velocity=True, weights=None):
    """Link detections over frames into tracks.

    Parameters
    ----------
    frame : array of int, shape (n,)
        Frame index of each detection.
    position : array of float, shape (n,)
        Position of each detection (any unit; NaN detections are not linked).
    max_step : float
        Largest allowed distance between a track's predicted position and a
        detection in the next frame, same unit as ``position``.  After a gap of
        ``g`` skipped frames the gate is ``max_step * sqrt(g + 1)``.
    max_gap : int
        Number of consecutive frames a track may miss and still be continued.
    velocity : bool
        Predict a track's position from its last two points (constant
        velocity); otherwise the last position is the prediction.
    weights : array of float, shape (n,), optional
        Positive detection intensities.  When given, a link's cost is
        ``d**2 * (1 + ln(w_new / w_last)**2)``, which favours links between
        detections of similar intensity; the gate stays on distance alone.

    Returns
    -------
    track_id : ndarray of int, shape (n,)
        Track of every detection, numbered from 0 in order of first
        appearance, then of position; -1 for NaN positions.

    Notes
    -----
    Deterministic: the detections are stably sorted by (frame, position),
    so ties follow input order.  Each frame's links minimise the summed
    cost by :func:`scipy.optimize.linear_sum_assignment`.
    """
    frame = _as_1d("frame", frame, np.int64)
    position = _as_1d("position", position, np.float64)
    if frame.shape != position.shape:
        raise InputError("frame and position differ in length", field="position",
                         expected=f"{frame.size} values", found=f"{position.size} values")
    if not (np.isfinite(max_step) and max_step > 0):
        raise InputError("gate must be a positive number", field="max_step",
                         expected="> 0", found=repr(max_step))
    if int(max_gap) != max_gap or max_gap < 0:
        raise InputError("gap must be a non-negative integer", field="max_gap",
                         expected="integer >= 0", found=repr(max_gap))
    max_gap = int(max_gap)
    if weights is not None:
        weights = _as_1d("weights", weights, np.float64)
        if weights.shape != position.shape:
            raise InputError("weights and position differ in length", field="weights",
                             expected=f"{position.size} values", found=f"{weights.size} values")
        if np.any(~(weights > 0) & np.isfinite(position)):
            raise InputError("weights must be positive", field="weights",
                             expected="> 0 for every linked detection", found="a value <= 0 or NaN")
        log_w = np.log(np.where(weights > 0, weights, 1.0))

    out = np.full(frame.size, -1, dtype=np.int64)
    valid = np.flatnonzero(np.isfinite(position))
    if valid.size == 0:
        return out
    order = valid[np.lexsort((position[valid], frame[valid]))]  # lexsort is stable

    # per-track state, in lists indexed by provisional id (= final id: creation order)
    last_f, last_p, prev_f, prev_p, last_lw = [], [], [], [], []
    active = []  # provisional ids of tracks that may still be continued
    frames_sorted = frame[order]
    starts = np.flatnonzero(np.r_[True, frames_sorted[1:] != frames_sorted[:-1]])
    ends = np.r_[starts[1:], order.size]
    for a, b in zip(starts, ends):
        f = int(frames_sorted[a])
        det = order[a:b]
        active = [t for t in active if f - last_f[t] <= max_gap + 1]
        n, m = len(active), det.size
        cost = np.full((n, m), np.inf)
        if n:
            t_idx = np.asarray(active)
            lf = np.asarray(last_f)[t_idx]
            lp = np.asarray(last_p)[t_idx]
            elapsed = (f - lf).astype(float)
            pred = lp.copy()
            if velocity:
                pf = np.asarray(prev_f)[t_idx]
                pp = np.asarray(prev_p)[t_idx]
                has_v = pf >= 0
                v = np.where(has_v, (lp - pp) / np.where(has_v, lf - pf, 1), 0.0)
                pred = lp + v * elapsed
            gate = max_step * np.sqrt(elapsed)
            d = position[det][None, :] - pred[:, None]
            ok = np.abs(d) <= gate[:, None]
            c = d * d
            if weights is not None:
                lw = np.asarray(last_lw)[t_idx]
                c = c * (1.0 + (log_w[det][None, :] - lw[:, None]) ** 2)
            cost = np.where(ok, c, np.inf)
        links = _assign(cost, fallback_cost=_NO_LINK_FACTOR * max_step**2)
        linked_det = np.zeros(m, dtype=bool)
        for r, col in links:
            t = active[r]
            i = det[col]
            prev_f[t], prev_p[t] = last_f[t], last_p[t]
            last_f[t], last_p[t] = f, position[i]
            if weights is not None:
                last_lw[t] = log_w[i]
            out[i] = t
            linked_det[col] = True
        for col in np.flatnonzero(~linked_det):  # births, in position order
            i = det[col]
            t = len(last_f)
            last_f.append(f)
            last_p.append(position[i])
            prev_f.append(-1)
            prev_p.append(np.nan)
            last_lw.append(log_w[i] if weights is not None else 0.0)
            active.append(t)
            out[i] = t
    return out


def _renumber(track_id, frame, position):
    """Renumber ids 0.. by first frame, then first position (ids < 0 kept)."""
    out = np.full(track_id.size, -1, dtype=np.int64)
    ok = track_id >= 0
    if not ok.any():
        return out
    ids = np.unique(track_id[ok])
    first_f = np.empty(ids.size)
    first_p = np.empty(ids.size)
    for k, t in enumerate(ids):
        sel = np.flatnonzero(track_id == t)
        j = sel[np.lexsort((position[sel], frame[sel]))[0]]
        first_f[k], first_p[k] = frame[j], position[j]
    rank = np.empty(ids.size, dtype=np.int64)
    rank[np.lexsort((ids, first_p, first_f))] = np.arange(ids.size)
    out[ok] = rank[np.searchsorted(ids, track_id[ok])]
    return out


def link_lines(lines, *, max_step_nm=0.15, max_gap_frames=3, min_length_frames=3, only_lasing=True):
    """Link one cell's fitted lines into mode tracks.

    Parameters
    ----------
    lines : pandas.DataFrame
        A ``lines`` table (see :mod:`lasecyto.tables`) of a single cell.
    max_step_nm : float
        Gate on the frame-to-frame move of a line after velocity prediction.
    max_gap_frames : int
        Frames a mode may be missing (dropout, below threshold) and still be
        continued.
    min_length_frames : int
        Tracks seen in fewer frames are dropped.
    only_lasing : bool
        Link only rows with ``lasing`` (always only rows with ``fit_ok``).

    Returns
    -------
    pandas.DataFrame
        A ``tracks`` table: the linked rows with ``track_id`` (0.. by first
        appearance, then wavelength) and ``mode_family`` = -1 (filled by
        :func:`lasecyto.cavity.assign_mode_families`), sorted by
        ``track_id`` then ``frame``.
    """
    lines = tables.validate(lines, "lines")
    cells = pd.unique(lines["cell_id"])
    if len(cells) > 1:
        raise InputError("lines of more than one cell", field="cell_id",
                         expected="one cell", found=f"{len(cells)} cells")
    if int(min_length_frames) != min_length_frames or min_length_frames < 1:
        raise InputError("minimum track length must be a positive integer", field="min_length_frames",
                         expected="integer >= 1", found=repr(min_length_frames))
    keep = lines["fit_ok"].to_numpy(bool).copy()
    if only_lasing:
        keep &= lines["lasing"].to_numpy(bool)
    keep &= np.isfinite(lines["center_nm"].to_numpy(float))
    sub = lines.loc[keep].reset_index(drop=True)
    if len(sub) == 0:
        return tables.empty("tracks")
    frame = sub["frame"].to_numpy(np.int64)
    pos = sub["center_nm"].to_numpy(float)
    tid = link_positions(frame, pos, max_step=max_step_nm, max_gap=max_gap_frames, velocity=True)
    ids, counts = np.unique(tid, return_counts=True)
    short = ids[counts < min_length_frames]
    tid = np.where(np.isin(tid, short), -1, tid)
    tid = _renumber(tid, frame, pos)
    sub["track_id"] = tid
    sub["mode_family"] = np.full(len(sub), -1, dtype=np.int64)
    sub = sub.loc[tid >= 0]
    if len(sub) == 0:
        return tables.empty("tracks")
    sub = sub.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    return tables.validate(sub, "tracks")
