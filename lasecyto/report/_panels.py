"""One compact figure per cell: kymograph, trace(s) or threshold curves, and its pattern montage.

Each panel is one PNG of fixed size (10.5 x 2.7 inches: 840 x 216 pixels at 80 dpi, plus a strip of
emission-pattern patches for a cell seen by a camera), drawn from one cell's
rows of ``lines``, ``tracks``, ``cell_frames`` and ``patterns``.
"""

from __future__ import annotations

import logging
import math

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ._figures import plot_kymograph, plot_threshold_curves, plot_trace
from ._montage import plot_pattern_montage
from ._render import new_figure

__all__ = ["CellData", "LINE_COLUMNS", "TRACK_COLUMNS", "FRAME_COLUMNS", "PATTERN_COLUMNS", "draw_cell_panel",
           "thin_trace", "pump_points", "PatternImages", "MONTAGE_FRAMES"]

logger = logging.getLogger("lasecyto.report")

LINE_COLUMNS = ("frame", "time_s", "center_nm", "area_counts", "fit_ok", "lasing")
TRACK_COLUMNS = ("frame", "time_s", "center_nm", "area_counts", "fit_ok", "track_id", "mode_family", "hop",
                 "polarization", "radial_order", "transverse_order")
FRAME_COLUMNS = ("frame", "time_s", "lasing", "index_change", "index_change_err", "relative_shift",
                 "relative_shift_err", "diameter_um", "diameter_err_um", "medium_index", "medium_index_err",
                 "diameter_change_um", "diameter_change_err_um", "pattern_baseline_corr", "pump_energy_nj",
                 "output_counts_per_s")
PATTERN_COLUMNS = ("frame", "time_s", "center_row_px", "center_col_px", "centroid_row_px", "centroid_col_px",
                   "waist_px", "mode_order", "pattern_change", "fit_ok")
MONTAGE_FRAMES = 8
TRACE_POINTS = 400
_WIDTH_IN = 10.5
_TOP_IN = 2.7
_MONTAGE_IN = 1.45


class CellData:
    """One cell's rows of the per-cell tables (each a DataFrame or None)."""

    def __init__(self, lines=None, tracks=None, frames=None, patterns=None):
        self.lines, self.tracks, self.frames, self.patterns = lines, tracks, frames, patterns


def _finite_any(df, column):
    return df is not None and column in df.columns and np.isfinite(df[column].to_numpy(dtype=float)).any()


def trace_columns(frames, *, kind, resonator, quantity):
    """The ``cell_frames`` columns drawn as a cell's trace(s), in order."""
    if frames is None or kind == "pump-series":
        return []
    if resonator == "sphere":
        cols = [c for c in ("diameter_um", "medium_index") if _finite_any(frames, c)]
        if cols:
            return cols
    for q in (quantity, "index_change", "relative_shift", "pattern_baseline_corr"):
        if q and _finite_any(frames, q):
            return [q]
    return []


def thin_trace(frames, quantity, *, max_points=TRACE_POINTS):
    """A cell's lasing, finite values of ``quantity`` over time, thinned to at most ``max_points``
    (means over equal groups of consecutive frames) for the overview figure."""
    lasing = frames["lasing"].fillna(False).to_numpy(dtype=bool) if "lasing" in frames.columns \
        else np.ones(len(frames), bool)
    t = frames["time_s"].to_numpy(dtype=float)
    y = frames[quantity].to_numpy(dtype=float)
    ok = lasing & np.isfinite(t) & np.isfinite(y)
    t, y = t[ok], y[ok]
    o = np.argsort(t, kind="stable")
    t, y = t[o], y[o]
    if t.size > max_points:
        group = (np.arange(t.size) * max_points) // t.size
        t = np.bincount(group, weights=t) / np.bincount(group)
        y = np.bincount(group, weights=y) / np.bincount(group)
    return t, y


def pump_points(data, fits):
    """Per-mode output (counts/s) against pump energy of a pump-series cell.

    The exposure of frame f is recovered as (summed area of the frame's fitted
    lines) / ``output_counts_per_s`` of ``cell_frames``, which the run computed as
    that sum per second of exposure; a mode's output is its line area over it.
    """
    lines, tracks, frames = data.lines, data.tracks, data.frames
    need = ("pump_energy_nj", "output_counts_per_s")
    if lines is None or tracks is None or frames is None or not all(c in frames.columns for c in need):
        return None
    ok = lines["fit_ok"].fillna(False).to_numpy(bool) if "fit_ok" in lines.columns else np.ones(len(lines), bool)
    summed = pd.Series(lines["area_counts"].to_numpy(float)[ok]).groupby(
        lines["frame"].to_numpy(np.int64)[ok]).sum()
    per_frame = frames.set_index(frames["frame"].to_numpy(np.int64))
    out_rate = per_frame["output_counts_per_s"].astype(float)
    with np.errstate(divide="ignore", invalid="ignore"):
        exposure = summed / out_rate.reindex(summed.index)
    exposure = exposure[np.isfinite(exposure) & (exposure > 0)]
    sel = tracks["track_id"].isin(fits["track_id"]).to_numpy()
    tr = tracks[sel]
    fr = tr["frame"].to_numpy(np.int64)
    exp = exposure.reindex(fr).to_numpy(float)
    pump = per_frame["pump_energy_nj"].astype(float).reindex(fr).to_numpy(float)
    return pd.DataFrame({"track_id": tr["track_id"].to_numpy(), "pump_energy_nj": pump,
                         "output_counts_per_s": tr["area_counts"].to_numpy(float) / exp})


def _with_pump(table, frames):
    if table is None or frames is None or "pump_energy_nj" not in frames.columns:
        return table
    pump = pd.Series(frames["pump_energy_nj"].to_numpy(float), index=frames["frame"].to_numpy(np.int64))
    out = table.copy()
    out["pump_energy_nj"] = pump.reindex(out["frame"].to_numpy(np.int64)).to_numpy(float)
    return out


class PatternImages:
    """The emission-image stacks of a run's camera fields, opened lazily and kept open until closed.

    Parameters
    ----------
    manifest : lasecyto.io.Manifest or None
        The run's manifest (cells name their field; fields name their stack).
    """

    def __init__(self, manifest):
        self._manifest = manifest
        self._cells = {} if manifest is None else {c.cell_id: c for c in manifest.cells}
        self._stacks = {}

    def stack_of(self, cell_id):
        """The open image stack of the cell's field, or None when the cell has no field."""
        from ..io import read_image_stack

        spec = self._cells.get(cell_id)
        if spec is None or spec.field is None:
            return None
        field = self._manifest.fields.get(spec.field)
        if field is None:
            return None
        if spec.field not in self._stacks:
            sidecar = field.sidecar if field.sidecar is not None else "auto"
            self._stacks[spec.field] = read_image_stack(field.images, sidecar=sidecar)
        return self._stacks[spec.field]

    def close(self):
        for stack in self._stacks.values():
            stack.close()
        self._stacks.clear()


def montage_frames(patterns, *, perturbation_s, n=MONTAGE_FRAMES):
    """Rows of ``patterns`` shown in the montage: the first frame, the last before the perturbation,
    the first after it, the first pattern change, the last frame, and evenly spaced frames between."""
    p = patterns.sort_values("frame", kind="stable").reset_index(drop=True)
    if not len(p):
        return p
    t = p["time_s"].to_numpy(float)
    keep = {0, len(p) - 1}
    if perturbation_s is not None and np.isfinite(perturbation_s):
        before = np.flatnonzero(t < perturbation_s)
        after = np.flatnonzero(t >= perturbation_s)
        if before.size:
            keep.add(int(before[-1]))
        if after.size:
            keep.add(int(after[0]))
    if "pattern_change" in p.columns:
        change = np.flatnonzero(p["pattern_change"].fillna(False).to_numpy(bool))
        if change.size:
            keep.add(int(change[0]))
    for i in np.linspace(0, len(p) - 1, n).round().astype(int):
        if len(keep) >= min(n, len(p)):
            break
        keep.add(int(i))
    return p.iloc[sorted(keep)].reset_index(drop=True)


def pattern_patches(stack, rows, *, half_px):
    """Square patches of ``stack`` around each row's fitted centre (centroid when the fit failed)."""
    n_frames, n_rows, n_cols = stack.shape
    patches = []
    for r in rows.itertuples(index=False):
        row, col = float(r.center_row_px), float(r.center_col_px)
        if not (np.isfinite(row) and np.isfinite(col)):
            row, col = float(r.centroid_row_px), float(r.centroid_col_px)
        frame = int(r.frame)
        if not (np.isfinite(row) and np.isfinite(col)) or not 0 <= frame < n_frames:
            patches.append(np.full((2 * half_px + 1, 2 * half_px + 1), np.nan))
            continue
        image = np.asarray(stack[frame], dtype=float)
        patch = np.full((2 * half_px + 1, 2 * half_px + 1), np.nan)
        r0, c0 = int(round(row)) - half_px, int(round(col)) - half_px
        a0, b0 = max(r0, 0), max(c0, 0)
        a1, b1 = min(r0 + 2 * half_px + 1, n_rows), min(c0 + 2 * half_px + 1, n_cols)
        if a1 > a0 and b1 > b0:
            patch[a0 - r0:a1 - r0, b0 - c0:b1 - c0] = image[a0:a1, b0:b1]
        background = np.nanmedian(image)
        patches.append(patch - background)
    return patches


def _montage(data, images, cell_id, *, perturbation_s, window_px):
    """Patches, times and labels of a cell's montage, or (None, reason)."""
    if images is None or data.patterns is None or not len(data.patterns):
        return None, None
    try:
        stack = images.stack_of(cell_id)
    except (InputError, OSError) as exc:
        return None, f"emission images not shown: {exc}"
    if stack is None:
        return None, None
    rows = montage_frames(data.patterns, perturbation_s=perturbation_s)
    waist = data.patterns["waist_px"].to_numpy(float) if "waist_px" in data.patterns.columns else np.array([])
    waist = waist[np.isfinite(waist)]
    half = int(np.clip(math.ceil(3.0 * np.median(waist)) if waist.size else window_px // 2, 6, window_px))
    try:
        patches = pattern_patches(stack, rows, half_px=half)
    except (InputError, OSError, ValueError) as exc:
        return None, f"emission images not shown: {exc}"
    labels = rows["mode_order"].fillna("").astype(str).tolist() if "mode_order" in rows.columns else None
    if labels is not None and "pattern_change" in rows.columns:
        labels = [lab + (" *" if ch else "") for lab, ch in zip(labels, rows["pattern_change"].fillna(False))]
    return (patches, rows["time_s"].to_numpy(float), labels), None


def draw_cell_panel(data, cell, *, kind, resonator, fits=None, images=None, window_px=32):
    """Draw one cell's panel figure.

    Parameters
    ----------
    data : CellData
    cell : mapping
        The cell's row of the ``cells`` table.
    kind, resonator : str
        The experiment's kind ("time-lapse", "pump-series") and resonator.
    fits : pandas.DataFrame, optional
        The cell's rows of ``thresholds`` (pump series).
    images : PatternImages, optional
        Emission-image stacks; with the cell's ``patterns`` rows they give a
        montage strip.
    window_px : int
        Largest half-size of a montage patch.

    Returns
    -------
    (matplotlib.figure.Figure or None, list of str)
        The figure (None when there is nothing to draw) and notes about what
        could not be drawn.
    """
    notes = []
    perturbation_s = float(cell.get("perturbation_s", math.nan))
    onset_s = float(cell.get("onset_s", math.nan))
    onset_err_s = float(cell.get("onset_err_s", math.nan))
    frames = data.frames
    pump = kind == "pump-series"
    kymo_points = data.lines if data.lines is not None else data.tracks
    has_kymo = kymo_points is not None and len(kymo_points)
    traces = trace_columns(frames, kind=kind, resonator=resonator, quantity=str(cell.get("quantity", "") or ""))
    points = pump_points(data, fits) if pump and fits is not None and len(fits) else None
    has_curve = pump and fits is not None and len(fits) and points is not None
    montage, why = _montage(data, images, str(cell["cell_id"]), perturbation_s=perturbation_s,
                            window_px=window_px)
    if why:
        notes.append(why)
    n_top = int(bool(has_kymo)) + len(traces) + int(bool(has_curve))
    if n_top == 0 and montage is None:
        return None, notes + ["no lines, frames or images to draw for this cell"]
    height = (_TOP_IN if n_top else 0.0) + (_MONTAGE_IN if montage is not None else 0.0)
    fig = new_figure(_WIDTH_IN, height, layout=None)  # fixed margins: every panel has the same layout
    if n_top and montage is not None:
        top, bottom = fig.subfigures(2, 1, height_ratios=[_TOP_IN, _MONTAGE_IN])
    elif n_top:
        top, bottom = fig, None
    else:
        top, bottom = None, fig
    if n_top:
        widths = ([1.35] if has_kymo else []) + [1.0] * len(traces) + ([1.2] if has_curve else [])
        # margins in inches (labels, tick labels, the colour bar's label), as fractions of this subfigure
        left, right, gap = 0.75, 0.1, 1.75  # the gap holds a colour bar's label and the next axis' labels
        mean_width = (_WIDTH_IN - left - right - (n_top - 1) * gap) / n_top
        axes = list(np.atleast_1d(top.subplots(1, n_top, width_ratios=widths, gridspec_kw={
            "left": left / _WIDTH_IN, "right": 1 - right / _WIDTH_IN, "bottom": 0.5 / _TOP_IN,
            "top": 1 - 0.25 / _TOP_IN, "wspace": gap / mean_width})))
        if has_kymo:
            time_col = "time_s"
            pts, tr = kymo_points, data.tracks
            if pump and frames is not None and _finite_any(frames, "pump_energy_nj"):
                time_col = "pump_energy_nj"
                pts, tr = _with_pump(pts, frames), _with_pump(tr, frames)
            ax = axes.pop(0)
            plot_kymograph(pts, ax=ax, tracks=tr, time_column=time_col)
            if time_col == "pump_energy_nj":
                ax.set_xscale("log")
        for q in traces:
            plot_trace(frames, ax=axes.pop(0), quantity=q, onset_s=onset_s, onset_err_s=onset_err_s,
                       perturbation_s=perturbation_s)
        if has_curve:
            plot_threshold_curves(points, fits, ax=axes.pop(0))
    if montage is not None:
        patches, times, labels = montage
        # one axes holding the patches side by side: far cheaper to lay out than one axes per patch
        plot_pattern_montage(patches, ax=bottom.add_axes((0.75 / _WIDTH_IN, 0.03, 1 - 0.85 / _WIDTH_IN, 0.94)), times_s=times, labels=labels, n_cols=len(patches))
    return fig, notes
