"""Scores of a linking against known identities (synthetic truth)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError

__all__ = ["LinkScores", "identity_scores"]


@dataclass(frozen=True)
class LinkScores:
    """Result of :func:`identity_scores`.

    Attributes
    ----------
    accuracy : float
        Frame-to-frame identity accuracy: among detections that have a
        predecessor in the truth or in the linking, the fraction whose
        predecessor is the same in both.
    switches_per_1000_links : float
        Identity switches (links that join detections of two different true
        identities) per 1000 links made.
    n_links : int
        Links made (pairs of successive detections of a found track).
    n_true_links : int
        Links in the truth (successive detections of one identity no more than
        ``max_gap + 1`` frames apart).
    n_switches : int
        Links made between different true identities.
    n_missed : int
        True links not made.
    """

    accuracy: float
    switches_per_1000_links: float
    n_links: int
    n_true_links: int
    n_switches: int
    n_missed: int


def _predecessor(frame, ids, max_gap):
    """Index of the previous detection with the same id (-1: none, or more than max_gap + 1 frames back)."""
    out = np.full(frame.size, -1, dtype=np.int64)
    ok = np.flatnonzero(ids >= 0)
    order = ok[np.lexsort((frame[ok], ids[ok]))]
    same = ids[order][1:] == ids[order][:-1]
    if max_gap is not None:
        same &= (frame[order][1:] - frame[order][:-1]) <= max_gap + 1
    out[order[1:][same]] = order[:-1][same]
    return out


def identity_scores(frame, truth_id, track_id, *, max_gap=None):
    """Frame-to-frame identity accuracy and identity switches of a linking.

    Parameters
    ----------
    frame : array of int, shape (n,)
        Frame of each detection.
    truth_id : array of int, shape (n,)
        True identity (e.g. mode) of each detection; one identity has at most
        one detection per frame.
    track_id : array of int, shape (n,)
        Track found by the linker; -1 for detections left unlinked.
    max_gap : int, optional
        The linker's allowed gap: true successive detections more than
        ``max_gap + 1`` frames apart are not counted as a true link (no
        linker with that gap could make it).  All are counted when None.

    Returns
    -------
    LinkScores
    """
    frame = np.asarray(frame, dtype=np.int64)
    truth_id = np.asarray(truth_id, dtype=np.int64)
    track_id = np.asarray(track_id, dtype=np.int64)
    if not (frame.shape == truth_id.shape == track_id.shape) or frame.ndim != 1:
        raise InputError("frame, truth_id and track_id must be 1-D and of equal length", field="track_id",
                         expected=f"{frame.size} values", found=f"shapes {truth_id.shape}, {track_id.shape}")
    for name, ids in (("truth_id", truth_id), ("track_id", track_id)):
        ok = ids >= 0
        pairs = np.unique(np.column_stack([ids[ok], frame[ok]]), axis=0)
        if pairs.shape[0] != int(ok.sum()):
            raise InputError("an identity has two detections in one frame", field=name,
                             expected="at most one detection per id and frame", found="a repeat")
    p_true = _predecessor(frame, truth_id, max_gap)
    p_found = _predecessor(frame, track_id, None)
    relevant = (p_true >= 0) | (p_found >= 0)
    correct = relevant & (p_true == p_found)
    made = p_found >= 0
    switch = made & (truth_id != truth_id[np.where(made, p_found, 0)])
    n_links = int(made.sum())
    n_rel = int(relevant.sum())
    return LinkScores(
        accuracy=float(correct.sum() / n_rel) if n_rel else float("nan"),
        switches_per_1000_links=float(1000.0 * switch.sum() / n_links) if n_links else float("nan"),
        n_links=n_links,
        n_true_links=int((p_true >= 0).sum()),
        n_switches=int(switch.sum()),
        n_missed=int(((p_true >= 0) & (p_true != p_found)).sum()),
    )
