"""Change of a pattern over time: aligned correlation, decorrelation time."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

__all__ = ["aligned_patch", "pattern_correlation", "decorrelation_time"]


def aligned_patch(image, center_rc, half_px):
    """A ``(2 half + 1)`` square of ``image`` resampled so that ``center_rc`` is its exact centre.

    Sub-pixel alignment uses linear interpolation; pixels beyond the image
    edge are NaN.
    """
    h = int(half_px)
    rr, cc = np.mgrid[-h:h + 1, -h:h + 1].astype(float)
    coords = np.array([rr + center_rc[0], cc + center_rc[1]])
    out = ndimage.map_coordinates(np.asarray(image, dtype=float), coords, order=1, mode="constant", cval=np.nan)
    return out


def pattern_correlation(a, b):
    """Pearson correlation of two aligned patterns over the pixels finite in both (NaN if undefined)."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < 3:
        return float("nan")
    x, y = a[ok] - a[ok].mean(), b[ok] - b[ok].mean()
    den = math.sqrt(float((x * x).sum() * (y * y).sum()))
    return float((x * y).sum() / den) if den > 0 else float("nan")


def decorrelation_time(lag_s, corr):
    """Lag at which the mean pattern correlation falls to 1/e of its first-lag value.

    The first-lag value stands in for zero lag because camera noise lowers
    even a frame's correlation with an identical pattern.  Linear interpolation
    between lags.

    Returns
    -------
    (float, str)
        The time (NaN when it cannot be given) and an empty string or the reason.
    """
    lag_s = np.asarray(lag_s, dtype=float)
    corr = np.asarray(corr, dtype=float)
    ok = np.isfinite(corr)
    lag_s, corr = lag_s[ok], corr[ok]
    if corr.size < 2:
        return float("nan"), "fewer than two lags with a correlation"
    if not corr[0] > 0:
        return float("nan"), "no correlation at the first lag"
    level = corr[0] / math.e
    below = np.flatnonzero(corr <= level)
    if below.size == 0:
        return float("nan"), f"correlation stays above 1/e of its first-lag value up to {lag_s[-1]:g} s"
    k = int(below[0])
    x0, x1, y0, y1 = lag_s[k - 1], lag_s[k], corr[k - 1], corr[k]
    return float(x0 + (y0 - level) * (x1 - x0) / (y0 - y1)) if y0 != y1 else float(x1), ""
