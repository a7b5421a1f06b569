"""The instrument function of a run, measured from its lamp frame."""

from __future__ import annotations

import logging

import numpy as np

from ..calibration import measure_instrument_profile
from ..exceptions import LasecytoError
from ..io import read_sidecar, read_stack

__all__ = ["lamp_instrument", "lamp_spectrum"]

logger = logging.getLogger("lasecyto.pipeline")


def lamp_spectrum(stack_path, sidecar_path):
    """Mean lamp spectrum in photoelectrons (offset removed, rows summed), its read noise and the sidecar."""
    sidecar = read_sidecar(sidecar_path)
    with read_stack(stack_path) as stack:
        raw = stack.read()  # (frames, pixels), detector rows summed
        n_rows, n_frames = stack.n_rows, stack.n_frames
    cam = sidecar.camera
    spectrum_e = (raw.mean(axis=0) - cam.offset_counts * n_rows) / cam.gain_counts_per_e
    read_noise = cam.read_noise_e * np.sqrt(n_rows / max(n_frames, 1))
    return spectrum_e, read_noise, sidecar


def lamp_instrument(lamp):
    """Instrument profile from the manifest's lamp frame, and a plain summary for the run record.

    A lamp whose lines cannot give a profile (too few bright isolated lines)
    yields ``None`` and the reason in the summary: only runs that fit with
    ``lines.shape = "instrument"`` need it.
    """
    try:
        spectrum_e, read_noise, _ = lamp_spectrum(lamp.stack, lamp.sidecar)
        profile = measure_instrument_profile(spectrum_e, read_noise_e=read_noise)
    except (LasecytoError, OSError) as exc:
        logger.warning("instrument function not measured from the lamp: %s", exc)
        return None, {"error": str(exc)}
    return profile, {"fwhm_px": profile.fwhm_px, "n_lines": profile.n_lines, "step_px": profile.step_px}
