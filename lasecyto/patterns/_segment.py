"""Segmentation of lasing regions in one camera frame (scikit-image)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ._background import Background, check_frame, estimate_background

__all__ = ["Segmentation", "segment_frame"]


def _skimage():
    try:
        from skimage import feature, measure, morphology, segmentation
    except ImportError as exc:  # optional extra
        raise ImportError('lasecyto.patterns needs scikit-image; install it with: pip install "lasecyto[images]"') \
            from exc
    return feature, measure, morphology, segmentation


@dataclass(frozen=True)
class Segmentation:
    """Lasing regions of one frame.

    ``labels`` is an int32 image (0 = background, regions 1..n in order of
    their centroid, rows then columns); ``regions`` maps property names to
    arrays of length n: ``label``, ``centroid_row_px``, ``centroid_col_px``
    (background-subtracted intensity centroid), ``area_px``, ``peak_counts``,
    ``total_counts`` (above background), ``n_saturated_px``, ``bbox_px``
    (n, 4: row0, col0, row1, col1).  ``message`` explains an empty result.
    """

    labels: np.ndarray
    regions: dict
    background: Background
    threshold_counts: float
    message: str

    @property
    def n_regions(self):
        return int(self.regions["label"].size)


def _empty_regions():
    return {"label": np.zeros(0, np.int64), "centroid_row_px": np.zeros(0), "centroid_col_px": np.zeros(0),
            "area_px": np.zeros(0, np.int64), "peak_counts": np.zeros(0), "total_counts": np.zeros(0),
            "n_saturated_px": np.zeros(0, np.int64), "bbox_px": np.zeros((0, 4), np.int64)}


def _drop_small(labels, min_area_px):
    """Zero the labelled regions smaller than ``min_area_px`` pixels."""
    if min_area_px <= 1 or labels.max() == 0:
        return labels
    area = np.bincount(labels.ravel())
    small = area < min_area_px
    small[0] = False
    return np.where(small[labels], 0, labels) if small.any() else labels


def _thin_peaks(peaks, image, min_distance):
    """Keep the brightest of peaks closer than ``min_distance`` (Euclidean), brightest first, ties by position."""
    if len(peaks) < 2:
        return peaks
    vals = image[tuple(peaks.T)]
    order = np.lexsort((peaks[:, 1], peaks[:, 0], -vals))
    kept = []
    for k in order:
        if all(np.hypot(*(peaks[k] - peaks[j])) >= min_distance for j in kept):
            kept.append(k)
    return peaks[np.sort(np.array(kept))]


def segment_frame(frame, *, spot_radius_px=10.0, threshold_sigma=5.0, smooth_px=1.0, min_area_px=12,
                  split_touching=True, saturated=None, background=None, tile_px=None):
    """Find the lasing regions of one frame.

    The frame is smoothed (Gaussian, ``smooth_px``) and thresholded at the
    background plus ``threshold_sigma`` robust standard deviations of the
    smoothed background, so the threshold follows the noise of each frame.
    Closing and hole filling join the lobes and rings of one transverse
    pattern; touching cells are split by a watershed seeded at the maxima of
    the frame smoothed on the cell scale (``spot_radius_px / 2``) that are at
    least ``spot_radius_px`` apart.

    Parameters
    ----------
    frame : array_like (rows, cols)
        Counts of one grayscale frame.
    spot_radius_px : float
        Typical radius of one cell's emission pattern.
    threshold_sigma : float
        Detection threshold in background standard deviations (after smoothing).
    min_area_px : int
        Smaller regions are dropped.
    saturated : array of bool, optional
        Saturated pixels (left out of the background estimate).
    background : Background, optional
        A precomputed background; estimated here when omitted.

    Returns
    -------
    Segmentation
    """
    feature, measure, morphology, segmentation = _skimage()
    a = check_frame(frame)
    bg = background if background is not None else estimate_background(a, saturated=saturated, tile_px=tile_px)
    signal = a - bg.level_counts
    if bg.noise_counts <= 0 or not np.isfinite(bg.noise_counts):
        spread = float(np.ptp(a))
        msg = "frame is constant (no noise, no signal)" if spread == 0 else \
            "background noise is zero (quantised or blank frame); no threshold can be set"
        return Segmentation(np.zeros(a.shape, np.int32), _empty_regions(), bg, float("nan"), msg)
    smooth = ndimage.gaussian_filter(signal, smooth_px, mode="nearest") if smooth_px > 0 else signal
    bsm = smooth[np.abs(signal) <= 3.0 * bg.noise_counts]
    noise_s = 1.4826 * float(np.median(np.abs(bsm - np.median(bsm)))) if bsm.size > 8 else bg.noise_counts
    if noise_s <= 0:
        noise_s = bg.noise_counts
    threshold = threshold_sigma * noise_s
    mask = smooth > threshold
    if not mask.any():
        peak = float(smooth.max()) / noise_s
        msg = f"no lasing region: brightest smoothed pixel {peak:.1f} sigma above background, " \
              f"threshold {threshold_sigma:g} sigma"
        return Segmentation(np.zeros(a.shape, np.int32), _empty_regions(), bg, float(threshold), msg)
    close_r = max(1, int(round(spot_radius_px / 4.0)))
    mask = ndimage.binary_closing(mask, structure=morphology.disk(close_r), border_value=0)
    mask = ndimage.binary_fill_holes(mask)
    comp, n_comp = ndimage.label(mask)
    comp = _drop_small(comp, min_area_px)
    mask = comp > 0
    if n_comp and split_touching:
        big = ndimage.gaussian_filter(signal, max(spot_radius_px / 2.0, 1.0), mode="nearest")
        peaks = feature.peak_local_max(big, min_distance=max(1, int(round(spot_radius_px / 3.0))), labels=comp,
                                       exclude_border=False)
        peaks = _thin_peaks(peaks, big, spot_radius_px)
        counts = np.bincount(comp[tuple(peaks.T)], minlength=n_comp + 1) if len(peaks) else np.zeros(n_comp + 1)
        if (counts[1:] > 1).any():
            markers = np.zeros(a.shape, np.int32)
            order = np.lexsort((peaks[:, 1], peaks[:, 0]))
            peaks = peaks[order]
            markers[tuple(peaks.T)] = np.arange(1, len(peaks) + 1)
            ws = segmentation.watershed(-big, markers, mask=mask)
            # components without a marker keep their own label
            lone = (ws == 0) & mask
            if lone.any():
                extra, _ = ndimage.label(lone)
                ws = np.where(lone, extra + len(peaks), ws)
            comp = _drop_small(ws, min_area_px)
    props = measure.regionprops(comp)
    if not props:
        msg = f"no lasing region of at least {min_area_px} px above {threshold_sigma:g} sigma"
        return Segmentation(np.zeros(a.shape, np.int32), _empty_regions(), bg, float(threshold), msg)
    cen = np.empty((len(props), 2))
    for k, p in enumerate(props):
        wgt = np.clip(signal[p.coords[:, 0], p.coords[:, 1]], 0, None)
        cen[k] = (wgt @ p.coords) / wgt.sum() if wgt.sum() > 0 else p.centroid
    order = np.lexsort((cen[:, 1], cen[:, 0]))
    labels = np.zeros(a.shape, np.int32)
    rows = []
    for new, k in enumerate(order, start=1):
        p = props[k]
        labels[tuple(p.coords.T)] = new
        pix = p.coords
        vals = signal[pix[:, 0], pix[:, 1]]
        nsat = int(saturated[pix[:, 0], pix[:, 1]].sum()) if saturated is not None else 0
        rows.append((new, cen[k, 0], cen[k, 1], int(p.area), float(vals.max()), float(np.clip(vals, 0, None).sum()),
                     nsat, p.bbox))
    regions = {
        "label": np.array([r[0] for r in rows], np.int64),
        "centroid_row_px": np.array([r[1] for r in rows]),
        "centroid_col_px": np.array([r[2] for r in rows]),
        "area_px": np.array([r[3] for r in rows], np.int64),
        "peak_counts": np.array([r[4] for r in rows]),
        "total_counts": np.array([r[5] for r in rows]),
        "n_saturated_px": np.array([r[6] for r in rows], np.int64),
        "bbox_px": np.array([r[7] for r in rows], np.int64).reshape(-1, 4),
    }
    return Segmentation(labels, regions, bg, float(threshold), "")
