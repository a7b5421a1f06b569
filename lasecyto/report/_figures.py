"""Figures drawn on matplotlib axes passed in by the caller (no pyplot state).

Every function takes its data as tables (or arrays), draws on ``ax`` and
returns it.  Colours, markers and line styles come from :mod:`._style` (our
own, readable in grey and by colour-blind readers).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ._mpl import axis_label, require_columns, require_matplotlib
from ._style import HOP_MARKER, NEUTRAL, ONSET_COLOUR, sequential_cmap, series_style, series_styles

__all__ = ["plot_kymograph", "plot_trace", "plot_traces_by_condition", "plot_onsets", "plot_values_by_condition",
           "plot_threshold_curves", "family_labels"]


def _bool(df, column, default=True):
    if column not in df.columns:
        return np.full(len(df), default, dtype=bool)
    return df[column].fillna(default).to_numpy(dtype=bool)


def family_labels(tracks):
    """Legend label of each ``mode_family`` of a cell's tracks.

    A bead's family is named by polarization and radial order ("TE 1"), a
    Fabry-Perot family by its transverse order ("k=0") when known, otherwise
    "family N"; tracks in no family (-1) are "tracked modes".
    """
    out = {}
    for family, g in tracks.groupby("mode_family", sort=True):
        label = f"family {family}"
        pol = g["polarization"].astype(str).iloc[0] if "polarization" in g.columns else ""
        radial = int(g["radial_order"].iloc[0]) if "radial_order" in g.columns else -1
        order = int(g["transverse_order"].iloc[0]) if "transverse_order" in g.columns else -1
        if pol and pol != "nan":
            label = f"{pol} {radial}" if radial > 0 else pol
        elif order >= 0:
            label = f"k={order}"
        elif int(family) < 0:
            label = "tracked modes"
        out[family] = label
    return out


def plot_kymograph(cell_lines, *, ax, tracks=None, time_column="time_s", colorbar=True, legend=True):
    """Draw a cell's fitted lines as a time-wavelength picture, its tracked modes over them.

    Parameters
    ----------
    cell_lines : pandas.DataFrame
        Lines of one cell ("lines" or "tracks" table): ``time_column``,
        ``center_nm``, ``area_counts`` and optionally ``fit_ok`` (failed fits
        are left out) and ``lasing`` (lasing lines are drawn as filled dots
        coloured by area, the other fitted lines as small grey dots).
    ax : matplotlib.axes.Axes
        Axes to draw on.
    tracks : pandas.DataFrame, optional
        The cell's "tracks" table (``track_id``, ``mode_family``, and
        optionally ``hop``, ``polarization``, ``radial_order``,
        ``transverse_order``).  Each track is drawn as a line, one style per
        mode family; the first row of a track that began by a mode hop is
        marked with a cross.
    time_column : str, optional
        Column giving the horizontal axis (e.g. ``pump_energy_nj`` for a pump
        series).
    colorbar, legend : bool, optional
        Draw the colour bar of the line areas and the legend of the families.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    from matplotlib.colors import PowerNorm
    from matplotlib.ticker import ScalarFormatter

    require_columns(cell_lines, [time_column, "center_nm", "area_counts"], "lines")
    pts = cell_lines[_bool(cell_lines, "fit_ok")]
    t = pts[time_column].to_numpy(dtype=float)
    c = pts["center_nm"].to_numpy(dtype=float)
    area = pts["area_counts"].to_numpy(dtype=float)
    lasing = _bool(pts, "lasing")
    keep = np.isfinite(t) & np.isfinite(c)
    t, c, lasing = t[keep], c[keep], lasing[keep]
    area = np.clip(np.where(np.isfinite(area[keep]), area[keep], 0.0), 0.0, None)
    if (~lasing).any():
        ax.scatter(t[~lasing], c[~lasing], s=2.0, color="#b3b3b3", linewidths=0, zorder=1,
                   rasterized=True)
    if lasing.any():
        a = area[lasing]
        top = float(a.max()) if a.size else 0.0
        norm = PowerNorm(0.5, vmin=0.0, vmax=top if top > 0 else 1.0)
        sc = ax.scatter(t[lasing], c[lasing], s=6.0, c=a, cmap=sequential_cmap(), norm=norm, linewidths=0,
                        zorder=2, rasterized=True)
        if colorbar:
            ax.figure.colorbar(sc, ax=ax, label="line area (counts)", pad=0.01, fraction=0.05)
    n_hops = 0
    if tracks is not None and len(tracks):
        require_columns(tracks, [time_column, "center_nm", "track_id", "mode_family"], "tracks")
        tr = tracks[_bool(tracks, "fit_ok")]
        families = sorted(pd.unique(tr["mode_family"].to_numpy()).tolist())
        styles = series_styles(families)
        names = family_labels(tr)
        labelled = set()
        for (family, _track), g in tr.groupby(["mode_family", "track_id"], sort=True):
            g = g.sort_values(time_column, kind="stable")
            st = styles[family]
            ax.plot(g[time_column].to_numpy(dtype=float), g["center_nm"].to_numpy(dtype=float),
                    color=st.colour, linestyle=st.linestyle, linewidth=0.9, zorder=3,
                    label=None if family in labelled else names[family])
            labelled.add(family)
        hops = tr[_bool(tr, "hop", default=False)]
        n_hops = len(hops)
        if n_hops:
            ax.plot(hops[time_column].to_numpy(dtype=float), hops["center_nm"].to_numpy(dtype=float),
                    linestyle="none", marker=HOP_MARKER, markersize=7, markerfacecolor="white",
                    markeredgecolor="black", markeredgewidth=1.0, zorder=4, label=f"mode hop ({n_hops})")
        if legend:
            ax.legend(loc="upper left", bbox_to_anchor=(0.0, 1.0), fontsize="x-small", frameon=True,
                      framealpha=0.85, ncols=min(4, len(families) + (1 if n_hops else 0)), handlelength=2.2)
    ax.set_xlabel(axis_label(time_column))
    ax.set_ylabel("vacuum wavelength (nm)")
    ax.yaxis.set_major_formatter(ScalarFormatter(useOffset=False))
    return ax


def plot_trace(cell_frames, *, ax, quantity="index_change", onset_s=None, onset_err_s=None, perturbation_s=None,
               label=None, style=None):
    """Draw one cell's time series of ``quantity`` with its 1-sigma band.

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        "cell_frames" rows of one cell; only lasing frames are drawn when a
        ``lasing`` column is present.
    ax : matplotlib.axes.Axes
        Axes to draw on.
    quantity : str, optional
        Column to draw; its ``<quantity>_err`` column (for a name ending in a
        unit, ``<name>_err_<unit>``), when present, is drawn as a band.
    onset_s, onset_err_s, perturbation_s : float, optional
        The onset (solid line, its uncertainty as a shaded band) and the
        perturbation (dashed line); skipped when None or NaN.
    label : str, optional
        Legend label of the trace.
    style : SeriesStyle, optional
        Colour and line style of the trace (default: the first series style).

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cell_frames, ["time_s", quantity], "cell_frames")
    df = cell_frames[_bool(cell_frames, "lasing")].sort_values("time_s", kind="stable")
    st = style or series_style(0)
    t = df["time_s"].to_numpy(dtype=float)
    y = df[quantity].to_numpy(dtype=float)
    ax.plot(t, y, color=st.colour, linewidth=1.0, label=label)
    err_col = _err_column(quantity, df.columns)
    if err_col is not None:
        e = df[err_col].to_numpy(dtype=float)
        ax.fill_between(t, y - e, y + e, color=st.colour, alpha=0.25, linewidth=0)
    if perturbation_s is not None and np.isfinite(perturbation_s):
        ax.axvline(perturbation_s, color=NEUTRAL, linestyle="--", linewidth=1.0, label="perturbation")
    if onset_s is not None and np.isfinite(onset_s):
        ax.axvline(onset_s, color=ONSET_COLOUR, linewidth=1.2, label="onset")
        if onset_err_s is not None and np.isfinite(onset_err_s) and onset_err_s > 0:
            ax.axvspan(onset_s - onset_err_s, onset_s + onset_err_s, color=ONSET_COLOUR, alpha=0.15, linewidth=0)
    ax.set_xlabel(axis_label("time_s"))
    ax.set_ylabel(axis_label(quantity))
    from matplotlib.ticker import ScalarFormatter

    if quantity.endswith(("_um", "_index")):  # absolute values: full numbers, no offset above the axis
        ax.yaxis.set_major_formatter(ScalarFormatter(useOffset=False))
    handles, _ = ax.get_legend_handles_labels()
    if handles:
        ax.legend(loc="best", fontsize="x-small", frameon=False)
    return ax


def _err_column(quantity, columns):
    for unit in ("_um", "_nm", "_s", "_px"):
        if quantity.endswith(unit):
            cand = quantity[: -len(unit)] + "_err" + unit
            if cand in columns:
                return cand
    cand = quantity + "_err"
    return cand if cand in columns else None


def _order(values, order):
    present = list(dict.fromkeys(str(v) for v in values))
    if order is None:
        return sorted(present)
    order = [str(o) for o in order]
    return [o for o in order if o in present] + sorted(set(present) - set(order))


def plot_traces_by_condition(cell_frames, cells, *, ax, quantity="index_change", conditions=None,
                             max_bins=300):
    """Draw every cell's trace as a thin line and the median of each condition as a thick one.

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        ``cell_id``, ``time_s``, ``quantity`` (and optionally ``lasing``) of
        many cells; the report passes each cell's trace thinned to a few
        hundred points.
    cells : pandas.DataFrame
        "cells" table giving each cell's ``condition`` (and ``perturbation_s``,
        marked by vertical lines).
    ax : matplotlib.axes.Axes
        Axes to draw on.
    quantity : str, optional
        Column of ``cell_frames`` to draw.
    conditions : sequence of str, optional
        Order of the conditions (their styles follow it); default sorted.
    max_bins : int, optional
        The median is taken per frame time, or in this many equal time bins
        when the cells have more distinct times.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cell_frames, ["cell_id", "time_s", quantity], "cell_frames")
    require_columns(cells, ["cell_id", "condition"], "cells")
    condition_of = dict(zip(cells["cell_id"].astype(str), cells["condition"].astype(str)))
    order = _order(condition_of.values(), conditions)
    styles = series_styles(order)
    df = cell_frames[_bool(cell_frames, "lasing")]
    df = df[np.isfinite(df[quantity].to_numpy(dtype=float))]
    ids = df["cell_id"].astype(str).to_numpy()
    cond = np.array([condition_of.get(i, "") for i in ids], dtype=object)
    t_all = df["time_s"].to_numpy(dtype=float)
    y_all = df[quantity].to_numpy(dtype=float)
    for cell_id, index in pd.Series(np.arange(ids.size)).groupby(ids, sort=True).indices.items():
        c = condition_of.get(str(cell_id))
        if c is None:
            continue
        o = index[np.argsort(t_all[index], kind="stable")]
        ax.plot(t_all[o], y_all[o], color=styles[c].colour, linewidth=0.5, alpha=0.35, zorder=1)
    times = np.unique(t_all)
    if times.size > max_bins:
        edges = np.linspace(times[0], times[-1], max_bins + 1)
        centre = 0.5 * (edges[:-1] + edges[1:])
        which = np.clip(np.searchsorted(edges, t_all, side="right") - 1, 0, max_bins - 1)
    else:
        centre = times
        which = np.searchsorted(times, t_all)
    for c in order:
        sel = cond == c
        if not sel.any():
            continue
        n_cells = np.unique(ids[sel]).size
        med = pd.Series(y_all[sel]).groupby(which[sel]).median()
        st = styles[c]
        ax.plot(centre[med.index.to_numpy()], med.to_numpy(), color=st.colour, linestyle=st.linestyle,
                linewidth=2.2, marker=st.marker, markevery=max(1, len(med) // 12), markersize=5,
                markeredgecolor="white", markeredgewidth=0.6, zorder=3,
                label=f"{c} (median of {n_cells} cell{'s' if n_cells != 1 else ''})")
    if "perturbation_s" in cells.columns:
        p = cells["perturbation_s"].to_numpy(dtype=float)
        for value in np.unique(p[np.isfinite(p)]):
            ax.axvline(value, color=NEUTRAL, linestyle="--", linewidth=0.9, zorder=2)
    ax.set_xlabel(axis_label("time_s"))
    ax.set_ylabel(axis_label(quantity))
    if order and len(df):
        ax.legend(title="condition", loc="best", fontsize="small", frameon=False)
    return ax


def plot_values_by_condition(cells, column, *, ax, err_column=None, conditions=None, log=False, xlabel=None,
                             empty_text="no values"):
    """Strip plot of one value per cell, a row per condition, with the median and quartiles.

    Parameters
    ----------
    cells : pandas.DataFrame
        ``condition`` and ``column`` (and ``err_column`` when given).
    column : str
        Values drawn along the horizontal axis; NaN values are left out and
        counted in the row label ("k of n").
    ax : matplotlib.axes.Axes
    err_column : str, optional
        1-sigma errors drawn as horizontal bars.
    conditions : sequence of str, optional
        Order of the rows (top to bottom) and of the styles; default sorted.
    log : bool, optional
        Logarithmic horizontal axis.
    xlabel : str, optional
        Default: the column's name and unit.
    empty_text : str, optional
        Written when no value is finite.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cells, ["condition", column], "cells")
    order = _order(cells["condition"].astype(str), conditions)
    styles = series_styles(order)
    cond = cells["condition"].astype(str).to_numpy()
    values = cells[column].to_numpy(dtype=float)
    errors = cells[err_column].to_numpy(dtype=float) if err_column else np.full(values.shape, np.nan)
    labels, drawn = [], 0
    n_rows = len(order)
    for i, c in enumerate(order):
        y0 = n_rows - 1 - i  # first condition on top
        sel = cond == c
        v, e = values[sel], errors[sel]
        ok = np.isfinite(v) & ((v > 0) if log else True)
        v, e = v[ok], e[ok]
        o = np.argsort(v, kind="stable")
        v, e = v[o], e[o]
        # spread the points of a row vertically, in order of value, so that equal values stay visible
        offsets = np.linspace(-0.28, 0.28, v.size) if v.size > 1 else np.zeros(v.size)
        st = styles[c]
        if v.size:
            ax.errorbar(v, y0 + offsets, xerr=np.where(np.isfinite(e), e, 0.0), color=st.colour,
                        marker=st.marker, linestyle="none", markersize=4.5, elinewidth=0.8, capsize=0,
                        markeredgecolor="white", markeredgewidth=0.4, zorder=3)
            q1, q2, q3 = np.quantile(v, [0.25, 0.5, 0.75])
            ax.plot([q1, q3], [y0 - 0.38, y0 - 0.38], color=st.colour, linewidth=3.0, solid_capstyle="butt",
                    zorder=2)
            ax.plot([q2], [y0 - 0.38], marker="|", markersize=10, markeredgewidth=2.0, color="black", zorder=2)
            drawn += v.size
        labels.append((y0, f"{c} ({v.size} of {int(sel.sum())})"))
    labels.sort()
    ax.set_yticks([y for y, _ in labels], labels=[text for _, text in labels])
    ax.set_ylim(-0.7, max(n_rows, 1) - 0.4)
    if log:
        ax.set_xscale("log")
    ax.set_xlabel(xlabel or axis_label(column))
    if drawn == 0:
        ax.text(0.5, 0.5, empty_text, transform=ax.transAxes, ha="center", va="center")
    return ax


def plot_onsets(cells, *, ax, conditions=None):
    """Draw each changed cell's onset relative to its perturbation, one row per condition.

    Parameters
    ----------
    cells : pandas.DataFrame
        "cells" table: ``condition``, ``perturbation_s``, ``onset_s`` and
        optionally ``onset_err_s`` (drawn as horizontal error bars).  Below
        each row a bar spans the quartiles of the onsets and a tick marks the
        median.
    ax : matplotlib.axes.Axes
    conditions : sequence of str, optional
        Order of the rows (top to bottom); default sorted.

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    require_columns(cells, ["condition", "perturbation_s", "onset_s"], "cells")
    delay = pd.DataFrame({
        "condition": cells["condition"].astype(str).to_numpy(),
        "delay_s": cells["onset_s"].to_numpy(dtype=float) - cells["perturbation_s"].to_numpy(dtype=float),
        "err_s": (cells["onset_err_s"].to_numpy(dtype=float) if "onset_err_s" in cells.columns
                  else np.full(len(cells), np.nan))})
    plot_values_by_condition(delay, "delay_s", ax=ax, err_column="err_s", conditions=conditions,
                             xlabel="onset after perturbation (s)", empty_text="no onsets")
    ax.axvline(0.0, color=NEUTRAL, linestyle="--", linewidth=0.8)
    ax.set_ylabel("condition (cells with an onset of all)")
    return ax


def plot_threshold_curves(points, fits, *, ax, pump_column="pump_energy_nj"):
    """Log-log input-output curves of a pump series with their rate-equation S-curve fits.

    Parameters
    ----------
    points : pandas.DataFrame
        One row per mode and frame: ``track_id``, ``pump_column`` and
        ``output_counts_per_s`` (the mode's line area per second of exposure).
    fits : pandas.DataFrame
        The cell's rows of the "thresholds" table (``track_id``,
        ``center_nm``, ``threshold_nj``, ``threshold_err_nj``, ``beta``,
        ``slope_counts_per_s_per_nj``, ``pump_min_nj``, ``pump_max_nj``,
        ``fit_ok``).  The curve is output = A S(P / P_th; beta) with the
        steady-state photon number S of :func:`lasecyto.cavity.threshold.
        steady_state_photons` and A = slope x beta x P_th; the threshold is
        marked by a vertical line with its uncertainty shaded.
    ax : matplotlib.axes.Axes
    pump_column : str, optional
        Pump axis column (pulse energy in nJ).

    Returns
    -------
    matplotlib.axes.Axes
    """
    require_matplotlib()
    from ..cavity.threshold import steady_state_photons

    require_columns(points, ["track_id", pump_column, "output_counts_per_s"], "points")
    require_columns(fits, ["track_id", "center_nm", "threshold_nj", "threshold_err_nj", "beta",
                           "slope_counts_per_s_per_nj", "pump_min_nj", "pump_max_nj", "fit_ok"], "thresholds")
    track = points["track_id"].to_numpy()
    pump = points[pump_column].to_numpy(dtype=float)
    out = points["output_counts_per_s"].to_numpy(dtype=float)
    for i, fit in enumerate(fits.itertuples(index=False)):
        st = series_style(i)
        sel = (track == fit.track_id) & np.isfinite(pump) & np.isfinite(out) & (pump > 0) & (out > 0)
        ok = bool(fit.fit_ok)
        label = f"{fit.center_nm:.2f} nm"
        if np.isfinite(fit.threshold_nj):
            label += f": {fit.threshold_nj:.3g} \u00b1 {fit.threshold_err_nj:.2g} nJ, \u03b2 {fit.beta:.2g}"
        if not ok:
            label += " (fit not ok)"
        ax.plot(pump[sel], out[sel], color=st.colour, marker=st.marker, linestyle="none", markersize=3.5,
                markeredgecolor="white", markeredgewidth=0.3, zorder=3, label=label)
        params = (fit.threshold_nj, fit.beta, fit.slope_counts_per_s_per_nj)
        if all(np.isfinite(params)) and fit.threshold_nj > 0 and 0 < fit.beta <= 1:
            p = np.geomspace(fit.pump_min_nj, fit.pump_max_nj, 200)
            scale = fit.slope_counts_per_s_per_nj * fit.beta * fit.threshold_nj
            ax.plot(p, scale * steady_state_photons(p / fit.threshold_nj, fit.beta), color=st.colour,
                    linestyle=st.linestyle, linewidth=1.3 if ok else 0.8, zorder=2)
            ax.axvline(fit.threshold_nj, color=st.colour, linestyle=":", linewidth=0.9, zorder=1)
            err = fit.threshold_err_nj
            if np.isfinite(err) and 0 < err < fit.threshold_nj:
                ax.axvspan(fit.threshold_nj - err, fit.threshold_nj + err, color=st.colour, alpha=0.15,
                           linewidth=0, zorder=0)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel(axis_label(pump_column))
    ax.set_ylabel("mode output (counts/s)")
    if len(fits):
        ax.legend(loc="upper left", fontsize="x-small", frameon=False)
    else:
        ax.text(0.5, 0.5, "no mode fitted", transform=ax.transAxes, ha="center", va="center")
    return ax
