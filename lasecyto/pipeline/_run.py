"""Batch run over an experiment: validation, calibration, items, tables, run record.

The flow of :func:`run_experiment`:

1. :func:`check_experiment` validates the manifest and the recipe together and
   reports every problem at once.
2. The lamp frame is calibrated (cheap; redone on resume, its axis enters
   every item's key).
3. One :class:`CellJob` per cell; with ``resume`` the items whose key matches
   a finished item in ``RUN_DIR/items`` are skipped.
4. An engine (``_engines.py``) runs the other items; each result is persisted
   as it arrives (``_store.py``), whatever the completion order.
5. The tables are assembled from the persisted items in manifest order; the
   experiment-level stage runs on them (always, also on resume); the tables
   are written (streamed, so memory stays bounded), then the run record.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import importlib.metadata
import logging
import platform
import sys
import time
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from .. import tables
from .._version import __version__
from ..calibration import reference_lines, solve_dispersion
from ..exceptions import InputError, LasecytoError
from ..io import atomic_path, missing_files, read_manifest, read_sidecar, write_json, write_table
from ._cell import CellJob, CellResult, process_cell
from ._engines import PARALLEL_MIN_S, Engine, make_engine
from ._experiment import finish_experiment
from ._instrument import lamp_instrument, lamp_spectrum
from ._params import find_recipe, load_recipe, parameter_problems
from ._patterns import image_job_fields
from ._store import AssembledTables, FileHashes, ItemStore, TableFiles, item_key, run_lock

__all__ = ["ExperimentPlan", "ItemProgress", "RunResult", "calibrate_lamp", "check_experiment", "run_experiment"]

logger = logging.getLogger("lasecyto.pipeline")

_DEPENDENCIES = ("numpy", "scipy", "pandas", "tifffile", "pyarrow", "tqdm", "matplotlib", "distributed")


@dataclass
class RunResult:
    """Outcome of :func:`run_experiment`.

    ``tables`` maps table names to DataFrames read from ``out_dir/tables``
    when first accessed (a large run's tables are never all in memory).
    """

    out_dir: Path
    tables: Mapping
    record: dict
    report: Path | None

    @property
    def n_failed(self) -> int:
        return sum(1 for item in self.record["items"] if item["status"] != "ok")


def calibrate_lamp(lamp, parameters):
    """Wavelength axis and instrument function from the manifest's lamp frame (read once).

    Returns ``(solution, summary, instrument)``: the dispersion solution, a
    plain dict for the run record (the instrument function's summary, or why it
    could not be measured, under ``"instrument"``) and the
    :class:`~lasecyto.lines.InstrumentProfile` or None.
    """
    cp = parameters["calibration"]
    sidecar = read_sidecar(lamp.sidecar)
    spectrum_e, read_noise = lamp_spectrum(lamp.stack, sidecar.camera)
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
    instrument, summary["instrument"] = lamp_instrument(spectrum_e, read_noise)
    return solution, summary, instrument


def _pump_safety(manifest):
    """The cautions that go with every pump dose or fluence a pump-series run reports."""
    if manifest.kind != "pump-series":
        return None
    from ..safety import CAUTIONS
    return CAUTIONS


def _versions():
    out = {"lasecyto": __version__, "python": sys.version.split()[0], "platform": platform.platform()}
    for name in _DEPENDENCIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def _hashes(manifest, file_hash, *, recipe=None):
    paths = {"manifest": manifest.path}
    if recipe is not None:
        paths["recipe"] = recipe
    if manifest.lamp is not None:
        paths["lamp.stack"] = manifest.lamp.stack
        paths["lamp.sidecar"] = manifest.lamp.sidecar
    for c in manifest.cells:
        if c.stack is not None:
            paths[f"{c.cell_id}.stack"] = c.stack
            paths[f"{c.cell_id}.sidecar"] = c.sidecar
    if manifest.classifier_model is not None:
        paths["classifier_model"] = manifest.classifier_model
    for f in manifest.fields.values():
        paths[f"{f.field}.images"] = f.images
        if f.sidecar is not None:
            paths[f"{f.field}.sidecar"] = f.sidecar
    out, seen = {}, {}
    for key, path in paths.items():
        path = Path(path)
        if path not in seen:
            seen[path] = file_hash(path) if path.is_file() else None
        out[key] = {"path": str(path), "sha256": seen[path]}
    return out


def _write_text(path, text):
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


@dataclass(frozen=True)
class ItemProgress:
    """What a ``progress`` callback of :func:`run_experiment` receives after each item.

    Attributes
    ----------
    done, total : int
        Items finished so far (including resumed and failed ones) and in all.
    item : str
        The cell id.
    status : str
        ``"ok"``, ``"failed"`` or ``"resumed"`` (kept from an earlier run).
    seconds : float
        Processing time of the item (for a resumed item: when it was computed).
    elapsed_s : float
        Time since the run started.
    """

    done: int
    total: int
    item: str
    status: str
    seconds: float
    elapsed_s: float


@dataclass(frozen=True)
class ExperimentPlan:
    """A validated experiment: manifest, resolved parameters and where the recipe came from."""

    manifest: object
    parameters: dict
    recipe: Path | None
    recipe_origin: str | None


def _raw_toml(path):
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError):
        return None


def check_experiment(manifest_path, *, recipe=None) -> ExperimentPlan:
    """Validate a manifest and its recipe together; report every problem at once.

    The parameters are, in increasing precedence: the defaults
    (:data:`DEFAULT_PARAMETERS`), the recipe (``recipe`` when given, else the
    manifest's ``[experiment] recipe``), and the manifest's ``[parameters]``.

    Parameters
    ----------
    manifest_path : path
        Experiment manifest (TOML).
    recipe : path or str, optional
        Recipe file or built-in recipe name; wins over the manifest's recipe.

    Raises
    ------
    InputError
        One error listing every problem of the manifest, the recipe and the
        parameters, each with its file, key, what was expected and what was found.
    """
    problems = []
    manifest = None
    manifest_path = Path(manifest_path)
    try:
        manifest = read_manifest(manifest_path)
        raw_recipe, raw_params = manifest.recipe, manifest.parameters
        where = manifest.path
    except InputError as exc:
        problems.append(str(exc))
        doc = _raw_toml(manifest_path) or {}
        exp = doc.get("experiment") if isinstance(doc.get("experiment"), dict) else {}
        raw_recipe = exp.get("recipe") if isinstance(exp.get("recipe"), str) else None
        raw_params = doc.get("parameters") if isinstance(doc.get("parameters"), dict) else None
        where = manifest_path.resolve()

    layers, sources, prefixes = [], [], []
    recipe_path, origin = None, None
    name, base, field = (recipe, None, "--recipe") if recipe is not None else (raw_recipe, where.parent,
                                                                               "experiment.recipe")
    if name is not None:
        origin = "command line" if recipe is not None else "manifest"
        try:
            recipe_path = find_recipe(name, base_dir=base, field=field)
            layers.append(load_recipe(recipe_path))
            sources.append(str(recipe_path))
            prefixes.append("")
        except InputError as exc:
            problems.append(f"{where}: {exc}" if recipe is None else str(exc))
    layers.append(raw_params)
    sources.append(str(where))
    prefixes.append("parameters.")
    params, found = parameter_problems(*layers, sources=sources, prefixes=prefixes)
    problems += found
    if len(problems) == 1:
        raise InputError(problems[0])
    if problems:
        raise InputError(f"{len(problems)} problems with the experiment: " + "; ".join(problems))
    return ExperimentPlan(manifest=manifest, parameters=params, recipe=recipe_path, recipe_origin=origin)


def _failed(cell_id, error, seconds=0.0):
    return CellResult(cell_id, "failed", error=error, seconds=seconds)


def _engine_error(exc):
    text = " ".join(str(exc).split())
    return f"engine: {type(exc).__name__}: {text}" if text else f"engine: {type(exc).__name__}"


def run_experiment(manifest_path, out_dir, *, workers=1, recipe=None, show_progress=None,
                   write_report=True, command=None, resume=False, scheduler=None, scheduler_file=None,
                   engine=None, progress=None, parallel_min_s=PARALLEL_MIN_S, csv=True) -> RunResult:
    """Run the whole pipeline over an experiment manifest.

    Parameters
    ----------
    manifest_path : path
        Experiment manifest (TOML).
    out_dir : path
        Run directory; receives ``tables/`` (Parquet and CSV), ``run_record.json``,
        ``calibration.txt``, ``items/`` (per-item results) and ``report.html``.
    workers : int
        Largest number of local worker processes (1 = serial, the default).
        Each worker opens its own files.  A pool is started only when the
        work is large enough to pay for it (see ``parallel_min_s``).
    recipe : path or str, optional
        Recipe of stage parameters, a file or a built-in name; wins over the
        manifest's ``[experiment] recipe``.  The manifest's ``[parameters]``
        override the recipe.
    show_progress : bool, optional
        Progress bar on standard error; default: only when it is a terminal.
    write_report : bool
        Write ``report.html`` (needs matplotlib).
    command : str, optional
        Command line, for the run record.
    resume : bool
        Keep the items of an earlier run in ``out_dir`` whose key (input file
        hashes, parameters, lamp axis, package version, ...) is unchanged and
        that finished; recompute the others.  Without it the item store starts empty.
    scheduler, scheduler_file : str or path, optional
        Run the items on a Dask distributed cluster (``lasecyto[dask]``).
    engine : Engine, optional
        An engine object (overrides ``workers`` and the scheduler options).
    progress : callable, optional
        Called in this process after every item with an :class:`ItemProgress`.
    parallel_min_s : float
        Estimated serial work (s) above which the local engine starts its pool.
    csv : bool
        Write every table as CSV beside the Parquet file (default).  For very
        large runs the CSV of ``lines`` is the slowest part of writing (about
        20x slower than Parquet) and several GB.

    Returns
    -------
    RunResult
        Tables, run record and report path.  Cells that failed are listed in
        ``record["items"]`` with their reason; the other cells are complete.
    """
    started = _dt.datetime.now(_dt.timezone.utc)
    t_start = time.perf_counter()
    out_dir = Path(out_dir)
    plan = check_experiment(manifest_path, recipe=recipe)
    manifest, params = plan.manifest, plan.parameters
    if engine is None:
        engine = make_engine(workers=workers, scheduler=scheduler, scheduler_file=scheduler_file,
                             parallel_min_s=parallel_min_s)
    elif not isinstance(engine, Engine):
        raise InputError("not an engine", field="engine", expected="a lasecyto.pipeline Engine",
                         found=type(engine).__name__)
    out_dir.mkdir(parents=True, exist_ok=True)
    with run_lock(out_dir):
        return _run_locked(manifest, params, plan, out_dir, engine=engine, resume=resume,
                           show_progress=show_progress, write_report=write_report, command=command,
                           progress=progress, workers=workers, started=started, t_start=t_start, csv=csv)


def _remove_leftovers(directory):
    """Temporary files of atomic writes that a killed run left behind (we hold the run lock)."""
    for tmp in Path(directory).glob(".*.tmp"):
        tmp.unlink(missing_ok=True)


def _run_locked(manifest, params, plan, out_dir, *, engine, resume, show_progress, write_report, command,
                progress, workers, started, t_start, csv):
    (out_dir / "tables").mkdir(parents=True, exist_ok=True)
    _remove_leftovers(out_dir)
    _remove_leftovers(out_dir / "tables")
    store = ItemStore(out_dir, fresh=not resume)
    file_hash = FileHashes()

    items = []
    lamp_axis, lamp_error, calib_summary, instrument = None, None, None, None
    if manifest.lamp is not None:
        try:
            solution, calib_summary, instrument = calibrate_lamp(manifest.lamp, params)
            lamp_axis = solution.axis()
            _write_text(out_dir / "calibration.txt", solution.report() + "\n")
            items.append({"item": "lamp", "status": "ok", "error": "", "seconds": None})
        except (LasecytoError, OSError) as exc:
            lamp_error = str(exc)
            items.append({"item": "lamp", "status": "failed", "error": lamp_error, "seconds": None})
            logger.warning("lamp calibration failed: %s", lamp_error)

    missing = {}
    for owner, path in missing_files(manifest):
        missing.setdefault(owner, str(path))
    jobs, order, outcome_of = [], {}, {}
    for i, c in enumerate(manifest.cells):
        order[c.cell_id] = i
        if c.cell_id in missing:
            err = InputError("file not found", path=missing[c.cell_id], field=f"cells[{i}] ({c.cell_id})",
                             expected="an existing file", found="no such file")
            outcome_of[c.cell_id] = {"item": c.cell_id, "status": "failed", "error": str(err), "seconds": None}
            continue
        jobs.append(CellJob(cell_id=c.cell_id, dish=c.dish, condition=c.condition,
                            perturbation_s=float(c.perturbation_s), stack=c.stack and str(c.stack),
                            sidecar=c.sidecar and str(c.sidecar), rows=c.rows, gap_um=float(manifest.gap_um),
                            parameters=params, lamp_axis=lamp_axis, lamp_error=lamp_error,
                            resonator=manifest.resonator, medium=manifest.medium,
                            cell_thickness_um=float(c.cell_thickness_um), kind=manifest.kind,
                            sphere=manifest.sphere, pump=manifest.pump, instrument=instrument,
                            **image_job_fields(manifest, c)))

    total = len(manifest.cells)
    done = 0
    bar = None
    if show_progress is None:
        show_progress = sys.stderr.isatty()

    def report_item(cell_id, status, seconds):
        nonlocal done
        done += 1
        if bar is not None:
            bar.update(1)
        if progress is not None:
            progress(ItemProgress(done=done, total=total, item=cell_id, status=status,
                                  seconds=float(seconds or 0.0), elapsed_s=time.perf_counter() - t_start))

    keys, pending = {}, []
    for job in jobs:
        keys[job.cell_id] = item_key(job, file_hash=file_hash)
        kept = store.finished(job.cell_id, keys[job.cell_id]) if resume else None
        if kept is not None:
            outcome_of[job.cell_id] = {"item": job.cell_id, "status": "ok", "error": "",
                                       "seconds": kept["seconds"], "resumed": True}
        else:
            pending.append(job)
    n_early = total - len(pending)
    logger.info("%d items: %d to run on %s, %d kept from an earlier run, %d with missing files",
                total, len(pending), engine.kind, n_early - len(missing), len(missing))
    for c in manifest.cells:
        early = outcome_of.get(c.cell_id)
        if early is not None:
            report_item(c.cell_id, "resumed" if early.get("resumed") else "failed", early["seconds"])
    if show_progress and total:
        from tqdm.auto import tqdm
        # items kept or failed before the start are the bar's initial count: rate and time
        # left are computed from the items run now
        bar = tqdm(total=total, initial=n_early, unit="item", desc=manifest.name or "items",
                   file=sys.stderr, dynamic_ncols=True)

    log_lines = contextlib.nullcontext()
    if bar is not None:  # log lines are printed above the bar instead of through it
        from tqdm.contrib.logging import logging_redirect_tqdm
        log_lines = logging_redirect_tqdm()
    try:
        with log_lines:
            for outcome in engine.run(process_cell, pending):
                job = pending[outcome.index]
                if outcome.error is not None:
                    result = _failed(job.cell_id, _engine_error(outcome.error))
                else:
                    result = outcome.result
                doc = store.save(job.cell_id, keys[job.cell_id], result)
                outcome_of[job.cell_id] = {"item": job.cell_id, "status": doc["status"], "error": doc["error"],
                                           "seconds": doc["seconds"]}
                if doc["status"] != "ok":
                    logger.warning("cell %s failed: %s", job.cell_id, doc["error"])
                else:
                    logger.info("cell %s done in %.2f s (%d/%d)", job.cell_id, doc["seconds"], done + 1, total)
                report_item(job.cell_id, doc["status"], doc["seconds"])
    finally:
        if bar is not None:
            bar.close()
    for c in manifest.cells:
        items.append(outcome_of[c.cell_id])

    ids = [c.cell_id for c in manifest.cells if outcome_of[c.cell_id]["status"] == "ok"]
    names = list(dict.fromkeys(["lines", "tracks", "cell_frames"] + store.table_names(ids) + ["cells"]))
    out_tables = AssembledTables(store, ids, names)

    # ---- experiment-level stage ------------------------------------------------------------
    # Population steps that need every item, on the assembled tables (also on resume).
    # ``out_tables`` loads a table only when it is read; the stage reads and changes only
    # ``cells``, so it is given that table alone and the tables it never reads (``lines``,
    # ``tracks``, ...) are streamed from the items to disk, never held in memory as a whole.
    finished, analysis = finish_experiment({"cells": out_tables["cells"]}, manifest=manifest,
                                           parameters=params)
    out_tables.update(finished)
    # -----------------------------------------------------------------------------------------

    rows = {}
    for name in out_tables:
        if isinstance(out_tables, AssembledTables):
            rows[name] = out_tables.write(name, out_dir / "tables" / name, csv=csv)
        else:
            table = tables.validate(out_tables[name], name)
            write_table(table, out_dir / "tables" / name, name=name, csv=csv)
            rows[name] = len(table)
    result_tables = TableFiles(out_dir / "tables", list(rows))

    from ..features import CHANGE_RULE
    record = {
        "lasecyto_run_record": 1,
        "command": command,
        "started_utc": started.isoformat(timespec="seconds"),
        "finished_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "elapsed_s": round(time.perf_counter() - t_start, 3),
        "versions": _versions(),
        "experiment": {"name": manifest.name, "manifest": str(manifest.path),
                       "resonator": manifest.resonator, "kind": manifest.kind,
                       "sphere": manifest.sphere, "pump": manifest.pump, "gap_um": manifest.gap_um,
                       "synthetic": manifest.synthetic, "description": manifest.description,
                       "n_cells": len(manifest.cells)},
        "wavelengths": "vacuum (converted from air with the "
                       f"{params['calibration']['air_formula']} formula where the axis was in air)",
        "parameters": params,
        "recipe": None if plan.recipe is None else str(plan.recipe),
        "recipe_origin": plan.recipe_origin,
        "change_rule": CHANGE_RULE,
        "pump_safety": _pump_safety(manifest),
        "seeds": {"pipeline": "none: every stage is deterministic"},
        "workers": workers,
        "engine": engine.describe(),
        "resume": bool(resume),
        "n_resumed": sum(1 for it in items if it.get("resumed")),
        "calibration": calib_summary,
        "analysis": analysis,
        "inputs": _hashes(manifest, file_hash, recipe=plan.recipe),
        "items": items,
        "n_failed": sum(1 for it in items if it["status"] != "ok"),
        "tables": {name: {"rows": int(n), "parquet": f"tables/{name}.parquet",
                          "csv": f"tables/{name}.csv" if csv else None} for name, n in rows.items()},
    }
    write_json(record, out_dir / "run_record.json")
    if record["pump_safety"] is not None:  # beside the tables that show pump energies and fluences
        with atomic_path(out_dir / "pump_safety.txt") as tmp:
            tmp.write_text(record["pump_safety"] + "\n", encoding="utf-8")
    logger.info("run finished: %d items, %d failed, %d resumed, %.1f s", total, record["n_failed"],
                record["n_resumed"], time.perf_counter() - t_start)

    report = None
    if write_report:
        try:
            from ..report import write_html_report
            report = write_html_report(out_dir)
        except ImportError as exc:
            logger.warning("report not written: %s", exc)
    return RunResult(out_dir=out_dir, tables=result_tables, record=record, report=report)
