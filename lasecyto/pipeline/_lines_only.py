"""The line stage alone: every line of a spectral stack, as a ``lines`` table.

For users who want fitted lines without tracking, cavity inversion or verdicts
(``lasecyto lines STACK --out TABLE``).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pandas as pd

from ..calibration import WavelengthAxis, measure_instrument_profile, reference_lines, solve_dispersion
from ..exceptions import CalibrationError, InputError
from ..io import CameraModel, check_sidecar, default_sidecar_path, read_sidecar, read_stack
from ._instrument import lamp_spectrum
from ._lines_stage import stack_lines
from ._params import resolve_parameters

__all__ = ["fit_stack"]


def _lamp_axis(spectrum_e, read_noise, reference, sidecar, calib):
    if reference is None:
        raise InputError("a lamp frame needs its reference line set", field="reference",
                         expected="a set name such as 'Ne I'", found="none")
    guess = None if sidecar is None else sidecar.wavelength_guess
    if guess is None or guess.polynomial_nm is None:
        raise InputError("lamp calibration needs a nominal axis", path=None if sidecar is None else sidecar.path,
                         field="wavelength_guess", expected="polynomial_nm coefficients in the sidecar",
                         found="none")
    ref = reference_lines(reference)
    solution = solve_dispersion(spectrum_e, ref["wavelength_air_nm"].to_numpy(),
                                guess_nm=tuple(guess.polynomial_nm), degree=calib["degree"],
                                read_noise_e=read_noise, clip_sigma=calib["clip_sigma"], snr_min=calib["snr_min"],
                                reference_intensity=ref["relative_intensity"].to_numpy())
    return solution.axis()


def fit_stack(stack_path, *, sidecar=None, parameters=None, lamp=None, reference=None, cell_id=None,
              camera=None, progress=None) -> pd.DataFrame:
    """Fit every line of every frame of a spectral stack.

    Parameters
    ----------
    stack_path : str or Path
        Spectral stack (any format :func:`lasecyto.io.read_stack` reads).
    sidecar : str or Path, optional
        Sidecar metadata (frame times, camera, axis); default: the stack path
        with suffix ``.json`` when that file exists.  Without a sidecar the
        camera is taken as 1 count per photoelectron, no offset, no read noise,
        and ``time_s`` is NaN.
    parameters : dict, optional
        Stage parameters overriding the defaults (``{"lines": {...}, "lasing":
        {...}, "calibration": {...}}``), as in a recipe.
    lamp, reference : optional
        Lamp frame (a stack) and its reference line set (e.g. ``"Ne I"``),
        calibrated against the sidecar's ``wavelength_guess`` when the sidecar
        and the stack carry no wavelength axis.  The lamp frame also gives the
        instrument function (used by ``lines.shape = "instrument"`` and as the
        width reference of the lasing and cosmic-ray tests); it is read with the
        stack's camera model.
    camera : dict, optional
        Camera fields replacing the sidecar's (``dark_stack``, ``flat_stack``,
        ``gain_from_data``, or numbers; see :class:`lasecyto.io.CameraModel`).
    cell_id : str, optional
        Value of the ``cell_id`` column (default: the stack file stem).
    progress : callable, optional
        Called as ``progress(frames_done, n_frames)`` after every block.

    Returns
    -------
    pandas.DataFrame
        The validated ``lines`` table, one row per fitted line (failed fits
        included with ``fit_ok=False`` and their reason).
    """
    p = resolve_parameters(parameters or {}, source="parameters")
    stack_path = Path(stack_path)
    if sidecar is None and default_sidecar_path(stack_path).is_file():
        sidecar = default_sidecar_path(stack_path)
    side = None if sidecar is None else read_sidecar(sidecar)
    cam = CameraModel() if side is None else side.camera
    if camera:
        try:
            cam = dataclasses.replace(cam, **camera)
        except TypeError:
            raise InputError("unknown camera field", field="camera",
                             expected=f"fields of CameraModel {sorted(f.name for f in dataclasses.fields(cam))}",
                             found=sorted(camera)) from None
    cell = stack_path.stem if cell_id is None else str(cell_id)
    lamp_e = None if lamp is None else lamp_spectrum(lamp, cam)  # (spectrum_e, read_noise), read once
    with read_stack(stack_path) as stack:
        if side is not None:
            check_sidecar(side, stack)
        if side is not None and side.wavelength is not None:
            axis = side.wavelength
        elif stack.axis_nm is not None:
            axis = WavelengthAxis(values_nm=tuple(stack.axis_nm), medium=stack.axis_medium or "vacuum")
        elif lamp is not None:
            axis = _lamp_axis(*lamp_e, reference, side, p["calibration"])
        else:
            raise InputError("no wavelength axis for the stack", path=stack_path, field="wavelength",
                             expected="an axis in the sidecar or the stack, or --lamp with --reference",
                             found="none")
        instrument = None
        if lamp is not None:
            spectrum_e, read_noise = lamp_e
            try:
                instrument = measure_instrument_profile(spectrum_e, read_noise_e=read_noise)
            except CalibrationError as exc:
                if p["lines"]["shape"] == "instrument":
                    raise InputError(f"instrument function not measured: {exc}", path=lamp, field="lamp",
                                     expected="bright isolated lamp lines", found="too few") from None
        n_frames = stack.n_frames
        times = (np.full(n_frames, np.nan) if side is None
                 else np.asarray(side.frame_times_s, dtype=float))
        return stack_lines(stack, cam, axis, times, cell_id=cell, parameters=p, instrument=instrument,
                           progress=progress)
