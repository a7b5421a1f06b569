"""Background level, background noise and saturation mask of camera frames."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..exceptions import InputError

__all__ = ["Background", "estimate_background", "saturation_mask", "check_frame"]

_MAD_TO_SIGMA = 1.4826


def check_frame(frame, *, field="frame"):
    """Return ``frame`` as a 2-D float64 array, or raise InputError for RGB, empty or non-numeric input."""
    a = np.asarray(frame)
    if a.ndim == 3 and a.shape[-1] in (3, 4):
        raise InputError("colour image where a grayscale frame is expected", field=field,
                         expected="a 2-D (rows, cols) grayscale array",
                         found=f"shape {a.shape} (RGB/RGBA samples in the last axis)")
    if a.ndim != 2:
        raise InputError("not a 2-D frame", field=field, expected="a 2-D (rows, cols) array",
                         found=f"shape {a.shape}")
    if a.size == 0:
        raise InputError("empty frame", field=field, expected="at least one pixel", found=f"shape {a.shape}")
    if a.dtype.kind not in "uif" or a.dtype.kind == "b":
        raise InputError("unsupported pixel type", field=field, expected="integer or float counts",
                         found=str(a.dtype))
    return a.astype(np.float64, copy=False)


@dataclass(frozen=True)
class Background:
    """Background of one frame.

    ``level_counts`` is a scalar or a (rows, cols) map; ``noise_counts`` is
    the robust standard deviation of the background pixels.
    """

    level_counts: float | np.ndarray
    noise_counts: float
    n_background_px: int


def _clipped_median(values, n_sigma, n_iter):
    v = values
    med = float(np.median(v))
    sig = _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
    for _ in range(n_iter):
        if sig <= 0:
            break
        keep = v[np.abs(v - med) <= n_sigma * sig]
        if keep.size == v.size or keep.size < 8:
            break
        v = keep
        med = float(np.median(v))
        sig = _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
    return med, sig, v.size


def estimate_background(frame, *, tile_px=None, n_sigma=3.0, n_iter=5, saturated=None):
    """Robust background level and noise of a camera frame.

    The level is the sigma-clipped median (clipping at ``n_sigma`` robust
    standard deviations, ``n_iter`` times), so bright emission spots do not
    bias it; the noise is 1.4826 x the median absolute deviation of the kept
    pixels.

    Parameters
    ----------
    frame : array_like (rows, cols)
        Counts.
    tile_px : int, optional
        When given, a level is estimated per tile of this size and
        interpolated into a smooth map (for uneven illumination).
    saturated : array of bool, optional
        Pixels to leave out.

    Returns
    -------
    Background
    """
    a = check_frame(frame)
    values = a[~saturated] if saturated is not None else a.ravel()
    if values.size == 0:
        raise InputError("no unsaturated pixel to estimate the background", field="frame",
                         expected="some pixels below saturation", found="all pixels saturated")
    level, noise, n_kept = _clipped_median(values, n_sigma, n_iter)
    if tile_px is None:
        return Background(level_counts=level, noise_counts=noise, n_background_px=int(n_kept))
    t = int(tile_px)
    if t < 4:
        raise InputError("tile too small", field="tile_px", expected="an integer >= 4", found=repr(tile_px))
    nr, nc = max(a.shape[0] // t, 1), max(a.shape[1] // t, 1)
    edges_r = np.linspace(0, a.shape[0], nr + 1).astype(int)
    edges_c = np.linspace(0, a.shape[1], nc + 1).astype(int)
    grid = np.empty((nr, nc))
    for i in range(nr):
        for j in range(nc):
            tile = a[edges_r[i]:edges_r[i + 1], edges_c[j]:edges_c[j + 1]]
            if saturated is not None:
                tile = tile[~saturated[edges_r[i]:edges_r[i + 1], edges_c[j]:edges_c[j + 1]]]
            tile = tile.ravel()
            grid[i, j] = _clipped_median(tile, n_sigma, n_iter)[0] if tile.size >= 8 else level
    zoom = (a.shape[0] / nr, a.shape[1] / nc)
    level_map = ndimage.zoom(grid, zoom, order=1, mode="nearest", grid_mode=True)[: a.shape[0], : a.shape[1]]
    resid = (a - level_map)[~saturated] if saturated is not None else (a - level_map).ravel()
    _, noise_map, n_kept = _clipped_median(resid, n_sigma, n_iter)
    return Background(level_counts=level_map, noise_counts=noise_map, n_background_px=int(n_kept))


def saturation_mask(frames, *, saturation_counts=None):
    """Boolean mask of saturated pixels (value >= ``saturation_counts``).

    Without ``saturation_counts`` the largest value of an integer dtype is
    used; float frames then have no saturated pixel.
    """
    a = np.asarray(frames)
    if saturation_counts is None:
        if a.dtype.kind in "ui":
            saturation_counts = np.iinfo(a.dtype).max
        else:
            return np.zeros(a.shape, dtype=bool)
    return a >= saturation_counts
