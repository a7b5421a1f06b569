"""Per-line tests after the fit: cosmic-ray spikes and contrast above the background."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = ["flag_cosmic_rays", "line_contrast"]


def line_contrast(amplitude_e, background_e, *, floor_e=1.0):
    """Contrast of a line: its peak pixel above background over the background under it.

    ``amplitude / max(background, floor_e)``; the floor (photoelectrons) keeps a
    line on an empty, offset-subtracted background finite.
    """
    amp = np.asarray(amplitude_e, dtype=float)
    bg = np.asarray(background_e, dtype=float)
    with np.errstate(invalid="ignore"):
        return amp / np.maximum(bg, floor_e)


def flag_cosmic_rays(frame, center_px, fwhm_px, *, instrument_fwhm_px, max_width_ratio=0.5, match_px=1.5):
    """Flag cosmic-ray spikes: lines narrower than the instrument function, present in one frame only.

    Light that passed the spectrometer is at least as wide as its instrument
    function; a charged particle hitting the detector is not, and it does not
    come back in the next frame.  A line is flagged when its fitted FWHM is
    below ``max_width_ratio`` times ``instrument_fwhm_px`` and no line (of any
    width or fit status) lies within ``match_px`` of its centre in the frame
    before or after it.  Flags only: nothing is removed.

    Parameters
    ----------
    frame : array_like of int
        Frame of every line (lines of one item, i.e. one detector region).
    center_px, fwhm_px : array_like
        Fitted centre and FWHM of every line (NaN widths are never narrow).
    instrument_fwhm_px : float
        FWHM of the instrument function (measured from a lamp, or the expected line width).
    max_width_ratio : float
        Narrowness limit in instrument FWHM.
    match_px : float
        Distance within which a line in a neighbouring frame counts as the same line.

    Returns
    -------
    numpy.ndarray of bool
    """
    frame = np.asarray(frame, dtype=np.int64)
    c = np.asarray(center_px, dtype=float)
    w = np.asarray(fwhm_px, dtype=float)
    if not (frame.shape == c.shape == w.shape) or frame.ndim != 1:
        raise InputError("per-line arrays of unequal length", field="center_px",
                         expected=f"{frame.size} values", found=f"{c.size} centres and {w.size} widths")
    for name, value in (("instrument_fwhm_px", instrument_fwhm_px), ("max_width_ratio", max_width_ratio),
                        ("match_px", match_px)):
        if not (np.isfinite(value) and value > 0):
            raise InputError("must be finite and positive", field=name, expected="> 0", found=repr(value))
    with np.errstate(invalid="ignore"):
        narrow = w < max_width_ratio * instrument_fwhm_px
    out = np.zeros(frame.size, dtype=bool)
    cand = np.flatnonzero(narrow)
    if cand.size == 0:
        return out
    ok = np.isfinite(c)
    order = np.lexsort((c[ok], frame[ok]))
    f_sorted, c_sorted = frame[ok][order], c[ok][order]
    seen = np.zeros(cand.size, dtype=bool)
    for n, i in enumerate(cand):
        if not ok[i]:
            continue
        for other in (frame[i] - 1, frame[i] + 1):
            lo, hi = np.searchsorted(f_sorted, other, side="left"), np.searchsorted(f_sorted, other, side="right")
            j = lo + np.searchsorted(c_sorted[lo:hi], c[i] - match_px, side="left")
            if j < hi and c_sorted[j] <= c[i] + match_px:
                seen[n] = True
    out[cand] = ~seen
    return out
