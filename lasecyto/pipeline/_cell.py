"""Processing of one cell: raw stack to lines, tracks, cell frames and a verdict.

:func:`process_cell` is a top-level function of a small picklable job, so that
process pools and clusters can run it: the worker opens its own files.
"""

from __future__ import annotations

import logging
import math
import time
import traceback
from dataclasses import dataclass, field

import numpy as np

from .. import tables
from ..calibration import WavelengthAxis
from ..cavity import cell_frames
from ..exceptions import InputError, LasecytoError
from ..features import summarize_cell
from ..io import check_sidecar, read_sidecar, read_stack
from ..lines import InstrumentProfile
from ._experiment import complete_cell
from ._lines_stage import stack_lines
from ._patterns import run_pattern_cell
from ._track_stage import track_cell

__all__ = ["CellJob", "CellResult", "process_cell"]

logger = logging.getLogger("lasecyto.pipeline")


@dataclass(frozen=True)
class CellJob:
    """Everything a worker needs to process one cell (plain, picklable values)."""

    cell_id: str
    dish: str
    condition: str
    perturbation_s: float
    stack: str | None
    sidecar: str | None
    rows: tuple | None
    gap_um: float
    parameters: dict
    lamp_axis: WavelengthAxis | None = None
    lamp_error: str | None = None
    resonator: str = "fabry-perot"
    medium: str = ""                      # gap medium (lasecyto.cavity.media name), "" when not given
    cell_thickness_um: float = math.nan   # thickness of the cell in the gap, NaN: fills the gap
    # emission images (pipeline._patterns.image_job_fields); stack is None for an image-only cell
    images: str | None = None
    images_sidecar: str | None = None
    image_field: str | None = None
    position_px: tuple | None = None
    roi_px: tuple | None = None
    field_cells: tuple = ()
    kind: str = "time-lapse"
    sphere: dict | None = None
    pump: dict | None = None
    instrument: InstrumentProfile | None = None  # instrument function measured from the lamp frame


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


def _gap_medium(job):
    """The gap medium named in the manifest (None when not given)."""
    if not job.medium:
        return None
    from ..cavity.media import get_medium

    try:
        return get_medium(job.medium)
    except InputError as exc:
        raise InputError("unknown gap medium", field="experiment.medium", expected=exc.expected,
                         found=repr(job.medium)) from None


def cell_lines(job: CellJob):
    """The lines stage of one cell: ``(lines, frame_times_s, n_frames, sidecar)``."""
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
        times = sidecar.frame_times_s
        lines = stack_lines(stack, cam, axis, times, rows=(r0, r1), cell_id=job.cell_id,
                            parameters=job.parameters, instrument=job.instrument)
        return lines, times, stack.n_frames, sidecar


def _run_fabry_perot(job: CellJob) -> CellResult:
    p = job.parameters
    medium = _gap_medium(job)
    lines, times, n_frames, _ = cell_lines(job)
    gap = job.gap_um if np.isfinite(job.gap_um) else None
    tracked = track_cell(lines, p, medium=medium, gap_um=gap)
    for text in tracked.warnings:
        logger.warning("cell %s: %s", job.cell_id, text)
    tracks = tracked.tracks
    pert = job.perturbation_s
    baseline_end = pert if np.isfinite(pert) else float(times[-1]) + 1.0
    frames_tab = cell_frames(lines, tracks, frame=np.arange(n_frames), time_s=times,
                             baseline_end_s=baseline_end, gap_um=gap, cell_id=job.cell_id,
                             cell_thickness_um=(job.cell_thickness_um if np.isfinite(job.cell_thickness_um)
                                                else None),
                             identity=tracked.identity)
    frames_tab = tables.validate(frames_tab, "cell_frames")
    vp = p["verdict"]
    summary = summarize_cell(frames_tab, perturbation_s=pert,
                             n_tracks=int(tracks["track_id"].nunique()) if len(tracks) else 0,
                             z_min=vp["z_min"], min_index_change=vp["min_index_change"],
                             min_relative_shift=vp["min_relative_shift"], k_sigma=vp["k_sigma"],
                             n_consecutive=vp["n_consecutive"], settle_fraction=vp["settle_fraction"])
    cell = {"cell_id": job.cell_id, "dish": job.dish, "condition": job.condition,
            "perturbation_s": float(pert), **summary}
    if tracked.warnings:  # mode-identity caveats travel with the cell's row
        modes_note = "modes: " + "; ".join(tracked.warnings)
        cell["note"] = f"{cell['note']}; {modes_note}" if cell.get("note") else modes_note
    return CellResult(job.cell_id, "ok", cell=cell,
                      tables={"lines": lines, "tracks": tracks, "cell_frames": frames_tab})


from ._pump import run_pump_series  # noqa: E402  (the processors use the helpers above)
from ._sphere import run_sphere  # noqa: E402

#: per-item processing by resonator type (the manifest's ``experiment.resonator``)
PROCESSORS = {"fabry-perot": _run_fabry_perot, "sphere": run_sphere}
#: per-item processing by experiment kind, ahead of the resonator (``experiment.kind``)
KIND_PROCESSORS = {"pump-series": run_pump_series}


def process_cell(job: CellJob) -> CellResult:
    """Process one cell; a failure is returned as a result, never raised."""
    t0 = time.perf_counter()
    try:
        if job.stack is None:
            result = run_pattern_cell(job)
        else:
            result = (KIND_PROCESSORS.get(job.kind) or PROCESSORS[job.resonator])(job)
        result = complete_cell(job, result)
    except LasecytoError as exc:
        result = CellResult(job.cell_id, "failed", error=str(exc))
    except Exception as exc:  # an unexpected failure must not stop the batch
        tb = traceback.extract_tb(exc.__traceback__)[-1]
        where = f" [{tb.filename.rsplit('/', 1)[-1]}:{tb.lineno}]"
        result = CellResult(job.cell_id, "failed",
                            error=f"unexpected {type(exc).__name__}: {exc}{where}")
    result.seconds = time.perf_counter() - t0
    return result
