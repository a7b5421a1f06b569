"""The instrument function of a run, measured from its lamp frame."""

from __future__ import annotations

import logging
import math

from ..calibration import measure_instrument_profile
from ..exceptions import LasecytoError
from ..io import read_stack

__all__ = ["lamp_instrument", "lamp_spectrum"]

logger = logging.getLogger("lasecyto.pipeline")


def lamp_spectrum(stack_path, camera):
    """Mean lamp spectrum in photoelectrons (offset removed, detector rows summed) and its read noise."""
    with read_stack(stack_path) as stack:
        raw = stack.read()  # (frames, pixels), detector rows summed
        n_rows, n_frames = stack.n_rows, stack.n_frames
    spectrum_e = (raw.mean(axis=0) - camera.offset_counts * n_rows) / camera.gain_counts_per_e
    return spectrum_e, camera.read_noise_e * math.sqrt(n_rows / max(n_frames, 1))


def lamp_instrument(spectrum_e, read_noise_e):
    """Instrument profile from a lamp spectrum (:func:`lamp_spectrum`), and a plain summary for the run record.

    A lamp whose lines cannot give a profile (too few bright isolated lines)
    yields ``None`` and the reason in the summary: only runs that fit with
    ``lines.shape = "instrument"`` need it.
    """
    try:
        profile = measure_instrument_profile(spectrum_e, read_noise_e=read_noise_e)
    except LasecytoError as exc:
        logger.warning("instrument function not measured from the lamp: %s", exc)
        return None, {"error": str(exc)}
    return profile, {"fwhm_px": profile.fwhm_px, "n_lines": profile.n_lines, "step_px": profile.step_px}
