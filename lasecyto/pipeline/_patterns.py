"""The pattern stage of a run: a cell's emission images to ``patterns`` rows and ``cell_frames`` columns.

A cell in a camera field (manifest ``[[fields]]``, cell keys ``field`` and
``position_px`` or ``roi_px``) is analysed on a window of the field's image
stack: its ROI, or a square of half-size ``patterns.window_px`` around its
position.  The worker opens the stack itself, so items stay independent.  The
region tracks of the window that lie nearest to this cell's position (and not
nearer to another cell of the field) are the cell's; in every frame the region
nearest to the position is kept.  :func:`cell_patterns` returns the cell's
``patterns`` rows, one row per frame of pattern columns for ``cell_frames``
and the cell's pattern features; :func:`run_pattern_cell` processes a cell
seen only in images (no spectra).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from ..io import read_image_stack

__all__ = ["PatternStage", "cell_patterns", "image_job_fields", "run_pattern_cell", "attach_patterns", "pattern_stack",
           "PATTERN_FRAME_COLUMNS", "PATTERN_TRACKS_KEY"]

#: key of a result's per-track pattern features (not a table of the run; removed before the results are gathered)
PATTERN_TRACKS_KEY = "_pattern_tracks"

#: the ``cell_frames`` columns filled by the pattern stage
PATTERN_FRAME_COLUMNS = ("pattern_order", "pattern_confidence", "pattern_waist_px", "pattern_orientation_deg",
                         "pattern_corr", "pattern_change", "pattern_baseline_corr")


@dataclass
class PatternStage:
    """Pattern results of one cell.

    ``regions``: the cell's ``patterns`` rows (at most one per frame);
    ``frames``: ``frame`` and :data:`PATTERN_FRAME_COLUMNS`, one row per image frame;
    ``tracks``: per-track pattern features of the cell's region tracks;
    ``cell``: ``pattern_dominant_order, pattern_decorrelation_time_s,
    pattern_change_count, pattern_first_change_s``; ``time_s``: image frame
    times; ``note``: empty, or why the cell has no pattern.
    """

    regions: pd.DataFrame
    frames: pd.DataFrame
    tracks: pd.DataFrame
    cell: dict
    time_s: np.ndarray
    note: str


def image_job_fields(manifest, cell) -> dict:
    """The :class:`~lasecyto.pipeline.CellJob` fields of a manifest cell's emission images (plain values)."""
    if cell.field is None:
        return {}
    f = manifest.fields[cell.field]
    others = []
    for c in manifest.cells:
        if c.field == cell.field:
            others.append((c.cell_id, *_anchor(c.position_px, c.roi_px)))
    return {"images": str(f.images), "images_sidecar": None if f.sidecar is None else str(f.sidecar),
            "image_field": f.field, "position_px": cell.position_px, "roi_px": cell.roi_px,
            "field_cells": tuple(others)}


def _anchor(position_px, roi_px):
    """(row, col) a cell is matched by: its position, or the centre of its ROI."""
    if position_px is not None:
        return float(position_px[0]), float(position_px[1])
    r0, c0, r1, c1 = roi_px
    return (r0 + r1 - 1) / 2.0, (c0 + c1 - 1) / 2.0


class _Window:
    """Lazy (frames, rows, cols) view of a rectangle of an image stack; slicing reads only those frames."""

    def __init__(self, stack, r0, r1, c0, c1):
        self._stack = stack
        self.r0, self.r1, self.c0, self.c1 = r0, r1, c0, c1
        self.shape = (stack.shape[0], r1 - r0, c1 - c0)
        self.time_s = stack.time_s
        self.pixel_size_um = stack.pixel_size_um

    def __getitem__(self, key):
        return self._stack[key][:, self.r0:self.r1, self.c0:self.c1]


def _window(job, shape):
    n_rows, n_cols = shape
    where = f"{job.images} (field {job.image_field!r}, cell {job.cell_id})"
    if job.roi_px is not None:
        r0, c0, r1, c1 = job.roi_px
        if r1 > n_rows or c1 > n_cols:
            raise InputError("region of interest outside the image", path=job.images, field="roi_px",
                             expected=f"within {n_rows} x {n_cols} pixels", found=f"{list(job.roi_px)}")
        return r0, r1, c0, c1
    row, col = job.position_px
    if not (0 <= row < n_rows and 0 <= col < n_cols):
        raise InputError("cell position outside the image", path=where, field="position_px",
                         expected=f"within {n_rows} x {n_cols} pixels", found=f"[{row:g}, {col:g}]")
    h = int(job.parameters["patterns"]["window_px"])
    r0, c0 = max(int(round(row)) - h, 0), max(int(round(col)) - h, 0)
    return r0, min(int(round(row)) + h + 1, n_rows), c0, min(int(round(col)) + h + 1, n_cols)


def _empty_frames(n_frames):
    return pd.DataFrame({"frame": np.arange(n_frames, dtype=np.int64), "pattern_order": np.full(n_frames, "", object),
                         "pattern_confidence": np.full(n_frames, np.nan), "pattern_waist_px": np.full(n_frames, np.nan),
                         "pattern_orientation_deg": np.full(n_frames, np.nan),
                         "pattern_corr": np.full(n_frames, np.nan), "pattern_change": np.zeros(n_frames, bool),
                         "pattern_baseline_corr": np.full(n_frames, np.nan)})


def _no_cell_features():
    return {"pattern_dominant_order": "", "pattern_decorrelation_time_s": float("nan"), "pattern_change_count": 0,
            "pattern_first_change_s": float("nan")}


def _own_tracks(job, tracks):
    """Track ids of the analysed window that belong to this cell."""
    if not len(tracks):
        return np.zeros(0, np.int64)
    if job.roi_px is not None:
        r0, c0, r1, c1 = job.roi_px
        inside = tracks["row_px"].between(r0, r1, inclusive="left") & tracks["col_px"].between(c0, c1,
                                                                                               inclusive="left")
        return tracks.loc[inside, "track_id"].to_numpy(np.int64)
    me = _anchor(job.position_px, None)
    others = np.array([(r, c) for cid, r, c in job.field_cells if cid != job.cell_id], float).reshape(-1, 2)
    tp = tracks[["row_px", "col_px"]].to_numpy(float)
    d_me = np.hypot(tp[:, 0] - me[0], tp[:, 1] - me[1])
    ok = d_me <= float(job.parameters["patterns"]["match_distance_px"])
    if len(others):
        d_other = np.hypot(tp[:, None, 0] - others[None, :, 0], tp[:, None, 1] - others[None, :, 1]).min(axis=1)
        ok &= d_me <= d_other
    return tracks.loc[ok, "track_id"].to_numpy(np.int64)


def cell_patterns(job, *, expected_frames=None) -> PatternStage:
    """Analyse the emission images of one cell (see the module text).

    Parameters
    ----------
    job : CellJob
        With ``images`` and ``position_px`` or ``roi_px``.
    expected_frames : int, optional
        Frames of the cell's spectral stack; the image stack must have as many
        (frames are joined by index).

    Raises
    ------
    InputError
        Unreadable, colour or empty image stack, a sidecar whose frame count
        disagrees with the stack, a frame count that disagrees with the spectra,
        or a position / ROI outside the image.  A field where this cell never
        lases is not an error: the result is empty and ``note`` says why.
    """
    from ..patterns import analyze_patterns, reference_correlation

    p = job.parameters["patterns"]
    sidecar = job.images_sidecar if job.images_sidecar is not None else "auto"
    with read_image_stack(job.images, sidecar=sidecar) as stack:
        n_frames = stack.shape[0]
        if expected_frames is not None and n_frames != int(expected_frames):
            raise InputError("image stack and spectral stack differ in frame count", path=job.images,
                             field="frames", expected=f"{int(expected_frames)} frames (one image per spectrum)",
                             found=f"{n_frames} frames")
        r0, r1, c0, c1 = _window(job, stack.shape[1:])
        res = analyze_patterns(_Window(stack, r0, r1, c0, c1), keep_patches=True, **_analysis_options(p))
        times = np.asarray(stack.time_s, dtype=float)
    reg = res.regions.copy()
    for col, off in (("centroid_row_px", r0), ("center_row_px", r0), ("centroid_col_px", c0),
                     ("center_col_px", c0)):
        reg[col] = reg[col] + off
    tracks = res.tracks.copy()
    tracks["row_px"] = tracks["row_px"] + r0
    tracks["col_px"] = tracks["col_px"] + c0
    own = _own_tracks(job, tracks)
    frames = _empty_frames(n_frames)
    if res.reason:
        note = f"patterns: {res.reason}"
    elif not len(own):
        near = "inside its ROI" if job.roi_px is not None else f"within {p['match_distance_px']:g} px of its position"
        note = f"patterns: no lasing region track {near} ({len(tracks)} track(s) elsewhere in the window)"
    else:
        note = ""
    if note:
        return PatternStage(regions=tables.empty("patterns"), frames=frames, tracks=tracks.iloc[:0],
                            cell=_no_cell_features(), time_s=times, note=note)

    anchor = _anchor(job.position_px, job.roi_px)
    sel = reg[reg["track_id"].isin(own)].copy()
    sel["_d"] = np.hypot(sel["center_row_px"] - anchor[0], sel["center_col_px"] - anchor[1])
    sel = sel.sort_values(["frame", "_d"], kind="stable").drop_duplicates("frame", keep="first")
    idx = sel.index.to_numpy()
    sel = sel.drop(columns="_d").reset_index(drop=True)
    pert = float(job.perturbation_s)
    t_sel = sel["time_s"].to_numpy(float)
    reference = t_sel < pert if np.isfinite(pert) else np.ones(len(sel), bool)
    base_corr = reference_correlation([res.patches[i] for i in idx], reference)

    f = sel["frame"].to_numpy(np.int64)
    ok = sel["fit_ok"].to_numpy(bool)
    frames.loc[f, "pattern_order"] = np.where(ok, sel["mode_order"].to_numpy(object), "")
    frames.loc[f, "pattern_confidence"] = sel["mode_confidence"].to_numpy(float)
    frames.loc[f, "pattern_waist_px"] = sel["waist_px"].to_numpy(float)
    frames.loc[f, "pattern_orientation_deg"] = sel["orientation_deg"].to_numpy(float)
    frames.loc[f, "pattern_corr"] = sel["pattern_corr"].to_numpy(float)
    frames.loc[f, "pattern_change"] = sel["pattern_change"].to_numpy(bool)
    frames.loc[f, "pattern_baseline_corr"] = base_corr
    frames["pattern_change"] = frames["pattern_change"].astype(bool)

    good = sel[sel["mode_status"] == "ok"]
    dominant = ""
    if len(good):
        counts = good["mode_order"].value_counts()
        dominant = sorted(counts[counts == counts.max()].index)[0]
    changes = sel[sel["pattern_change"]]
    after = changes[changes["time_s"] >= pert] if np.isfinite(pert) else changes
    own_tracks = tracks[tracks["track_id"].isin(own)].reset_index(drop=True)
    dec = own_tracks["decorrelation_time_s"].to_numpy(float)
    cell = {"pattern_dominant_order": dominant,
            "pattern_decorrelation_time_s": float(np.median(dec[np.isfinite(dec)])) if np.isfinite(dec).any()
            else float("nan"),
            "pattern_change_count": int(len(changes)),
            "pattern_first_change_s": float(after["time_s"].iloc[0]) if len(after) else float("nan")}
    sel.insert(0, "cell_id", job.cell_id)
    return PatternStage(regions=tables.validate(sel, "patterns"), frames=frames, tracks=own_tracks, cell=cell,
                        time_s=times, note="")


def attach_patterns(job, result):
    """Add the pattern stage to a processed cell that also has spectra (a problem becomes ``pattern_note``)."""
    frames = result.tables.get("cell_frames")
    n = int(len(frames)) if frames is not None else None
    try:
        stage = cell_patterns(job, expected_frames=n)
    except (InputError, ImportError) as exc:  # ImportError: scikit-image (extra "images") not installed
        result.cell.update(_no_cell_features())
        result.cell["pattern_note"] = f"patterns: {exc}"
        return result
    if frames is not None:
        base = frames.drop(columns=[c for c in PATTERN_FRAME_COLUMNS if c in frames.columns])
        merged = base.merge(stage.frames, on="frame", how="left", sort=False)
        merged["pattern_order"] = merged["pattern_order"].fillna("").astype(object)
        merged["pattern_change"] = merged["pattern_change"].fillna(False).astype(bool)
        result.tables["cell_frames"] = tables.validate(merged, "cell_frames")
    result.tables["patterns"] = stage.regions
    result.cell.update(stage.cell)
    result.cell["pattern_note"] = stage.note
    result.tables[PATTERN_TRACKS_KEY] = stage.tracks
    return result


def run_pattern_cell(job):
    """Process a cell seen only in emission images: ``cell_frames`` from its pattern, no spectral columns."""
    from ._cell import CellResult

    stage = cell_patterns(job)
    n = len(stage.frames)
    nan = np.full(n, np.nan)
    lasing = np.isin(np.arange(n), stage.regions["frame"].to_numpy(np.int64))
    cf = pd.DataFrame({"cell_id": [job.cell_id] * n, "frame": np.arange(n, dtype=np.int64),
                       "time_s": stage.time_s, "n_lines": np.zeros(n, np.int64),
                       "n_lasing": np.zeros(n, np.int64), "total_area_counts": nan, "lasing": lasing,
                       "fsr_nm": nan, "optical_length_um": nan, "optical_length_err_um": nan,
                       "relative_shift": nan, "relative_shift_err": nan, "delta_optical_length_um": nan,
                       "delta_optical_length_err_um": nan, "index_change": nan, "index_change_err": nan})
    cf = tables.validate(cf.merge(stage.frames, on="frame", how="left"), "cell_frames")
    pert = float(job.perturbation_s)
    cell = {"cell_id": job.cell_id, "dish": job.dish, "condition": job.condition, "perturbation_s": pert,
            "n_frames": int(n), "n_frames_lasing": int(lasing.sum()), "n_tracks": 0,
            "baseline_optical_length_um": math.nan, "baseline_noise": math.nan, "index_change": math.nan,
            "index_change_err": math.nan, "change_z": math.nan, "onset_s": math.nan, "onset_err_s": math.nan,
            "changed": False, "quantity": "pattern_baseline_corr",
            "note": "image-only cell: no spectral quantities", **stage.cell, "pattern_note": stage.note}
    return CellResult(job.cell_id, "ok", cell=cell, tables={"cell_frames": cf, "patterns": stage.regions,
                                                            PATTERN_TRACKS_KEY: stage.tracks})


def _analysis_options(p):
    return dict(spot_radius_px=p["spot_radius_px"], threshold_sigma=p["threshold_sigma"], min_area_px=p["min_area_px"],
                min_explained=p["min_explained"], max_displacement_px=p["max_displacement_px"],
                max_gap_frames=p["max_gap_frames"], change_corr=p["change_corr"], max_lag_frames=p["max_lag_frames"],
                block_frames=p["block_frames"])


def pattern_stack(stack_path, *, sidecar="auto", parameters=None, pixel_size_um=None, progress=None):
    """Segment, track, describe and detect pattern changes on one image stack (``lasecyto patterns``).

    Parameters
    ----------
    stack_path : str or Path
        Grayscale (frames, rows, cols) TIFF or OME-TIFF.
    sidecar : str, Path, None or "auto"
        JSON sidecar (``frame_times_s``, ``n_frames``, ``pixel_size_um``); "auto" uses
        the stack path with suffix ``.json`` when it exists.
    parameters : dict, optional
        Stage parameters as in a recipe (only ``patterns`` is used).
    pixel_size_um : float, optional
        Overrides the pixel size of the metadata.
    progress : callable, optional
        ``progress(frames_done, n_frames)``.

    Returns
    -------
    (pandas.DataFrame, pandas.DataFrame, str)
        The validated ``patterns`` table (``cell_id`` empty: no manifest here), the
        per-track features and the reason when no lasing region was found (else "").
    """
    from ..patterns import analyze_patterns
    from ._params import resolve_parameters

    p = resolve_parameters(parameters or {}, source="parameters")["patterns"]
    with read_image_stack(stack_path, sidecar=sidecar) as stack:
        res = analyze_patterns(stack, pixel_size_um=pixel_size_um, progress=progress, **_analysis_options(p))
    table = res.regions.copy()
    table.insert(0, "cell_id", np.full(len(table), "", dtype=object))
    return tables.validate(table, "patterns"), res.tracks, res.reason
