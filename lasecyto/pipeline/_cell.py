"""Processing of one cell: raw stack to lines, tracks, cell frames and a verdict.

:func:`process_cell` is a top-level function of a small picklable job, so that
process pools and clusters can run it: the worker opens its own files.
"""

from __future__ import annotations

import math
import time
import traceback
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import tables
from ..calibration import WavelengthAxis
from ..cavity import assign_mode_families, cell_frames
from ..exceptions import InputError, LasecytoError
from ..features import summarize_cell
from ..io import check_sidecar, read_sidecar, read_stack
from ..lines import fit_lines, is_lasing
from ..tracks import link_lines

__all__ = ["CellJob", "CellResult", "process_cell", "lines_table"]


@dataclass(frozen=True)
class CellJob:
    """Everything a worker needs to process one cell (plain, picklable values)."""

    cell_id: str
    dish: str
    condition: str
    perturbation_s: float
    stack: str
    sidecar: str
    rows: tuple | None
    gap_um: float
    parameters: dict
    lamp_axis: WavelengthAxis | None = None
    lamp_error: str | None = None
    resonator: str = "fabry-perot"


@dataclass
class CellResult:
    """Outcome of one item of a batch (plain values, picklable).

    ``tables`` maps a table name of :data:`lasecyto.tables.SCHEMAS` to this
    item's rows of that table; ``cell`` is the item's row of the ``cells``
    table.  A failed item has ``status == "failed"``, its reason in ``error``
    and no tables.
    """

    cell_id: str
    status: str  # "ok" or "failed"
    error: str = ""
    seconds: float = 0.0
    tables: dict = field(default_factory=dict)
    cell: dict = field(default_factory=dict)


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


def _axis_for(job, sidecar, stack):
    if sidecar.wavelength is not None:
        return sidecar.wavelength
    if stack.axis_nm is not None:
        return WavelengthAxis(values_nm=tuple(stack.axis_nm), medium=stack.axis_medium or "vacuum")
    if job.lamp_axis is not None:
        return job.lamp_axis
    why = f"; lamp calibration failed: {job.lamp_error}" if job.lamp_error else ""
    raise InputError("no wavelength axis" + why, path=job.sidecar, field="wavelength",
                     expected="an axis in the sidecar, the stack or a [lamp] calibration",
                     found="none")


def _run_fabry_perot(job: CellJob) -> CellResult:
    p = job.parameters
    lp = p["lines"]
    with read_stack(job.stack) as stack:
        sidecar = read_sidecar(job.sidecar)
        check_sidecar(sidecar, stack)
        axis = _axis_for(job, sidecar, stack)
        cam = sidecar.camera
        if job.rows is not None:
            r0, r1 = job.rows
            if not (0 <= r0 < r1 <= stack.n_rows):
                raise InputError("row range outside the detector", path=job.stack, field="rows",
                                 expected=f"0 <= start < stop <= {stack.n_rows}", found=f"[{r0}, {r1}]")
        else:
            r0, r1 = 0, stack.n_rows
        n_rows = r1 - r0
        offset = cam.offset_counts * n_rows
        read_noise = cam.read_noise_e * math.sqrt(n_rows)
        times = sidecar.frame_times_s
        parts = []
        block = int(lp["block_frames"])
        for start in range(0, stack.n_frames, block):
            stop = min(start + block, stack.n_frames)
            raw = stack.read_rows(start, stop)[:, r0:r1, :]
            saturated = (raw >= cam.saturation_counts).any(axis=1)
            spectra_e = (raw.sum(axis=1) - offset) / cam.gain_counts_per_e
            fits = fit_lines(spectra_e, read_noise_e=read_noise, shape=lp["shape"],
                             snr_min=lp["snr_min"], fwhm_guess_px=lp["fwhm_guess_px"],
                             baseline=lp["baseline"], baseline_window_px=lp["baseline_window_px"])
            frames = np.arange(start, stop)
            parts.append(lines_table(fits, frame=frames, time_s=times[start:stop], cell_id=job.cell_id,
                                     axis=axis, gain_counts_per_e=cam.gain_counts_per_e,
                                     saturated=saturated,
                                     lasing_max_fwhm_px=p["lasing"]["max_fwhm_px"],
                                     lasing_snr_min=p["lasing"]["snr_min"]))
        n_frames = stack.n_frames
    lines = tables.validate(pd.concat(parts, ignore_index=True) if parts else tables.empty("lines"),
                            "lines")
    tp = p["tracks"]
    tracks = link_lines(lines, max_step_nm=tp["max_step_nm"], max_gap_frames=tp["max_gap_frames"],
                        min_length_frames=tp["min_length_frames"])
    if len(tracks):
        tracks = assign_mode_families(tracks)
    tracks = tables.validate(tracks, "tracks")
    pert = job.perturbation_s
    baseline_end = pert if np.isfinite(pert) else float(times[-1]) + 1.0
    frames_tab = cell_frames(lines, tracks, frame=np.arange(n_frames), time_s=times,
                             baseline_end_s=baseline_end,
                             gap_um=job.gap_um if np.isfinite(job.gap_um) else None,
                             cell_id=job.cell_id)
    frames_tab = tables.validate(frames_tab, "cell_frames")
    vp = p["verdict"]
    summary = summarize_cell(frames_tab, perturbation_s=pert,
                             n_tracks=int(tracks["track_id"].nunique()) if len(tracks) else 0,
                             z_min=vp["z_min"], min_index_change=vp["min_index_change"],
                             min_relative_shift=vp["min_relative_shift"], k_sigma=vp["k_sigma"],
                             n_consecutive=vp["n_consecutive"], settle_fraction=vp["settle_fraction"])
    cell = {"cell_id": job.cell_id, "dish": job.dish, "condition": job.condition,
            "perturbation_s": float(pert), **summary}
    return CellResult(job.cell_id, "ok", cell=cell,
                      tables={"lines": lines, "tracks": tracks, "cell_frames": frames_tab})


#: per-item processing by resonator type (the manifest's ``experiment.resonator``)
PROCESSORS = {"fabry-perot": _run_fabry_perot}


def process_cell(job: CellJob) -> CellResult:
    """Process one cell; a failure is returned as a result, never raised."""
    t0 = time.perf_counter()
    try:
        result = PROCESSORS[job.resonator](job)
    except LasecytoError as exc:
        result = CellResult(job.cell_id, "failed", error=str(exc))
    except Exception as exc:  # an unexpected failure must not stop the batch
        tb = traceback.extract_tb(exc.__traceback__)[-1]
        where = f" [{tb.filename.rsplit('/', 1)[-1]}:{tb.lineno}]"
        result = CellResult(job.cell_id, "failed",
                            error=f"unexpected {type(exc).__name__}: {exc}{where}")
    result.seconds = time.perf_counter() - t0
    return result
