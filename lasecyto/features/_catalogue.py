"""Feature catalogue: per-series, per-track and per-cell features with units (docs/features.md)."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
from scipy.optimize import OptimizeWarning, curve_fit
from scipy.stats import theilslopes

from .. import tables
from ..exceptions import InputError
from ._allan import allan_deviation
from ._changepoint import changepoint_onset, difference_noise
from ._stats import robust_std

__all__ = ["series_features", "track_features", "cell_features", "exponential_response",
           "SERIES_KEYS", "CELL_FEATURE_KEYS", "RESPONSE_FEATURE_KEYS", "TRACK_FEATURE_COLUMNS", "DEFAULT_ALLAN_M"]

DEFAULT_ALLAN_M = (1, 2, 4, 8)
_MIN_SETTLED = 5

SERIES_KEYS = ("baseline_level", "baseline_noise", "diff_noise", "change", "change_err", "baseline_slope_per_s",
               "slope_per_s", "step", "onset_s", "onset_err_s", "n_changepoints", "amplitude", "amplitude_err",
               "tau_s", "tau_err_s")

_CAVITY = (("optical_length_um", "optical_length", "_um"), ("diameter_um", "diameter", "_um"),
           ("medium_index", "medium_index", ""))

TRACK_FEATURE_COLUMNS = ("cell_id", "track_id", "mode_family", "n_frames", "first_time_s", "lifetime_s",
                         "dropout_fraction", "baseline_center_nm", "baseline_noise_nm", "shift_nm", "shift_err_nm",
                         "relative_shift", "baseline_slope_nm_per_s", "slope_nm_per_s", "bleach_rate_per_s",
                         "fwhm_baseline_nm", "fwhm_change_nm") + tuple(f"adev_m{m}_nm" for m in DEFAULT_ALLAN_M)


def _series_keys(prefix, m_allan):
    return [f"{prefix}_{k}" for k in SERIES_KEYS] + [f"{prefix}_adev_m{m}" for m in m_allan]


def _cell_keys(m_allan):
    keys = _series_keys("dn", m_allan) + _series_keys("rs", m_allan) + _series_keys("pc", m_allan)
    for _, stem, unit in _CAVITY:
        keys += [f"{stem}_baseline{unit}", f"{stem}_noise{unit}", f"{stem}_change{unit}",
                 f"{stem}_change_err{unit}"]
    keys += ["dropout_fraction", "lasing_lifetime_s", "bleach_rate_per_s", "n_feature_tracks",
             "track_lifetime_median_s", "mode_hop_rate_per_s", "fwhm_change_nm", "track_shift_median_nm",
             "track_adev_m1_nm", "pattern_decorrelation_time_s", "pattern_corr_mean", "pattern_change_rate_per_s"]
    return tuple(keys)


CELL_FEATURE_KEYS = _cell_keys(DEFAULT_ALLAN_M)

#: the catalogue features that describe a cell's response after the perturbation (the default
#: inputs of the classifier in a run): changes, steps, slopes and fitted amplitudes of its series,
#: changes of its cavity quantities, linewidth, mode hops, intensity and pattern dynamics
RESPONSE_FEATURE_KEYS = tuple(
    [f"{p}_{k}" for p in ("dn", "rs", "pc") for k in ("change", "step", "slope_per_s", "amplitude")]
    + ["optical_length_change_um", "diameter_change_um", "medium_index_change", "fwhm_change_nm",
       "track_shift_median_nm", "mode_hop_rate_per_s", "bleach_rate_per_s", "dropout_fraction",
       "pattern_decorrelation_time_s", "pattern_corr_mean", "pattern_change_rate_per_s"])


def _slope(t, y):
    if t.size < 3 or np.ptp(t) == 0:
        return float("nan")
    return float(np.polyfit(t - t.mean(), y, 1)[0])


def _windows(t, perturbation_s, settle_fraction):
    """Boolean baseline mask and indices of the settled window (empty when too short)."""
    before = t < perturbation_s
    post = np.flatnonzero(~before)
    n_s = max(_MIN_SETTLED, math.ceil(settle_fraction * post.size))
    settled = post[-n_s:] if post.size >= n_s else np.zeros(0, dtype=np.int64)
    return before, post, settled


def _response_model(t, b, a, tau, t0):
    return b + a * (1.0 - np.exp(-np.clip(t - t0, 0.0, None) / tau))


def exponential_response(time_s, values, *, t0_s, t0_window_s=None, noise=None) -> dict:
    """Fit ``b + A (1 - exp(-(t - t0)/tau))`` (flat before t0) by least squares.

    ``t0`` is fitted within ``t0_s +- t0_window_s`` (default one median frame
    interval); ``t0_window_s=0`` holds it fixed at ``t0_s``.

    Returns
    -------
    dict
        ``baseline, amplitude, amplitude_err, tau_s, tau_err_s, t0_s, fit_ok, fit_message``.
        Uncertainties are 1 sigma from the covariance with the given ``noise``
        (absolute), or scaled by the residual scatter when ``noise`` is None.
    """
    t = np.asarray(time_s, dtype=float)
    y = np.asarray(values, dtype=float)
    keep = np.isfinite(t) & np.isfinite(y)
    t, y = t[keep], y[keep]
    nan = float("nan")
    out = {"baseline": nan, "amplitude": nan, "amplitude_err": nan, "tau_s": nan, "tau_err_s": nan,
           "t0_s": nan, "fit_ok": False, "fit_message": ""}
    pre, post = t < t0_s, t >= t0_s
    if pre.sum() < 2 or post.sum() < 4:
        out["fit_message"] = "too few frames before or after t0"
        return out
    span = float(t[post].max() - t0_s)
    dt = float(np.median(np.diff(t)))
    win = dt if t0_window_s is None else float(t0_window_s)
    b0 = float(np.median(y[pre]))
    a0 = float(np.mean(y[post][-max(3, int(post.sum()) // 4):]) - b0)
    scale = max(abs(a0), float(np.std(y)), 1e-300)
    tau_lo, tau_hi = max(dt / 10.0, 1e-9), max(20.0 * span, dt)
    p0 = [b0 / scale, a0 / scale, min(max(span / 4.0, tau_lo * 2), tau_hi / 2)]
    lo, hi = [-np.inf, -np.inf, tau_lo], [np.inf, np.inf, tau_hi]
    if win > 0:
        p0.append(float(t0_s))
        lo.append(float(t0_s) - win)
        hi.append(float(t0_s) + win)

        def model(tt, b, a, tau, t0):
            return _response_model(tt, b, a, tau, t0)
    else:
        def model(tt, b, a, tau):
            return _response_model(tt, b, a, tau, t0_s)

    sigma = None if noise is None else np.full(t.size, float(noise) / scale)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            popt, pcov = curve_fit(model, t, y / scale, p0=p0, sigma=sigma, absolute_sigma=noise is not None,
                                   bounds=(lo, hi), method="trf", max_nfev=400)
    except (RuntimeError, ValueError) as exc:
        out["fit_message"] = f"fit did not converge: {exc}".split("\n")[0]
        return out
    err = np.sqrt(np.clip(np.diag(pcov), 0.0, None)) if np.all(np.isfinite(pcov)) else np.full(len(p0), nan)
    out.update(baseline=float(popt[0] * scale), amplitude=float(popt[1] * scale),
               amplitude_err=float(err[1] * scale), tau_s=float(popt[2]), tau_err_s=float(err[2]),
               t0_s=float(popt[3]) if win > 0 else float(t0_s))
    at_bound = popt[2] <= tau_lo * 1.0001 or popt[2] >= tau_hi * 0.9999
    out["fit_ok"] = bool(np.all(np.isfinite(err)) and not at_bound)
    out["fit_message"] = "" if out["fit_ok"] else ("time constant at bound" if at_bound else "singular covariance")
    return out


def series_features(time_s, values, *, perturbation_s, errors=None, m_allan=DEFAULT_ALLAN_M, settle_fraction=0.25,
                    min_baseline_frames=5, penalty_factor=6.0, min_step_sigma=5.0, dynamics=True) -> dict:
    """Drift, noise, change, onset and response features of one series (keys :data:`SERIES_KEYS` + ``adev_m*``).

    Non-finite values are dropped. The baseline window is ``time_s < perturbation_s``;
    the settled window the last ``settle_fraction`` (at least 5) of the frames after it.
    Features that need a missing window are NaN. Units are those of ``values``
    (per second for slopes, seconds for times). ``dynamics=False`` skips the
    change-point onset and the response fit (their keys stay NaN, ``n_changepoints`` 0)
    where only levels, noise, change and slopes are wanted.
    """
    t = np.asarray(time_s, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    e = np.full(v.size, np.nan) if errors is None else np.asarray(errors, dtype=float).ravel()
    keep = np.isfinite(t) & np.isfinite(v)
    order = np.argsort(t[keep], kind="stable")
    t, v, e = t[keep][order], v[keep][order], e[keep][order]
    out = dict.fromkeys(list(SERIES_KEYS) + [f"adev_m{m}" for m in m_allan], float("nan"))
    out["n_changepoints"] = 0
    if v.size < 4:
        return out
    out["diff_noise"] = difference_noise(v)
    if not np.isfinite(perturbation_s):
        return out
    before, post, settled = _windows(t, perturbation_s, settle_fraction)
    nb = int(before.sum())
    if nb >= min_baseline_frames:
        vb, tb = v[before], t[before]
        out["baseline_level"] = float(np.mean(vb))
        out["baseline_noise"] = robust_std(vb)
        out["baseline_slope_per_s"] = _slope(tb, vb)
        dt = float(np.median(np.diff(tb))) if tb.size > 1 else 1.0
        for m in m_allan:
            if 2 * m <= vb.size:
                out[f"adev_m{m}"] = float(allan_deviation(vb, tau0_s=dt, m=[m]).adev[0])
    if post.size >= 3:
        out["slope_per_s"] = _slope(t[post], v[post])
    if nb >= min_baseline_frames and settled.size:
        vb, vs = v[before], v[settled]
        out["change"] = float(np.mean(vs) - np.mean(vb))
        out["change_err"] = float(math.sqrt(np.var(vb, ddof=1) / vb.size + np.var(vs, ddof=1) / vs.size))
    # slow drift must not count as a change: scale by the larger of white noise and baseline scatter
    if not dynamics:
        return out
    noise = float(np.nanmax([out["diff_noise"], out["baseline_noise"]]))
    t0 = float(perturbation_s)
    if np.isfinite(noise) and noise > 0 and v.size >= 8:
        onset = changepoint_onset(t, v, start_s=perturbation_s, noise=noise, penalty_factor=penalty_factor,
                                  min_step_sigma=min_step_sigma)
        out["n_changepoints"] = onset["n_changepoints"]
        out["onset_s"], out["onset_err_s"], out["step"] = onset["onset_s"], onset["onset_err_s"], onset["onset_step"]
        if np.isfinite(onset["onset_s"]):
            t0 = onset["onset_s"]
    if nb >= min_baseline_frames and settled.size:
        fit = exponential_response(t, v, t0_s=t0, noise=None)
        if fit["fit_ok"]:
            out.update(amplitude=fit["amplitude"], amplitude_err=fit["amplitude_err"], tau_s=fit["tau_s"],
                       tau_err_s=fit["tau_err_s"])
    return out


def _check_one_cell(df, name):
    ids = pd.unique(df["cell_id"])
    if len(ids) > 1:
        raise InputError("table holds more than one cell", path=f"table '{name}'", field="cell_id",
                         expected="one cell", found=f"{len(ids)} cells")


def _bleach_rate(t, area):
    ok = np.isfinite(t) & np.isfinite(area) & (area > 0)
    if ok.sum() < 5 or np.ptp(t[ok]) == 0:
        return float("nan")
    return float(-theilslopes(np.log(area[ok]), t[ok])[0])


def track_features(tracks, *, perturbation_s, settle_fraction=0.25, min_baseline_frames=5) -> pd.DataFrame:
    """One row per mode track (columns :data:`TRACK_FEATURE_COLUMNS`), from lasing, well-fitted lines.

    ``lifetime_s`` spans the track's first to last frame; ``dropout_fraction`` is the share
    of frames missing within that span; shifts, slopes and Allan deviations are of
    ``center_nm``; ``bleach_rate_per_s`` is the Theil-Sen slope of -ln(area_counts).
    """
    df = tables.validate(tracks, "tracks")
    try:
        perturbation_s = float(perturbation_s)
    except (TypeError, ValueError):
        raise InputError("invalid perturbation time", field="perturbation_s", expected="a number or NaN",
                         found=repr(perturbation_s)) from None
    df = df[df["lasing"].to_numpy(bool) & df["fit_ok"].to_numpy(bool)]
    rows = []
    for (cid, tid), g in df.groupby(["cell_id", "track_id"], sort=True):
        g = g.sort_values(["time_s", "frame"], kind="stable")
        t = g["time_s"].to_numpy(float)
        c = g["center_nm"].to_numpy(float)
        frames = g["frame"].to_numpy(np.int64)
        span = int(frames.max() - frames.min() + 1)
        s = series_features(t, c, perturbation_s=perturbation_s, settle_fraction=settle_fraction,
                            min_baseline_frames=min_baseline_frames, m_allan=DEFAULT_ALLAN_M, dynamics=False)
        row = {"cell_id": cid, "track_id": int(tid), "mode_family": int(g["mode_family"].iloc[0]),
               "n_frames": int(g.shape[0]), "first_time_s": float(t[0]), "lifetime_s": float(t[-1] - t[0]),
               "dropout_fraction": float(1.0 - np.unique(frames).size / span),
               "baseline_center_nm": s["baseline_level"], "baseline_noise_nm": s["baseline_noise"],
               "shift_nm": s["change"], "shift_err_nm": s["change_err"],
               "relative_shift": s["change"] / s["baseline_level"] if np.isfinite(s["baseline_level"]) else np.nan,
               "baseline_slope_nm_per_s": s["baseline_slope_per_s"], "slope_nm_per_s": s["slope_per_s"],
               "bleach_rate_per_s": _bleach_rate(t, g["area_counts"].to_numpy(float))}
        fw = series_features(t, g["fwhm_nm"].to_numpy(float), perturbation_s=perturbation_s,
                             settle_fraction=settle_fraction, min_baseline_frames=min_baseline_frames, m_allan=(),
                             dynamics=False)
        row["fwhm_baseline_nm"], row["fwhm_change_nm"] = fw["baseline_level"], fw["change"]
        for m in DEFAULT_ALLAN_M:
            row[f"adev_m{m}_nm"] = s[f"adev_m{m}"]
        rows.append(row)
    out = pd.DataFrame(rows, columns=list(TRACK_FEATURE_COLUMNS))
    return out.astype({"track_id": "int64", "mode_family": "int64", "n_frames": "int64"}).reset_index(drop=True)


def _dominant_hops(tracks):
    """Changes of the brightest track between consecutive frames that have one."""
    las = tracks[tracks["lasing"].to_numpy(bool) & tracks["fit_ok"].to_numpy(bool)]
    if las.empty:
        return 0, float("nan")
    las = las.sort_values(["frame", "area_counts", "track_id"], ascending=[True, False, True], kind="stable")
    top = las.drop_duplicates("frame", keep="first")
    ids = top["track_id"].to_numpy(np.int64)
    t = top["time_s"].to_numpy(float)
    return int(np.count_nonzero(np.diff(ids))), float(t[-1] - t[0]) if t.size > 1 else float("nan")


def cell_features(cell_frames, tracks=None, *, perturbation_s, pattern_tracks=None, m_allan=DEFAULT_ALLAN_M,
                  settle_fraction=0.25, min_baseline_frames=5, min_frames=10, penalty_factor=6.0,
                  min_step_sigma=5.0) -> dict:
    """The per-cell feature catalogue (keys :data:`CELL_FEATURE_KEYS`, documented in docs/features.md).

    Parameters
    ----------
    cell_frames : pandas.DataFrame
        A "cell_frames" table of one cell. Optional columns ``diameter_um`` and
        ``medium_index`` are summarised when present.
    tracks : pandas.DataFrame, optional
        The "tracks" table of the same cell (track, hop and linewidth features).
    perturbation_s : float
        Time of the perturbation (NaN: no change features).
    pattern_tracks : pandas.DataFrame, optional
        Per-track pattern features (``decorrelation_time_s``, ``mean_pattern_corr``,
        ``n_pattern_changes``) when emission images exist.
    m_allan : sequence of int
        Averaging factors of the Allan deviations (tau = m x frame interval).
    min_frames : int
        Fewer frames than this in ``cell_frames`` is an error.

    Returns
    -------
    dict
        Every key of the catalogue (NaN where a feature cannot be computed), plus
        ``features_note`` (empty, or why change features are NaN).

    Raises
    ------
    InputError
        For a table that is not one cell's cell_frames (or tracks), too few frames,
        or an invalid option.
    """
    df = tables.validate(cell_frames, "cell_frames")
    _check_one_cell(df, "cell_frames")
    try:
        perturbation_s = float(perturbation_s)
    except (TypeError, ValueError):
        raise InputError("invalid perturbation time", field="perturbation_s", expected="a number or NaN",
                         found=repr(perturbation_s)) from None
    if not (np.isfinite(settle_fraction) and 0 < settle_fraction <= 1):
        raise InputError("invalid option", field="settle_fraction", expected="a number in (0, 1]",
                         found=repr(settle_fraction))
    n_frames = int(pd.unique(df["frame"]).size)
    if n_frames < int(min_frames):
        cid = df["cell_id"].iloc[0] if len(df) else "?"
        raise InputError("too few frames for the feature catalogue", path=f"cell {cid}", field="frame",
                         expected=f"at least {int(min_frames)} frames", found=f"{n_frames} frames")
    df = df.iloc[np.lexsort((df["frame"].to_numpy(), df["time_s"].to_numpy()))].reset_index(drop=True)
    lasing = df["lasing"].to_numpy(bool)
    las = df[lasing]
    t = las["time_s"].to_numpy(float)
    out = dict.fromkeys(_cell_keys(m_allan), float("nan"))
    opts = dict(perturbation_s=perturbation_s, settle_fraction=settle_fraction,
                min_baseline_frames=min_baseline_frames)
    for prefix, col in (("dn", "index_change"), ("rs", "relative_shift"), ("pc", "pattern_baseline_corr")):
        err = las[col + "_err"].to_numpy(float) if col + "_err" in las.columns else None
        s = series_features(t, las[col].to_numpy(float), errors=err, m_allan=m_allan,
                            penalty_factor=penalty_factor, min_step_sigma=min_step_sigma, **opts)
        out.update({f"{prefix}_{k}": v for k, v in s.items()})
    for col, stem, unit in _CAVITY:
        if col in las.columns:
            s = series_features(t, las[col].to_numpy(float), m_allan=(), penalty_factor=penalty_factor,
                                min_step_sigma=min_step_sigma, dynamics=False, **opts)
            out[f"{stem}_baseline{unit}"], out[f"{stem}_noise{unit}"] = s["baseline_level"], s["baseline_noise"]
            out[f"{stem}_change{unit}"], out[f"{stem}_change_err{unit}"] = s["change"], s["change_err"]
    out["dropout_fraction"] = float(1.0 - lasing.sum() / n_frames)
    out["lasing_lifetime_s"] = float(t[-1] - t[0]) if t.size > 1 else 0.0
    out["bleach_rate_per_s"] = _bleach_rate(t, las["total_area_counts"].to_numpy(float))
    out["n_feature_tracks"] = 0
    if tracks is not None:
        tr = tables.validate(tracks, "tracks")
        _check_one_cell(tr, "tracks")
        tf = track_features(tr, **opts)
        out["n_feature_tracks"] = int(tf.shape[0])
        if tf.shape[0]:
            def med(col):
                x = tf[col].to_numpy(float)
                return float(np.median(x[np.isfinite(x)])) if np.isfinite(x).any() else float("nan")
            out["track_lifetime_median_s"] = med("lifetime_s")
            out["fwhm_change_nm"] = med("fwhm_change_nm")
            out["track_shift_median_nm"] = med("shift_nm")
            out["track_adev_m1_nm"] = med("adev_m1_nm")
            hops, span = _dominant_hops(tr)
            out["mode_hop_rate_per_s"] = hops / span if np.isfinite(span) and span > 0 else float("nan")
    if pattern_tracks is not None and len(pattern_tracks):
        pt = pattern_tracks
        for col in ("decorrelation_time_s", "mean_pattern_corr", "n_pattern_changes"):
            if col not in pt.columns:
                raise InputError("missing column", path="table 'pattern_tracks'", field=col, expected="present",
                                 found="absent")
        dec = pt["decorrelation_time_s"].to_numpy(float)
        corr = pt["mean_pattern_corr"].to_numpy(float)
        out["pattern_decorrelation_time_s"] = float(np.median(dec[np.isfinite(dec)])) if np.isfinite(dec).any() \
            else float("nan")
        out["pattern_corr_mean"] = float(np.mean(corr[np.isfinite(corr)])) if np.isfinite(corr).any() \
            else float("nan")
        span = out["lasing_lifetime_s"]
        out["pattern_change_rate_per_s"] = float(pt["n_pattern_changes"].sum()) / span if span > 0 else float("nan")
    note = ""
    if not np.isfinite(perturbation_s):
        note = "no perturbation time"
    elif las.shape[0] == 0:
        note = "no lasing frames"
    elif not any(np.isfinite(out[f"{k}_change"]) for k in ("dn", "rs", "pc")):
        note = "too few lasing frames before or after perturbation_s"
    out["features_note"] = note
    return out
