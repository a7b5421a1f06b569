"""Matched-filter detection of narrow lines above the baseline."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

from ..exceptions import InputError
from ._baseline import as_block, estimate_baseline
from ._nbprep import detect_row, fill_row
from ._nbshape import LORENTZIAN, profile_block

__all__ = ["detect_lines"]


def check_nonneg(name, value):
    if not np.isfinite(value) or value < 0:
        raise InputError("must be finite and non-negative", field=name, expected=">= 0", found=repr(value))
    return float(value)


def check_pos(name, value):
    if not np.isfinite(value) or value <= 0:
        raise InputError("must be finite and positive", field=name, expected="> 0", found=repr(value))
    return float(value)


def detection_kernel(fwhm_px):
    """Zero-mean, symmetric, pixel-integrated Lorentzian kernel (half length max(4, 3 FWHM)).

    Returns the kernel and the peak pixel fraction of the unit-area template.
    """
    half = int(np.ceil(max(4.0, 3.0 * fwhm_px)))
    x = np.arange(-half, half + 1, dtype=float)
    template = np.empty((1, x.size))
    profile_block(LORENTZIAN, x, np.zeros(1), np.array([float(fwhm_px)]), np.ones(1), np.zeros(8), 0.0, 1.0,
                  template)
    template = 0.5 * (template[0] + template[0][::-1])  # exactly symmetric
    return np.ascontiguousarray(template - template.mean()), float(template[half])


@njit(cache=True, parallel=True, error_model="numpy")
def _detect_block(raw, base, has_base, read_noise_e, kernel, snr_min, radius, peak_frac):
    s_count, n = raw.shape
    cap = n // 2 + 1
    pix = np.zeros((s_count, cap), dtype=np.int64)
    snr = np.zeros((s_count, cap))
    height = np.zeros((s_count, cap))
    count = np.zeros(s_count, dtype=np.int64)
    for s in prange(s_count):
        filled = np.empty(n)
        finite = np.empty(n, dtype=np.bool_)
        scratch = np.empty((2, n))
        work32 = np.empty((4, n), dtype=np.float32)
        fill_row(raw[s], filled, finite)
        brow = base[s] if has_base else base[0]
        count[s] = detect_row(filled, brow, has_base, finite, read_noise_e, kernel, snr_min, radius, pix[s],
                              snr[s], scratch[0], peak_frac, scratch[1], work32)
        for m in range(count[s]):
            height[s, m] = scratch[0, pix[s, m]]
    return pix, snr, height, count


def detect_lines(spectra_e, *, baseline_e=None, read_noise_e=0.0, snr_min=5.0, fwhm_guess_px=2.5,
                 min_separation_px=1.5):
    """Find narrow lines in a block of spectra with a matched filter.

    The baseline-subtracted spectrum is correlated with a zero-mean,
    pixel-integrated Lorentzian kernel of FWHM ``fwhm_guess_px`` (half length
    ``max(4, 3 * fwhm)`` px), which is the least-squares amplitude of a line on
    a free local constant.  Its variance follows from the Poisson + read-noise
    model, ``var_i = max(y_i, 0) + read_noise_e**2``; a line is a local maximum
    of the resulting SNR, within ``+-max(1, floor(min_separation_px),
    floor(fwhm_guess_px / 2))`` pixels, at or above ``snr_min``.

    Parameters
    ----------
    spectra_e : array_like, shape (N,) or (S, N)
        Spectra in photoelectrons.  NaN/inf pixels are never detected.
    baseline_e : array_like, optional
        Baseline of the same shape; estimated with SNIP (default window) if omitted.
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    snr_min : float
        Detection threshold.
    fwhm_guess_px : float
        FWHM of the matched kernel, pixels.
    min_separation_px : float
        Two detections are at least this far apart (and at least 2 px).

    Returns
    -------
    dict of numpy.ndarray
        ``spectrum`` (row index), ``pixel`` (peak pixel), ``height_e`` (filter
        estimate of the peak pixel value above background for a line of the
        guessed width) and ``snr``, one entry per line, in spectrum then pixel order.
    """
    block, _ = as_block(spectra_e)
    read_noise_e = check_nonneg("read_noise_e", read_noise_e)
    snr_min = check_pos("snr_min", snr_min)
    fwhm_guess_px = check_pos("fwhm_guess_px", fwhm_guess_px)
    min_separation_px = check_nonneg("min_separation_px", min_separation_px)
    if baseline_e is None:
        baseline = estimate_baseline(block)
    else:
        baseline, _ = as_block(baseline_e, field="baseline_e")
        if baseline.shape != block.shape:
            raise InputError("baseline shape differs from the spectra", field="baseline_e",
                             expected=f"shape {block.shape}", found=f"shape {baseline.shape}")
        baseline = np.where(np.isfinite(baseline), baseline, 0.0)
    kernel, peak_frac = detection_kernel(fwhm_guess_px)
    radius = int(max(1, math.floor(min_separation_px), math.floor(0.5 * fwhm_guess_px)))
    pix, snr, height, count = _detect_block(np.ascontiguousarray(block, dtype=float),
                                            np.ascontiguousarray(baseline, dtype=float), True, read_noise_e,
                                            kernel, snr_min, radius, peak_frac)
    rows = np.repeat(np.arange(block.shape[0]), count)
    cols = np.concatenate([np.arange(c) for c in count]) if block.shape[0] else np.zeros(0, dtype=np.int64)
    return {"spectrum": rows.astype(np.int64), "pixel": pix[rows, cols].astype(np.int64),
            "height_e": height[rows, cols], "snr": snr[rows, cols]}

