"""Laser lines in pixel space: baseline, detection, batched sub-pixel fits and uncertainties.

Everything here works in pixel coordinates (pixel ``i`` covers ``[i - 0.5,
i + 0.5]``) and photoelectrons; the pipeline converts to nm and counts.
"""

from ._baseline import estimate_baseline
from ._crlb import crlb_center_px
from ._detect import detect_lines
from ._fit import LineFits, fit_lines, is_lasing
from ._shapes import GAUSSIAN_FWHM_PER_SIGMA, SHAPES, line_profile_pixels

__all__ = [
    "GAUSSIAN_FWHM_PER_SIGMA",
    "LineFits",
    "SHAPES",
    "crlb_center_px",
    "detect_lines",
    "estimate_baseline",
    "fit_lines",
    "is_lasing",
    "line_profile_pixels",
]
