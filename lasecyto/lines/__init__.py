"""Laser lines in pixel space: baseline, detection, batched sub-pixel fits and uncertainties.

Everything here works in pixel coordinates (pixel ``i`` covers ``[i - 0.5,
i + 0.5]``) and photoelectrons; the pipeline converts to nm and counts.  The
numerical kernels (detection, starting values, Fisher scoring of
pixel-integrated shapes, Fisher-matrix uncertainties) are compiled with Numba
and run in parallel over spectra.
"""

from ._baseline import estimate_baseline
from ._cosmic import flag_cosmic_rays, line_contrast
from ._crlb import crlb_center_px
from ._detect import detect_lines
from ._fit import LineFits, fit_lines, is_lasing
from ._instrument import InstrumentProfile, instrument_profile_from_samples
from ._shapes import GAUSSIAN_FWHM_PER_SIGMA, SHAPES, line_profile_pixels, voigt_fwhm, voigt_profile

__all__ = [
    "GAUSSIAN_FWHM_PER_SIGMA",
    "InstrumentProfile",
    "LineFits",
    "SHAPES",
    "crlb_center_px",
    "detect_lines",
    "estimate_baseline",
    "fit_lines",
    "flag_cosmic_rays",
    "instrument_profile_from_samples",
    "is_lasing",
    "line_contrast",
    "line_profile_pixels",
    "voigt_fwhm",
    "voigt_profile",
]
