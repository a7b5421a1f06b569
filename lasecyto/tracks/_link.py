"""Linking detections over frames into tracks by two rounds of linear assignment.

The core, :func:`link_detections`, works on plain arrays of frame indices and
positions in any unit (plus, optionally, intensities and widths).  It follows
the two-step structure of Jaqaman et al. (2008), Nat. Methods 5, 695-702:

1. **Frame to frame.**  The segments that reached frame ``f - 1`` and the
   detections of frame ``f`` are matched by one linear assignment problem on
   the augmented cost matrix

       [[C,  D ],
        [B,  C']]

   ``C`` holds the link costs (forbidden beyond the gate), ``D`` and ``B`` are
   diagonal "no link" blocks (a segment ends, a detection starts a segment)
   and ``C'`` is the transpose of the allowed pattern of ``C``, which keeps the
   problem square and feasible.  The no-link cost is 1.05 times the largest
   gated link cost.  A segment's position is predicted from its own velocity
   as the common step of the whole comb into frame ``f`` (the shift that
   aligns the most predictions with detections) plus the segment's own
   velocity relative to that common motion (a straight-line fit to its last
   points; zero for a segment of one point).
2. **Gap closing.**  A second assignment of the same structure over segment
   ends and segment starts joins segments across up to ``max_gap`` missing
   frames (or none: a segment too young for a velocity in step 1 is predicted
   backwards from its own start), predicting across the gap with the common
   motion and the relative velocities of both segments.

A link's cost is dimensionless: the squared distance from the prediction in
units of ``max_step / 3`` (a third of the gate), plus, when given, the squared
log ratio of intensities in units of ``intensity_scale``, the squared log
ratio of widths in units of ``width_scale`` and, for gap closing, the squared
velocity difference in units of ``max_step / 6`` per frame.  Intensity, width
and velocity are what tell two modes apart where they cross in wavelength.

:func:`link_positions` is the same with positions only; :func:`link_lines`
applies it to one cell's ``lines`` table and flags mode hops
(:func:`lasecyto.tracks.flag_hops`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment

from .. import tables
from ..exceptions import InputError
from ._hops import flag_hops

__all__ = ["LinkResult", "link_detections", "link_positions", "link_lines"]

_NO_LINK_FACTOR = 1.05
_VELOCITY_POINTS = 4      # points of a segment's end (or start) fitted for its velocity
_LEVEL_POINTS = 3         # points averaged for a segment's intensity and width at an end
_POSITION_SIGMAS = 3.0    # the gate is this many position units of the cost
_VELOCITY_SIGMAS = 6.0    # velocity unit of the gap-closing cost: max_step / 6 per frame
_COMMON_SEARCH = 3.0      # the common step of a comb is searched within this many gates of the last one
_COMMON_SHARE = 0.3       # ... and trusted when at least this share of the possible pairs agree
_YOUNG_GATE = 2.0         # gate factor for a segment without a velocity of its own (one point)


@dataclass(frozen=True)
class LinkResult:
    """Result of :func:`link_detections` (arrays in input order).

    Attributes
    ----------
    track_id : ndarray of int
        Track of every detection, numbered from 0 by first frame, then first
        position; -1 for detections that were not linked (NaN position).
    segment_id : ndarray of int
        Frame-to-frame segment (step 1) of every detection, numbered the same way.
    n_gap_links : int
        Segments joined across missing frames by the second assignment.
    """

    track_id: np.ndarray
    segment_id: np.ndarray
    n_gap_links: int


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
    """Solve the augmented assignment for a (n_rows, n_cols) cost matrix.

    ``cost`` holds ``inf`` where a link is forbidden.  The no-link cost is
    1.05 x the largest allowed cost (``fallback_cost`` when that is 0).
    Returns the list of (row, col) links chosen, by increasing row.
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
    big[:n, m:][np.diag_indices(n)] = no_link          # D: row gets no partner (segment ends)
    big[n:, :m][np.diag_indices(m)] = no_link          # B: column gets no partner (segment starts)
    big[n:, m:] = np.where(allowed.T, 0.0, np.inf)     # C': keeps the matrix feasible
    rows, cols = linear_sum_assignment(big)
    keep = (rows < n) & (cols < m)
    return list(zip(rows[keep].tolist(), cols[keep].tolist()))


def _slope(t, x):
    """Least-squares slope of x against t (NaN for fewer than 2 distinct t)."""
    if t.size < 2:
        return np.nan
    tc = t - t.mean()
    den = float(tc @ tc)
    return float(tc @ (x - x.mean()) / den) if den > 0 else np.nan


def _common_step(pred, x, *, around, search, tol):
    """Shift that aligns the most predicted positions with detections (the comb's common step).

    Every pair (prediction, detection) proposes its difference; the proposal
    with the most others within ``tol`` wins (ties: nearest ``around``) and
    is refined as their median.  Proposals further than ``search`` from
    ``around`` are ignored; with too little agreement ``around`` is returned.
    """
    d = (x[None, :] - pred[:, None]).ravel()
    d = np.sort(d[np.abs(d - around) <= search])
    need = max(2, int(np.ceil(_COMMON_SHARE * min(pred.size, x.size))))
    if d.size < need:
        return float(around)
    lo = np.searchsorted(d, d - tol, side="left")
    hi = np.searchsorted(d, d + tol, side="right")
    count = hi - lo
    best = np.flatnonzero(count == count.max())
    j = best[np.argmin(np.abs(d[best] - around))]
    if count[j] < need:
        return float(around)
    return float(np.median(d[lo[j]:hi[j]]))


def _log_or_none(name, values, n):
    if values is None:
        return None
    a = _as_1d(name, values, np.float64)
    if a.shape != (n,):
        raise InputError(f"{name} and position differ in length", field=name,
                         expected=f"{n} values", found=f"{a.size} values")
    return a


def _check_scale(name, value):
    if not (np.isfinite(value) and value > 0):
        raise InputError("scale must be a positive number", field=name, expected="> 0",
                         found=repr(value))
    return float(value)


def _renumber(track_id, frame, position):
    """Renumber ids 0.. by first frame, then first position (ids < 0 kept)."""
    out = np.full(track_id.size, -1, dtype=np.int64)
    ok = track_id >= 0
    if not ok.any():
        return out
    idx = np.flatnonzero(ok)
    order = idx[np.lexsort((position[idx], frame[idx]))]
    ids, first = np.unique(track_id[order], return_index=True)
    j = order[first]
    rank = np.empty(ids.size, dtype=np.int64)
    rank[np.lexsort((ids, position[j], frame[j]))] = np.arange(ids.size)
    out[ok] = rank[np.searchsorted(ids, track_id[ok])]
    return out


def link_detections(frame, position, *, max_step, max_gap=3, intensity=None, width=None,
                    velocity=True, common_motion=True, intensity_scale=0.5, width_scale=0.3):
    """Link detections over frames into tracks (frame-to-frame assignment, then gap closing).

    Parameters
    ----------
    frame : array of int, shape (n,)
        Frame index of each detection.
    position : array of float, shape (n,)
        Position of each detection (any unit; NaN detections are not linked).
    max_step : float
        Gate: largest distance between a predicted position and a detection
        one frame later, same unit as ``position``.  Across ``g`` frames the
        gate is ``max_step * sqrt(g)``.
    max_gap : int
        Consecutive frames a track may miss and still be continued (closed
        by the second assignment).
    intensity : array of float, shape (n,), optional
        Positive detection intensities (e.g. line areas); enter the cost as
        the log ratio to the segment's recent intensity.
    width : array of float, shape (n,), optional
        Positive detection widths (e.g. FWHM); enter the cost as a log ratio.
    velocity : bool
        Predict positions from the common step of the comb and each segment's
        own velocity; otherwise a segment stays where it was last seen.
    common_motion : bool
        Estimate the common step of all detections frame by frame (lines of
        one laser move together); switch off for independent emitters, whose
        predictions then use their own velocities alone.
    intensity_scale, width_scale : float
        Log ratios that cost as much as a third of the gate in position.

    Returns
    -------
    LinkResult

    Notes
    -----
    Deterministic: detections are stably sorted by (frame, position) before
    linking, so the result does not depend on the input order except for
    exact duplicates, which keep their input order; every assignment is solved
    exactly by :func:`scipy.optimize.linear_sum_assignment`.
    """
    frame = _as_1d("frame", frame, np.int64)
    position = _as_1d("position", position, np.float64)
    n_all = frame.size
    if position.shape != frame.shape:
        raise InputError("frame and position differ in length", field="position",
                         expected=f"{frame.size} values", found=f"{position.size} values")
    if not (np.isfinite(max_step) and max_step > 0):
        raise InputError("gate must be a positive number", field="max_step",
                         expected="> 0", found=repr(max_step))
    if int(max_gap) != max_gap or max_gap < 0:
        raise InputError("gap must be a non-negative integer", field="max_gap",
                         expected="integer >= 0", found=repr(max_gap))
    max_gap = int(max_gap)
    intensity = _log_or_none("intensity", intensity, n_all)
    width = _log_or_none("width", width, n_all)
    intensity_scale = _check_scale("intensity_scale", intensity_scale)
    width_scale = _check_scale("width_scale", width_scale)
    valid = np.isfinite(position)
    for name, arr in (("intensity", intensity), ("width", width)):
        if arr is not None and np.any(~(arr > 0) & valid):
            raise InputError(f"{name} must be positive", field=name,
                             expected="> 0 for every linked detection", found="a value <= 0 or NaN")
    log_i = np.log(np.where(valid, intensity, 1.0)) if intensity is not None else None
    log_w = np.log(np.where(valid, width, 1.0)) if width is not None else None

    track_out = np.full(n_all, -1, dtype=np.int64)
    seg_out = np.full(n_all, -1, dtype=np.int64)
    idx = np.flatnonzero(valid)
    if idx.size == 0:
        return LinkResult(track_out, seg_out, 0)
    order = idx[np.lexsort((position[idx], frame[idx]))]  # lexsort is stable
    sigma_p = max_step / _POSITION_SIGMAS

    def extra_cost(i_ref, w_ref, det):
        c = 0.0
        if log_i is not None:
            c = c + ((log_i[det][None, :] - i_ref[:, None]) / intensity_scale) ** 2
        if log_w is not None:
            c = c + ((log_w[det][None, :] - w_ref[:, None]) / width_scale) ** 2
        return c

    # ---- step 1: frame to frame -------------------------------------------------------------
    members = []          # detection indices of each segment, in frame order
    seg = np.full(n_all, -1, dtype=np.int64)
    f_sorted = frame[order]
    starts = np.flatnonzero(np.r_[True, f_sorted[1:] != f_sorted[:-1]])
    ends = np.r_[starts[1:], order.size]
    frames_u = f_sorted[starts]
    common = np.zeros(frames_u.size)     # common step of the comb into each frame
    cum = {}                             # cumulative common displacement at each frame
    open_segs = []        # segments whose last detection is in the previous frame
    prev_f = None
    for fi, (a, b) in enumerate(zip(starts, ends)):
        f = int(f_sorted[a])
        det = order[a:b]
        act = open_segs if prev_f == f - 1 else []
        links = []
        prev_common = common[fi - 1] if fi > 0 else 0.0
        if act:
            n = len(act)
            last = np.array([members[s][-1] for s in act])
            own = np.zeros(n)
            if velocity:
                # a segment's velocity relative to the common motion (slope of x - C over its last points)
                for r, s in enumerate(act):
                    tail = np.asarray(members[s][-_VELOCITY_POINTS:])
                    if tail.size >= 2:
                        c_tail = np.array([cum[int(ff)] for ff in frame[tail]])
                        own[r] = _slope(frame[tail].astype(float), position[tail] - c_tail)
                step = (_common_step(position[last] + own, position[det], around=prev_common,
                                     search=_COMMON_SEARCH * max_step, tol=sigma_p)
                        if common_motion else 0.0)
                common[fi] = step
                pred = position[last] + own + step
            else:
                pred = position[last]
            # a segment of one point has no velocity of its own yet: a wider gate
            young = np.array([len(members[s]) < 2 for s in act]) if velocity else np.zeros(n, bool)
            gate = np.where(young, _YOUNG_GATE * max_step, max_step)
            d = position[det][None, :] - pred[:, None]
            cost = (d / (gate[:, None] / _POSITION_SIGMAS)) ** 2
            if log_i is not None or log_w is not None:
                i_ref = (np.array([log_i[members[s][-_LEVEL_POINTS:]].mean() for s in act])
                         if log_i is not None else None)
                w_ref = (np.array([log_w[members[s][-_LEVEL_POINTS:]].mean() for s in act])
                         if log_w is not None else None)
                cost = cost + extra_cost(i_ref, w_ref, det)
            cost = np.where(np.abs(d) <= gate[:, None], cost, np.inf)
            links = _assign(cost, fallback_cost=_NO_LINK_FACTOR * _POSITION_SIGMAS**2)
        elif fi > 0 and velocity:
            common[fi] = prev_common
        cum[f] = (cum[prev_f] + common[fi] * (f - prev_f)) if prev_f is not None else 0.0
        taken = np.zeros(det.size, dtype=bool)
        new_open = []
        for r, col in links:
            s = act[r]
            members[s].append(int(det[col]))
            seg[det[col]] = s
            taken[col] = True
            new_open.append(s)
        for col in np.flatnonzero(~taken):
            members.append([int(det[col])])
            seg[det[col]] = len(members) - 1
            new_open.append(len(members) - 1)
        open_segs = sorted(new_open)
        prev_f = f

    # ---- step 2: gap closing over segments ------------------------------------------------------
    n_seg = len(members)
    first = np.array([m[0] for m in members])
    last = np.array([m[-1] for m in members])
    f_first, f_last = frame[first], frame[last]
    # velocities relative to the common motion C of the comb, at both ends of every segment
    cum_det = np.array([cum[int(ff)] for ff in frame[order]])
    c_of = np.zeros(n_all)
    c_of[order] = cum_det
    v_end = np.full(n_seg, np.nan)
    v_start = np.full(n_seg, np.nan)
    if velocity:
        for s, m in enumerate(members):
            if len(m) >= 2:
                tail, head = np.array(m[-_VELOCITY_POINTS:]), np.array(m[:_VELOCITY_POINTS])
                v_end[s] = _slope(frame[tail].astype(float), position[tail] - c_of[tail])
                v_start[s] = _slope(frame[head].astype(float), position[head] - c_of[head])
    n_gap_links = 0
    successor = np.full(n_seg, -1, dtype=np.int64)
    if max_gap > 0 and n_seg > 1:
        gap = f_first[None, :] - f_last[:, None]                       # (end segment, start segment)
        cand = (gap >= 1) & (gap <= max_gap + 1)
        # gap 1 again: a segment too young for a velocity in step 1 may now be predicted backwards
        if cand.any():
            g = np.where(cand, gap, 1).astype(float)
            ve, vs = v_end[:, None], v_start[None, :]
            if velocity:
                both = np.isfinite(ve) & np.isfinite(vs)
                v_mean = np.where(both, 0.5 * (ve + vs),
                                  np.where(np.isfinite(ve), ve, np.where(np.isfinite(vs), vs, 0.0)))
                moved = c_of[first][None, :] - c_of[last][:, None]       # common motion across the gap
            else:
                both = np.zeros_like(cand)
                v_mean = np.zeros_like(g)
                moved = 0.0
            d = position[first][None, :] - position[last][:, None] - moved - v_mean * g
            known = (np.isfinite(ve) | np.isfinite(vs)) if velocity else np.ones_like(cand)
            gate = max_step * np.sqrt(g) * np.where(known, 1.0, _YOUNG_GATE)
            cost = (d / (gate / _POSITION_SIGMAS)) ** 2
            if velocity:
                dv = np.where(both, ve - vs, 0.0)
                cost = cost + (dv / (max_step / _VELOCITY_SIGMAS)) ** 2
            if log_i is not None:
                i_end = np.array([log_i[m[-_LEVEL_POINTS:]].mean() for m in members])
                i_start = np.array([log_i[m[:_LEVEL_POINTS]].mean() for m in members])
                cost = cost + ((i_start[None, :] - i_end[:, None]) / intensity_scale) ** 2
            if log_w is not None:
                w_end = np.array([log_w[m[-_LEVEL_POINTS:]].mean() for m in members])
                w_start = np.array([log_w[m[:_LEVEL_POINTS]].mean() for m in members])
                cost = cost + ((w_start[None, :] - w_end[:, None]) / width_scale) ** 2
            ok = cand & (np.abs(d) <= gate)
            cost = np.where(ok, cost, np.inf)
            rows_any = np.flatnonzero(ok.any(axis=1))
            cols_any = np.flatnonzero(ok.any(axis=0))
            for r, c in _assign(cost[np.ix_(rows_any, cols_any)],
                                fallback_cost=_NO_LINK_FACTOR * _POSITION_SIGMAS**2):
                successor[rows_any[r]] = cols_any[c]
                n_gap_links += 1

    # chains of segments -> tracks (a start has at most one predecessor, time increases)
    has_pred = np.zeros(n_seg, dtype=bool)
    has_pred[successor[successor >= 0]] = True
    track_of_seg = np.full(n_seg, -1, dtype=np.int64)
    t = 0
    for s in range(n_seg):
        if has_pred[s]:
            continue
        k = s
        while k >= 0:
            track_of_seg[k] = t
            k = successor[k]
        t += 1
    ok = seg >= 0
    track_out[ok] = track_of_seg[seg[ok]]
    seg_out[ok] = seg[ok]
    return LinkResult(_renumber(track_out, frame, position), _renumber(seg_out, frame, position),
                      int(n_gap_links))


def link_positions(frame, position, *, max_step, max_gap=3, velocity=True, weights=None):
    """Link detections over frames into tracks, from positions (and intensities) alone.

    The same as :func:`link_detections` with ``intensity=weights`` and no
    widths; returns the track ids only.

    Parameters
    ----------
    frame : array of int, shape (n,)
        Frame index of each detection.
    position : array of float, shape (n,)
        Position of each detection (any unit; NaN detections are not linked).
    max_step : float
        Gate per frame after motion prediction (``max_step * sqrt(g)`` across ``g`` frames).
    max_gap : int
        Number of consecutive frames a track may miss and still be continued.
    velocity : bool
        Predict positions from velocities; otherwise the last position.
    weights : array of float, shape (n,), optional
        Positive detection intensities; links between similar intensities are favoured.

    Returns
    -------
    track_id : ndarray of int, shape (n,)
        Track of every detection, numbered from 0 in order of first
        appearance, then of position; -1 for NaN positions.
    """
    return link_detections(frame, position, max_step=max_step, max_gap=max_gap, intensity=weights,
                           velocity=velocity).track_id


def link_lines(lines, *, max_step_nm=0.15, max_gap_frames=3, min_length_frames=3, only_lasing=True,
               intensity_scale=0.5, width_scale=0.3, hop_spacing_per_um=None, hop_tolerance=0.05):
    """Link one cell's fitted lines into mode tracks and flag mode hops.

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
    intensity_scale, width_scale : float
        Log ratios of ``area_counts`` and ``fwhm_nm`` that cost as much as a
        third of the gate (see :func:`link_detections`).
    hop_spacing_per_um : float, optional
        Free spectral range as a wavenumber spacing 1 / (2 n_g L) in 1/um
        (e.g. from :func:`lasecyto.cavity.comb_spacing`).  When given, a
        track that starts where another ended one spacing away (within
        ``hop_tolerance`` x spacing) is flagged as a mode hop
        (:func:`lasecyto.tracks.flag_hops`).

    Returns
    -------
    pandas.DataFrame
        A ``tracks`` table: the linked rows with ``track_id`` (0.. by first
        appearance, then wavelength), ``hop``, and ``mode_family``,
        ``mode_number``, ``transverse_order`` = -1 (filled by
        :func:`lasecyto.cavity.assign_mode_families` and
        :func:`lasecyto.cavity.assign_mode_numbers`), sorted by ``track_id``
        then ``frame``.
    """
    lines = tables.validate(lines, "lines")
    cells = pd.unique(lines["cell_id"])
    if len(cells) > 1:
        raise InputError("lines of more than one cell", field="cell_id",
                         expected="one cell", found=f"{len(cells)} cells")
    if int(min_length_frames) != min_length_frames or min_length_frames < 1:
        raise InputError("minimum track length must be a positive integer", field="min_length_frames",
                         expected="integer >= 1", found=repr(min_length_frames))
    if hop_spacing_per_um is not None and not (np.isfinite(hop_spacing_per_um) and hop_spacing_per_um > 0):
        raise InputError("hop spacing must be a positive wavenumber spacing", field="hop_spacing_per_um",
                         expected="> 0 (1/um) or None", found=repr(hop_spacing_per_um))
    keep = lines["fit_ok"].to_numpy(bool).copy()
    if only_lasing:
        keep &= lines["lasing"].to_numpy(bool)
    lam = lines["center_nm"].to_numpy(float)
    area = lines["area_counts"].to_numpy(float)
    fwhm = lines["fwhm_nm"].to_numpy(float)
    keep &= np.isfinite(lam) & (lam > 0)
    keep &= np.isfinite(area) & (area > 0) & np.isfinite(fwhm) & (fwhm > 0)
    sub = lines.loc[keep].reset_index(drop=True)
    if len(sub) == 0:
        return tables.empty("tracks")
    frame = sub["frame"].to_numpy(np.int64)
    pos = sub["center_nm"].to_numpy(float)
    res = link_detections(frame, pos, max_step=max_step_nm, max_gap=max_gap_frames,
                          intensity=sub["area_counts"].to_numpy(float), width=sub["fwhm_nm"].to_numpy(float),
                          intensity_scale=intensity_scale, width_scale=width_scale)
    tid = res.track_id
    ids, counts = np.unique(tid, return_counts=True)
    short = ids[counts < min_length_frames]
    tid = np.where(np.isin(tid, short), -1, tid)
    tid = _renumber(tid, frame, pos)
    hop = np.zeros(tid.size, dtype=bool)
    if hop_spacing_per_um is not None and np.any(tid >= 0):
        ok = tid >= 0
        hop[ok] = flag_hops(frame[ok], 1e3 / pos[ok], tid[ok], spacing=float(hop_spacing_per_um),
                            tolerance=hop_tolerance, max_gap=max_gap_frames)
    sub["track_id"] = tid
    sub["mode_family"] = np.full(len(sub), -1, dtype=np.int64)
    sub["mode_number"] = np.full(len(sub), -1, dtype=np.int64)
    sub["transverse_order"] = np.full(len(sub), -1, dtype=np.int64)
    sub["hop"] = hop
    sub = sub.loc[tid >= 0]
    if len(sub) == 0:
        return tables.empty("tracks")
    sub = sub.sort_values(["track_id", "frame"], kind="stable").reset_index(drop=True)
    return tables.validate(sub, "tracks")
