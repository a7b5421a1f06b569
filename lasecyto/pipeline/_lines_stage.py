"""The lines stage on a spectral stack: blocks of frames to rows of the ``lines`` table.

Shared by every per-item processor and by ``lasecyto lines``: raw counts are
summed over the item's detector rows, converted to photoelectrons with the
camera model, fitted block by block (bounded memory) and turned into table
rows with vacuum wavelengths.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .. import tables
from ..lines import fit_lines, is_lasing

__all__ = ["lines_table", "stack_lines"]


def lines_table(fits, *, frame, time_s, cell_id, axis, gain_counts_per_e, saturated=None,
                lasing_max_fwhm_px=8.0, lasing_snr_min=10.0) -> pd.DataFrame:
    """Turn pixel-space fits of one block into rows of the ``lines`` table.

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
    })
    table = table.sort_values(["frame", "center_px"], kind="stable").reset_index(drop=True)
    table["line_id"] = table.groupby("frame").cumcount().astype(np.int64)
    return table



def stack_lines(stack, camera, axis, times, *, rows=None, cell_id, parameters, progress=None) -> pd.DataFrame:
    """Fit every line of every frame of an open spectral stack.

    Parameters
    ----------
    stack : lasecyto.io.SpectralStack
        Open stack (read block by block).
    camera : lasecyto.io.CameraModel
        Offset, gain, read noise and saturation level of the detector.
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
    progress : callable, optional
        Called as ``progress(frames_done, n_frames)`` after every block.

    Returns
    -------
    pandas.DataFrame
        The validated ``lines`` table.
    """
    lp = parameters["lines"]
    r0, r1 = (0, stack.n_rows) if rows is None else rows
    n_rows = r1 - r0
    offset = camera.offset_counts * n_rows
    read_noise = camera.read_noise_e * math.sqrt(n_rows)
    times = np.asarray(times, dtype=float)
    parts = []
    block = int(lp["block_frames"])
    for start in range(0, stack.n_frames, block):
        stop = min(start + block, stack.n_frames)
        raw = stack.read_rows(start, stop)[:, r0:r1, :]
        saturated = (raw >= camera.saturation_counts).any(axis=1)
        spectra_e = (raw.sum(axis=1, dtype=float) - offset) / camera.gain_counts_per_e
        fits = fit_lines(spectra_e, read_noise_e=read_noise, shape=lp["shape"], snr_min=lp["snr_min"],
                         fwhm_guess_px=lp["fwhm_guess_px"], baseline=lp["baseline"],
                         baseline_window_px=lp["baseline_window_px"])
        parts.append(lines_table(fits, frame=np.arange(start, stop), time_s=times[start:stop],
                                 cell_id=cell_id, axis=axis, gain_counts_per_e=camera.gain_counts_per_e,
                                 saturated=saturated, lasing_max_fwhm_px=parameters["lasing"]["max_fwhm_px"],
                                 lasing_snr_min=parameters["lasing"]["snr_min"]))
        if progress is not None:
            progress(stop, stack.n_frames)
    table = pd.concat(parts, ignore_index=True) if parts else tables.empty("lines")
    return tables.validate(table, "lines")
