"""Synthetic camera stacks of lasing-cell emission patterns with ground truth.

Each lasing cell shows one transverse mode (Hermite-Gaussian HG_mn or
Laguerre-Gaussian LG_pl intensity, Kogelnik & Li 1966) that drifts, turns
slowly, drops out for single frames and switches order at known frames.  The
intensity formulas and the TIFF writing are implemented here on their own
(recurrences for the polynomials, tifffile directly) so that this generator
shares no code with :mod:`lasecyto.patterns` or :mod:`lasecyto.io`.

Coordinates: ``x`` runs along image columns, ``y`` along rows (downwards);
``orientation_deg`` turns the mode's first axis from +x towards +y.
"""

from __future__ import annotations

import functools
import json
import math
import uuid
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = [
    "PATTERN_ORDERS",
    "mode_intensity",
    "pattern_truth",
    "render_pattern_frame",
    "iter_pattern_frames",
    "simulate_pattern_stack",
    "write_pattern_stack",
    "write_image_stack",
]

#: Transverse orders the generator draws from (distinct intensity patterns; HG_nm is HG_mn turned 90 deg).
PATTERN_ORDERS = ("HG00", "HG10", "HG11", "HG20", "HG21", "LG01", "LG02", "LG10")


def _hermite(k, s):
    """Physicists' Hermite polynomial H_k(s) by the three-term recurrence."""
    h_prev, h = np.ones_like(s), 2.0 * s
    if k == 0:
        return h_prev
    for j in range(1, k):
        h_prev, h = h, 2.0 * s * h - 2.0 * j * h_prev
    return h


def _laguerre(p, a, u):
    """Generalised Laguerre polynomial L_p^a(u) by the three-term recurrence."""
    l_prev, l_cur = np.ones_like(u), 1.0 + a - u
    if p == 0:
        return l_prev
    for k in range(1, p):
        l_prev, l_cur = l_cur, ((2 * k + 1 + a - u) * l_cur - (k + a) * l_prev) / (k + 1)
    return l_cur


def mode_intensity(order, x, y, *, waist_px, orientation_deg=0.0):
    """Normalised intensity (integral over the plane = 1) of one transverse mode.

    Parameters
    ----------
    order : str
        ``"HGmn"`` or ``"LGpl"`` (one digit each), e.g. ``"HG10"``, ``"LG01"``.
    x, y : array_like
        Coordinates relative to the mode centre, in pixels.
    waist_px : float
        Beam radius w (1/e^2 radius of the fundamental intensity).
    orientation_deg : float, optional
        Turn of the HG axes (ignored by the rotationally symmetric LG modes).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    w = float(waist_px)
    family, i, j = order[:2], int(order[2]), int(order[3])
    r2 = x * x + y * y
    if family == "HG":
        t = math.radians(orientation_deg)
        xr = x * math.cos(t) + y * math.sin(t)
        yr = -x * math.sin(t) + y * math.cos(t)
        norm = 2.0 / (math.pi * w * w) / (2.0 ** (i + j) * math.factorial(i) * math.factorial(j))
        hx = _hermite(i, math.sqrt(2.0) * xr / w)
        hy = _hermite(j, math.sqrt(2.0) * yr / w)
        return norm * hx * hx * hy * hy * np.exp(-2.0 * r2 / (w * w))
    if family == "LG":
        p, l_abs = i, abs(j)
        u = 2.0 * r2 / (w * w)
        norm = 2.0 * math.factorial(p) / (math.pi * math.factorial(p + l_abs) * w * w)
        lag = _laguerre(p, l_abs, u)
        return norm * u ** l_abs * lag * lag * np.exp(-u)
    raise ValueError(f"unknown mode order {order!r}: expected 'HGmn' or 'LGpl'")


@functools.lru_cache(maxsize=4096)
def _peak(order, waist_px):
    g = np.linspace(-3.5 * waist_px, 3.5 * waist_px, 281)
    xx, yy = np.meshgrid(g, g)
    return float(mode_intensity(order, xx, yy, waist_px=waist_px).max())


def _place(rng, n, shape, margin, min_sep, touching_px):
    """Cell centres (rows, cols) at least ``min_sep`` apart; cells 0 and 1 ``touching_px`` apart if given."""
    for _ in range(2000):
        pos = []
        for k in range(n):
            for _ in range(500):
                if k == 1 and touching_px is not None:
                    a = rng.uniform(0.0, 2.0 * math.pi)
                    cand = pos[0] + touching_px * np.array([math.sin(a), math.cos(a)])
                    others = pos[2:]
                else:
                    cand = np.array([rng.uniform(margin, shape[0] - margin),
                                     rng.uniform(margin, shape[1] - margin)])
                    others = pos
                inside = margin <= cand[0] <= shape[0] - margin and margin <= cand[1] <= shape[1] - margin
                if inside and all(math.hypot(*(cand - q)) >= min_sep for q in others):
                    pos.append(cand)
                    break
            else:
                break
        if len(pos) == n:
            return np.array(pos).reshape(n, 2)
    raise ValueError(f"cannot place {n} cells {min_sep:g} px apart in a {shape} field")


def _triangle(x, amplitude):
    """Triangle wave of slope 1 through 0, bounded by +-``amplitude`` (identity when it is 0 or less)."""
    if amplitude <= 0:
        return np.asarray(x, dtype=float)
    a = amplitude
    return a - np.abs(np.mod(np.asarray(x, dtype=float) + a, 4 * a) - 2 * a)


def pattern_truth(*, n_frames=40, shape=(128, 128), n_cells=4, waist_px=(4.0, 5.5), peak_snr=25.0,
                  orders=PATTERN_ORDERS, change_prob=0.04, min_dwell_frames=4, dropout_prob=0.0,
                  drift_px_per_frame=(0.03, -0.02), max_drift_px=4.0, jitter_px=0.04, restoring=0.05,
                  rotation_deg_per_frame=0.2,
                  min_separation_px=34.0, touching_px=None, frame_interval_s=1.0,
                  background_e=20.0, read_noise_e=3.0, rng=None):
    """Ground truth of a synthetic pattern stack: one row per cell and frame.

    Parameters
    ----------
    n_frames, shape, n_cells : int, (int, int), int
        Stack size (frames, rows, columns) and number of lasing cells.
    waist_px : (float, float)
        Range the cells' beam radii are drawn from.
    peak_snr : float
        Peak signal over the total noise (shot, background, read) at the peak pixel.
    orders : sequence of str
        Orders drawn for the start and for every change.
    change_prob : float
        Per-frame probability that a cell switches to another order (at least
        ``min_dwell_frames`` frames after its previous change).
    dropout_prob : float
        Per-frame probability that a cell does not lase (a missed frame).
    drift_px_per_frame, max_drift_px : (float, float), float
        Common stage drift (rows, cols), going back and forth within
        +-``max_drift_px`` so that long stacks keep their cells in the field.
    jitter_px, restoring : float
        Per-cell wander: a random step per frame pulled back by ``restoring``
        of the offset each frame (stationary spread jitter / sqrt(2 restoring)).
    rotation_deg_per_frame : float
        Turn rate of the HG axes.
    min_separation_px, touching_px : float, float or None
        Minimum distance between cells; when ``touching_px`` is given the
        second cell is put that far from the first (a touching pair).
    rng : int or numpy.random.Generator
        Randomness source.

    Returns
    -------
    pandas.DataFrame
        ``frame, time_s, cell, row_px, col_px, order, waist_px, orientation_deg,
        lasing, changed, peak_e`` (``changed``: the order differs from the one
        at the cell's previous lasing frame).
    """
    rng = np.random.default_rng(rng)
    if not orders:
        raise ValueError("orders must name at least one mode order")
    margin = 2.6 * max(waist_px) + 2 + max(float(max_drift_px), 0.0)
    start = _place(rng, n_cells, shape, margin, min_separation_px, touching_px)
    waists = rng.uniform(waist_px[0], waist_px[1], n_cells)
    angles = rng.uniform(0.0, 180.0, n_cells)
    variance0 = background_e + read_noise_e ** 2
    s2 = peak_snr ** 2
    peak_e = (s2 + math.sqrt(s2 * s2 + 4.0 * s2 * variance0)) / 2.0  # S / sqrt(S + v0) = snr
    drift = np.asarray(drift_px_per_frame, dtype=float)
    amp = float(max_drift_px)
    wander = np.zeros((n_cells, 2))
    rows = []
    current = [orders[int(rng.integers(len(orders)))] for _ in range(n_cells)]
    last_change = np.full(n_cells, -10 ** 6)
    last_lasing_order = [None] * n_cells
    for f in range(n_frames):
        if f:
            wander = (1.0 - restoring) * wander + rng.normal(0.0, jitter_px, wander.shape)
        pos = start + _triangle(drift * f, amp) + wander
        for c in range(n_cells):
            if f and f - last_change[c] >= min_dwell_frames and rng.random() < change_prob and len(orders) > 1:
                choices = [o for o in orders if o != current[c]]
                current[c] = choices[int(rng.integers(len(choices)))]
                last_change[c] = f
            lasing = bool(f == 0 or rng.random() >= dropout_prob)
            changed = lasing and last_lasing_order[c] is not None and current[c] != last_lasing_order[c]
            if lasing:
                last_lasing_order[c] = current[c]
            rows.append((f, f * frame_interval_s, c, pos[c, 0], pos[c, 1], current[c], waists[c],
                         (angles[c] + rotation_deg_per_frame * f) % 180.0, lasing, changed, peak_e))
    cols = ["frame", "time_s", "cell", "row_px", "col_px", "order", "waist_px", "orientation_deg",
            "lasing", "changed", "peak_e"]
    return pd.DataFrame(rows, columns=cols)


def render_pattern_frame(frame_truth, *, shape, background_e=20.0, read_noise_e=3.0, offset_counts=100.0,
                         gain_counts_per_e=1.0, saturation_counts=65535, rng=None):
    """One noisy uint16 camera frame of the lasing cells in ``frame_truth`` (rows of one frame).

    Each cell's pattern is scaled so that its brightest pixel expects
    ``peak_e`` photoelectrons over the background; counts are
    ``offset + gain * (Poisson(signal + background) + read noise)``, clipped
    at ``saturation_counts``.
    """
    rng = np.random.default_rng(rng)
    expected = np.full(shape, float(background_e))
    for row in frame_truth.itertuples(index=False):
        if not row.lasing:
            continue
        half = int(math.ceil(4.0 * row.waist_px))
        r0, c0 = int(round(row.row_px)), int(round(row.col_px))
        ra, rb = max(r0 - half, 0), min(r0 + half + 1, shape[0])
        ca, cb = max(c0 - half, 0), min(c0 + half + 1, shape[1])
        if ra >= rb or ca >= cb:
            continue
        yy, xx = np.mgrid[ra:rb, ca:cb]
        inten = mode_intensity(row.order, xx - row.col_px, yy - row.row_px, waist_px=row.waist_px,
                               orientation_deg=row.orientation_deg)
        expected[ra:rb, ca:cb] += row.peak_e * inten / _peak(row.order, row.waist_px)
    electrons = rng.poisson(expected) + rng.normal(0.0, read_noise_e, shape)
    counts = offset_counts + gain_counts_per_e * electrons
    return np.clip(np.rint(counts), 0, saturation_counts).astype(np.uint16)


def iter_pattern_frames(truth, *, shape, rng=None, **camera):
    """Yield the frames of ``truth`` one at a time (bounded memory); ``camera`` as in :func:`render_pattern_frame`."""
    rng = np.random.default_rng(rng)
    for _, ft in truth.groupby("frame", sort=True):
        yield render_pattern_frame(ft, shape=shape, rng=rng, **camera)


def simulate_pattern_stack(*, n_frames=40, shape=(128, 128), rng=None, camera=None, **truth_options):
    """A whole synthetic stack in memory: ``(stack (T, rows, cols) uint16, truth DataFrame)``.

    ``truth_options`` are passed to :func:`pattern_truth`; ``camera`` (a dict)
    to :func:`render_pattern_frame`.  Use :func:`write_pattern_stack` for long stacks.
    """
    rng = np.random.default_rng(rng)
    camera = dict(camera or {})
    for key in ("background_e", "read_noise_e"):
        if key in truth_options:
            camera.setdefault(key, truth_options[key])
    truth = pattern_truth(n_frames=n_frames, shape=shape, rng=rng, **truth_options)
    stack = np.stack(list(iter_pattern_frames(truth, shape=shape, rng=rng, **camera)))
    return stack, truth


def write_pattern_stack(path, *, n_frames=40, shape=(128, 128), pixel_size_um=0.5, frame_interval_s=1.0,
                        ome=True, sidecar=True, rng=None, camera=None, **truth_options):
    """Write a synthetic pattern stack as (OME-)TIFF, frame by frame, with its truth table.

    Writes ``path`` (uncompressed, contiguous pages, so readers can memory-map
    it), ``path.with_suffix('.json')`` (sidecar: ``frame_times_s``,
    ``pixel_size_um``) when ``sidecar`` is true, and
    ``path.with_suffix('.truth.csv')``.  OME metadata carry ``TimeIncrement``
    (s) and ``PhysicalSizeX/Y`` (um).

    Returns
    -------
    pandas.DataFrame
        The truth table (see :func:`pattern_truth`).
    """
    path = Path(path)
    rng = np.random.default_rng(rng)
    camera = dict(camera or {})
    for key in ("background_e", "read_noise_e"):
        if key in truth_options:
            camera.setdefault(key, truth_options[key])
    truth = pattern_truth(n_frames=n_frames, shape=shape, frame_interval_s=frame_interval_s, rng=rng,
                          **truth_options)
    frames = iter_pattern_frames(truth, shape=shape, rng=rng, **camera)
    write_image_stack(path, frames, n_frames=n_frames, shape=shape, frame_interval_s=frame_interval_s,
                      pixel_size_um=pixel_size_um, ome=ome)
    if sidecar:
        doc = {"frame_times_s": [float(t) for t in np.arange(n_frames) * frame_interval_s],
               "pixel_size_um": float(pixel_size_um)}
        path.with_suffix(".json").write_text(json.dumps(doc), encoding="utf-8")
    truth.to_csv(path.with_suffix(".truth.csv"), index=False)
    return truth


def write_image_stack(path, frames, *, n_frames, shape, frame_interval_s, pixel_size_um, ome=True):
    """Write uint16 frames (an iterable, consumed one at a time) as an uncompressed, contiguous (OME-)TIFF.

    OME metadata carry ``TimeIncrement`` (s) and ``PhysicalSizeX/Y`` (um), and a UUID derived from the
    file name and the stack's design, so that the same inputs write identical bytes.
    """
    import tifffile

    if ome:
        design = (f"lasecyto.synth:{Path(path).name}:{n_frames}:{tuple(shape)}:{frame_interval_s!r}:"
                  f"{pixel_size_um!r}")
        meta = {"axes": "TYX", "UUID": str(uuid.uuid5(uuid.NAMESPACE_URL, design)),
                "TimeIncrement": float(frame_interval_s), "TimeIncrementUnit": "s",
                "PhysicalSizeX": float(pixel_size_um), "PhysicalSizeXUnit": "\u00b5m",
                "PhysicalSizeY": float(pixel_size_um), "PhysicalSizeYUnit": "\u00b5m"}
    else:
        meta = {"axes": "TYX"}
    with tifffile.TiffWriter(path, ome=ome, bigtiff=n_frames * shape[0] * shape[1] * 2 > 2 ** 31) as tw:
        tw.write(frames, shape=(n_frames, *shape), dtype=np.uint16, metadata=meta, contiguous=True)
