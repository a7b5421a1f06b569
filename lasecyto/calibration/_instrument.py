"""The spectrometer's instrument function, measured from the lines of a lamp frame.

Lamp lines are far narrower than the resolution, so each one records the
instrument function at its own sub-pixel phase.  Bright, isolated lines are
fitted, their background-subtracted pixels divided by the line area and
pooled against the offset ``pixel - centre``; a penalised B-spline through the
pooled samples is the oversampled, normalised, pixel-integrated profile
(:class:`lasecyto.lines.InstrumentProfile`).  The line centres are then refitted
with that profile and the profile rebuilt (two rounds).  Finally its reference
point is moved to where a Gaussian fit puts the lines (the convention of
:func:`find_lamp_peaks`, hence of the dispersion solution), so that centres
fitted with the instrument shape and the wavelength scale share one
convention even for an asymmetric instrument.
"""

from __future__ import annotations

import logging
import math

import numpy as np

from ..exceptions import CalibrationError, InputError
from ..lines import InstrumentProfile, fit_lines, instrument_profile_from_samples
from ._lamp import _as_spectrum, _positive, find_lamp_peaks

__all__ = ["measure_instrument_profile"]

logger = logging.getLogger("lasecyto.calibration")

_MIN_LINES = 3


def _samples(y, centres, areas, half, read_noise_e):
    """(offset, value, weight) samples of the lines, with a linear background from the window margins."""
    n = y.size
    offs, vals, wts = [], [], []
    for c, a in zip(centres, areas):
        lo = int(math.floor(c - half - 3))
        hi = int(math.ceil(c + half + 3))
        if lo < 0 or hi >= n:
            continue
        x = np.arange(lo, hi + 1)
        d = x - c
        margin = np.abs(d) > half
        coef = np.polyfit(d[margin], y[lo:hi + 1][margin], 1)
        bg = np.polyval(coef, d)
        core = ~margin
        var = np.maximum(y[lo:hi + 1][core], 0.0) + read_noise_e ** 2 + 1.0
        offs.append(d[core])
        vals.append((y[lo:hi + 1][core] - bg[core]) / a)
        wts.append(a * a / var)
    if not offs:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    return np.concatenate(offs), np.concatenate(vals), np.concatenate(wts)


def _isolated(pix, others, half):
    """Lines with no other detected line within 2 * half + 3 px."""
    keep = np.ones(pix.size, dtype=bool)
    for i, p in enumerate(pix):
        near = np.abs(others - p)
        keep[i] = np.count_nonzero(near < 2 * half + 3) <= 1
    return keep


def measure_instrument_profile(spectrum_e, *, read_noise_e=0.0, snr_min=30.0, half_width_px=None,
                               step_px=0.25, smoothing=None):
    """Measure the pixel-integrated instrument profile from a lamp spectrum.

    Parameters
    ----------
    spectrum_e : array, shape (n_pixels,)
        Lamp spectrum in photoelectrons per pixel (dark-subtracted).
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    snr_min : float
        Lines used must have at least this SNR (area over its error).
    half_width_px : float, optional
        Support of the profile; default 3 times the median lamp-line FWHM (at least 4 px).
    step_px : float
        Knot spacing of the profile (default 0.25 px: oversampling 4).
    smoothing : float, optional
        Roughness penalty of the spline; default by generalised cross-validation
        (see :func:`instrument_profile_from_samples`).

    Returns
    -------
    InstrumentProfile

    Raises
    ------
    CalibrationError
        Fewer than three bright isolated lines.
    """
    y = _as_spectrum(spectrum_e)
    read_noise_e = _positive(read_noise_e, "read_noise_e", allow_zero=True)
    snr_min = _positive(snr_min, "snr_min")
    peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=5.0)
    if len(peaks) >= 3:
        fwhm_med = float(np.median(peaks["fwhm_px"]))
        if abs(fwhm_med / 2.5 - 1.0) > 0.3:
            peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=5.0,
                                    fwhm_guess_px=min(fwhm_med, y.size / 4))
    if len(peaks) < _MIN_LINES:
        raise CalibrationError(f"instrument profile: {len(peaks)} lamp lines found, needs at least {_MIN_LINES}")
    fwhm = float(np.median(peaks["fwhm_px"]))
    half = max(4.0, 3.0 * fwhm) if half_width_px is None else float(half_width_px)
    if not (math.isfinite(half) and half >= 2):
        raise InputError("profile support too small", field="half_width_px", expected=">= 2 px",
                         found=repr(half_width_px))
    pix_all = peaks["pixel"].to_numpy()
    bright = (peaks["snr"].to_numpy() >= snr_min) & _isolated(pix_all, pix_all, half)
    centres = pix_all[bright]
    gauss_centres = centres.copy()
    sigma = fwhm / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    areas = peaks["amplitude_e"].to_numpy()[bright] * sigma * math.sqrt(2.0 * math.pi)
    inside = (centres - half - 3 >= 0) & (centres + half + 3 <= y.size - 1)
    centres, areas, gauss_centres = centres[inside], areas[inside], gauss_centres[inside]
    if centres.size < _MIN_LINES:
        raise CalibrationError(f"instrument profile: {centres.size} bright isolated lamp lines (SNR >= {snr_min:g}, "
                               f"nothing else within {2 * half + 3:.0f} px), needs at least {_MIN_LINES}")
    profile = None
    for _ in range(3):
        d, v, w = _samples(y, centres, areas, half, read_noise_e)
        profile = instrument_profile_from_samples(d, v, w, half_width_px=half, step_px=step_px,
                                                  smoothing=smoothing, n_lines=centres.size)
        # refit the lines with the profile: centres on its centroid, areas of the whole line
        fits = fit_lines(y, read_noise_e=read_noise_e, shape="instrument", instrument=profile, baseline="local",
                         background_degree=1, snr_min=5.0, fwhm_guess_px=max(fwhm, 1.0))
        ok = fits.fit_ok
        if np.count_nonzero(ok) < _MIN_LINES:
            break
        idx = np.searchsorted(fits.center_px[ok], centres)
        idx = np.clip(idx, 1, np.count_nonzero(ok) - 1)
        cand = np.stack([fits.center_px[ok][idx - 1], fits.center_px[ok][idx]])
        pick = np.argmin(np.abs(cand - centres), axis=0)
        j = np.where(pick == 0, idx - 1, idx)
        match = np.abs(fits.center_px[ok][j] - centres) < 0.5 * fwhm
        centres = np.where(match, fits.center_px[ok][j], centres)
        areas = np.where(match, fits.area_e[ok][j], areas)
    # reference point: where a Gaussian fit puts the lines (the lamp calibration's convention)
    shift = float(np.median(gauss_centres - centres))
    profile = InstrumentProfile(coefficients=profile.coefficients, start_px=profile.start_px - shift,
                                step_px=profile.step_px, fwhm_px=profile.fwhm_px,
                                half_width_px=profile.half_width_px + abs(shift), n_lines=profile.n_lines)
    logger.info("instrument profile from %d lamp lines: FWHM %.3f px, reference shift %.4f px",
                profile.n_lines, profile.fwhm_px, shift)
    return profile
