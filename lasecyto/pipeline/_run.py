"""Batch run over an experiment: calibration, cells, tables, run record."""

from __future__ import annotations

import concurrent.futures as cf
import datetime as _dt
import importlib.metadata
import logging
import multiprocessing
import platform
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .. import tables
from .._version import __version__
from ..calibration import reference_lines, solve_dispersion
from ..exceptions import InputError, LasecytoError
from ..io import file_sha256, missing_files, read_manifest, read_sidecar, read_stack, write_json, write_table
from ._cell import CellJob, CellResult, process_cell
from ._instrument import lamp_instrument
from ._params import load_recipe, resolve_parameters

__all__ = ["RunResult", "run_experiment", "calibrate_lamp"]

logger = logging.getLogger("lasecyto.pipeline")

_DEPENDENCIES = ("numpy", "scipy", "pandas", "tifffile", "pyarrow", "tqdm", "matplotlib")


@dataclass
class RunResult:
    """Outcome of :func:`run_experiment`."""

    out_dir: Path
    tables: dict
    record: dict
    report: Path | None

    @property
    def n_failed(self) -> int:
        return sum(1 for item in self.record["items"] if item["status"] != "ok")


def calibrate_lamp(lamp, parameters):
    """Wavelength axis from the manifest's lamp frame.

    Returns ``(solution, summary)`` where ``summary`` is a plain dict for the
    run record.
    """
    cp = parameters["calibration"]
    with read_stack(lamp.stack) as stack:
        sidecar = read_sidecar(lamp.sidecar)
        raw = stack.read()
    cam = sidecar.camera
    spectrum_e = (raw.mean(axis=0) - cam.offset_counts * stack.n_rows) / cam.gain_counts_per_e
    read_noise = cam.read_noise_e * np.sqrt(stack.n_rows / max(stack.n_frames, 1))
    guess = sidecar.wavelength_guess or sidecar.wavelength
    if guess is None or guess.polynomial_nm is None:
        raise InputError("lamp sidecar has no nominal axis", path=lamp.sidecar, field="wavelength_guess",
                         expected="a polynomial_nm nominal axis", found="none")
    ref = reference_lines(lamp.reference)
    solution = solve_dispersion(spectrum_e, ref["wavelength_air_nm"].to_numpy(),
                                guess_nm=guess.polynomial_nm, degree=cp["degree"],
                                read_noise_e=read_noise, clip_sigma=cp["clip_sigma"],
                                snr_min=cp["snr_min"])
    summary = {
        "stack": str(lamp.stack), "reference": lamp.reference, "medium": "air",
        "coefficients_nm": list(solution.coefficients_nm), "degree": solution.degree,
        "rms_nm": solution.rms_nm, "n_used": solution.n_used,
    }
    return solution, summary


def _versions():
    out = {"lasecyto": __version__, "python": sys.version.split()[0], "platform": platform.platform()}
    for name in _DEPENDENCIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def _hashes(manifest):
    paths = {"manifest": manifest.path}
    if manifest.lamp is not None:
        paths["lamp.stack"] = manifest.lamp.stack
        paths["lamp.sidecar"] = manifest.lamp.sidecar
    for c in manifest.cells:
        paths[f"{c.cell_id}.stack"] = c.stack
        paths[f"{c.cell_id}.sidecar"] = c.sidecar
    out, seen = {}, {}
    for key, path in paths.items():
        path = Path(path)
        if path not in seen:
            seen[path] = file_sha256(path) if path.is_file() else None
        out[key] = {"path": str(path), "sha256": seen[path]}
    return out


def _concat(frames, name):
    frames = [f for f in frames if f is not None and len(f)]
    if not frames:
        return tables.empty(name)
    return tables.validate(pd.concat(frames, ignore_index=True), name)


def _cells_table(results, manifest):
    rows = []
    for r in results:
        if r.status == "ok":
            row = {k: v for k, v in r.cell.items() if k not in ("note", "quantity")}
            row["quantity"] = r.cell.get("quantity", "")
            row["note"] = r.cell.get("note", "")
            rows.append(row)
    if not rows:
        return tables.empty("cells")
    return tables.validate(pd.DataFrame(rows), "cells")


def _iterate(jobs, workers, progress):
    if workers <= 1 or len(jobs) <= 1:
        for job in jobs:
            result = process_cell(job)
            progress(result)
            yield result
        return
    ctx = multiprocessing.get_context("spawn")
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        futures = {pool.submit(process_cell, job): i for i, job in enumerate(jobs)}
        for fut in cf.as_completed(futures):
            result = fut.result()
            progress(result)
            yield result


def run_experiment(manifest_path, out_dir, *, workers=1, recipe=None, show_progress=None,
                   write_report=True, command=None) -> RunResult:
    """Run the whole pipeline over an experiment manifest.

    Parameters
    ----------
    manifest_path : path
        Experiment manifest (TOML).
    out_dir : path
        Run directory; receives ``tables/`` (Parquet and CSV), ``run_record.json``,
        ``calibration.txt`` and ``report.html``.
    workers : int
        Worker processes (1 = serial, the default).  Each worker opens its own files.
    recipe : path, optional
        Recipe of stage parameters; the manifest's ``[parameters]`` override it.
    show_progress : bool, optional
        Progress bar on standard error; default: only when it is a terminal.

    Returns
    -------
    RunResult
        Tables, run record and report path.  Cells that failed are listed in
        ``record["items"]`` with their reason; the other cells are complete.
    """
    started = _dt.datetime.now(_dt.timezone.utc)
    out_dir = Path(out_dir)
    manifest = read_manifest(manifest_path)
    recipe_layer = load_recipe(recipe) if recipe is not None else None
    params = resolve_parameters(recipe_layer, manifest.parameters, source=str(manifest.path))
    (out_dir / "tables").mkdir(parents=True, exist_ok=True)

    items = []
    lamp_axis, lamp_error, calib_summary, instrument = None, None, None, None
    if manifest.lamp is not None:
        try:
            solution, calib_summary = calibrate_lamp(manifest.lamp, params)
            lamp_axis = solution.axis()
            instrument, calib_summary["instrument"] = lamp_instrument(manifest.lamp)
            (out_dir / "calibration.txt").write_text(solution.report() + "\n")
            items.append({"item": "lamp", "status": "ok", "error": "", "seconds": None})
        except (LasecytoError, OSError) as exc:
            lamp_error = str(exc)
            items.append({"item": "lamp", "status": "failed", "error": lamp_error, "seconds": None})
            logger.warning("lamp calibration failed: %s", lamp_error)

    missing = {}
    for owner, path in missing_files(manifest):
        missing.setdefault(owner, str(path))
    jobs, order = [], {}
    for i, c in enumerate(manifest.cells):
        order[c.cell_id] = i
        if c.cell_id in missing:
            err = InputError("file not found", path=missing[c.cell_id], field=f"cells[{i}] ({c.cell_id})",
                             expected="an existing file", found="no such file")
            items.append({"item": c.cell_id, "status": "failed", "error": str(err), "seconds": None})
            continue
        jobs.append(CellJob(cell_id=c.cell_id, dish=c.dish, condition=c.condition,
                            perturbation_s=float(c.perturbation_s), stack=str(c.stack),
                            sidecar=str(c.sidecar), rows=c.rows, gap_um=float(manifest.gap_um),
                            parameters=params, lamp_axis=lamp_axis, lamp_error=lamp_error,
                            resonator=manifest.resonator, instrument=instrument))

    bar = None
    if show_progress is None:
        show_progress = sys.stderr.isatty()
    if show_progress and jobs:
        from tqdm.auto import tqdm
        bar = tqdm(total=len(jobs), unit="cell", desc="cells", file=sys.stderr)

    def progress(result: CellResult):
        if bar is not None:
            bar.update(1)
        if result.status != "ok":
            logger.warning("cell %s failed: %s", result.cell_id, result.error)
        else:
            logger.info("cell %s done in %.2f s", result.cell_id, result.seconds)

    results = sorted(_iterate(jobs, workers, progress), key=lambda r: order[r.cell_id])
    if bar is not None:
        bar.close()
    for r in results:
        items.append({"item": r.cell_id, "status": r.status, "error": r.error,
                      "seconds": round(r.seconds, 3)})
    items.sort(key=lambda it: (-1 if it["item"] == "lamp" else order.get(it["item"], 10**9)))

    names = [n for n in tables.SCHEMAS if n != "cells" and any(n in r.tables for r in results)]
    names = list(dict.fromkeys(["lines", "tracks", "cell_frames"] + names))
    out_tables = {name: _concat([r.tables.get(name) for r in results], name) for name in names}
    out_tables["cells"] = _cells_table(results, manifest)
    for name, table in out_tables.items():
        write_table(table, out_dir / "tables" / name, name=name)

    from ..features import CHANGE_RULE
    record = {
        "lasecyto_run_record": 1,
        "command": command,
        "started_utc": started.isoformat(timespec="seconds"),
        "finished_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "versions": _versions(),
        "experiment": {"name": manifest.name, "manifest": str(manifest.path),
                       "resonator": manifest.resonator, "gap_um": manifest.gap_um,
                       "synthetic": manifest.synthetic, "description": manifest.description,
                       "n_cells": len(manifest.cells)},
        "wavelengths": "vacuum (converted from air with the "
                       f"{params['calibration']['air_formula']} formula where the axis was in air)",
        "parameters": params,
        "recipe": None if recipe is None else str(recipe),
        "change_rule": CHANGE_RULE,
        "seeds": {"pipeline": "none: every stage is deterministic"},
        "workers": workers,
        "calibration": calib_summary,
        "inputs": _hashes(manifest),
        "items": items,
        "n_failed": sum(1 for it in items if it["status"] != "ok"),
        "tables": {name: {"rows": int(len(t)), "parquet": f"tables/{name}.parquet",
                          "csv": f"tables/{name}.csv"} for name, t in out_tables.items()},
    }
    write_json(record, out_dir / "run_record.json")

    report = None
    if write_report:
        try:
            from ..report import write_html_report
            report = write_html_report(out_dir, tables=out_tables)
        except ImportError as exc:
            logger.warning("report not written: %s", exc)
    return RunResult(out_dir=out_dir, tables=out_tables, record=record, report=report)
