"""Per-cell change, significance, onset and verdict from a cell_frames table."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from ._onset import onset_time
from ._stats import robust_std

__all__ = ["summarize_cell", "CHANGE_RULE"]

_MIN_SETTLED_FRAMES = 5

CHANGE_RULE = (
    "A cell is judged twice: against its own baseline (self_changed, the per-cell rule) and against the "
    "control population (changed). Per-cell rule: the quantity is index_change when it is finite in most "
    "lasing frames (for a bead: the change of the index around it), otherwise relative_shift. Only lasing "
    "frames with a finite value are used. The baseline "
    "window holds the frames before perturbation_s (at least min_baseline_frames, default 5); the settled "
    "window holds the last settle_fraction (default 25 %, at least 5 frames) of the frames at or after "
    "perturbation_s. baseline_noise is 1.4826 times the median absolute deviation of the baseline values, never "
    "below the median reported 1-sigma error there. The change is mean(settled) - mean(baseline), its error "
    "sqrt(s_b^2/n_b + s_s^2/n_s) with s the sample standard deviation of each window (floored by the median "
    "reported error), and change_z = change / baseline_noise. The cell is self_changed when |change_z| >= z_min "
    "(default 5) and |change| >= min_index_change (default 2e-4) or, for relative_shift, min_relative_shift "
    "(default 1.5e-4); a processor may judge another series with its own smallest change (the sphere "
    "processor with sphere.judge = diameter: diameter_change_um, sphere.min_diameter_change_um). A cell seen only in emission images is judged the same way on pattern_baseline_corr "
    "(its pattern's correlation with its mean pattern before perturbation_s) with min_pattern_change (default "
    "0.1). Against the controls: when the manifest names control conditions (experiment.control_condition) and "
    "at least 4 control cells have a finite flag feature x (flags.feature, default index_change, the change "
    "above), every cell gets change_score = (x - median of the controls) / s, with s the controls' 1.4826 x "
    "median absolute deviation, widened when the cell's own error exceeds the controls' typical error (a "
    "control is compared with the other controls); a p_value calibrated on the controls (the rank of its "
    "deviation among theirs when (n_controls + 1) x fdr >= 5, otherwise the exact distribution of the score for "
    "normally distributed controls, by Monte Carlo); and a Benjamini-Hochberg q_value across all scored cells. "
    "The cell is changed when q_value <= fdr (flags.fdr, default 0.05) and |x| is at least the per-cell rule's "
    "size threshold (min_index_change or min_relative_shift; flags.min_effect for another feature). A cell that "
    "cannot be scored, and every cell of an experiment without controls, is changed when it is self_changed. "
    "The onset of a changed cell is the first significant change point of its judged series at or after "
    "perturbation_s: exact penalised change points (PELT, squared-error cost, penalty 6 sigma^2 ln n, sigma the "
    "larger of the frame-to-frame and the baseline noise), the first whose step is at least 5 sigma and whose "
    "level persists over the next 3 frames, moved back to the first of the run of same-direction change points "
    "that leads to it (a gradual response); onset_s is half-way between that frame and the frame before it and "
    "onset_err_s combines the spread of the change location with the frame interval. Without a perturbation "
    "time, or with too few baseline or settled frames, the features are NaN, the cell is not changed and the "
    "note says why."
)

_FEATURE_KEYS = ("n_frames", "n_frames_lasing", "n_tracks", "baseline_optical_length_um", "baseline_noise",
                 "index_change", "index_change_err", "change_z", "onset_s", "onset_err_s", "changed")


def _window_sd(values, errors):
    """Sample standard deviation of a window, floored by its median reported error."""
    sd = float(np.std(values, ddof=1)) if values.size > 1 else float("nan")
    return _floor(sd, errors)


def _floor(value, errors):
    e = errors[np.isfinite(errors)]
    floor = float(np.median(e)) if e.size else float("nan")
    if math.isnan(value):
        return floor
    if math.isnan(floor):
        return value
    return max(value, floor)


def _check_options(**opts):
    for name in ("z_min", "min_index_change", "min_relative_shift", "k_sigma"):
        v = opts[name]
        if not (np.isfinite(v) and v >= 0):
            raise InputError("invalid option", field=name, expected="a finite number >= 0", found=repr(v))
    sf = opts["settle_fraction"]
    if not (np.isfinite(sf) and 0 < sf <= 1):
        raise InputError("invalid option", field="settle_fraction", expected="a number in (0, 1]",
                         found=repr(sf))
    for name, low in (("n_consecutive", 1), ("min_baseline_frames", 2), ("n_tracks", 0)):
        v = opts[name]
        if int(v) != v or v < low:
            raise InputError("invalid option", field=name, expected=f"an integer >= {low}", found=repr(v))


def summarize_cell(cell_frames, *, perturbation_s, n_tracks=0, z_min=5.0, min_index_change=2e-4,
                   min_relative_shift=1.5e-4, k_sigma=5.0, n_consecutive=3, settle_fraction=0.25,
                   min_baseline_frames=5, quantity=None, quantity_err=None, min_change=None) -> dict:
    """Change, significance, onset and per-cell verdict of one cell.

    ``changed`` here is the per-cell rule of :data:`CHANGE_RULE` (``self_changed``
    in the cells table of a run, where ``changed`` also weighs the control
    population).  The onset of a changed cell is the first frame at or after
    ``perturbation_s`` that starts a run of ``n_consecutive`` frames beyond
    baseline mean + ``k_sigma`` baseline_noise in the direction of the change
    (half-way between that frame and the one before, error half that interval);
    a run replaces it with the change-point onset of the catalogue.

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        A "cell_frames" table (see :mod:`lasecyto.tables`) holding one cell.
    perturbation_s : float
        Time of the perturbation in seconds; NaN when there was none.
    n_tracks : int, optional
        Mode tracks found for the cell (copied to the result).
    z_min, min_index_change, min_relative_shift, k_sigma, n_consecutive, settle_fraction, min_baseline_frames
        Options of the per-cell rule (:data:`CHANGE_RULE`) and of the threshold onset (above).
    quantity, quantity_err, min_change : optional
        Judge this column of ``cell_frames`` (error column ``quantity_err``, default
        ``quantity + "_err"``) with smallest flagged change ``min_change`` instead of the
        automatic choice (e.g. ``diameter_change_um`` of a bead).

    Returns
    -------
    dict
        The feature keys of the "cells" schema (``n_frames``, ``n_frames_lasing``, ``n_tracks``,
        ``baseline_optical_length_um``, ``baseline_noise``, ``index_change``, ``index_change_err``,
        ``change_z``, ``onset_s``, ``onset_err_s``, ``changed``), ``quantity`` (``"index_change"`` or
        ``"relative_shift"``; the change keys are in its units) and ``note`` (empty when every feature
        could be computed, else the reason).

    Raises
    ------
    InputError
        When ``cell_frames`` is not a cell_frames table of a single cell, or an option is invalid.
        Data problems never raise; they give NaN features and a note.
    """
    _check_options(z_min=z_min, min_index_change=min_index_change, min_relative_shift=min_relative_shift,
                   k_sigma=k_sigma, n_consecutive=n_consecutive, settle_fraction=settle_fraction,
                   min_baseline_frames=min_baseline_frames, n_tracks=n_tracks)
    df = tables.validate(cell_frames, "cell_frames")
    ids = pd.unique(df["cell_id"])
    if len(ids) > 1:
        raise InputError("table holds more than one cell", path="table 'cell_frames'", field="cell_id",
                         expected="one cell", found=f"{len(ids)} cells")
    try:
        perturbation_s = float(perturbation_s)
    except (TypeError, ValueError):
        raise InputError("invalid perturbation time", field="perturbation_s", expected="a number or NaN",
                         found=repr(perturbation_s)) from None

    order = np.lexsort((df["frame"].to_numpy(), df["time_s"].to_numpy()))
    df = df.iloc[order].reset_index(drop=True)
    lasing = df["lasing"].to_numpy(dtype=bool)
    out = dict.fromkeys(_FEATURE_KEYS, float("nan"))
    out.update(n_frames=int(pd.unique(df["frame"]).size), n_frames_lasing=int(lasing.sum()),
               n_tracks=int(n_tracks), changed=False, quantity="index_change", note="")

    las = df[lasing]
    idx = las["index_change"].to_numpy(dtype=float)
    q_err = quantity_err
    if quantity is not None:
        q_err = q_err or quantity + "_err"
        if quantity not in df.columns or q_err not in df.columns or min_change is None:
            raise InputError("a named series needs its column, its error column and min_change",
                             field="quantity", expected="columns of cell_frames and min_change",
                             found=f"{quantity!r}, {q_err!r}, min_change={min_change!r}")
    elif las.shape[0] and np.isfinite(idx).sum() * 2 > las.shape[0]:
        quantity = "index_change"
    elif las.shape[0] and np.isfinite(las["relative_shift"].to_numpy(dtype=float)).any():
        quantity = "relative_shift"
    else:
        quantity = "index_change"
    q_err = q_err or quantity + "_err"
    out["quantity"] = quantity
    if las.shape[0] == 0:
        out["note"] = "no lasing frames"
        return out

    t = las["time_s"].to_numpy(dtype=float)
    q = las[quantity].to_numpy(dtype=float)
    qe = las[q_err].to_numpy(dtype=float)
    opl = las["optical_length_um"].to_numpy(dtype=float)

    if math.isnan(perturbation_s):
        finite_opl = opl[np.isfinite(opl)]
        if finite_opl.size:  # without a perturbation the whole recording is baseline
            out["baseline_optical_length_um"] = float(np.median(finite_opl))
        out["note"] = "no perturbation time"
        return out

    before = t < perturbation_s
    opl_b = opl[before & np.isfinite(opl)]
    if opl_b.size:
        out["baseline_optical_length_um"] = float(np.median(opl_b))

    ok = np.isfinite(q) & np.isfinite(t)
    if not ok.any():
        out["note"] = "no finite index_change or relative_shift in lasing frames"
        return out
    base = ok & before
    post = np.flatnonzero(ok & ~before)
    n_b = int(base.sum())
    if n_b < min_baseline_frames:
        out["note"] = (f"too few baseline frames before perturbation_s ({n_b} lasing frames with finite "
                       f"{quantity}, need {int(min_baseline_frames)})")
        return out
    n_s = max(_MIN_SETTLED_FRAMES, math.ceil(settle_fraction * post.size))
    if post.size < n_s:
        out["note"] = (f"too few frames after perturbation_s ({post.size} lasing frames with finite "
                       f"{quantity}, need {_MIN_SETTLED_FRAMES})")
        return out
    settled = post[-n_s:]

    qb, qs = q[base], q[settled]
    noise = _floor(robust_std(qb), qe[base])
    mean_b = float(np.mean(qb))
    change = float(np.mean(qs)) - mean_b
    s_b = _window_sd(qb, qe[base])
    s_s = _window_sd(qs, qe[settled])
    out["baseline_noise"] = noise
    out["index_change"] = change
    out["index_change_err"] = float(math.sqrt(s_b ** 2 / n_b + s_s ** 2 / n_s))
    if not (np.isfinite(noise) and noise > 0):
        out["note"] = "baseline noise is zero or undefined"
        return out
    z = change / noise
    out["change_z"] = float(z)
    if min_change is None:
        min_change = min_index_change if quantity == "index_change" else min_relative_shift
    changed = bool(abs(z) >= z_min and abs(change) >= min_change)
    out["changed"] = changed
    if changed:
        onset, onset_err = onset_time(t[ok], q[ok], start_s=perturbation_s, baseline_mean=mean_b,
                                      noise=noise, direction=1 if change > 0 else -1, k_sigma=k_sigma,
                                      n_consecutive=n_consecutive)
        out["onset_s"], out["onset_err_s"] = onset, onset_err
        if math.isnan(onset):
            out["note"] = "changed, but no run of frames beyond the onset threshold"
    return out
