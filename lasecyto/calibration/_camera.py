"""Camera noise model from frames: offset and read noise from dark frames, gain by photon transfer.

A linear camera reports ``counts = offset + K * electrons`` with electrons
Poisson-distributed plus Gaussian read noise.  The temporal variance of a
pixel under steady light is therefore ``sigma_read^2 + K (mean - offset)``
(counts^2): the photon-transfer relation (Janesick 2007, "Photon Transfer",
SPIE Press; EMVA Standard 1288, release 4.0, 2021, section 6).  Its slope is
the conversion gain K (counts per electron), its intercept the read noise.

The temporal variance of every pixel is taken from successive-frame
differences, ``sum (y[t+1] - y[t])^2 / (2 (T - 1))``, which removes the fixed
pattern and slow drifts (the EMVA 1288 difference-image method, generalised
to T frames).  Pixels are grouped by mean level; each group's robust mean
variance is one point of the transfer curve.  A quadratic term
``q (mean - offset)^2`` may be fitted too: it takes up frame-to-frame
fluctuations of the light that scale with the signal; fluctuations common to
all pixels (pump-pulse energy) are better removed first by normalising every
frame to the mean total signal, so that the curve can be measured on the data
themselves.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..exceptions import CalibrationError, InputError

__all__ = ["DarkFrameEstimate", "PhotonTransfer", "dark_frame_estimate", "photon_transfer"]


def _frames(frames, field):
    arr = np.asarray(frames)
    if arr.ndim not in (2, 3) or arr.shape[0] < 2 or arr.dtype.kind not in "uif":
        raise InputError("need a stack of at least two frames", field=field,
                         expected="a numeric array (frames, pixels) or (frames, rows, pixels)",
                         found=f"{arr.dtype} array of shape {arr.shape}")
    arr = arr.astype(float)
    if not np.all(np.isfinite(arr)):
        raise InputError("frames hold non-finite values", field=field, expected="finite counts",
                         found=f"{np.count_nonzero(~np.isfinite(arr))} NaN or infinite values")
    return arr


def _difference_variance(arr):
    """Per-pixel temporal variance from successive differences, and the per-pixel mean."""
    diff = np.diff(arr, axis=0)
    return np.mean(diff * diff, axis=0) / 2.0, arr.mean(axis=0)


@dataclass(frozen=True, eq=False)
class DarkFrameEstimate:
    """Offset and read noise from dark frames (counts).

    Attributes
    ----------
    offset_map_counts : numpy.ndarray
        Mean dark level of every pixel (the fixed pattern), shape of one frame.
    offset_counts : float
        Median of the map.
    read_noise_counts : float
        RMS temporal noise of a pixel, from successive-frame differences,
        pooled over pixels (hot pixels, whose variance exceeds 5 times the
        median, left out).
    n_frames : int
    n_hot : int
        Pixels left out.
    """

    offset_map_counts: np.ndarray
    offset_counts: float
    read_noise_counts: float
    n_frames: int
    n_hot: int


def dark_frame_estimate(frames):
    """Offset map and read noise from a stack of dark frames (same exposure and read-out as the data).

    Parameters
    ----------
    frames : array_like, shape (T, N) or (T, R, N), T >= 2
        Raw counts.

    Returns
    -------
    DarkFrameEstimate
    """
    arr = _frames(frames, "dark frames")
    var, mean = _difference_variance(arr)
    med = float(np.median(var))
    good = var <= 5.0 * med if med > 0 else np.ones(var.shape, dtype=bool)
    read = math.sqrt(float(np.mean(var[good])))
    offset_map = mean
    offset_map.setflags(write=False)
    return DarkFrameEstimate(offset_map_counts=offset_map, offset_counts=float(np.median(mean)),
                             read_noise_counts=read, n_frames=int(arr.shape[0]),
                             n_hot=int(np.count_nonzero(~good)))


@dataclass(frozen=True, eq=False)
class PhotonTransfer:
    """Result of :func:`photon_transfer`.

    Attributes
    ----------
    gain_counts_per_e : float
        Conversion gain K, counts per photoelectron (slope of the transfer curve).
    gain_err_counts_per_e : float
        Its 1-sigma uncertainty from the curve fit.
    read_noise_counts : float
        Read noise from the intercept (NaN when the intercept was fixed by a given read noise).
    fluctuation : float
        Quadratic coefficient q (relative light fluctuation squared; 0 when not fitted).
    signal_counts, variance_counts2 : numpy.ndarray
        The curve: mean signal above offset and temporal variance of every level group.
    """

    gain_counts_per_e: float
    gain_err_counts_per_e: float
    read_noise_counts: float
    fluctuation: float
    signal_counts: np.ndarray
    variance_counts2: np.ndarray


def photon_transfer(frames, *, offset_counts=0.0, read_noise_counts=None, saturation_counts=math.inf,
                    n_levels=24, normalise=False, quadratic=False, min_pixels=20):
    """Conversion gain by the photon-transfer method on a stack of frames of a steady scene.

    Any scene whose pixels span a range of levels will do: a flat field or a
    continuum lamp through the spectrometer, or (with ``quadratic=True``) the
    data themselves, where line pixels that move or flicker are outliers
    the per-level robust mean rejects.

    Parameters
    ----------
    frames : array_like, shape (T, N) or (T, R, N), T >= 3
        Raw counts.
    offset_counts : float or array_like
        Offset (a map from :func:`dark_frame_estimate`, or a number).
    read_noise_counts : float, optional
        Known read noise; fixes the intercept.  Otherwise fitted.
    saturation_counts : float
        Pixels that reach it in any frame are left out.
    n_levels : int
        Groups of pixels by mean level (quantiles of the level); fewer when
        there are not ``2 * min_pixels`` pixels per group.
    normalise : bool
        Divide every frame's signal by its total relative to the mean total
        first: removes light fluctuations common to all pixels (pump energy),
        as needed on the data themselves.
    quadratic : bool
        Fit the fluctuation term ``q (mean - offset)^2`` too (fluctuations not
        removed by ``normalise``).
    min_pixels : int
        Smallest group.

    Returns
    -------
    PhotonTransfer

    Raises
    ------
    CalibrationError
        Too few distinct levels for the fit, or a non-positive slope.
    """
    arr = _frames(frames, "photon-transfer frames")
    if arr.shape[0] < 3:
        raise InputError("need at least three frames", field="photon-transfer frames", expected=">= 3 frames",
                         found=f"{arr.shape[0]} frames")
    offset = np.asarray(offset_counts, dtype=float)
    sat = np.any(arr >= saturation_counts, axis=0)
    if normalise:
        above = arr - offset
        totals = above.reshape(arr.shape[0], -1).sum(axis=1)
        if not np.all(totals > 0):
            raise CalibrationError("photon transfer: a frame has no signal above the offset to normalise by")
        arr = offset + above * (totals.mean() / totals).reshape((-1,) + (1,) * (arr.ndim - 1))
    var, mean = _difference_variance(arr)
    signal = (mean - offset).ravel()
    var = var.ravel()
    unsaturated = ~sat.ravel()
    use = unsaturated & np.isfinite(signal)
    signal, var = signal[use], var[use]
    if signal.size < min_pixels * 3:
        raise CalibrationError(f"photon transfer: {signal.size} usable pixels, needs at least {min_pixels * 3}")
    n_levels = max(3, min(int(n_levels), signal.size // (2 * min_pixels)))  # groups of at least 2 min_pixels
    edges = np.unique(np.quantile(signal, np.linspace(0.0, 1.0, n_levels + 1)))
    which = np.clip(np.searchsorted(edges, signal, side="right") - 1, 0, edges.size - 2)
    xs, x2s, ys, ws = [], [], [], []
    n_t = arr.shape[0] - 1
    for b in range(edges.size - 1):
        sel = which == b
        if np.count_nonzero(sel) < min_pixels:
            continue
        v = var[sel]
        med = np.median(v)
        keep = v <= 3.0 * med if med > 0 else np.ones(v.size, dtype=bool)  # moving or flickering pixels
        v = v[keep]
        m = float(np.mean(v))
        xs.append(float(np.mean(signal[sel][keep])))
        x2s.append(float(np.mean(signal[sel][keep] ** 2)))  # mean of the square, not square of the mean
        ys.append(m)
        # variance of a mean of difference variances ~ 2 m^2 / (T - 1) per pixel (chi-square, from memory)
        ws.append(v.size * n_t / (2.0 * m * m) if m > 0 else 0.0)
    x, x2, yv, w = np.array(xs), np.array(x2s), np.array(ys), np.array(ws)
    n_par = (2 if read_noise_counts is None else 1) + (1 if quadratic else 0)
    if x.size < n_par + 2:
        raise CalibrationError(f"photon transfer: {x.size} signal levels, needs at least {n_par + 2} distinct ones")
    if np.ptp(x) < 0.5 * max(float(np.max(np.abs(x))), 1.0):
        raise CalibrationError(f"photon transfer: the signal levels span only {x.min():.4g} to {x.max():.4g} counts "
                               "above the offset; needs a range of levels (at least a factor of two)")
    cols = [x]
    target = yv.copy()
    if read_noise_counts is None:
        cols.insert(0, np.ones_like(x))
    else:
        target = target - float(read_noise_counts) ** 2
    if quadratic:
        cols.append(x2)
    design = np.stack(cols, axis=1)
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(design * sw[:, None], target * sw, rcond=None)
    cov = np.linalg.pinv((design * w[:, None]).T @ design)
    resid = target - design @ coef
    dof = max(x.size - n_par, 1)
    scale = max(float(np.sum(w * resid ** 2)) / dof, 1.0)
    i_gain = 1 if read_noise_counts is None else 0
    gain = float(coef[i_gain])
    if not gain > 0:
        raise CalibrationError(f"photon transfer: non-positive slope {gain:.4g} counts^2 per count")
    if read_noise_counts is None:
        read = math.sqrt(coef[0]) if coef[0] > 0 else 0.0
    else:
        read = float("nan")
    return PhotonTransfer(gain_counts_per_e=gain, gain_err_counts_per_e=math.sqrt(cov[i_gain, i_gain] * scale),
                          read_noise_counts=read, fluctuation=float(coef[-1]) if quadratic else 0.0,
                          signal_counts=x, variance_counts2=yv)
