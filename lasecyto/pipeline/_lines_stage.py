"""The lines stage on a spectral stack: blocks of frames to rows of the ``lines`` table.

Shared by every per-item processor and by ``lasecyto lines``: the camera model
is completed from dark or flat frames where the sidecar names them, raw counts
are summed over the item's detector rows, converted to photoelectrons, fitted
block by block (bounded memory) and turned into table rows with vacuum
wavelengths; cosmic-ray spikes are flagged and the lasing rule applied over
the whole stack.
"""

from __future__ import annotations

import dataclasses
import logging
import math

import numpy as np
import pandas as pd

from .. import tables
from ..calibration import dark_frame_estimate, photon_transfer
from ..exceptions import CalibrationError, InputError
from ..io import read_stack
from ..lines import fit_lines, flag_cosmic_rays, is_lasing, line_contrast

__all__ = ["lines_table", "resolve_camera", "stack_lines"]

logger = logging.getLogger("lasecyto.pipeline")

#: frames read for a photon-transfer gain (from the start of a flat or data stack)
PTC_FRAMES = 512


def _read_frames(path, what, n_max=None):
    try:
        with read_stack(path) as st:
            stop = st.n_frames if n_max is None else min(st.n_frames, n_max)
            return st.read_rows(0, stop).astype(float)
    except FileNotFoundError:
        raise InputError(f"{what} not found", path=path, expected="an existing stack of frames",
                         found="no such file") from None


def resolve_camera(camera, stack):
    """Complete a camera model from the frames it names.

    ``camera.dark_stack``: the offset map (rows x pixels) and read noise come
    from the dark frames (:func:`lasecyto.calibration.dark_frame_estimate`),
    replacing ``offset_counts`` and ``read_noise_e``.  ``camera.flat_stack`` or
    ``camera.gain_from_data``: the conversion gain comes from the
    photon-transfer curve (:func:`lasecyto.calibration.photon_transfer`) of
    the flat frames, or of the first ``PTC_FRAMES`` frames of the data with
    every frame normalised to the mean total (pump fluctuations removed).

    Returns
    -------
    camera : CameraModel
        With numbers only (and ``offset_map_counts`` when dark frames were given).
    summary : dict
        Plain values of what was measured (empty when nothing was).
    """
    if camera.dark_stack is None and camera.flat_stack is None and not camera.gain_from_data:
        return camera, {}
    summary = {}
    offset_map = None
    offset = camera.offset_counts
    read_counts = camera.read_noise_e * camera.gain_counts_per_e
    read_known = camera.read_noise_e > 0
    if camera.dark_stack is not None:
        dark = _read_frames(camera.dark_stack, "dark stack")
        if dark.shape[1:] != (stack.n_rows, stack.n_pixels):
            raise InputError("dark frames do not match the stack", path=camera.dark_stack, field="camera.dark_stack",
                             expected=f"frames of {stack.n_rows} x {stack.n_pixels} pixels",
                             found=f"frames of {dark.shape[1]} x {dark.shape[2]} pixels")
        est = dark_frame_estimate(dark)
        offset_map = est.offset_map_counts
        offset = est.offset_counts
        read_counts = est.read_noise_counts
        read_known = True
        summary.update(dark_frames=est.n_frames, offset_counts=offset, read_noise_counts=read_counts,
                       hot_pixels=est.n_hot)
    gain = camera.gain_counts_per_e
    if camera.flat_stack is not None or camera.gain_from_data:
        source = camera.flat_stack if camera.flat_stack is not None else stack.path
        frames = _read_frames(source, "flat stack" if camera.flat_stack is not None else "data stack",
                              n_max=PTC_FRAMES)
        if frames.shape[1:] != (stack.n_rows, stack.n_pixels):
            raise InputError("flat frames do not match the stack", path=source, field="camera.flat_stack",
                             expected=f"frames of {stack.n_rows} x {stack.n_pixels} pixels",
                             found=f"frames of {frames.shape[1]} x {frames.shape[2]} pixels")
        try:
            ptc = photon_transfer(frames, offset_counts=offset if offset_map is None else offset_map,
                                  read_noise_counts=read_counts if read_known else None,
                                  saturation_counts=camera.saturation_counts,
                                  normalise=camera.flat_stack is None)
        except CalibrationError as exc:
            raise InputError(f"photon-transfer gain failed: {exc}", path=source, field="camera.gain_counts_per_e",
                             expected="frames whose pixels span a range of steady levels", found="see message") from None
        gain = ptc.gain_counts_per_e
        if not read_known:
            read_counts = ptc.read_noise_counts
        summary.update(gain_counts_per_e=gain, gain_err_counts_per_e=ptc.gain_err_counts_per_e,
                       gain_source="flat frames" if camera.flat_stack is not None else "data (normalised frames)")
    resolved = dataclasses.replace(camera, offset_counts=float(offset), gain_counts_per_e=float(gain),
                                   read_noise_e=float(read_counts / gain), dark_stack=None, flat_stack=None,
                                   gain_from_data=False, offset_map_counts=offset_map)
    logger.info("camera measured for %s: %s", stack.path.name, summary)
    return resolved, summary


def lines_table(fits, *, frame, time_s, cell_id, axis, gain_counts_per_e, saturated=None,
                lasing_max_fwhm_px=8.0, lasing_snr_min=10.0) -> pd.DataFrame:
    """Turn pixel-space fits of one block into rows of the ``lines`` table.

    ``lasing`` here follows the width and SNR rule only (``cosmic_ray`` False);
    :func:`stack_lines` applies the full rule over a whole stack.

    Parameters
    ----------
    fits : lasecyto.lines.LineFits
        Fits of a block of spectra; ``fits.spectrum`` indexes ``frame``.
    frame, time_s : arrays
        Frame index and time of every spectrum of the block.
    axis : WavelengthAxis
        Pixel-to-wavelength map (converted to vacuum).
    saturated : bool array (n_spectra, n_pixels), optional
        Raw-pixel saturation mask; a line is flagged when a pixel within
        +-2 FWHM of its centre is saturated.
    """
    d = fits.as_dict()
    spec = np.asarray(d["spectrum"], dtype=np.int64)
    center_px = np.asarray(d["center_px"], dtype=float)
    disp = np.abs(axis.vacuum_dispersion_nm_per_px(center_px))
    sat = np.asarray(d["saturated"], dtype=bool).copy()
    if saturated is not None and spec.size:
        n_pix = saturated.shape[1]
        fwhm = np.clip(np.nan_to_num(np.asarray(d["fwhm_px"], dtype=float), nan=2.0), 0.0, n_pix)
        centre = np.clip(np.nan_to_num(center_px, nan=0.0), 0.0, n_pix - 1.0)
        half = np.ceil(2 * fwhm).astype(np.int64) + 1
        lo = np.clip(np.rint(centre).astype(np.int64) - half, 0, n_pix)
        hi = np.clip(np.rint(centre).astype(np.int64) + half + 1, 0, n_pix)
        csum = np.concatenate([np.zeros((saturated.shape[0], 1)), np.cumsum(saturated, axis=1)], axis=1)
        sat |= (csum[spec, hi] - csum[spec, lo]) > 0
    frames = np.asarray(frame)[spec]
    table = pd.DataFrame({
        "cell_id": np.full(spec.size, cell_id, dtype=object),
        "frame": frames.astype(np.int64),
        "time_s": np.asarray(time_s, dtype=float)[spec],
        "line_id": np.zeros(spec.size, dtype=np.int64),
        "center_px": center_px,
        "center_err_px": d["center_err_px"],
        "center_nm": axis.vacuum_nm(center_px),
        "center_err_nm": np.asarray(d["center_err_px"]) * disp,
        "fwhm_px": d["fwhm_px"],
        "fwhm_nm": np.asarray(d["fwhm_px"]) * disp,
        "area_counts": np.asarray(d["area_e"]) * gain_counts_per_e,
        "area_err_counts": np.asarray(d["area_err_e"]) * gain_counts_per_e,
        "amplitude_counts": np.asarray(d["amplitude_e"]) * gain_counts_per_e,
        "background_counts": np.asarray(d["background_e"]) * gain_counts_per_e,
        "snr": d["snr"],
        "chi2_red": d["chi2_red"],
        "lasing": is_lasing(d["fwhm_px"], d["snr"], d["fit_ok"], max_fwhm_px=lasing_max_fwhm_px,
                            snr_min=lasing_snr_min),
        "saturated": sat,
        "fit_ok": np.asarray(d["fit_ok"], dtype=bool),
        "fit_message": np.asarray(d["fit_message"], dtype=object),
        "cosmic_ray": np.zeros(spec.size, dtype=bool),
        "contrast": line_contrast(d["amplitude_e"], d["background_e"]),
    })
    table = table.sort_values(["frame", "center_px"], kind="stable").reset_index(drop=True)
    table["line_id"] = table.groupby("frame").cumcount().astype(np.int64)
    return table


def stack_lines(stack, camera, axis, times, *, rows=None, cell_id, parameters, instrument=None,
                progress=None) -> pd.DataFrame:
    """Fit every line of every frame of an open spectral stack.

    Parameters
    ----------
    stack : lasecyto.io.SpectralStack
        Open stack (read block by block).
    camera : lasecyto.io.CameraModel
        Offset, gain, read noise and saturation level of the detector, or the
        dark/flat frames to measure them from (see :func:`resolve_camera`).
    axis : WavelengthAxis
        Pixel-to-wavelength map.
    times : array of float
        Time of every frame (s).
    rows : (start, stop), optional
        Detector rows that belong to this item (default: all rows).
    cell_id : str
        Value of the ``cell_id`` column.
    parameters : dict
        Resolved stage parameters (``lines`` and ``lasing`` are used).
    instrument : lasecyto.lines.InstrumentProfile, optional
        Instrument function from the lamp: needed by ``lines.shape =
        "instrument"``; its FWHM is the reference of the lasing and cosmic-ray
        width tests (without it, ``lasing.max_fwhm_px`` and ``lines.fwhm_guess_px``).
    progress : callable, optional
        Called as ``progress(frames_done, n_frames)`` after every block.

    Returns
    -------
    pandas.DataFrame
        The validated ``lines`` table.
    """
    lp, la = parameters["lines"], parameters["lasing"]
    if lp["shape"] == "instrument" and instrument is None:
        raise InputError("the instrument line shape needs the instrument function from a lamp frame",
                         path=stack.path, field="lines.shape", expected="a [lamp] frame (or another shape)",
                         found="'instrument' without a lamp")
    camera, _ = resolve_camera(camera, stack)
    r0, r1 = (0, stack.n_rows) if rows is None else rows
    n_rows = r1 - r0
    if camera.offset_map_counts is not None:
        offset = np.asarray(camera.offset_map_counts)[r0:r1].sum(axis=0)
    else:
        offset = camera.offset_counts * n_rows
    read_noise = camera.read_noise_e * math.sqrt(n_rows)
    times = np.asarray(times, dtype=float)
    gaussian = lp["voigt_gaussian_fwhm_px"]
    parts = []
    block = int(lp["block_frames"])
    for start in range(0, stack.n_frames, block):
        stop = min(start + block, stack.n_frames)
        raw = stack.read_rows(start, stop)[:, r0:r1, :]
        saturated = (raw >= camera.saturation_counts).any(axis=1)
        spectra_e = (raw.sum(axis=1, dtype=float) - offset) / camera.gain_counts_per_e
        fits = fit_lines(spectra_e, read_noise_e=read_noise, shape=lp["shape"], snr_min=lp["snr_min"],
                         fwhm_guess_px=lp["fwhm_guess_px"], baseline=lp["baseline"],
                         baseline_window_px=lp["baseline_window_px"], instrument=instrument,
                         gaussian_fwhm_px=gaussian if (lp["shape"] == "voigt" and gaussian > 0) else None)
        parts.append(lines_table(fits, frame=np.arange(start, stop), time_s=times[start:stop],
                                 cell_id=cell_id, axis=axis, gain_counts_per_e=camera.gain_counts_per_e,
                                 saturated=saturated))
        if progress is not None:
            progress(stop, stack.n_frames)
    table = pd.concat(parts, ignore_index=True) if parts else tables.empty("lines")
    if len(table):
        inst_fwhm = None if instrument is None else instrument.fwhm_px
        table["cosmic_ray"] = flag_cosmic_rays(table["frame"].to_numpy(), table["center_px"].to_numpy(),
                                               table["fwhm_px"].to_numpy(),
                                               instrument_fwhm_px=inst_fwhm or lp["fwhm_guess_px"],
                                               max_width_ratio=lp["cosmic_width_ratio"],
                                               match_px=lp["cosmic_match_px"])
        table["lasing"] = is_lasing(table["fwhm_px"], table["snr"], table["fit_ok"],
                                    max_fwhm_px=la["max_fwhm_px"], snr_min=la["snr_min"],
                                    instrument_fwhm_px=inst_fwhm, max_width_ratio=la["max_width_ratio"],
                                    contrast=table["contrast"], min_contrast=la["min_contrast"],
                                    cosmic_ray=table["cosmic_ray"])
    return tables.validate(table, "lines")
