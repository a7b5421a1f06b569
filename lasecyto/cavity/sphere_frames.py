"""Per-frame bead (sphere WGM) quantities of one cell: mode identity of tracks, diameter, medium index.

:func:`assign_sphere_tracks` finds the mode identity (polarization, angular number l,
radial order) of a cell's tracks: the full search of :func:`lasecyto.cavity.sphere.fit_sphere`
runs on the frame(s) with the most tracked lines, and tracks absent from that frame are
matched afterwards to the predicted resonance nearest to them.  :func:`sphere_cell_frames`
then fits every frame with :func:`lasecyto.cavity.sphere.fit_sphere_modes` (the identity is
known, so 3 lines suffice), rejects outlying lines one at a time, and gives per frame the
diameter and the medium index with their uncertainties and their changes since baseline.
The medium-index change is written to ``index_change`` so that the verdict rule applies
unchanged.  Wavelengths are vacuum nm, diameters um.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import InputError
from ._frames import cell_frames
from .sphere import fit_sphere, fit_sphere_modes, mode_wavelengths

__all__ = ["assign_sphere_tracks", "sphere_cell_frames"]

_MEDIAN_EFFICIENCY = 1.2533   # sd of a sample median / sd of the mean, Gaussian data
_OUTLIER_SIGMA = 4.0          # a line this many sigma off is dropped from a frame's fit
_MATCH_MARGIN = 2.0           # a later track takes a mode only if the next one is this much further


def _line_errors(tracks, floor_nm):
    err = tracks["center_err_nm"].to_numpy(float)
    return np.sqrt(np.where(np.isfinite(err), err, 0.0) ** 2 + float(floor_nm) ** 2)


def _identity_columns(tracks, identity):
    out = tracks.copy()
    tid = out["track_id"].to_numpy(np.int64)
    out["polarization"] = np.array([identity.get(int(t), ("", -1, -1))[0] for t in tid], dtype=object)
    out["mode_number"] = np.array([identity.get(int(t), ("", -1, -1))[1] for t in tid], dtype=np.int64)
    out["radial_order"] = np.array([identity.get(int(t), ("", -1, -1))[2] for t in tid], dtype=np.int64)
    # families: one ladder of l per (polarization, radial order), 0 carries most power
    fam = out.loc[out["mode_number"] >= 1].groupby(["polarization", "radial_order"])["area_counts"].sum()
    rank = {key: i for i, key in enumerate(sorted(fam.index, key=lambda k: (-fam[k], k)))}
    out["mode_family"] = np.array([rank.get((p, n), -1) for p, n in
                                   zip(out["polarization"], out["radial_order"])], dtype=np.int64)
    return out


def _drop_outliers(fit, lam, err, *, n_sphere, n_medium, diameter_range_um, n_medium_bounds, tolerance_nm):
    """Refit the best assignment without its worst lines (blends, stray lines): up to a quarter
    of the lines (at least 2), one at a time, keeping at least 4."""
    max_drop = max(2, lam.size // 4)
    a = fit.assignment
    pols, ls, ns = np.array(a.polarization, dtype=object), np.asarray(a.l), np.asarray(a.radial_order)
    keep = np.ones(lam.size, dtype=bool)
    resid = np.asarray(a.residual_nm, dtype=float)
    for _ in range(max_drop):
        z = np.where(keep, np.abs(resid) / err, -np.inf)
        if keep.sum() <= 4 or not np.isfinite(z.max()) or z.max() < _OUTLIER_SIGMA:
            break
        keep[int(np.argmax(z))] = False
        refit = fit_sphere_modes(lam[keep], err[keep], polarization=pols[keep], l=ls[keep],
                                 radial_order=ns[keep], n_sphere=n_sphere, n_medium_guess=n_medium,
                                 diameter_range_um=diameter_range_um, n_medium_bounds=n_medium_bounds,
                                 tolerance_nm=tolerance_nm)
        if refit.ok:
            return refit, keep
        resid = np.full(lam.size, np.nan)
        resid[keep] = refit.assignment.residual_nm
        resid = np.where(keep, resid, 0.0)
    return fit, np.ones(lam.size, dtype=bool)


def assign_sphere_tracks(tracks, *, n_sphere, n_medium, diameter_range_um, n_medium_bounds,
                         max_radial_order=2, floor_nm=0.001, assign_frames=3, tolerance_nm=0.02):
    """Mode identity (polarization, l, radial order) of the tracks of one cell.

    Parameters
    ----------
    tracks : pandas.DataFrame
        The cell's ``tracks`` table (from :func:`lasecyto.tracks.link_lines`).
    n_sphere, n_medium : float or callable
        Bead index and base index of the surroundings (a constant offset to it is fitted).
    diameter_range_um, n_medium_bounds : (float, float)
        Search ranges of the diameter and of the medium index.
    max_radial_order : int
        Radial orders 1..max_radial_order are considered.
    floor_nm : float
        Systematic wavelength error added in quadrature to each line's fitted error
        (calibration); it decides, with the chi2 test, what "fits" means.
    assign_frames : int
        Frames with the most tracked lines tried in turn for the full search.
    tolerance_nm : float
        Largest distance of a later track from its predicted mode (besides 5 sigma).

    Returns
    -------
    tracks : pandas.DataFrame
        The input with ``polarization``, ``mode_number`` (= l), ``radial_order`` and
        ``mode_family`` (one family per polarization and radial order, 0 carrying most
        power) filled; tracks without an identity keep "" / -1.
    info : dict
        ``ok``, ``frame`` (the frame that fixed the identity), ``diameter_um``,
        ``n_medium`` (at its median line) and ``message`` (why no identity was found, or
        notes).
    """
    tracks = tables.validate(tracks, "tracks")
    info = {"ok": False, "frame": -1, "diameter_um": math.nan, "n_medium": math.nan, "message": ""}
    if len(tracks) == 0:
        info["message"] = "no tracked lines"
        return _identity_columns(tracks, {}), info
    frames = tracks["frame"].to_numpy(np.int64)
    counts = pd.Series(frames).value_counts()
    ranked = sorted(counts.index, key=lambda f: (-counts[f], f))[:max(1, int(assign_frames))]
    orders = tuple(range(1, int(max_radial_order) + 1))
    err_all = _line_errors(tracks, floor_nm)
    best_msg = ""
    identity, fit = {}, None
    for f in ranked:
        sel = frames == f
        if sel.sum() < 3:
            best_msg = best_msg or f"frame {f} has {int(sel.sum())} tracked lines (need >= 3)"
            continue
        lam = tracks["center_nm"].to_numpy(float)[sel]
        fit = fit_sphere(lam, err_all[sel], n_sphere=n_sphere, n_medium_guess=n_medium,
                         diameter_range_um=diameter_range_um, n_medium_bounds=n_medium_bounds,
                         radial_orders=orders, tolerance_nm=tolerance_nm)
        keep = np.ones(lam.size, dtype=bool)
        if not fit.ok and fit.assignment is not None and "fit no sphere" in fit.message:
            fit, keep = _drop_outliers(fit, lam, err_all[sel], n_sphere=n_sphere, n_medium=n_medium,
                                       diameter_range_um=diameter_range_um, n_medium_bounds=n_medium_bounds,
                                       tolerance_nm=tolerance_nm)
        if fit.ok:
            a = fit.assignment
            for t, p, l, n in zip(tracks["track_id"].to_numpy(np.int64)[sel][keep], a.polarization, a.l,
                                  a.radial_order):
                identity[int(t)] = (str(p), int(l), int(n))
            info.update(ok=True, frame=int(f), diameter_um=fit.diameter_um, n_medium=fit.n_medium)
            break
        best_msg = best_msg or f"frame {f}: {fit.message}"
    if not identity:
        info["message"] = best_msg or "no frame with enough lines"
        return _identity_columns(tracks, {}), info

    # later tracks: nearest predicted mode, corrected for the common shift since the frame
    lam_all = tracks["center_nm"].to_numpy(float)
    tid_all = tracks["track_id"].to_numpy(np.int64)
    ref = info["frame"]
    d0, nm_at = info["diameter_um"], info["n_medium"]
    lam_ref = float(np.median(lam_all[frames == ref]))
    offset = nm_at - float(np.asarray(n_medium(lam_ref)) if callable(n_medium) else n_medium)

    def medium(lam, offset=offset):
        base = n_medium(lam) if callable(n_medium) else n_medium
        return np.asarray(base, dtype=float) + offset

    table = mode_wavelengths(d0, n_sphere, medium, polarizations=("TE", "TM"), radial_orders=orders,
                             wavelength_range_nm=(float(lam_all.min()) - 2.0, float(lam_all.max()) + 2.0))
    # a mode may carry several tracks (it vanished for longer than the tracker's gap), never
    # two at the same time
    frames_of = {int(t): set(frames[tid_all == t].tolist()) for t in np.unique(tid_all)}
    taken = {}
    for t, key in identity.items():
        taken.setdefault(key, set()).update(frames_of[t])
    # relative shift of every frame from the assigned tracks' wavelengths in the reference frame
    ref_lam = {int(t): lam_all[(tid_all == t) & (frames == ref)][0] for t in identity}
    shift = {}
    for f in np.unique(frames):
        r = [lam_all[i] / ref_lam[int(tid_all[i])] - 1.0 for i in np.flatnonzero(frames == f)
             if int(tid_all[i]) in ref_lam]
        shift[int(f)] = float(np.median(r)) if r else math.nan
    notes = []
    for t in np.unique(tid_all):
        if int(t) in identity:
            continue
        sel = (tid_all == t) & np.array([np.isfinite(shift[int(f)]) for f in frames])
        if not sel.any():
            continue
        lam_t = lam_all[sel] / (1.0 + np.array([shift[int(f)] for f in frames[sel]]))
        centre = float(np.median(lam_t))
        sigma = float(np.median(err_all[sel]))
        dist = np.abs(table["wavelength_nm"] - centre)
        order = np.argsort(dist, kind="stable")
        if not order.size:
            continue
        k = int(order[0])
        key = (str(table["polarization"][k]), int(table["l"][k]), int(table["radial_order"][k]))
        next_dist = float(dist[order[1]]) if order.size > 1 else math.inf
        if dist[k] <= max(tolerance_nm, 5.0 * sigma) and next_dist >= _MATCH_MARGIN * dist[k] \
                and not (taken.get(key, set()) & frames_of[int(t)]):
            identity[int(t)] = key
            taken.setdefault(key, set()).update(frames_of[int(t)])
        else:
            notes.append(int(t))
    if notes:
        info["message"] = f"{len(notes)} track(s) matched no mode: {notes[:5]}"
    return _identity_columns(tracks, identity), info


def _families(pols, orders):
    return len(set(zip(pols.tolist(), orders.tolist())))


def _fit_frame(lam, err, pols, ls, orders, *, n_sphere, n_medium, diameter_range_um, n_medium_bounds,
               reference_nm, min_lines, tolerance_nm, diameter_um=None):
    """Fit one frame, dropping the worst line while the fit fails and lines remain."""
    keep = np.ones(lam.size, dtype=bool)
    while keep.sum() >= min_lines:
        fit = fit_sphere_modes(lam[keep], err[keep], polarization=pols[keep], l=ls[keep],
                               radial_order=orders[keep], n_sphere=n_sphere, n_medium_guess=n_medium,
                               diameter_range_um=diameter_range_um, n_medium_bounds=n_medium_bounds,
                               reference_nm=reference_nm, tolerance_nm=tolerance_nm, diameter_um=diameter_um)
        if fit.ok or keep.sum() == min_lines:
            return fit, int(keep.sum())
        z = np.abs(fit.assignment.residual_nm / err[keep])
        if not np.all(np.isfinite(z)) or z.max() < _OUTLIER_SIGMA:
            return fit, int(keep.sum())
        keep[np.flatnonzero(keep)[int(np.argmax(z))]] = False
    return None, 0


def _baseline(values, errors, base):
    """Median of the baseline values and its uncertainty (formal or scatter, the larger)."""
    sel = base & np.isfinite(values)
    if not sel.any():
        return math.nan, math.nan
    v = values[sel]
    med = float(np.median(v))
    formal = _MEDIAN_EFFICIENCY * float(np.median(errors[sel])) / math.sqrt(v.size)
    scatter = (_MEDIAN_EFFICIENCY * 1.4826 * float(np.median(np.abs(v - med))) / math.sqrt(v.size)
               if v.size > 1 else 0.0)
    return med, max(formal, scatter)


def sphere_cell_frames(lines, tracks, *, frame, time_s, baseline_end_s, n_sphere, n_medium,
                       diameter_range_um, n_medium_bounds, reference_nm, floor_nm=0.001, min_lines=3,
                       tolerance_nm=0.02, cell_id):
    """One row per frame of one bead cell: line counts, shift, diameter and medium index.

    Parameters
    ----------
    lines : pandas.DataFrame
        The cell's ``lines`` table.
    tracks : pandas.DataFrame
        The cell's ``tracks`` after :func:`assign_sphere_tracks`.
    frame, time_s : arrays
        Every frame of the acquisition and its time.
    baseline_end_s : float
        Frames before this time form the baseline.
    n_sphere, n_medium, diameter_range_um, n_medium_bounds, floor_nm, tolerance_nm
        As for :func:`assign_sphere_tracks` (the diameter range may be narrowed to the
        identified bead).
    reference_nm : float
        Wavelength at which ``medium_index`` is given.
    min_lines : int
        Frames with fewer identified lines get no fit (>= 3: two parameters and a check).
    cell_id : str
        Written in every row.

    Returns
    -------
    pandas.DataFrame
        A ``cell_frames`` table: the counts and ``relative_shift`` of
        :func:`lasecyto.cavity.cell_frames`, and ``diameter_um``, ``medium_index``,
        their errors and changes since baseline, ``sphere_lines`` and
        ``sphere_rms_nm``; ``index_change`` holds the medium-index change.  A frame
        whose lines all belong to one family (one polarization and radial order) cannot
        separate the diameter from the medium index: its medium index is fitted with the
        diameter held at the cell's median, and its ``diameter_um`` stays NaN.
    """
    if int(min_lines) != min_lines or min_lines < 3:
        raise InputError("a per-frame size and index fit needs at least 3 lines", field="min_lines",
                         expected="an integer >= 3", found=repr(min_lines))
    tracks = tables.validate(tracks, "tracks")
    plain = tracks.copy()
    plain["mode_family"] = -1           # no Fabry-Perot comb: shifts and counts only
    plain["comb_index"] = -1
    out = cell_frames(lines, plain, frame=frame, time_s=time_s, baseline_end_s=baseline_end_s,
                      gap_um=None, cell_id=cell_id)
    n_f = len(out)
    frames_sorted = out["frame"].to_numpy(np.int64)
    d = np.full(n_f, np.nan)
    d_err = np.full(n_f, np.nan)
    n_med = np.full(n_f, np.nan)
    n_err = np.full(n_f, np.nan)
    used = np.zeros(n_f, dtype=np.int64)
    rms = np.full(n_f, np.nan)
    ident = tracks[tracks["mode_number"].to_numpy(np.int64) >= 1]
    if len(ident):
        err_all = _line_errors(ident, floor_nm)
        fr = ident["frame"].to_numpy(np.int64)
        lam_all = ident["center_nm"].to_numpy(float)
        pol_all = ident["polarization"].to_numpy(object)
        l_all = ident["mode_number"].to_numpy(np.int64)
        n_all = ident["radial_order"].to_numpy(np.int64)
        single = []
        for j, f in enumerate(frames_sorted):
            sel = fr == f
            if sel.sum() < min_lines:
                continue
            if _families(pol_all[sel], n_all[sel]) < 2:
                single.append(j)       # one family cannot separate D from the medium index
                continue
            fit, n_used = _fit_frame(lam_all[sel], err_all[sel], pol_all[sel], l_all[sel], n_all[sel],
                                     n_sphere=n_sphere, n_medium=n_medium, diameter_range_um=diameter_range_um,
                                     n_medium_bounds=n_medium_bounds, reference_nm=reference_nm,
                                     min_lines=min_lines, tolerance_nm=tolerance_nm)
            if fit is None or not fit.ok:
                continue
            d[j], d_err[j], n_med[j], n_err[j] = fit.diameter_um, fit.diameter_err_um, fit.n_medium, fit.n_medium_err
            used[j], rms[j] = n_used, fit.rms_nm
        # frames of a single family: the diameter of the (solid) bead held at its median over the
        # frames that measured it, the medium index fitted; the held diameter's uncertainty is
        # carried into the medium index by refitting at D +- its error
        fin = np.isfinite(d)
        if single and fin.any():
            d_hold, d_hold_err = _baseline(d, d_err, fin)
            for j in single:
                sel = fr == frames_sorted[j]
                args = dict(n_sphere=n_sphere, n_medium=n_medium, diameter_range_um=diameter_range_um,
                            n_medium_bounds=n_medium_bounds, reference_nm=reference_nm, min_lines=min_lines,
                            tolerance_nm=tolerance_nm)
                fit, n_used = _fit_frame(lam_all[sel], err_all[sel], pol_all[sel], l_all[sel], n_all[sel],
                                         diameter_um=d_hold, **args)
                if fit is None or not fit.ok:
                    continue
                up, _ = _fit_frame(lam_all[sel], err_all[sel], pol_all[sel], l_all[sel], n_all[sel],
                                   diameter_um=d_hold + d_hold_err, **args)
                dn = abs(up.n_medium - fit.n_medium) if up is not None and up.ok else math.nan
                n_med[j], n_err[j] = fit.n_medium, math.hypot(fit.n_medium_err, dn)
                used[j], rms[j] = n_used, fit.rms_nm
    base = out["time_s"].to_numpy(float) < baseline_end_s
    d0, d0_err = _baseline(d, d_err, base)
    n0, n0_err = _baseline(n_med, n_err, base)
    out["diameter_um"], out["diameter_err_um"] = d, d_err
    out["medium_index"], out["medium_index_err"] = n_med, n_err
    out["diameter_change_um"] = d - d0
    out["diameter_change_err_um"] = np.sqrt(d_err**2 + d0_err**2)
    out["index_change"] = n_med - n0
    out["index_change_err"] = np.sqrt(n_err**2 + n0_err**2)
    out["sphere_lines"] = used
    out["sphere_rms_nm"] = rms
    return tables.validate(out, "cell_frames")
