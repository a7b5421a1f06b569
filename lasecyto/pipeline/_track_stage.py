"""The tracks stage of one cell: lines to mode tracks with families, mode numbers and hop flags.

Shared by the Fabry-Perot processor and by ``lasecyto track``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .. import tables
from ..cavity import ModeIdentity, assign_mode_families, assign_mode_numbers, comb_spacing
from ..exceptions import InputError, LasecytoWarning
from ..tracks import link_lines

__all__ = ["TrackedCell", "comb_spacing_of_lines", "track_cell"]


@dataclass(frozen=True)
class TrackedCell:
    """Result of :func:`track_cell`: the ``tracks`` table, the mode identity, the comb spacing
    used for hop flags (1/um, NaN when it could not be measured) and the warnings raised."""

    tracks: object
    identity: ModeIdentity
    spacing_per_um: float
    warnings: tuple


def comb_spacing_of_lines(lines, *, n_frames=7, optical_length_range_um=(5.0, 200.0)):
    """Comb spacing (1/um) of a cell's lasing lines: the median over a few well-filled frames.

    The frames with at least 80 % of the largest number of lasing lines are
    taken at evenly spaced ranks in time (at most ``n_frames``); each gives
    :func:`lasecyto.cavity.comb_spacing` of its lines weighted by their area.
    NaN when no frame has 2 distinct lines.  ``optical_length_range_um`` is
    the range of n_g L searched.
    """
    ok = lines["fit_ok"].to_numpy(bool) & lines["lasing"].to_numpy(bool)
    lam = lines["center_nm"].to_numpy(float)
    ok &= np.isfinite(lam) & (lam > 0)
    if not ok.any():
        return float("nan")
    frames = lines["frame"].to_numpy(np.int64)[ok]
    sigma_all = 1e3 / lam[ok]
    area_all = np.clip(np.nan_to_num(lines["area_counts"].to_numpy(float)[ok]), 0, None)
    ids, counts = np.unique(frames, return_counts=True)
    full = ids[counts >= max(2, 0.8 * counts.max())]
    if full.size == 0:
        return float("nan")
    pick = full[np.unique(np.linspace(0, full.size - 1, min(n_frames, full.size)).round().astype(int))]
    spacings = []
    for f in pick:
        sel = frames == f
        sigma, area = sigma_all[sel], area_all[sel]
        if np.unique(sigma).size < 2:
            continue
        spacings.append(comb_spacing(sigma, weights=area if np.any(area > 0) else None,
                                     optical_length_range_um=optical_length_range_um))
    return float(np.median(spacings)) if spacings else float("nan")


def track_cell(lines, parameters, *, medium=None, gap_um=None, index_offset=None):
    """Link one cell's lines into tracks, sort them into families and assign mode numbers.

    Parameters
    ----------
    lines : pandas.DataFrame
        The cell's ``lines`` table.
    parameters : dict
        Resolved stage parameters (``tracks`` and ``cavity`` are used).
    medium : Medium, optional
        Dispersion of the gap content (absolute mode numbers; see
        :func:`lasecyto.cavity.fit_mode_numbers`).
    gap_um : float, optional
        Mirror gap; with ``medium`` the gap's index offset is fitted.  The
        comb is then searched where n_g L lies within gap x
        (``cavity.group_index_min``, ``cavity.group_index_max``).
    index_offset : float, optional
        Gap index minus medium index when the gap is not given (default 0).

    Returns
    -------
    TrackedCell
        Warnings of the mode identity (lasecyto warning categories) are caught
        and returned as text, so that a batch can record them per cell; a
        mode identity that cannot be established (e.g. lines outside the
        medium's validity range) leaves ``mode_number`` and
        ``transverse_order`` at -1 and says why in the warnings.
    """
    tp, cp = parameters["tracks"], parameters["cavity"]
    if gap_um is not None:
        if not (np.isfinite(gap_um) and gap_um > 0):
            raise InputError("gap must be a positive length", field="gap_um", expected="> 0 um or None",
                             found=repr(gap_um))
        search = (cp["group_index_min"] * gap_um, cp["group_index_max"] * gap_um)
    else:
        search = (5.0, 200.0)
    caught = []
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always", LasecytoWarning)
        try:
            spacing = comb_spacing_of_lines(lines, optical_length_range_um=search)
        except InputError:
            spacing = float("nan")
        tracks = link_lines(lines, max_step_nm=tp["max_step_nm"], max_gap_frames=tp["max_gap_frames"],
                            min_length_frames=tp["min_length_frames"], intensity_scale=tp["intensity_scale"],
                            width_scale=tp["width_scale"],
                            hop_spacing_per_um=spacing if np.isfinite(spacing) else None,
                            hop_tolerance=tp["hop_tolerance"])
        identity = ModeIdentity(None, -1, note="no tracks")
        if len(tracks):
            tracks = assign_mode_families(tracks, optical_length_range_um=search)
            try:
                tracks, identity = assign_mode_numbers(
                    tracks, medium=medium, gap_um=gap_um, index_offset=index_offset,
                    offset_range=cp["index_offset_range"], ladder_tolerance=cp["ladder_tolerance"],
                    max_transverse_order=cp["max_transverse_order"])
            except InputError as exc:   # e.g. lines outside the medium's validity range: keep the tracks
                identity = ModeIdentity(None, -1, note=f"no mode identity: {exc}")
    for w in record:
        if issubclass(w.category, LasecytoWarning):
            caught.append(str(w.message))
        else:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    if identity.note and len(tracks):
        caught.append(identity.note)
    return TrackedCell(tables.validate(tracks, "tracks"), identity, float(spacing), tuple(caught))
