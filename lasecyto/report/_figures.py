"""Figures drawn on matplotlib axes passed in by the caller."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ._mpl import axis_label, palette, require_columns, require_matplotlib

__all__ = ["plot_kymograph", "plot_trace", "plot_traces_by_condition", "plot_onsets"]


def plot_kymograph(cell_lines, *, ax, tracks=None, time_column="time_s"):
    """Draw a cell's fitted lines as a time-wavelength picture.

    Parameters
    ----------
    cell_lines : pandas.DataFrame
        Lines of one cell ("lines" or "tracks" table): ``time_column``,
        ``center_nm``, ``area_counts`` and optionally ``fit_ok``.
    ax : matplotlib.axes.Axes
        Axes to draw on.
    tracks : pandas.DataFrame, optional
        The cell's "tracks" table; each track is drawn over the points as a
        line, one colour per ``mode_family``.
    time_column : str, optional
        Column giving the horizontal axis.

    Returns
    -------
    matplotlib.axes.Axes
    """
    mpl = require_matplotlib()
    require_columns(cell_lines, [time_column, "center_nm", "area_counts"], "lines")
    pts = cell_lines
    if "fit_ok" in pts.columns:
        pts = pts[pts["fit_ok"].to_numpy(dtype=bool)]
    t = pts[time_column].to_numpy(dtype=float)
    c = pts["center_nm"].to_numpy(dtype=float)
    area = pts["area_counts"].to_numpy(dtype=float)
    keep = np.isfinite(t) & np.isfinite(c)
    t, c, area = t[keep], c[keep], np.where(np.isfinite(area[keep]), area[keep], 0.0)
    area = np.clip(area, 0.0, None)
    top = area.max() if area.size else 0.0
    sizes = 4.0 + 30.0 * (area / top if top > 0 else np.zeros_like(area))
    sc = ax.scatter(t, c, s=sizes, c=area, cmap="viridis", linewidths=0, zorder=2)
    if area.size:
        ax.figure.colorbar(sc, ax=ax, label=axis_label("area_counts"))
    if tracks is not None and len(tracks):
        require_columns(tracks, [time_column, "center_nm", "track_id", "mode_family"], "tracks")
        families = np.sort(pd.unique(tracks["mode_family"].to_numpy()))
        colours = dict(zip(families.tolist(), palette(len(families))))
        labelled = set()
        for (family, track), g in tracks.groupby(["mode_family", "track_id"], sort=True):
            g = g.sort_values(time_column, kind="stable")
            label = None if family in labelled else f"mode family {family}"
            labelled.add(family)
            ax.plot(g[time_column].to_numpy(dtype=float), g["center_nm"].to_numpy(dtype=float),
                    color=colours[family], linewidth=0.9, zorder=3, label=label)
        ax.legend(loc="best", fontsize="small", frameon=False)
    ax.set_xlabel(axis_label(time_column))
    ax.set_ylabel("vacuum wavelength (nm)")
    ax.yaxis.set_major_formatter(mpl.ticker.ScalarFormatter(useOffset=False))
    return ax


def plot_trace(cell_frames, *, ax, quantity="index_change", onset_s=None, perturbation_s=None, label=None):
    """Draw one cell's time series of ``quantity`` with its 1-sigma band.

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        "cell_frames" rows of one cell; only lasing frames are drawn when a
        ``lasing`` column is present.
    ax : matplotlib.axes.Axes
        Axes to draw on.
    quantity : str, optional
        Column to draw; its ``<quantity>_err`` column, when present, is drawn
        as a band.
    onset_s, perturbation_s : float, optional
        Times marked by vertical lines (skipped when None or NaN).
    label : str, optional
        Legend label of the trace.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cell_frames, ["time_s", quantity], "cell_frames")
    df = cell_frames
    if "lasing" in df.columns:
        df = df[df["lasing"].to_numpy(dtype=bool)]
    df = df.sort_values("time_s", kind="stable")
    t = df["time_s"].to_numpy(dtype=float)
    y = df[quantity].to_numpy(dtype=float)
    (line,) = ax.plot(t, y, linewidth=1.0, label=label)
    err_col = quantity + "_err"
    if err_col in df.columns:
        e = df[err_col].to_numpy(dtype=float)
        ax.fill_between(t, y - e, y + e, color=line.get_color(), alpha=0.25, linewidth=0)
    if perturbation_s is not None and np.isfinite(perturbation_s):
        ax.axvline(perturbation_s, color="0.4", linestyle="--", linewidth=1.0, label="perturbation")
    if onset_s is not None and np.isfinite(onset_s):
        ax.axvline(onset_s, color="tab:red", linewidth=1.0, label="onset")
    ax.set_xlabel(axis_label("time_s"))
    ax.set_ylabel(axis_label(quantity))
    if label is not None or perturbation_s is not None or onset_s is not None:
        handles, _ = ax.get_legend_handles_labels()
        if handles:
            ax.legend(loc="best", fontsize="small", frameon=False)
    return ax


def plot_traces_by_condition(cell_frames, cells, *, ax, quantity="index_change"):
    """Draw every cell's trace as a thin line, one colour per condition.

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        "cell_frames" table of many cells.
    cells : pandas.DataFrame
        "cells" table giving each cell's ``condition`` (and ``perturbation_s``,
        marked by vertical lines).
    ax : matplotlib.axes.Axes
        Axes to draw on.
    quantity : str, optional
        Column of ``cell_frames`` to draw.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cell_frames, ["cell_id", "time_s", quantity], "cell_frames")
    require_columns(cells, ["cell_id", "condition"], "cells")
    condition_of = dict(zip(cells["cell_id"].astype(str), cells["condition"].astype(str)))
    conditions = sorted(set(condition_of.values()))
    colours = dict(zip(conditions, palette(len(conditions))))
    df = cell_frames
    if "lasing" in df.columns:
        df = df[df["lasing"].to_numpy(dtype=bool)]
    labelled = set()
    for cell_id, g in df.groupby(df["cell_id"].astype(str), sort=True):
        cond = condition_of.get(cell_id)
        if cond is None:
            continue
        g = g.sort_values("time_s", kind="stable")
        label = None if cond in labelled else cond
        labelled.add(cond)
        ax.plot(g["time_s"].to_numpy(dtype=float), g[quantity].to_numpy(dtype=float),
                color=colours[cond], linewidth=0.7, alpha=0.8, label=label)
    if "perturbation_s" in cells.columns:
        p = cells["perturbation_s"].to_numpy(dtype=float)
        for value in np.unique(p[np.isfinite(p)]):
            ax.axvline(value, color="0.4", linestyle="--", linewidth=0.8)
    ax.set_xlabel(axis_label("time_s"))
    ax.set_ylabel(axis_label(quantity))
    if labelled:
        ax.legend(title="condition", loc="best", fontsize="small", frameon=False)
    return ax


def plot_onsets(cells, *, ax):
    """Draw each changed cell's onset relative to its perturbation, one row per condition.

    Parameters
    ----------
    cells : pandas.DataFrame
        "cells" table: ``condition``, ``perturbation_s``, ``onset_s`` and
        optionally ``onset_err_s`` (drawn as horizontal error bars).
    ax : matplotlib.axes.Axes
        Axes to draw on.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cells, ["condition", "perturbation_s", "onset_s"], "cells")
    conditions = sorted(set(cells["condition"].astype(str)))
    colours = palette(len(conditions))
    labels = []
    drawn = 0
    for i, cond in enumerate(conditions):
        g = cells[cells["condition"].astype(str).to_numpy() == cond]
        delay = g["onset_s"].to_numpy(dtype=float) - g["perturbation_s"].to_numpy(dtype=float)
        err = (g["onset_err_s"].to_numpy(dtype=float) if "onset_err_s" in g.columns
               else np.full(delay.shape, np.nan))
        ok = np.isfinite(delay)
        delay, err = delay[ok], err[ok]
        order = np.argsort(delay, kind="stable")
        delay, err = delay[order], err[order]
        # spread the points of a row vertically, in order of delay, so that equal delays stay visible
        offsets = np.linspace(-0.25, 0.25, delay.size) if delay.size > 1 else np.zeros(delay.size)
        if delay.size:
            ax.errorbar(delay, i + offsets, xerr=np.where(np.isfinite(err), err, 0.0), fmt="o",
                        markersize=4, color=colours[i], elinewidth=0.8, capsize=0)
            drawn += delay.size
        labels.append(f"{cond} ({delay.size} of {len(g)})")
    ax.set_yticks(np.arange(len(conditions)), labels=labels)
    ax.set_ylim(-0.6, max(len(conditions), 1) - 0.4)
    ax.axvline(0.0, color="0.4", linestyle="--", linewidth=0.8)
    ax.set_xlabel("onset after perturbation (s)")
    ax.set_ylabel("condition")
    ax.set_title("onsets by condition (cells with an onset of all cells)", fontsize="medium")
    if drawn == 0:
        ax.text(0.5, 0.5, "no onsets", transform=ax.transAxes, ha="center", va="center")
    return ax
