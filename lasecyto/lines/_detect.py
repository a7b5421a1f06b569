"""Matched-filter detection of narrow lines above the baseline."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from ..exceptions import InputError
from ._baseline import as_block, estimate_baseline, fill_nonfinite
from ._crlb import model_variance
from ._shapes import pixel_terms

__all__ = ["detect_lines"]


def check_nonneg(name, value):
    if not np.isfinite(value) or value < 0:
        raise InputError("must be finite and non-negative", field=name, expected=">= 0", found=repr(value))
    return float(value)


def check_pos(name, value):
    if not np.isfinite(value) or value <= 0:
        raise InputError("must be finite and positive", field=name, expected="> 0", found=repr(value))
    return float(value)


def matched_kernel(fwhm_px):
    """Zero-mean, pixel-integrated Lorentzian kernel of unit area before centring.

    Returns the kernel and the peak pixel fraction of the unit-area template.
    """
    half = int(np.ceil(max(4.0, 3.0 * fwhm_px)))
    x = np.arange(-half, half + 1, dtype=float)
    template, _, _ = pixel_terms(x, 0.0, fwhm_px, "lorentzian")
    return template - template.mean(), float(template[half])


def _local_maxima(score, radius):
    """Local maxima of each row within +-radius; plateaus keep their leftmost pixel."""
    s, n = score.shape
    pad = np.pad(score, ((0, 0), (radius, radius)), constant_values=-np.inf)
    is_max = np.ones((s, n), dtype=bool)
    for k in range(1, radius + 1):
        is_max &= score > pad[:, radius - k:radius - k + n]   # strictly above the left neighbours
        is_max &= score >= pad[:, radius + k:radius + k + n]  # not below the right neighbours
    return is_max


def _detect(block, baseline, finite, read_noise_e, snr_min, fwhm_guess_px, min_separation_px,
            extra_widths=()):
    """Core detection on a filled (S, N) block; returns the result dict."""
    resid = np.where(finite, block - baseline, 0.0)
    var = np.where(finite, model_variance(block, read_noise_e), 0.0)
    radius = max(1, int(np.floor(min_separation_px)))
    found = np.zeros(block.shape, dtype=bool)
    covered = np.zeros(block.shape, dtype=bool)
    best_snr = np.zeros(block.shape)
    best_height = np.zeros(block.shape)
    for factor in (1.0,) + tuple(extra_widths):
        fwhm = fwhm_guess_px * factor
        kernel, peak_frac = matched_kernel(fwhm)
        norm = np.sum(kernel ** 2)
        # least-squares area of a unit-area template on a free local constant
        area = ndimage.correlate1d(resid, kernel, axis=1, mode="reflect") / norm
        area_var = ndimage.correlate1d(var, kernel ** 2, axis=1, mode="reflect") / norm ** 2
        ok = area_var > 0
        snr = np.where(ok & finite, area / np.sqrt(np.where(ok, area_var, 1.0)), 0.0)
        peaks = _local_maxima(snr, max(radius, int(np.floor(0.5 * fwhm)))) & (snr >= snr_min) & finite
        # a wider kernel adds only lines that the narrower ones did not already find nearby
        new = peaks & ~covered
        found |= new
        best_snr = np.where(new, snr, best_snr)
        best_height = np.where(new, area * peak_frac, best_height)
        covered |= ndimage.maximum_filter1d(found, size=2 * int(np.ceil(fwhm)) + 1, axis=1)
    spec, pix = np.nonzero(found)  # row-major: spectrum, then pixel order
    return {
        "spectrum": spec.astype(np.int64),
        "pixel": pix.astype(np.int64),
        "height_e": best_height[spec, pix],
        "snr": best_snr[spec, pix],
    }


def detect_lines(spectra_e, *, baseline_e=None, read_noise_e=0.0, snr_min=5.0, fwhm_guess_px=2.5,
                 min_separation_px=1.5, extra_widths=()):
    """Find narrow lines in a block of spectra with a matched filter.

    The baseline-subtracted spectrum is correlated with a zero-mean,
    pixel-integrated Lorentzian kernel of FWHM ``fwhm_guess_px`` (half length
    ``max(4, 3 * fwhm)`` px), which is the least-squares amplitude of a line on
    a free local constant.  Its variance follows from the Poisson + read-noise
    model, ``var_i = max(y_i, 0) + read_noise_e**2``; a line is a local maximum
    of the resulting SNR, within ``+-min_separation_px``, at or above
    ``snr_min``.  Kernels ``extra_widths`` times wider are then tried, in
    order, and add the lines they find away from those already found (faint
    broad lines); close pairs stay resolved by the narrowest kernel.

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
    extra_widths : tuple of float
        Widths, in units of ``fwhm_guess_px``, of the further kernels; ``()`` for one kernel.

    Returns
    -------
    dict of numpy.ndarray
        ``spectrum`` (row index), ``pixel`` (peak pixel), ``height_e`` (filter
        estimate of the peak pixel value above background for a line of the
        guessed width) and ``snr``, one entry per line, in spectrum then pixel order.
    """
    block, was_1d = as_block(spectra_e)
    read_noise_e = check_nonneg("read_noise_e", read_noise_e)
    snr_min = check_pos("snr_min", snr_min)
    fwhm_guess_px = check_pos("fwhm_guess_px", fwhm_guess_px)
    min_separation_px = check_nonneg("min_separation_px", min_separation_px)
    filled, finite = fill_nonfinite(block)
    if baseline_e is None:
        baseline = estimate_baseline(filled)
    else:
        baseline, _ = as_block(baseline_e, field="baseline_e")
        if baseline.shape != block.shape:
            raise InputError("baseline shape differs from the spectra", field="baseline_e",
                             expected=f"shape {block.shape}", found=f"shape {baseline.shape}")
        baseline, _ = fill_nonfinite(baseline)
    extra_widths = tuple(float(check_pos("extra_widths", f)) for f in extra_widths)
    return _detect(filled, baseline, finite, read_noise_e, snr_min, fwhm_guess_px, min_separation_px,
                   extra_widths)
