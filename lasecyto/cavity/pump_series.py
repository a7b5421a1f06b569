"""Threshold of each main mode of one cell from a pump series (one pump energy per frame).

Each frame of a pump series is recorded at one pump pulse energy (from the sidecar) and
possibly its own exposure.  The output of a mode in a frame is the fitted area of its
line per second of exposure; its error combines the fit's area error with a relative
floor for unmodelled frame-to-frame scatter.  For the modes with the most output at the
highest pumps, :func:`lasecyto.cavity.threshold.fit_threshold` fits the rate-equation
S-curve (threshold, beta, slope efficiency, and the straight line above threshold with its
expected bias), and :func:`lasecyto.cavity.threshold.linewidth_vs_pump` judges the line
width against the instrument function.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from .threshold import fit_threshold, linewidth_vs_pump

__all__ = ["pump_series_output", "fit_pump_series"]


def _per_frame(name, values, n):
    a = np.asarray(values, dtype=float)
    if a.shape != (n,):
        raise InputError("one value per frame is needed", field=name, expected=f"{n} values",
                         found=f"shape {a.shape}")
    if not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise InputError("values must be positive and finite", field=name, expected="> 0",
                         found=f"{int(np.sum(~(np.isfinite(a) & (a > 0))))} bad values")
    return a


def pump_series_output(table, *, frame, exposure_s):
    """Output of every row of a ``lines`` or ``tracks`` table per second of exposure.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows with ``frame``, ``area_counts`` and ``area_err_counts``.
    frame, exposure_s : arrays
        Every frame of the acquisition and its exposure (s).

    Returns
    -------
    output, output_err : ndarray
        area / exposure and its error, in counts per second.
    """
    frame = np.asarray(frame, dtype=np.int64)
    exposure_s = _per_frame("exposure_s", exposure_s, frame.size)
    idx = np.searchsorted(frame, table["frame"].to_numpy(np.int64))
    exp = exposure_s[np.clip(idx, 0, frame.size - 1)]
    return (table["area_counts"].to_numpy(float) / exp, table["area_err_counts"].to_numpy(float) / exp)


def fit_pump_series(tracks, *, frame, pump_nj, exposure_s, cell_id, max_modes=3, min_points=6,
                    linear_range=(2.0, 5.0), output_floor=0.02, fluence_per_nj=None,
                    instrument_fwhm_nm=None, resolved_factor=1.1):
    """Threshold, beta and slope efficiency of the main modes of one cell.

    Parameters
    ----------
    tracks : pandas.DataFrame
        The cell's ``tracks`` table (every fitted line linked, lasing or not: below
        threshold a mode is a weak, broad line).
    frame, pump_nj, exposure_s : arrays
        Every frame of the acquisition, its pump pulse energy (nJ) and exposure (s).
    cell_id : str
        Written in every row.
    max_modes : int
        Modes fitted, by decreasing output over the highest-pump quarter of the frames.
    min_points : int
        A mode needs this many frames with distinct pump energies.
    linear_range : (float, float)
        Pump range, in units of the fitted threshold, of the straight-line estimate.
    output_floor : float
        Relative error added in quadrature to every output (frame-to-frame scatter).
    fluence_per_nj : float, optional
        Fluence of 1 nJ in J/cm^2 (peak for a Gaussian spot); gives threshold fluences.
    instrument_fwhm_nm : float, optional
        Instrument FWHM; without it the linewidth is summarised but not judged.
    resolved_factor : float
        A width counts as resolved above this multiple of the instrument FWHM.

    Returns
    -------
    pandas.DataFrame
        A ``thresholds`` table, one row per mode fitted (best first); a mode whose fit
        failed is a row with ``fit_ok`` False and the reason.
    """
    frame = np.asarray(frame, dtype=np.int64)
    pump_nj = _per_frame("pump_nj", pump_nj, frame.size)
    if np.unique(pump_nj).size < 3:
        raise InputError("a pump series needs several pump energies", field="pump_energy_nj",
                         expected=">= 3 distinct pump energies",
                         found=f"{np.unique(pump_nj).size} distinct value{'s' if np.unique(pump_nj).size != 1 else ''}")
    tracks = tables.validate(tracks, "tracks")
    if len(tracks) == 0:
        return tables.empty("thresholds")
    out, out_err = pump_series_output(tracks, frame=frame, exposure_s=exposure_s)
    fi = np.searchsorted(frame, tracks["frame"].to_numpy(np.int64))
    pump_row = pump_nj[np.clip(fi, 0, frame.size - 1)]
    high = pump_row >= np.quantile(pump_nj, 0.75)
    tid = tracks["track_id"].to_numpy(np.int64)
    score = pd.Series(np.where(high, out, 0.0)).groupby(tid).sum()
    ranked = [int(t) for t in sorted(score.index, key=lambda t: (-score[t], t))]
    rows = []
    for t in ranked:
        sel = (tid == t) & (out > 0) & np.isfinite(out)
        if np.unique(pump_row[sel]).size < min_points:
            continue
        p, y = pump_row[sel], out[sel]
        y_err = np.sqrt(np.nan_to_num(out_err[sel], nan=0.0) ** 2 + (output_floor * y) ** 2)
        row = {"cell_id": str(cell_id), "track_id": t,
               "center_nm": float(np.median(tracks["center_nm"].to_numpy(float)[sel])),
               "n_points": int(sel.sum()), "pump_min_nj": float(p.min()), "pump_max_nj": float(p.max())}
        fit = fit_threshold(p, y, output_err=y_err, linear_range=linear_range, absolute_sigma=False,
                            spot_area_cm2=None if fluence_per_nj is None else 1.0 / fluence_per_nj)
        row.update(threshold_nj=fit.threshold, threshold_err_nj=fit.threshold_err, beta=fit.beta,
                   beta_err=fit.beta_err, slope_counts_per_s_per_nj=fit.slope_efficiency,
                   slope_err_counts_per_s_per_nj=fit.slope_efficiency_err,
                   linear_threshold_nj=fit.linear_threshold, linear_slope_counts_per_s_per_nj=fit.linear_slope,
                   linear_n_points=fit.linear_n_points, linear_bias=fit.linear_bias,
                   threshold_fluence_j_cm2=fit.threshold_fluence_j_cm2,
                   max_fluence_j_cm2=math.nan if fluence_per_nj is None else float(pump_nj.max() * fluence_per_nj),
                   rms_log=fit.rms_log, fit_ok=fit.ok, fit_message=fit.message)
        # line width against pump, from the quarters of lowest and highest pump
        fw = tracks["fwhm_nm"].to_numpy(float)[sel]
        good = np.isfinite(fw) & (fw > 0)
        q_lo, q_hi = np.quantile(p, 0.25), np.quantile(p, 0.75)
        lo_w, hi_w = fw[good & (p <= q_lo)], fw[good & (p >= q_hi)]
        row["fwhm_low_pump_nm"] = float(np.median(lo_w)) if lo_w.size else math.nan
        row["fwhm_high_pump_nm"] = float(np.median(hi_w)) if hi_w.size else math.nan
        row["narrowing_ratio"] = row["fwhm_low_pump_nm"] / row["fwhm_high_pump_nm"]
        row["instrument_fwhm_nm"] = math.nan if instrument_fwhm_nm is None else float(instrument_fwhm_nm)
        row["instrument_limited"] = False
        if instrument_fwhm_nm is not None and good.sum() >= 2:
            lw = linewidth_vs_pump(p[good], fw[good], instrument_fwhm_nm=instrument_fwhm_nm,
                                   resolved_factor=resolved_factor)
            top = lw.pump >= q_hi
            row["instrument_limited"] = bool(np.median(lw.ratio_to_instrument[top]) <= resolved_factor)
        rows.append(row)
        if len(rows) >= max_modes:
            break
    if not rows:
        return tables.empty("thresholds")
    table = pd.DataFrame(rows)
    table["max_fluence_skin_mpe_ratio"] = math.nan
    return tables.validate(table, "thresholds")
