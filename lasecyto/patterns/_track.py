"""Linking lasing regions across frames into cell identities, and matching them to manifest cells."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment

from ..exceptions import InputError

__all__ = ["RegionLinker", "link_regions", "match_tracks_to_cells"]

_BIG = 1e12


class RegionLinker:
    """Gated linear assignment of region centres, frame after frame (streaming).

    A track's next position is predicted from its last position and its
    smoothed velocity (so slow stage drift is followed); a region may join a
    track only within ``max_displacement_px`` of the prediction, widened by
    ``max_displacement_px`` for each frame the track was missed.  Tracks
    unseen for more than ``max_gap_frames`` frames are closed.  Track ids are
    given in order of first appearance (then by row, then column), so the
    result does not depend on anything but the inputs.

    Parameters
    ----------
    max_displacement_px : float
        Gate radius for consecutive frames.
    max_gap_frames : int
        Frames a track may be missing and still be continued.
    velocity_smoothing : float
        Weight of the newest step in the velocity estimate (0 disables prediction).
    """

    def __init__(self, *, max_displacement_px=6.0, max_gap_frames=3, velocity_smoothing=0.3):
        if not max_displacement_px > 0:
            raise InputError("bad gate", field="max_displacement_px", expected="> 0", found=repr(max_displacement_px))
        if int(max_gap_frames) < 0:
            raise InputError("bad gap", field="max_gap_frames", expected=">= 0", found=repr(max_gap_frames))
        self.max_displacement_px = float(max_displacement_px)
        self.max_gap_frames = int(max_gap_frames)
        self.velocity_smoothing = float(velocity_smoothing)
        self._pos = np.zeros((0, 2))
        self._vel = np.zeros((0, 2))
        self._last = np.zeros(0, np.int64)
        self._ids = np.zeros(0, np.int64)
        self._next_id = 0

    def update(self, frame, positions_rc):
        """Assign the regions of ``frame`` (array (n, 2) of row, col) to tracks; returns their track ids."""
        pos = np.asarray(positions_rc, dtype=float).reshape(-1, 2)
        alive = frame - self._last <= self.max_gap_frames + 1
        self._pos, self._vel, self._last, self._ids = (self._pos[alive], self._vel[alive], self._last[alive],
                                                      self._ids[alive])
        out = np.full(len(pos), -1, np.int64)
        if len(self._ids) and len(pos):
            gap = (frame - self._last).astype(float)
            pred = self._pos + self._vel * gap[:, None]
            d = np.hypot(pred[:, None, 0] - pos[None, :, 0], pred[:, None, 1] - pos[None, :, 1])
            gate = self.max_displacement_px * gap[:, None]
            cost = np.where(d <= gate, d * d, _BIG)
            ti, ri = linear_sum_assignment(cost)
            keep = cost[ti, ri] < _BIG
            ti, ri = ti[keep], ri[keep]
            step = (pos[ri] - self._pos[ti]) / gap[ti, None]
            a = self.velocity_smoothing
            self._vel[ti] = (1 - a) * self._vel[ti] + a * step
            self._pos[ti] = pos[ri]
            self._last[ti] = frame
            out[ri] = self._ids[ti]
        new = np.flatnonzero(out < 0)
        if len(new):
            new = new[np.lexsort((pos[new, 1], pos[new, 0]))]
            ids = np.arange(self._next_id, self._next_id + len(new))
            self._next_id += len(new)
            out[new] = ids
            self._pos = np.vstack([self._pos, pos[new]])
            self._vel = np.vstack([self._vel, np.zeros((len(new), 2))])
            self._last = np.concatenate([self._last, np.full(len(new), frame, np.int64)])
            self._ids = np.concatenate([self._ids, ids])
        return out


def link_regions(frame, row_px, col_px, *, max_displacement_px=6.0, max_gap_frames=3, velocity_smoothing=0.3):
    """Track ids for regions given as flat arrays (``frame``, ``row_px``, ``col_px``), see :class:`RegionLinker`."""
    frame = np.asarray(frame, dtype=np.int64)
    pos = np.column_stack([np.asarray(row_px, float), np.asarray(col_px, float)])
    linker = RegionLinker(max_displacement_px=max_displacement_px, max_gap_frames=max_gap_frames,
                          velocity_smoothing=velocity_smoothing)
    out = np.full(len(frame), -1, np.int64)
    order = np.argsort(frame, kind="stable")
    bounds = np.flatnonzero(np.diff(frame[order])) + 1
    for idx in np.split(order, bounds):
        if len(idx):
            out[idx] = linker.update(int(frame[idx[0]]), pos[idx])
    return out


def match_tracks_to_cells(tracks, cells, *, max_distance_px=15.0):
    """Give each tracked region the manifest cell it belongs to.

    Parameters
    ----------
    tracks : pandas.DataFrame
        One row per track: ``track_id``, ``row_px``, ``col_px`` (e.g. the
        median position of the track's regions).
    cells : pandas.DataFrame
        One row per manifest cell: ``cell_id`` and either a position
        (``row_px``, ``col_px``) or a region of interest (``roi_row0_px``,
        ``roi_col0_px``, ``roi_row1_px``, ``roi_col1_px``, half-open).
    max_distance_px : float
        Largest track-to-position distance accepted (positions only).

    Returns
    -------
    pandas.DataFrame
        ``track_id, cell_id, distance_px``, one row per matched track (one
        track per cell at most, by linear assignment on the distance to the
        cell's position or ROI centre; a track must lie inside an ROI).
    """
    for col in ("track_id", "row_px", "col_px"):
        if col not in tracks.columns:
            raise InputError("missing column", path="tracks", field=col, expected="present", found="absent")
    if "cell_id" not in cells.columns:
        raise InputError("missing column", path="cells", field="cell_id", expected="present", found="absent")
    roi_cols = ["roi_row0_px", "roi_col0_px", "roi_row1_px", "roi_col1_px"]
    has_roi = all(c in cells.columns for c in roi_cols)
    has_pos = all(c in cells.columns for c in ("row_px", "col_px"))
    if not (has_roi or has_pos):
        raise InputError("cells have neither positions nor regions of interest", path="cells",
                         field="row_px, col_px", expected=f"row_px, col_px or {', '.join(roi_cols)}",
                         found=", ".join(map(str, cells.columns)))
    tp = tracks[["row_px", "col_px"]].to_numpy(float)
    if has_roi:
        roi = cells[roi_cols].to_numpy(float)
        centre = np.column_stack([(roi[:, 0] + roi[:, 2] - 1) / 2, (roi[:, 1] + roi[:, 3] - 1) / 2])
        inside = ((tp[:, None, 0] >= roi[None, :, 0]) & (tp[:, None, 0] < roi[None, :, 2])
                  & (tp[:, None, 1] >= roi[None, :, 1]) & (tp[:, None, 1] < roi[None, :, 3]))
        d = np.hypot(tp[:, None, 0] - centre[None, :, 0], tp[:, None, 1] - centre[None, :, 1])
        ok = inside
    else:
        cp = cells[["row_px", "col_px"]].to_numpy(float)
        d = np.hypot(tp[:, None, 0] - cp[None, :, 0], tp[:, None, 1] - cp[None, :, 1])
        ok = d <= max_distance_px
    cols = {"track_id": np.zeros(0, np.int64), "cell_id": np.zeros(0, object), "distance_px": np.zeros(0)}
    if not len(tp) or not len(cells):
        return pd.DataFrame(cols)
    cost = np.where(ok, d, _BIG)
    ti, ci = linear_sum_assignment(cost)
    keep = cost[ti, ci] < _BIG
    ti, ci = ti[keep], ci[keep]
    out = pd.DataFrame({"track_id": tracks["track_id"].to_numpy()[ti].astype(np.int64),
                        "cell_id": cells["cell_id"].to_numpy()[ci].astype(object), "distance_px": d[ti, ci]})
    return out.sort_values("track_id", kind="stable").reset_index(drop=True)
