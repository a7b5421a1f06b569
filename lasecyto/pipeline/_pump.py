"""Per-cell processor of pump-threshold series: lines, mode tracks, S-curve fits, dose."""

from __future__ import annotations

import math

import numpy as np

from .. import tables
from ..cavity import cell_frames
from ..cavity.pump_series import fit_pump_series, pump_series_output
from ..exceptions import InputError
from ..features import summarize_cell
from ..safety import pulse_dose
from ..tracks import link_lines

__all__ = ["fluence_per_nj", "pump_energies", "pump_tables", "run_pump_series"]


def fluence_per_nj(pump):
    """Fluence of a 1 nJ pulse (J/cm^2; peak for a Gaussian spot) from a ``[pump]`` table, or None."""
    if pump is None or pump.get("spot_diameter_um") is None:
        return None
    return pulse_dose(1e-9, pulse_s=pump["pulse_s"], beam=pump["beam"], diameter_um=pump["spot_diameter_um"],
                      wavelength_nm=pump["wavelength_nm"]).fluence_j_cm2


def _skin_mpe_ratio(pump, energy_nj):
    if pump is None or pump.get("spot_diameter_um") is None:
        return math.nan
    dose = pulse_dose(float(energy_nj) * 1e-9, pulse_s=pump["pulse_s"], beam=pump["beam"],
                      diameter_um=pump["spot_diameter_um"], wavelength_nm=pump["wavelength_nm"])
    return math.nan if dose.mpe_ratio is None else float(dose.mpe_ratio)


def pump_energies(sidecar, n_frames):
    """Pump energy (nJ) and exposure (s) of every frame from a sidecar; clear errors otherwise."""
    if sidecar is None or sidecar.pump_energy_nj is None:
        raise InputError("a pump series needs the pump energy of every frame",
                         path=None if sidecar is None else sidecar.path, field="pump_energy_nj",
                         expected="one pump energy per frame in the sidecar", found="absent")
    pump_nj = np.asarray(sidecar.pump_energy_nj, dtype=float)
    n_distinct = np.unique(pump_nj).size
    if pump_nj.size != n_frames or n_distinct < 3 or np.any(pump_nj <= 0):
        raise InputError("a pump series needs several positive pump energies, one per frame", path=sidecar.path,
                         field="pump_energy_nj", expected=f">= 3 distinct energies > 0 over {n_frames} frames",
                         found=f"{n_distinct} distinct value{'s' if n_distinct != 1 else ''} over {pump_nj.size} frames"
                               + (", some <= 0" if np.any(pump_nj <= 0) else ""))
    exposure = (np.asarray(sidecar.frame_exposure_s, dtype=float) if sidecar.frame_exposure_s is not None
                else np.full(n_frames, sidecar.exposure_s))
    return pump_nj, exposure


def pump_tables(lines, *, time_s, pump_nj, exposure_s, pump, parameters, cell_id, tracks=None):
    """Tracks, ``cell_frames`` and ``thresholds`` of one pump-series cell from its lines.

    ``pump`` is a validated ``[pump]`` table (or None: no fluences, no linewidth judgement);
    ``tracks``, when given, are used as they are instead of linking ``lines``.
    """
    tp_, tk = parameters["threshold"], parameters["tracks"]
    n_frames = len(pump_nj)
    # below threshold a mode is a weak, broad line that fails the lasing rule: link every fitted line
    if tracks is None:
        tracks = link_lines(lines, max_step_nm=tk["max_step_nm"], max_gap_frames=tk["max_gap_frames"],
                            min_length_frames=tk["min_length_frames"], only_lasing=False)
    frames = np.arange(n_frames)
    per_nj = fluence_per_nj(pump)
    thresholds = fit_pump_series(
        tracks, frame=frames, pump_nj=pump_nj, exposure_s=exposure_s, cell_id=cell_id,
        max_modes=tp_["max_modes"], min_points=tp_["min_points"],
        linear_range=(tp_["linear_min_x"], tp_["linear_max_x"]), output_floor=tp_["output_floor"],
        fluence_per_nj=per_nj, instrument_fwhm_nm=None if pump is None else pump.get("instrument_fwhm_nm"),
        resolved_factor=tp_["resolved_factor"])
    if len(thresholds):
        thresholds["max_fluence_skin_mpe_ratio"] = _skin_mpe_ratio(pump, np.max(pump_nj))
        thresholds = tables.validate(thresholds, "thresholds")
    plain = tracks.copy()
    plain["mode_family"] = -1
    plain["comb_index"] = -1
    frames_tab = cell_frames(lines, plain, frame=frames, time_s=time_s, baseline_end_s=-math.inf, gap_um=None,
                             cell_id=cell_id)
    ok = lines["fit_ok"].to_numpy(bool)
    out, _ = pump_series_output(lines[ok], frame=frames, exposure_s=exposure_s)
    fi = lines.loc[ok, "frame"].to_numpy(np.int64)
    frames_tab["pump_energy_nj"] = pump_nj
    frames_tab["pump_fluence_j_cm2"] = pump_nj * per_nj if per_nj is not None else math.nan
    frames_tab["output_counts_per_s"] = np.bincount(fi, weights=out, minlength=n_frames)
    return tables.validate(tracks, "tracks"), tables.validate(frames_tab, "cell_frames"), thresholds


def run_pump_series(job):
    """Process one cell of a pump series (a ``CellJob`` with ``kind='pump-series'``)."""
    from ._cell import CellResult, cell_lines

    p = job.parameters
    lines, times, n_frames, sidecar = cell_lines(job)
    pump_nj, exposure = pump_energies(sidecar, n_frames)
    tracks, frames_tab, thresholds = pump_tables(lines, time_s=times, pump_nj=pump_nj, exposure_s=exposure,
                                                 pump=job.pump, parameters=p, cell_id=job.cell_id)
    vp = p["verdict"]
    summary = summarize_cell(frames_tab, perturbation_s=math.nan,
                             n_tracks=int(tracks["track_id"].nunique()) if len(tracks) else 0,
                             z_min=vp["z_min"], min_index_change=vp["min_index_change"],
                             min_relative_shift=vp["min_relative_shift"], k_sigma=vp["k_sigma"],
                             n_consecutive=vp["n_consecutive"], settle_fraction=vp["settle_fraction"])
    cell = {"cell_id": job.cell_id, "dish": job.dish, "condition": job.condition,
            "perturbation_s": float(job.perturbation_s), **summary}
    if len(thresholds):
        main = thresholds.iloc[0]
        cell.update(threshold_nj=main["threshold_nj"], threshold_err_nj=main["threshold_err_nj"],
                    beta=main["beta"], beta_err=main["beta_err"],
                    threshold_fluence_j_cm2=main["threshold_fluence_j_cm2"])
        note = f"pump series: main mode at {main['center_nm']:.3f} nm, thresholds in the thresholds table"
        if not main["fit_ok"]:
            note += f"; main-mode fit: {main['fit_message']}"
    else:
        note = "pump series: no mode seen at enough pump energies for a threshold fit"
    cell["note"] = note
    return CellResult(job.cell_id, "ok", cell=cell,
                      tables={"lines": lines, "tracks": tracks, "cell_frames": frames_tab, "thresholds": thresholds})
