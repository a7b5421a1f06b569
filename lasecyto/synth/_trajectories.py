"""Synthetic mode trajectories with known identities, for testing the linking of lines into tracks.

Everything here is invented (a synthetic scenario, not measured data): one cell
laser in a planar cavity emits a comb of longitudinal modes q in four
transverse families k.  Over the time-lapse

* the whole comb drifts (the cell's index rises, then partly falls back, plus
  a slow random walk),
* the cell's lens changes shape back and forth, so the Gouy fraction zeta of
  the transverse ladder swings around 1/3 and the families slide past each
  other: the third-order family of mode q crosses the fundamental of mode
  q + 1 every time zeta passes 1/3 (at up to 0.2 nm per frame),
* a mode lases only where the gain (a Gaussian window) lifts it above
  threshold, so modes are born and die at the edges of the gain window,
* single modes drop out for 1-3 frames and whole frames are lost when the
  pump misfires,
* now and then the emission of a mode hops to its neighbour one free spectral
  range away and later returns,
* two lines closer than the spectrometer's resolution are seen as one
  (intensity-weighted position, summed intensity, broadened width) that
  carries the identity of the brighter one.

The generator keeps its own simple comb physics (non-dispersive resonances
sigma = (q + k zeta) / (2 n_g L)) and imports nothing of the analysis code.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..exceptions import InputError
from ._render import _gaussian_band

__all__ = ["TRAJECTORY_SCENARIO", "mode_trajectories"]

#: Constants of the trajectory scenario (lengths in nm unless stated).
TRAJECTORY_SCENARIO = {
    "group_optical_length_um": 27.9,     # n_g L: free spectral range 6.8 nm at 615 nm
    "window_nm": (590.0, 640.0),         # spectrometer window
    "gain_center_nm": 615.0,
    "gain_fwhm_nm": 24.0,
    "threshold": 0.08,                   # a line lases above this fraction of the peak of family 0
    "family_factor": (1.0, 0.6, 0.35, 0.2),
    "family_fwhm_nm": (0.11, 0.12, 0.13, 0.14),
    "zeta_mean": 1.0 / 3.0,              # Gouy fraction of the cell lens, swinging around this value ...
    "zeta_amplitude": 0.08,              # ... by this much ...
    "zeta_period_frames": 50.0,          # ... with this period
    "shifts_nm": ((1.2, 0.3, 8.0), (-0.8, 0.8, 5.0)),  # (size, centre as fraction of the run, width frames)
    "walk_nm": 0.002,                    # random-walk step of the comb per frame
    "peak_area_counts": 3e4,
    "pump_sigma": 0.05,                  # lognormal pulse-to-pulse factor
    "area_sigma": 0.08,                  # lognormal scatter of a fitted area
    "fwhm_sigma": 0.05,                  # lognormal scatter of a fitted width
    "position_sigma_nm": 0.004,          # centre scatter of a line at the peak of family 0 (grows as 1/sqrt)
    "position_sigma_range_nm": (0.002, 0.02),
    "dropout_rate": 0.01,                # per mode and frame: a dropout of 1-3 frames starts
    "misfire_rate": 0.02,                # whole frame lost
    "resolution_nm": 0.09,               # closer lines are seen as one
    "hop_hold_frames": (15, 40),
    "nominal_axis_nm": (582.0, 0.05),    # synthetic pixel axis (offset, nm per pixel)
}


def _logistic(x):
    return 0.5 * (1.0 + np.tanh(0.5 * x))


def _design(n_frames, rng):
    """Per-frame comb drift (relative), Gouy fraction, pump factor and misfires."""
    sc = TRAJECTORY_SCENARIO
    t = np.arange(n_frames, dtype=float)
    zeta = sc["zeta_mean"] + sc["zeta_amplitude"] * np.sin(2.0 * np.pi * t / sc["zeta_period_frames"]
                                                            + rng.uniform(0.0, 2.0 * np.pi))
    shift = np.zeros(n_frames)
    for size, centre, width in sc["shifts_nm"]:
        shift += size * _logistic((t - centre * n_frames - rng.uniform(-5, 5)) / width)
    shift += np.concatenate([[0.0], np.cumsum(sc["walk_nm"] * rng.standard_normal(n_frames - 1))])
    shift -= shift[0]
    pump = np.exp(sc["pump_sigma"] * rng.standard_normal(n_frames))
    misfire = rng.random(n_frames) < sc["misfire_rate"]
    return zeta, shift / sc["gain_center_nm"], pump, misfire


def _modes(zeta, rel_shift):
    """Wavelength (frames, modes) of every (k, q) that can enter the window, and k, q."""
    sc = TRAJECTORY_SCENARIO
    s = 1.0 / (2.0 * sc["group_optical_length_um"])          # 1/um
    lo, hi = sc["window_nm"]
    q_lo = int(np.floor(1e3 / hi / s)) - 2
    q_hi = int(np.ceil(1e3 / lo / s)) + 2
    ks, qs = np.meshgrid(np.arange(len(sc["family_factor"])), np.arange(q_lo, q_hi + 1), indexing="ij")
    k, q = ks.ravel(), qs.ravel()
    sigma = (q[None, :] + k[None, :] * zeta[:, None]) * s
    lam = 1e3 / sigma * (1.0 + rel_shift[:, None])
    return lam, k, q


def _natural_lasing(lam, k):
    sc = TRAJECTORY_SCENARIO
    gain = _gaussian_band(lam, sc["gain_center_nm"], sc["gain_fwhm_nm"])
    level = gain * np.asarray(sc["family_factor"])[k][None, :]
    lo, hi = sc["window_nm"]
    return level, (level >= sc["threshold"]) & (lam > lo) & (lam < hi)


def _hop_events(lasing, lam, k, q, n_hops, rng):
    """Hop events (source column, target column, start frame, stop frame) on distinct modes and times."""
    sc = TRAJECTORY_SCENARIO
    n_frames = lasing.shape[0]
    lo, hi = sc["window_nm"]
    col = {(int(kk), int(qq)): j for j, (kk, qq) in enumerate(zip(k, q))}
    events = []
    for _ in range(200 * max(n_hops, 1)):
        if len(events) >= n_hops:
            break
        hold = int(rng.integers(sc["hop_hold_frames"][0], sc["hop_hold_frames"][1] + 1))
        if n_frames - hold - 20 <= 10:
            break
        f0 = int(rng.integers(10, n_frames - hold - 10))
        f1 = f0 + hold
        src = np.flatnonzero(lasing[f0])
        if src.size == 0:
            continue
        j = int(rng.choice(src))
        tgt = col.get((int(k[j]), int(q[j]) + int(rng.choice([-1, 1]))))
        if tgt is None or lasing[f0, tgt] or lasing[f1, tgt]:
            continue
        inside = (lam[f0:f1, tgt] > lo + 1.0) & (lam[f0:f1, tgt] < hi - 1.0)
        if not inside.all() or not lasing[f0:f1, j].all():
            continue
        busy = any(not (f1 + 5 < e[2] or e[3] + 5 < f0) and {j, tgt} & {e[0], e[1]} for e in events)
        if busy:
            continue
        events.append((j, tgt, f0, f1))
    return events


def _blend(pos, area, fwhm, ident, resolution):
    """Merge lines of one frame closer than ``resolution`` (sorted by position)."""
    order = np.argsort(pos, kind="stable")
    pos, area, fwhm, ident = pos[order], area[order], fwhm[order], ident[order]
    groups = np.cumsum(np.r_[True, np.diff(pos) >= resolution])
    out = []
    for g in np.unique(groups):
        sel = groups == g
        a = area[sel]
        top = int(np.argmax(a))
        p = float(np.sum(a * pos[sel]) / a.sum())
        w = float(fwhm[sel].max() + np.ptp(pos[sel]))
        out.append((p, float(a.sum()), w, int(ident[sel][top]), bool(sel.sum() > 1)))
    return out


def mode_trajectories(*, n_frames=200, n_hops=3, frame_interval_s=10.0, cell_id="synthetic-0", rng=0):
    """Seeded mode trajectories of one synthetic cell laser, with the true identity of every line.

    The scenario (invented, see the module docstring and
    :data:`TRAJECTORY_SCENARIO`) has a drifting comb of four transverse
    families whose Gouy fraction swings so that families cross, births and
    deaths at the gain-window edges, dropouts of 1-3 frames, pump misfires,
    mode hops of one free spectral range and blended lines at crossings.

    Parameters
    ----------
    n_frames : int
        Frames of the time-lapse (at least 80).
    n_hops : int
        Mode-hop events (each hops away and later back; fewer when no mode qualifies).
    frame_interval_s : float
        Time between frames.
    cell_id : str
        Written in every row.
    rng : int or numpy.random.Generator
        Seeds every random draw.

    Returns
    -------
    pandas.DataFrame
        One row per detected line, sorted by frame then wavelength, with the
        columns of a ``lines`` table (vacuum ``center_nm``, ``fwhm_nm``,
        ``area_counts``; every line lasing and well fitted; pixels on a
        nominal 0.05 nm/pixel axis) plus the truth: ``true_mode`` (identity:
        1000 k + q), ``true_family`` (k), ``true_q``, ``true_hop`` (first
        detection after a hop) and ``blended`` (two or more lines seen as one).
    """
    if not (isinstance(n_frames, (int, np.integer)) and n_frames >= 80):
        raise InputError("too few frames for the trajectory scenario", field="n_frames",
                         expected="integer >= 80", found=repr(n_frames))
    if not (isinstance(n_hops, (int, np.integer)) and n_hops >= 0):
        raise InputError("number of hops must be a non-negative integer", field="n_hops",
                         expected="integer >= 0", found=repr(n_hops))
    if not (np.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise InputError("frame interval must be positive", field="frame_interval_s", expected="> 0 s",
                         found=repr(frame_interval_s))
    sc = TRAJECTORY_SCENARIO
    gen = np.random.default_rng(rng)
    zeta, rel_shift, pump, misfire = _design(int(n_frames), gen)
    lam, k, q = _modes(zeta, rel_shift)
    level, lasing = _natural_lasing(lam, k)
    on = lasing.copy()
    hop_start = np.zeros_like(on)
    for j, tgt, f0, f1 in _hop_events(lasing, lam, k, q, int(n_hops), gen):
        on[f0:f1, j] = False
        on[f0:f1, tgt] = True
        level[f0:f1, tgt] = level[f0:f1, j]
        hop_start[f0, tgt] = True
        if f1 < n_frames and lasing[f1, j] and not lasing[f1, tgt]:
            hop_start[f1, j] = True
    # dropouts of single modes (1-3 frames) and misfired frames
    n_f, n_m = on.shape
    starts = gen.random((n_f, n_m)) < sc["dropout_rate"]
    lengths = gen.integers(1, 4, size=(n_f, n_m))
    dropped = np.zeros_like(on)
    for f, m in zip(*np.nonzero(starts)):
        dropped[f:f + lengths[f, m], m] = True
    seen = on & ~dropped & ~misfire[:, None]
    # a hop start hidden by a dropout moves to the first frame the new mode is seen
    hop_seen = np.zeros_like(on)
    for f, m in zip(*np.nonzero(hop_start)):
        later = np.flatnonzero(seen[f:, m])
        if later.size and on[f:f + later[0] + 1, m].all():
            hop_seen[f + later[0], m] = True

    rows = []
    lo_fw, hi_fw = sc["position_sigma_range_nm"]
    fam_fwhm = np.asarray(sc["family_fwhm_nm"])
    for f in range(n_f):
        cols = np.flatnonzero(seen[f])
        if cols.size == 0:
            continue
        rel_level = level[f, cols]
        area = (sc["peak_area_counts"] * rel_level * pump[f]
                * np.exp(sc["area_sigma"] * gen.standard_normal(cols.size)))
        fwhm = fam_fwhm[k[cols]] * np.exp(sc["fwhm_sigma"] * gen.standard_normal(cols.size))
        sig = np.clip(sc["position_sigma_nm"] / np.sqrt(rel_level), lo_fw, hi_fw)
        pos = lam[f, cols] + sig * gen.standard_normal(cols.size)
        for p, a, w, c, blended in _blend(pos, area, fwhm, cols, sc["resolution_nm"]):
            err = float(np.clip(sc["position_sigma_nm"] / np.sqrt(a / sc["peak_area_counts"]), lo_fw, hi_fw))
            rows.append((f, p, err, w, a, int(c), blended))
    f_arr = np.array([r[0] for r in rows], dtype=np.int64)
    pos = np.array([r[1] for r in rows])
    err = np.array([r[2] for r in rows])
    fwhm = np.array([r[3] for r in rows])
    area = np.array([r[4] for r in rows])
    col = np.array([r[5] for r in rows], dtype=np.int64)
    blended = np.array([r[6] for r in rows], dtype=bool)
    n = f_arr.size
    line_id = np.zeros(n, dtype=np.int64)
    starts_f = np.flatnonzero(np.r_[True, f_arr[1:] != f_arr[:-1]])
    for a, b in zip(starts_f, np.r_[starts_f[1:], n]):
        line_id[a:b] = np.arange(b - a)
    c0, c1 = sc["nominal_axis_nm"]
    amp = area / (0.5 * np.pi * fwhm / c1)                  # peak of a Lorentzian of that area, per pixel
    return pd.DataFrame({
        "cell_id": [str(cell_id)] * n, "frame": f_arr, "time_s": f_arr * float(frame_interval_s),
        "line_id": line_id, "center_px": (pos - c0) / c1, "center_err_px": err / c1,
        "center_nm": pos, "center_err_nm": err, "fwhm_px": fwhm / c1, "fwhm_nm": fwhm,
        "area_counts": area, "area_err_counts": np.sqrt(area), "amplitude_counts": amp,
        "background_counts": np.full(n, 30.0), "snr": np.sqrt(area), "chi2_red": np.ones(n),
        "lasing": np.ones(n, dtype=bool), "saturated": np.zeros(n, dtype=bool),
        "fit_ok": np.ones(n, dtype=bool), "fit_message": [""] * n,
        "true_mode": 1000 * k[col] + q[col], "true_family": k[col], "true_q": q[col],
        "true_hop": hop_seen[f_arr, col], "blended": blended,
    })
