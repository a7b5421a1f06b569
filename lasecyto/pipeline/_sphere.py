"""Per-cell processor of bead (sphere WGM) time-lapses: lines, tracks, mode identity, size and index."""

from __future__ import annotations

import math

import numpy as np

from .. import tables
from ..cavity.media import get_medium
from ..cavity.sphere_frames import assign_sphere_tracks, sphere_cell_frames
from ..exceptions import InputError
from ..features import summarize_cell
from ..tracks import link_lines

__all__ = ["JUDGED", "sphere_media", "sphere_tables", "sphere_cell_row", "run_sphere"]

#: series the verdict of a bead cell may judge (parameter ``sphere.judge``)
JUDGED = {"medium_index": ("index_change", "index_change_err"),
          "diameter": ("diameter_change_um", "diameter_change_err_um")}


def sphere_media(spec):
    """Bead and base-medium indices (callables or numbers) of a validated ``[sphere]`` table."""
    n_sphere = (get_medium(spec["bead_material"]) if spec.get("bead_material")
                else float(spec["bead_index"]))
    n_medium = get_medium(spec["medium"], temperature_c=spec.get("temperature_c")
                          if spec["medium"] == "water-iapws" else None)
    return n_sphere, n_medium


def _media_error(exc, spec):
    """An InputError of a dispersion formula, restated with the manifest key that chose it."""
    key = "sphere.bead_material" if spec.get("bead_material") and spec["bead_material"] in exc.message \
        else "sphere.medium"
    return InputError(f"{exc.message.split('; pass extrapolate')[0]}, asked for by the cell's lines or "
                      "parameters.sphere.reference_nm", field=key, expected=exc.expected, found=exc.found)


def sphere_tables(lines, *, time_s, n_frames, spec, parameters, perturbation_s, cell_id, tracks=None):
    """Tracks with mode identity and the ``cell_frames`` rows of one bead cell from its lines.

    Parameters
    ----------
    lines : pandas.DataFrame
        The cell's ``lines`` table.
    time_s : array of float
        Time of every frame; ``n_frames`` frames.
    spec : dict
        A validated ``[sphere]`` table (:func:`lasecyto.io.read_manifest`).
    parameters : dict
        Resolved stage parameters (``tracks`` and ``sphere`` are used).
    perturbation_s : float
        Frames before it form the baseline (NaN: all frames).
    tracks : pandas.DataFrame, optional
        The cell's tracks when already linked (``lasecyto sphere`` on a tracks table);
        otherwise the lines are linked with the ``tracks`` parameters.

    Returns
    -------
    tracks, cell_frames : pandas.DataFrame
    info : dict
        Outcome of the mode identification (see :func:`lasecyto.cavity.sphere_frames.assign_sphere_tracks`).
    """
    sp, tp = parameters["sphere"], parameters["tracks"]
    if sp["judge"] not in JUDGED:
        raise InputError("unknown series to judge", field="parameters.sphere.judge",
                         expected=" or ".join(repr(k) for k in JUDGED), found=repr(sp["judge"]))
    if tracks is None:
        tracks = link_lines(lines, max_step_nm=tp["max_step_nm"], max_gap_frames=tp["max_gap_frames"],
                            min_length_frames=tp["min_length_frames"])
    n_sphere, n_medium = sphere_media(spec)
    time_s = np.asarray(time_s, dtype=float)
    baseline_end = perturbation_s if np.isfinite(perturbation_s) else float(np.nanmax(time_s)) + 1.0
    try:
        tracks, info = assign_sphere_tracks(
            tracks, n_sphere=n_sphere, n_medium=n_medium, diameter_range_um=spec["diameter_range_um"],
            n_medium_bounds=spec["medium_index_range"], max_radial_order=sp["max_radial_order"],
            floor_nm=sp["wavelength_floor_nm"], assign_frames=sp["assign_frames"], tolerance_nm=sp["tolerance_nm"])
        d_range = spec["diameter_range_um"]
        if info["ok"]:  # the bead is known now: a narrow range keeps every frame on it
            d_range = (max(d_range[0], 0.97 * info["diameter_um"]), min(d_range[1], 1.03 * info["diameter_um"]))
        frames_tab = sphere_cell_frames(
            lines, tracks, frame=np.arange(n_frames), time_s=time_s, baseline_end_s=baseline_end,
            n_sphere=n_sphere, n_medium=n_medium, diameter_range_um=d_range,
            n_medium_bounds=spec["medium_index_range"], reference_nm=sp["reference_nm"],
            floor_nm=sp["wavelength_floor_nm"], min_lines=sp["min_lines"], tolerance_nm=sp["tolerance_nm"],
            cell_id=cell_id)
    except InputError as exc:
        if "validity range of medium" in exc.message:
            raise _media_error(exc, spec) from None
        raise
    return tables.validate(tracks, "tracks"), frames_tab, info


def sphere_cell_row(frames_tab, tracks, info, *, parameters, perturbation_s):
    """The cell's features and verdict (a row of the ``cells`` table without its identifiers)."""
    vp, sp = parameters["verdict"], parameters["sphere"]
    options = dict(perturbation_s=perturbation_s,
                   n_tracks=int(tracks["track_id"].nunique()) if len(tracks) else 0, z_min=vp["z_min"],
                   min_index_change=vp["min_index_change"], min_relative_shift=vp["min_relative_shift"],
                   k_sigma=vp["k_sigma"], n_consecutive=vp["n_consecutive"], settle_fraction=vp["settle_fraction"])
    col, err = JUDGED["diameter"]
    diameter = summarize_cell(frames_tab, quantity=col, quantity_err=err,
                              min_change=sp["min_diameter_change_um"], **options)
    summary = diameter if sp["judge"] == "diameter" else summarize_cell(frames_tab, **options)
    t = frames_tab["time_s"].to_numpy(float)
    base = t < perturbation_s if np.isfinite(perturbation_s) else np.ones(t.size, dtype=bool)
    row = {**summary,
           "baseline_diameter_um": _median(frames_tab["diameter_um"].to_numpy(float)[base]),
           "baseline_medium_index": _median(frames_tab["medium_index"].to_numpy(float)[base]),
           "diameter_change_um": diameter["index_change"], "diameter_change_err_um": diameter["index_change_err"]}
    notes = [summary.get("note", "")]
    notes.append(info["message"] if info["ok"] else "no mode identity: " + info["message"])
    row["note"] = "; ".join(n for n in notes if n)
    return row


def run_sphere(job):
    """Process one bead cell (a ``CellJob`` with ``resonator='sphere'``)."""
    from ._cell import CellResult, cell_lines

    if job.sphere is None:
        raise InputError("a sphere resonator needs the manifest's [sphere] table", field="sphere",
                         expected="bead_material or bead_index, diameter_range_um", found="absent")
    lines, times, n_frames, _ = cell_lines(job)
    tracks, frames_tab, info = sphere_tables(lines, time_s=times, n_frames=n_frames, spec=job.sphere,
                                             parameters=job.parameters, perturbation_s=job.perturbation_s,
                                             cell_id=job.cell_id)
    row = sphere_cell_row(frames_tab, tracks, info, parameters=job.parameters, perturbation_s=job.perturbation_s)
    cell = {"cell_id": job.cell_id, "dish": job.dish, "condition": job.condition,
            "perturbation_s": float(job.perturbation_s), **row}
    return CellResult(job.cell_id, "ok", cell=cell,
                      tables={"lines": lines, "tracks": tracks, "cell_frames": frames_tab})


def _median(values):
    v = values[np.isfinite(values)]
    return float(np.median(v)) if v.size else math.nan
