"""Per-frame cavity quantities of one cell: optical length, shift and index change.

At fixed gap L and mode number q a change dn of the gap's index moves every
mode by d lambda / lambda = dn / n_g, so the change of the phase optical
length is Delta(n L) = n_g L * d lambda / lambda, with n_g L measured from the
comb spacing (check-values section 4).  When the cell fills the gap,
dn = Delta(n L) / L.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError

__all__ = ["cell_frames"]

_MIN_BASELINE_FRAMES = 3   # a track needs this many baseline frames to carry its own baseline
_MIN_SHARED_FRAMES = 3     # a later track is tied in over at least this many shared frames
_MEDIAN_EFFICIENCY = 1.2533  # sd of a sample median / sd of the mean, Gaussian data


def _wmean(x, err):
    """Inverse-variance weighted mean and its error, scaled by the Birge ratio when > 1."""
    w = 1.0 / err**2
    sw = w.sum()
    m = float((w * x).sum() / sw)
    e = 1.0 / np.sqrt(sw)
    if x.size > 1:
        chi2_red = float((w * (x - m) ** 2).sum()) / (x.size - 1)
        e *= np.sqrt(max(1.0, chi2_red))
    return m, float(e)


def _frame_comb(sigma, sigma_err, m):
    """Fit sigma = sigma_0 + m s; returns s, err_s (NaN with < 2 distinct m)."""
    if np.unique(m).size < 2:
        return np.nan, np.nan
    w = 1.0 / sigma_err**2
    x = m.astype(float)
    sw, sx, sy = w.sum(), (w * x).sum(), (w * sigma).sum()
    sxx, sxy = (w * x * x).sum(), (w * x * sigma).sum()
    det = sw * sxx - sx * sx
    s = (sw * sxy - sx * sy) / det
    b = (sy - s * sx) / sw
    var_s = sw / det
    dof = x.size - 2
    if dof > 0:
        chi2_red = float((w * (sigma - b - s * x) ** 2).sum()) / dof
        var_s *= max(1.0, chi2_red)
    return float(s), float(np.sqrt(var_s))


def _combine(r, e, present):
    """Per-frame inverse-variance mean over tracks; r, e, present have shape (tracks, frames)."""
    n_f = r.shape[1]
    out = np.full(n_f, np.nan)
    err = np.full(n_f, np.nan)
    count = present.sum(axis=0)
    for j in np.flatnonzero(count > 0):
        sel = present[:, j]
        out[j], err[j] = _wmean(r[sel, j], e[sel, j])
    return out, err, count


def cell_frames(lines, tracks, *, frame, time_s, baseline_end_s, gap_um=None, cell_id):
    """One row per frame of one cell: line counts, optical length and index change.

    Parameters
    ----------
    lines : pandas.DataFrame
        The cell's ``lines`` table (for the counts and intensities).
    tracks : pandas.DataFrame
        The cell's ``tracks`` table after
        :func:`lasecyto.cavity.assign_mode_families` (needs ``comb_index``).
    frame, time_s : arrays
        Every frame of the acquisition and its time, also frames without lines.
    baseline_end_s : float
        Frames before this time form the baseline.
    gap_um : float, optional
        Mirror gap, filled by the cell; without it ``index_change`` is NaN.
    cell_id : str
        Written in every row.

    Returns
    -------
    pandas.DataFrame
        A ``cell_frames`` table, plus ``n_shift_tracks`` (tracks combined in
        the frame's shift).

    Notes
    -----
    ``optical_length_um`` is n_g L = 1 / (2 s) from a weighted fit of the
    family-0 lines of the frame, sigma_j = sigma_0 + m_j s with m_j their
    ``comb_index``.  ``relative_shift`` is the inverse-variance mean over
    tracks of (lambda - lambda_b) / lambda_b, lambda_b being the track's
    weighted mean before ``baseline_end_s`` (tracks with at least 3 such
    frames).  A track without its own baseline is tied in by its mean offset
    from the combined shift over at least 3 shared frames.  Errors of weighted
    means are scaled up by the Birge ratio sqrt(chi2_red) when it exceeds 1.
    ``delta_optical_length_um`` = relative_shift x the median n_g L of the
    baseline frames; ``index_change`` = that / ``gap_um``.
    """
    frame = np.asarray(frame)
    time_s = np.asarray(time_s, dtype=float)
    if frame.ndim != 1 or time_s.shape != frame.shape:
        raise InputError("frame and time_s must be 1-D and of equal length", field="time_s",
                         expected=f"{frame.size} values", found=f"shape {time_s.shape}")
    frame = frame.astype(np.int64)
    if np.unique(frame).size != frame.size:
        raise InputError("repeated frame index", field="frame", expected="unique frames",
                         found=f"{frame.size - np.unique(frame).size} repeats")
    if gap_um is not None and not (np.isfinite(gap_um) and gap_um > 0):
        raise InputError("gap must be a positive length", field="gap_um", expected="> 0 um or None",
                         found=repr(gap_um))
    order = np.argsort(frame, kind="stable")
    frame, time_s = frame[order], time_s[order]
    n_f = frame.size
    lines = tables.validate(lines, "lines")
    tracks = tables.validate(tracks, "tracks")
    if len(tracks) and "comb_index" not in tracks.columns:
        raise InputError("tracks lack mode families", field="comb_index",
                         expected="a column from cavity.assign_mode_families", found="absent")
    for name, t in (("lines", lines), ("tracks", tracks)):
        unknown = ~np.isin(t["frame"].to_numpy(np.int64), frame)
        if unknown.any():
            raise InputError("frames not in the acquisition", field=f"{name}.frame",
                             expected="frames listed in `frame`",
                             found=f"{int(unknown.sum())} rows, e.g. frame {int(t['frame'][unknown].iloc[0])}")

    # counts and intensities
    li = np.searchsorted(frame, lines["frame"].to_numpy(np.int64))
    ok = lines["fit_ok"].to_numpy(bool)
    las = ok & lines["lasing"].to_numpy(bool)
    n_lines = np.bincount(li[ok], minlength=n_f)
    n_lasing = np.bincount(li[las], minlength=n_f)
    total_area = np.bincount(li[las], weights=lines["area_counts"].to_numpy(float)[las], minlength=n_f)

    fsr = np.full(n_f, np.nan)
    opt_len = np.full(n_f, np.nan)
    opt_len_err = np.full(n_f, np.nan)
    shift = np.full(n_f, np.nan)
    shift_err = np.full(n_f, np.nan)
    n_shift = np.zeros(n_f, dtype=np.int64)

    lam = tracks["center_nm"].to_numpy(float)
    lam_err = tracks["center_err_nm"].to_numpy(float)
    good = np.isfinite(lam) & np.isfinite(lam_err) & (lam_err > 0)
    ti = np.searchsorted(frame, tracks["frame"].to_numpy(np.int64))
    if good.any():
        # optical length from the family-0 comb of each frame
        fam0 = good & (tracks["mode_family"].to_numpy(np.int64) == 0)
        m_all = tracks["comb_index"].to_numpy(np.int64)
        sigma = 1e3 / lam
        sigma_err = 1e3 * lam_err / lam**2
        for j in np.unique(ti[fam0]):
            sel = fam0 & (ti == j)
            s, es = _frame_comb(sigma[sel], sigma_err[sel], m_all[sel])
            if np.isfinite(s) and s > 0:
                opt_len[j] = 1.0 / (2.0 * s)
                opt_len_err[j] = es / (2.0 * s * s)
                fsr[j] = float(np.mean(lam[sel])) ** 2 * s / 1e3

        # relative shift: per-track matrices (tracks x frames)
        tid = tracks["track_id"].to_numpy(np.int64)
        ids, t_inv = np.unique(tid[good], return_inverse=True)
        cols = ti[good]
        n_t = ids.size
        lam_m = np.full((n_t, n_f), np.nan)
        err_m = np.full((n_t, n_f), np.nan)
        lam_m[t_inv, cols] = lam[good]
        err_m[t_inv, cols] = lam_err[good]
        present = np.isfinite(lam_m)
        base = time_s < baseline_end_s
        r = np.full((n_t, n_f), np.nan)
        e = np.full((n_t, n_f), np.nan)
        in_use = np.zeros(n_t, dtype=bool)
        for k in range(n_t):
            sel = present[k] & base
            if sel.sum() >= _MIN_BASELINE_FRAMES:
                lam_b, err_b = _wmean(lam_m[k, sel], err_m[k, sel])
                r[k] = (lam_m[k] - lam_b) / lam_b
                e[k] = np.sqrt(err_m[k] ** 2 + err_b**2) / lam_b
                in_use[k] = True
        used = present & in_use[:, None]
        comb, comb_err, _ = _combine(r, e, used)
        first = np.array([np.flatnonzero(present[k])[0] for k in range(n_t)])
        for k in np.flatnonzero(~in_use)[np.argsort(first[~in_use], kind="stable")]:
            lam_ref, _ = _wmean(lam_m[k, present[k]], err_m[k, present[k]])
            rk = (lam_m[k] - lam_ref) / lam_ref
            ek = err_m[k] / lam_ref
            shared = present[k] & np.isfinite(comb)
            if shared.sum() < _MIN_SHARED_FRAMES:
                continue
            off, off_err = _wmean(rk[shared] - comb[shared],
                                  np.sqrt(ek[shared] ** 2 + comb_err[shared] ** 2))
            r[k] = rk - off
            e[k] = np.sqrt(ek**2 + off_err**2)
            in_use[k] = True
            used = present & in_use[:, None]
            comb, comb_err, _ = _combine(r, e, used)
        shift, shift_err, n_shift = comb, comb_err, used.sum(axis=0)

    # baseline optical length and the changes
    base = time_s < baseline_end_s
    sel = base & np.isfinite(opt_len)
    delta = np.full(n_f, np.nan)
    delta_err = np.full(n_f, np.nan)
    if sel.any():
        l0 = float(np.median(opt_len[sel]))
        n0 = int(sel.sum())
        formal = _MEDIAN_EFFICIENCY * float(np.median(opt_len_err[sel])) / np.sqrt(n0)
        if n0 > 1:
            mad_sd = 1.4826 * float(np.median(np.abs(opt_len[sel] - l0)))
            scatter = _MEDIAN_EFFICIENCY * mad_sd / np.sqrt(n0)
        else:
            scatter = 0.0
        l0_err = max(formal, scatter)
        delta = shift * l0
        delta_err = np.sqrt((shift_err * l0) ** 2 + (shift * l0_err) ** 2)
    if gap_um is None:
        index_change = np.full(n_f, np.nan)
        index_change_err = np.full(n_f, np.nan)
    else:
        index_change = delta / gap_um
        index_change_err = delta_err / gap_um

    out = pd.DataFrame({
        "cell_id": [str(cell_id)] * n_f, "frame": frame, "time_s": time_s,
        "n_lines": n_lines.astype(np.int64), "n_lasing": n_lasing.astype(np.int64),
        "total_area_counts": total_area, "lasing": n_lasing > 0,
        "fsr_nm": fsr, "optical_length_um": opt_len, "optical_length_err_um": opt_len_err,
        "relative_shift": shift, "relative_shift_err": shift_err,
        "delta_optical_length_um": delta, "delta_optical_length_err_um": delta_err,
        "index_change": index_change, "index_change_err": index_change_err,
        "n_shift_tracks": np.asarray(n_shift, dtype=np.int64),
    })
    return tables.validate(out, "cell_frames")
