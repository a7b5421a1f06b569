"""Streaming analysis of an emission-image stack: segment, track, describe, detect changes."""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ..tables import SCHEMAS
from ._background import estimate_background, saturation_mask
from ._change import aligned_patch, decorrelation_time, pattern_correlation
from ._describe import count_lobes, extract_patch, fit_mode, moment_descriptors, radial_profile
from ._modes import MODE_ORDERS
from ._segment import segment_frame
from ._track import RegionLinker

__all__ = ["PatternAnalysis", "analyze_patterns", "patterns_table", "pattern_track_features",
           "REGION_COLUMNS"]

#: Columns of the per-region-per-frame table, with their meaning (the ``patterns`` schema of
#: :mod:`lasecyto.tables` without its ``cell_id``, which a run adds).
REGION_COLUMNS = {c.name: c.description for c in SCHEMAS["patterns"] if c.name != "cell_id"}

_TRACK_COLUMNS = ["track_id", "n_frames", "first_frame", "last_frame", "row_px", "col_px", "dominant_order",
                  "dominant_fraction", "n_pattern_changes", "mean_pattern_corr", "decorrelation_time_s",
                  "decorrelation_message"]


@dataclass(frozen=True)
class PatternAnalysis:
    """Result of :func:`analyze_patterns`.

    ``regions``: one row per region and frame (columns :data:`REGION_COLUMNS`);
    ``frames``: one row per frame (``frame, time_s, background_counts,
    noise_counts, threshold_counts, n_regions, n_saturated_px, message``);
    ``tracks``: one row per track; ``lag_correlation``: mean aligned
    correlation per track and lag (``track_id, lag_frames, lag_s, corr, n``);
    ``reason`` is empty unless no region was found at all, then it says why;
    ``patches`` (only with ``keep_patches=True``) holds, for every row of
    ``regions``, the region's pattern resampled on a square grid centred on its
    fitted centre (the aligned patch its correlations are computed on).
    """

    regions: pd.DataFrame
    frames: pd.DataFrame
    tracks: pd.DataFrame
    lag_correlation: pd.DataFrame
    reason: str
    patches: list | None = None


def _check_stack(stack):
    shape = tuple(getattr(stack, "shape", ()))
    if len(shape) == 4 and shape[-1] in (3, 4):
        raise InputError("colour image stack where grayscale frames are expected", field="stack",
                         expected="a (frames, rows, cols) grayscale stack",
                         found=f"shape {shape} (RGB/RGBA samples in the last axis)")
    if len(shape) == 2:
        raise InputError("a single 2-D frame where a stack is expected", field="stack",
                         expected="a (frames, rows, cols) stack (use stack[None] for one frame)",
                         found=f"shape {shape}")
    if len(shape) != 3:
        raise InputError("not an image stack", field="stack", expected="a (frames, rows, cols) array",
                         found=f"shape {shape}")
    if shape[0] == 0 or shape[1] == 0 or shape[2] == 0:
        raise InputError("empty image stack", field="stack", expected="at least one frame of at least one pixel",
                         found=f"shape {shape}")
    return shape


def analyze_patterns(stack, *, frame_times_s=None, frame_interval_s=None, pixel_size_um=None, block_frames=32,
                     spot_radius_px=10.0, threshold_sigma=5.0, min_area_px=12, saturation_counts=None,
                     tile_px=None, orders=MODE_ORDERS, min_explained=0.9, max_displacement_px=6.0,
                     max_gap_frames=3, change_corr=0.9, max_lag_frames=20, keep_patches=False, progress=None):
    """Segment, track and describe the lasing regions of an image stack, streaming it in blocks.

    Parameters
    ----------
    stack : array_like (frames, rows, cols)
        Anything sliceable along the first axis into numpy arrays: an array,
        a memory map or :class:`lasecyto.io._images.ImageStack`.  When it has
        ``time_s`` and ``pixel_size_um`` attributes they are used unless given here.
    frame_times_s, frame_interval_s : array or float, optional
        Frame times; by default ``frame * frame_interval_s`` (interval 1 s if unknown).
    pixel_size_um : float, optional
        Pixel size for the ``_um`` columns.
    block_frames : int
        Frames read at once (memory is bounded by this block, not the stack length).
    spot_radius_px, threshold_sigma, min_area_px, tile_px
        Segmentation options (:func:`segment_frame`).
    saturation_counts : float, optional
        Saturation level (default: the largest value of an integer dtype).
    orders, min_explained
        Mode fit options (:func:`fit_mode`).
    max_displacement_px, max_gap_frames
        Linking options (:class:`RegionLinker`).
    change_corr : float
        A pattern change is flagged when the aligned correlation with the
        track's previous pattern falls below this value.
    max_lag_frames : int
        Longest lag of the per-track correlation used for the decorrelation time.
    keep_patches : bool
        Return every region's aligned patch in ``PatternAnalysis.patches`` (memory
        grows with the number of regions; for per-cell analyses of modest length).
    progress : callable, optional
        Called as ``progress(frames_done, n_frames)`` after each block.

    Returns
    -------
    PatternAnalysis
    """
    n_frames, n_rows, n_cols = _check_stack(stack)
    if frame_times_s is None:
        frame_times_s = getattr(stack, "time_s", None)
    if pixel_size_um is None:
        pixel_size_um = getattr(stack, "pixel_size_um", None)
    if frame_times_s is None:
        dt = 1.0 if frame_interval_s is None else float(frame_interval_s)
        times = np.arange(n_frames) * dt
    else:
        times = np.asarray(frame_times_s, dtype=float)
        if times.shape != (n_frames,):
            raise InputError("frame times do not match the stack", field="frame_times_s",
                             expected=f"{n_frames} values (one per frame)", found=f"{times.size} values")
    px_um = float("nan") if pixel_size_um is None else float(pixel_size_um)
    half = int(round(1.5 * spot_radius_px))
    linker = RegionLinker(max_displacement_px=max_displacement_px, max_gap_frames=max_gap_frames)
    history = {}  # track_id -> deque of (frame, aligned normalised patch)
    lag_sum, lag_n = {}, {}
    rows, frame_rows = [], []
    kept = [] if keep_patches else None
    block = max(int(block_frames), 1)
    for start in range(0, n_frames, block):
        raw = np.asarray(stack[start:min(start + block, n_frames)])
        if raw.ndim != 3 or raw.shape[1:] != (n_rows, n_cols):
            raise InputError("stack block has the wrong shape", field=f"frames {start}..",
                             expected=f"(n, {n_rows}, {n_cols})", found=f"shape {raw.shape}")
        sat_block = saturation_mask(raw, saturation_counts=saturation_counts)
        for k in range(raw.shape[0]):
            f = start + k
            frame = raw[k].astype(np.float64)
            sat = sat_block[k]
            if sat.all():
                frame_rows.append((f, times[f], np.nan, np.nan, np.nan, 0, int(sat.sum()),
                                   "every pixel is saturated"))
                continue
            bg = estimate_background(frame, saturated=sat if sat.any() else None, tile_px=tile_px)
            seg = segment_frame(frame, spot_radius_px=spot_radius_px, threshold_sigma=threshold_sigma,
                                min_area_px=min_area_px, saturated=sat, background=bg)
            level = bg.level_counts
            frame_rows.append((f, times[f], float(np.mean(level)), bg.noise_counts, seg.threshold_counts,
                               seg.n_regions, int(sat.sum()), seg.message))
            if seg.n_regions == 0:
                continue
            reg = seg.regions
            ids = linker.update(f, np.column_stack([reg["centroid_row_px"], reg["centroid_col_px"]]))
            signal = frame - level
            signal_fit = np.where(sat, np.nan, signal)
            for i in range(seg.n_regions):
                lab = int(reg["label"][i])
                cen = (reg["centroid_row_px"][i], reg["centroid_col_px"][i])
                patch, (o_r, o_c) = extract_patch(signal_fit, cen, half)
                labp, _ = extract_patch(seg.labels, cen, half, fill=-1)
                own = labp == lab
                fit = fit_mode(patch, mask=own | (labp == 0), region=own, orders=orders,
                               min_explained=min_explained)
                mom = moment_descriptors(patch, mask=own)
                lobes = count_lobes(patch, mask=own)
                if fit.fit_ok:
                    c_abs = (fit.center_row_px + o_r, fit.center_col_px + o_c)
                    rad, prof = radial_profile(patch, (fit.center_row_px, fit.center_col_px),
                                               max_radius_px=half)
                    ring = float(rad[int(np.nanargmax(prof))]) if np.isfinite(prof).any() else float("nan")
                else:
                    c_abs = cen
                    ring = float("nan")
                tid = int(ids[i])
                big, (b_r, b_c) = extract_patch(signal, c_abs, half + 2)
                big_lab, _ = extract_patch(seg.labels, c_abs, half + 2, fill=-1)
                big = np.where((big_lab == lab) | (big_lab == 0) | np.isnan(big), big, 0.0)  # hide neighbours
                aligned = aligned_patch(big, (c_abs[0] - b_r, c_abs[1] - b_c), half)
                corr = float("nan")
                hist = history.setdefault(tid, deque())
                while hist and f - hist[0][0] > max_lag_frames:
                    hist.popleft()
                for f_prev, p_prev in hist:
                    c = pattern_correlation(p_prev, aligned)
                    lag = f - f_prev
                    if np.isfinite(c):
                        lag_sum[(tid, lag)] = lag_sum.get((tid, lag), 0.0) + c
                        lag_n[(tid, lag)] = lag_n.get((tid, lag), 0) + 1
                if hist:
                    corr = pattern_correlation(hist[-1][1], aligned)
                hist.append((f, aligned))
                if kept is not None:
                    kept.append(aligned)
                bgc = float(level) if np.ndim(level) == 0 else float(
                    level[int(np.clip(round(cen[0]), 0, n_rows - 1)), int(np.clip(round(cen[1]), 0, n_cols - 1))])
                rows.append((
                    f, times[f], tid, lab, cen[0], cen[1], int(reg["area_px"][i]), reg["area_px"][i] * px_um ** 2,
                    reg["peak_counts"][i], reg["total_counts"][i], int(reg["n_saturated_px"][i]),
                    bool(reg["n_saturated_px"][i] > 0), bgc, bg.noise_counts,
                    c_abs[0], c_abs[1], fit.waist_px, fit.waist_px * px_um, fit.orientation_deg, fit.order,
                    fit.status, fit.confidence, fit.explained, fit.second_order, fit.mixture_explained,
                    mom["sigma_major_px"], mom["sigma_minor_px"], mom["moment_orientation_deg"],
                    mom["eccentricity"], lobes, ring, corr, bool(np.isfinite(corr) and corr < change_corr),
                    fit.fit_ok, fit.message))
        if progress is not None:
            progress(min(start + block, n_frames), n_frames)
    regions = pd.DataFrame(rows, columns=list(REGION_COLUMNS))
    regions = regions.astype({"frame": "int64", "track_id": "int64", "region": "int64", "area_px": "int64",
                              "n_saturated_px": "int64", "n_lobes": "int64", "saturated": "bool",
                              "pattern_change": "bool", "fit_ok": "bool"})
    for c in ("mode_order", "mode_status", "mode_second_order", "fit_message"):
        regions[c] = regions[c].astype(object)
    frames = pd.DataFrame(frame_rows, columns=["frame", "time_s", "background_counts", "noise_counts",
                                               "threshold_counts", "n_regions", "n_saturated_px", "message"])
    frames["message"] = frames["message"].astype(object)
    dt = float(np.median(np.diff(times))) if n_frames > 1 else 1.0
    keys = sorted(lag_n)
    lagc = pd.DataFrame({"track_id": np.array([k[0] for k in keys], np.int64),
                         "lag_frames": np.array([k[1] for k in keys], np.int64),
                         "lag_s": np.array([k[1] * dt for k in keys], float),
                         "corr": np.array([lag_sum[k] / lag_n[k] for k in keys], float),
                         "n": np.array([lag_n[k] for k in keys], np.int64)})
    tracks = pattern_track_features(regions, lagc)
    reason = ""
    if regions.empty:
        msgs = frames["message"][frames["message"] != ""]
        common = msgs.value_counts().index[0] if len(msgs) else "no region"
        reason = f"no lasing cell in any of the {n_frames} frames (most frames: {common})"
    return PatternAnalysis(regions=regions, frames=frames, tracks=tracks, lag_correlation=lagc, reason=reason,
                           patches=kept)


def pattern_track_features(regions, lag_correlation):
    """Per-track features from the region table and the lag correlations of :func:`analyze_patterns`.

    Returns
    -------
    pandas.DataFrame
        ``track_id, n_frames, first_frame, last_frame, row_px, col_px`` (median
        fitted centre), ``dominant_order, dominant_fraction`` (most frequent
        "ok" order and its share), ``n_pattern_changes, mean_pattern_corr,
        decorrelation_time_s, decorrelation_message``.
    """
    out = []
    for tid, g in regions.groupby("track_id", sort=True):
        ok = g[g["mode_status"] == "ok"]
        if len(ok):
            counts = ok["mode_order"].value_counts()
            top = sorted(counts[counts == counts.max()].index)[0]
            dom, frac = top, float(counts[top] / len(g))
        else:
            dom, frac = "", 0.0
        lc = lag_correlation[lag_correlation["track_id"] == tid].sort_values("lag_frames")
        tau, msg = decorrelation_time(lc["lag_s"].to_numpy(), lc["corr"].to_numpy())
        corr = g["pattern_corr"].to_numpy(float)
        out.append((int(tid), len(g), int(g["frame"].min()), int(g["frame"].max()),
                    float(np.median(g["center_row_px"])), float(np.median(g["center_col_px"])), dom, frac,
                    int(g["pattern_change"].sum()),
                    float(np.nanmean(corr)) if np.isfinite(corr).any() else float("nan"), tau, msg))
    df = pd.DataFrame(out, columns=_TRACK_COLUMNS)
    return df.astype({"track_id": "int64", "n_frames": "int64", "first_frame": "int64", "last_frame": "int64",
                      "n_pattern_changes": "int64"})


def patterns_table(stack, **options):
    """The per-region-per-frame table of :func:`analyze_patterns` (same options).

    An empty table carries the reason in ``table.attrs["reason"]``.
    """
    res = analyze_patterns(stack, **options)
    table = res.regions
    table.attrs["reason"] = res.reason
    return table
