"""Change of a pattern over time: aligned correlation, decorrelation time."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ..exceptions import InputError

__all__ = ["aligned_patch", "pattern_correlation", "decorrelation_time", "reference_correlation"]


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


def _standardise(patch):
    """Patch minus its mean over finite pixels, divided by their standard deviation (NaN kept)."""
    p = np.asarray(patch, dtype=float)
    ok = np.isfinite(p)
    if ok.sum() < 3:
        return np.full(p.shape, np.nan)
    v = p[ok]
    sd = float(v.std())
    if not sd > 0:
        return np.full(p.shape, np.nan)
    return (p - v.mean()) / sd


def reference_correlation(patches, reference):
    """Correlation of each aligned pattern with the mean standardised pattern of the reference frames.

    Each patch is standardised (zero mean, unit variance over its finite
    pixels) and the template is the pixel-wise mean of the reference patches;
    a reference patch is compared with the mean of the *other* reference patches
    (leave one out), so reference and later frames are scored alike.

    Parameters
    ----------
    patches : sequence of 2-D arrays of one shape
        Aligned patterns of one cell (e.g. ``PatternAnalysis.patches``).
    reference : array of bool
        Which patches form the template (e.g. frames before the perturbation).

    Returns
    -------
    numpy.ndarray
        One correlation per patch; all NaN when fewer than two reference patches
        are usable.
    """
    ref = np.asarray(reference, dtype=bool).ravel()
    if ref.size != len(patches):
        raise InputError("reference mask does not match the patches", field="reference",
                         expected=f"{len(patches)} booleans", found=f"{ref.size}")
    out = np.full(len(patches), np.nan)
    if not len(patches):
        return out
    z = np.stack([_standardise(p) for p in patches])
    usable = ref & np.isfinite(z).any(axis=(1, 2))
    if usable.sum() < 2:
        return out
    zr = z[usable]
    total = np.nansum(zr, axis=0)
    count = np.isfinite(zr).sum(axis=0)
    for i in range(len(patches)):
        if usable[i]:
            zi = np.nan_to_num(z[i], nan=0.0)
            n = count - np.isfinite(z[i])
            with np.errstate(invalid="ignore", divide="ignore"):
                tmpl = np.where(n > 0, (total - zi) / n, np.nan)
        else:
            with np.errstate(invalid="ignore", divide="ignore"):
                tmpl = np.where(count > 0, total / count, np.nan)
        out[i] = pattern_correlation(tmpl, z[i])
    return out
