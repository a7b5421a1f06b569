"""Mode hops: a track that ends where another starts about one comb spacing away.

A laser mode hop moves the emission from one longitudinal mode to its
neighbour: a line vanishes and, in the same frame or within a few frames, a
line appears one free spectral range away.  The two are different modes, so
they are never linked; the new track is flagged instead.
"""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = ["flag_hops", "common_drift"]


def common_drift(frame, position, track_id):
    """Cumulative displacement shared by all tracks, per frame.

    The median over tracks of the move between consecutive frames of a track
    is summed over frames (0 at the first frame; frames without a move keep
    the previous value).

    Returns
    -------
    frames : ndarray of int
        Sorted distinct frames.
    drift : ndarray of float
        Common displacement at each of ``frames`` since the first.
    """
    frame = np.asarray(frame, dtype=np.int64)
    position = np.asarray(position, dtype=float)
    track_id = np.asarray(track_id, dtype=np.int64)
    frames = np.unique(frame)
    order = np.lexsort((frame, track_id))
    t, f, x = track_id[order], frame[order], position[order]
    same = (t[1:] == t[:-1]) & (f[1:] > f[:-1])
    step = (x[1:] - x[:-1])[same] / (f[1:] - f[:-1])[same]
    at = f[1:][same]
    rate = np.zeros(frames.size)
    if step.size:
        pos = np.searchsorted(frames, at)
        for j in np.unique(pos):
            rate[j] = np.median(step[pos == j])
    gaps = np.diff(frames, prepend=frames[:1])
    return frames, np.cumsum(rate * gaps)


def flag_hops(frame, position, track_id, *, spacing, tolerance=0.05, max_gap=3):
    """Flag the first detection of every track that began by a hop from another track.

    A start of track B is a hop when a track A ended 1 to ``max_gap + 1``
    frames earlier and B's start lies one ``spacing`` (either side) from A's
    end after removing the common drift of all tracks, within
    ``tolerance * spacing``.  Each ended track explains at most one hop (the
    closest match wins; ties go to the earlier start, then the lower id).

    Parameters
    ----------
    frame, position, track_id : arrays, shape (n,)
        Linked detections; ``position`` in a unit in which the comb is evenly
        spaced (wavenumber for a Fabry-Perot).
    spacing : float
        Comb spacing (free spectral range) in the unit of ``position``.
    tolerance : float
        Allowed mismatch as a fraction of ``spacing``.
    max_gap : int
        Frames that may lie between the end of A and the start of B, minus one.

    Returns
    -------
    ndarray of bool, shape (n,)
        True on the first detection of each hopped track.
    """
    frame = np.asarray(frame, dtype=np.int64)
    position = np.asarray(position, dtype=float)
    track_id = np.asarray(track_id, dtype=np.int64)
    if not (frame.shape == position.shape == track_id.shape) or frame.ndim != 1:
        raise InputError("frame, position and track_id must be 1-D and of equal length", field="position",
                         expected=f"{frame.size} values", found=f"shapes {position.shape}, {track_id.shape}")
    if not (np.isfinite(spacing) and spacing > 0):
        raise InputError("hop spacing must be positive", field="spacing", expected="> 0", found=repr(spacing))
    if not (np.isfinite(tolerance) and 0 < tolerance < 0.5):
        raise InputError("hop tolerance out of range", field="tolerance", expected="0 < tolerance < 0.5",
                         found=repr(tolerance))
    out = np.zeros(frame.size, dtype=bool)
    if frame.size == 0:
        return out
    frames, drift = common_drift(frame, position, track_id)
    rel = position - drift[np.searchsorted(frames, frame)]
    ids = np.unique(track_id)
    first = np.empty(ids.size, dtype=np.int64)
    last = np.empty(ids.size, dtype=np.int64)
    for k, t in enumerate(ids):
        sel = np.flatnonzero(track_id == t)
        sel = sel[np.argsort(frame[sel], kind="stable")]
        first[k], last[k] = sel[0], sel[-1]
    gap = frame[first][None, :] - frame[last][:, None]                  # (ended A, started B)
    d = np.abs(rel[first][None, :] - rel[last][:, None])
    miss = np.abs(d - spacing)
    cand = (gap >= 1) & (gap <= int(max_gap) + 1) & (miss <= tolerance * spacing)
    np.fill_diagonal(cand, False)
    a_idx, b_idx = np.nonzero(cand)
    order = np.lexsort((a_idx, b_idx, frame[first][b_idx], miss[a_idx, b_idx]))
    used_a, used_b = set(), set()
    for j in order:
        a, b = int(a_idx[j]), int(b_idx[j])
        if a in used_a or b in used_b:
            continue
        used_a.add(a)
        used_b.add(b)
        out[first[b]] = True
    return out
