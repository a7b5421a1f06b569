"""Per-frame cavity quantities of one cell: optical length, shift, index change and the ladder.

At fixed gap L and mode number q a change of the optical length moves every
mode by d lambda / lambda = Delta(n L) / (n_g L) (check-values section 4), so
Delta(n L) = n_g L * d lambda / lambda, with n_g L measured from the comb
spacing.  With a gap medium (a dispersion model from
:func:`lasecyto.cavity.assign_mode_numbers`) each track's shift is scaled by
n_g(lambda_track) / n_g(lambda_centre), since n_g differs across the comb.
A cell of thickness t in the gap changes n L by t Delta n_c (the
partly-filled gap: n L_eff = n_m (L - t) + n_c t, d lambda / d n_c =
lambda t / (n_g L_eff)), so the cell's index change is Delta(n L) / t, with
t = L when the cell fills the gap.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from ._ladder import lens_focal_length_um

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


def _frame_ladder(sigma, sigma_err, q, k):
    """Gouy fraction of one frame: weighted fit sigma = c + s q (+ a q^2) + t k, zeta = t / s.

    Needs two transverse orders, two mode numbers and one degree of freedom;
    the quadratic term (dispersion of the spacing) is fitted with three
    distinct q and at least six lines.  Returns zeta, err (NaN when not possible).
    """
    if np.unique(k).size < 2 or np.unique(q).size < 2 or sigma.size < 4:
        return np.nan, np.nan
    qc = q - np.median(q)
    cols = [np.ones_like(sigma), qc, k.astype(float)]
    if np.unique(q).size >= 3 and sigma.size >= 6:
        cols.append(qc**2)
    design = np.column_stack(cols)
    w = 1.0 / sigma_err**2
    sw = np.sqrt(w)
    a = design * sw[:, None]
    coef, *_ = np.linalg.lstsq(a, sigma * sw, rcond=None)
    dof = sigma.size - design.shape[1]
    if dof < 1 or np.linalg.matrix_rank(a) < design.shape[1]:
        return np.nan, np.nan
    cov = np.linalg.inv(a.T @ a)
    resid = (sigma - design @ coef) * sw
    cov *= max(1.0, float(resid @ resid) / dof)
    s, t = coef[1], coef[2]
    if not s > 0:
        return np.nan, np.nan
    zeta = t / s
    grad = np.array([-t / s**2, 1.0 / s])
    var = grad @ cov[np.ix_([1, 2], [1, 2])] @ grad
    return float(zeta), float(np.sqrt(var))


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


def _shift_series(lam_m, err_m, base, scale=None):
    """Combined relative shift per frame of tracks x frames matrices.

    A track with at least 3 baseline frames is referred to its own baseline
    mean; a later track is tied in by its mean offset from the combined shift
    over at least 3 shared frames.  ``scale`` (one factor per track) multiplies
    each track's relative shift before combining.
    """
    n_t, n_f = lam_m.shape
    present = np.isfinite(lam_m)
    g = np.ones(n_t) if scale is None else np.asarray(scale, dtype=float)
    r = np.full((n_t, n_f), np.nan)
    e = np.full((n_t, n_f), np.nan)
    in_use = np.zeros(n_t, dtype=bool)
    for k in range(n_t):
        sel = present[k] & base
        if sel.sum() >= _MIN_BASELINE_FRAMES:
            lam_b, err_b = _wmean(lam_m[k, sel], err_m[k, sel])
            r[k] = g[k] * (lam_m[k] - lam_b) / lam_b
            e[k] = g[k] * np.sqrt(err_m[k] ** 2 + err_b**2) / lam_b
            in_use[k] = True
    used = present & in_use[:, None]
    comb, comb_err, _ = _combine(r, e, used)
    first = np.array([np.flatnonzero(present[k])[0] for k in range(n_t)])
    for k in np.flatnonzero(~in_use)[np.argsort(first[~in_use], kind="stable")]:
        lam_ref, _ = _wmean(lam_m[k, present[k]], err_m[k, present[k]])
        rk = g[k] * (lam_m[k] - lam_ref) / lam_ref
        ek = g[k] * err_m[k] / lam_ref
        shared = present[k] & np.isfinite(comb)
        if shared.sum() < _MIN_SHARED_FRAMES:
            continue
        off, off_err = _wmean(rk[shared] - comb[shared], np.sqrt(ek[shared] ** 2 + comb_err[shared] ** 2))
        r[k] = rk - off
        e[k] = np.sqrt(ek**2 + off_err**2)
        in_use[k] = True
        used = present & in_use[:, None]
        comb, comb_err, _ = _combine(r, e, used)
    return comb, comb_err, used.sum(axis=0)


def _positive_or_none(name, value):
    if value is None:
        return None
    if not (np.isfinite(value) and value > 0):
        raise InputError("must be a positive length", field=name, expected="> 0 um or None", found=repr(value))
    return float(value)


def cell_frames(lines, tracks, *, frame, time_s, baseline_end_s, gap_um=None, cell_id,
                cell_thickness_um=None, identity=None):
    """One row per frame of one cell: line counts, optical lengths, index change and ladder.

    Parameters
    ----------
    lines : pandas.DataFrame
        The cell's ``lines`` table (for the counts and intensities).
    tracks : pandas.DataFrame
        The cell's ``tracks`` table after
        :func:`lasecyto.cavity.assign_mode_families` (needs ``comb_index``)
        and, for the ladder and the phase optical length,
        :func:`lasecyto.cavity.assign_mode_numbers`.
    frame, time_s : arrays
        Every frame of the acquisition and its time, also frames without lines.
    baseline_end_s : float
        Frames before this time form the baseline.
    gap_um : float, optional
        Mirror gap L (geometric).  Without it and without ``cell_thickness_um``
        ``index_change`` is NaN; without it the lens focal length is NaN.
    cell_id : str
        Written in every row.
    cell_thickness_um : float, optional
        Thickness t of the cell in the gap (t <= L); the index change is then
        the cell's, Delta(n L) / t.  Default: the cell fills the gap (t = L).
    identity : ModeIdentity, optional
        From :func:`lasecyto.cavity.assign_mode_numbers`: with a gap medium it
        scales each track's shift by its group index and gives the phase
        optical length.

    Returns
    -------
    pandas.DataFrame
        A ``cell_frames`` table (with the optional ladder and phase columns),
        plus ``n_shift_tracks`` (tracks combined in the frame's shift).

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
    ``delta_optical_length_um`` = l0 x the combined shift, l0 being the
    median n_g L of the baseline frames (each track's shift scaled by
    n_g(lambda_track) / n_g(lambda_l0) when the identity has a gap medium);
    ``index_change`` = that / t.  ``phase_optical_length_um`` is the weighted
    mean over the fundamental family's lines of q lambda / 2, carried to
    ``reference_nm`` with the medium's dispersion.  ``gouy_fraction`` comes
    from a weighted fit of all lines of the frame with known mode number and
    transverse order, sigma = c + s q (+ a q^2) + t k, as t / s;
    ``lens_focal_length_um`` = L / sin^2(pi gouy_fraction).
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
    gap_um = _positive_or_none("gap_um", gap_um)
    cell_thickness_um = _positive_or_none("cell_thickness_um", cell_thickness_um)
    if gap_um is not None and cell_thickness_um is not None and cell_thickness_um > gap_um:
        raise InputError("cell thicker than the mirror gap", field="cell_thickness_um",
                         expected=f"<= gap_um ({gap_um:g} um)", found=f"{cell_thickness_um:g} um")
    thickness = cell_thickness_um if cell_thickness_um is not None else gap_um
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
    numbers = identity.numbers if identity is not None else None
    model = numbers if (numbers is not None and numbers.medium is not None) else None

    # counts and intensities
    li = np.searchsorted(frame, lines["frame"].to_numpy(np.int64))
    ok = lines["fit_ok"].to_numpy(bool)
    las = ok & lines["lasing"].to_numpy(bool)
    n_lines = np.bincount(li[ok], minlength=n_f)
    n_lasing = np.bincount(li[las], minlength=n_f)
    total_area = np.bincount(li[las], weights=lines["area_counts"].to_numpy(float)[las], minlength=n_f)

    def nan_col():
        return np.full(n_f, np.nan)

    fsr, opt_len, opt_len_err, centre = nan_col(), nan_col(), nan_col(), nan_col()
    shift, shift_err, dshift, dshift_err = nan_col(), nan_col(), nan_col(), nan_col()
    phase_len, phase_len_err, zeta, zeta_err = nan_col(), nan_col(), nan_col(), nan_col()
    n_shift = np.zeros(n_f, dtype=np.int64)

    lam = tracks["center_nm"].to_numpy(float)
    lam_err = tracks["center_err_nm"].to_numpy(float)
    good = np.isfinite(lam) & np.isfinite(lam_err) & (lam_err > 0)
    ti = np.searchsorted(frame, tracks["frame"].to_numpy(np.int64))
    base = time_s < baseline_end_s
    if good.any():
        sigma = 1e3 / lam
        sigma_err = 1e3 * lam_err / lam**2
        # optical length from the family-0 comb of each frame
        fam0 = good & (tracks["mode_family"].to_numpy(np.int64) == 0)
        m_all = tracks["comb_index"].to_numpy(np.int64)
        for j in np.unique(ti[fam0]):
            sel = fam0 & (ti == j)
            s, es = _frame_comb(sigma[sel], sigma_err[sel], m_all[sel])
            if np.isfinite(s) and s > 0:
                opt_len[j] = 1.0 / (2.0 * s)
                opt_len_err[j] = es / (2.0 * s * s)
                centre[j] = float(np.mean(lam[sel]))
                fsr[j] = centre[j] ** 2 * s / 1e3

        # relative shift: per-track matrices (tracks x frames)
        tid = tracks["track_id"].to_numpy(np.int64)
        ids, t_inv = np.unique(tid[good], return_inverse=True)
        lam_m = np.full((ids.size, n_f), np.nan)
        err_m = np.full((ids.size, n_f), np.nan)
        lam_m[t_inv, ti[good]] = lam[good]
        err_m[t_inv, ti[good]] = lam_err[good]
        shift, shift_err, n_shift = _shift_series(lam_m, err_m, base)
        dshift, dshift_err = shift, shift_err
        sel_c = base & np.isfinite(centre)
        if model is not None and sel_c.any():
            lam_c = float(np.median(centre[sel_c]))
            lam_track = np.empty(ids.size)      # each track's baseline wavelength (else its median)
            for k in range(ids.size):
                row = lam_m[k, base & np.isfinite(lam_m[k])]
                lam_track[k] = np.median(row if row.size else lam_m[k, np.isfinite(lam_m[k])])
            scale = model.gap_group_index(lam_track) / model.gap_group_index(lam_c)
            dshift, dshift_err, _ = _shift_series(lam_m, err_m, base, scale)

        cols = set(tracks.columns)
        if {"mode_number", "transverse_order"} <= cols:
            q = tracks["mode_number"].to_numpy(np.int64)
            k = tracks["transverse_order"].to_numpy(np.int64)
            known = good & (q >= 0) & (k >= 0)
            for j in np.unique(ti[known]):
                sel = known & (ti == j)
                zeta[j], zeta_err[j] = _frame_ladder(sigma[sel], sigma_err[sel], q[sel].astype(float), k[sel])
            if numbers is not None and numbers.absolute:
                fund = known & (tracks["mode_family"].to_numpy(np.int64) == identity.fundamental_family)
                ref = numbers.reference_nm
                to_ref = numbers.gap_um * (numbers.medium.n(ref) - numbers.medium.n(lam[fund]))
                nl = q[fund] * lam[fund] * 5e-4 + to_ref          # q lambda / 2, nm -> um
                nl_err = q[fund] * lam_err[fund] * 5e-4
                for j in np.unique(ti[fund]):
                    sel = ti[fund] == j
                    phase_len[j], phase_len_err[j] = _wmean(nl[sel], nl_err[sel])

    # baseline optical length and the changes
    sel = base & np.isfinite(opt_len)
    delta = nan_col()
    delta_err = nan_col()
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
        delta = dshift * l0
        delta_err = np.sqrt((dshift_err * l0) ** 2 + (dshift * l0_err) ** 2)
    if thickness is None:
        index_change, index_change_err = nan_col(), nan_col()
    else:
        index_change = delta / thickness
        index_change_err = delta_err / thickness
    if gap_um is not None:
        focal, focal_err = lens_focal_length_um(zeta, gap_um, gouy_err=zeta_err)
    else:
        focal, focal_err = nan_col(), nan_col()
    reference = numbers.reference_nm if (numbers is not None and numbers.absolute) else np.nan

    out = pd.DataFrame({
        "cell_id": [str(cell_id)] * n_f, "frame": frame, "time_s": time_s,
        "n_lines": n_lines.astype(np.int64), "n_lasing": n_lasing.astype(np.int64),
        "total_area_counts": total_area, "lasing": n_lasing > 0,
        "fsr_nm": fsr, "optical_length_um": opt_len, "optical_length_err_um": opt_len_err,
        "relative_shift": shift, "relative_shift_err": shift_err,
        "delta_optical_length_um": delta, "delta_optical_length_err_um": delta_err,
        "index_change": index_change, "index_change_err": index_change_err,
        "reference_nm": np.full(n_f, reference),
        "phase_optical_length_um": phase_len, "phase_optical_length_err_um": phase_len_err,
        "gouy_fraction": zeta, "gouy_fraction_err": zeta_err,
        "lens_focal_length_um": np.asarray(focal, dtype=float),
        "lens_focal_length_err_um": np.asarray(focal_err, dtype=float),
        "n_shift_tracks": np.asarray(n_shift, dtype=np.int64),
    })
    return tables.validate(out, "cell_frames")
