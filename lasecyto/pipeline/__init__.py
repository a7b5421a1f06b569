"""Batch runs: per-cell processing, the experiment runner and its run record."""

from ._cell import CellJob, CellResult, process_cell
from ._lines_stage import lines_table, stack_lines
from ._lines_only import fit_stack
from ._params import DEFAULT_PARAMETERS, load_recipe, resolve_parameters
from ._run import RunResult, calibrate_lamp, run_experiment

__all__ = [
    "DEFAULT_PARAMETERS",
    "CellJob",
    "CellResult",
    "RunResult",
    "calibrate_lamp",
    "fit_stack",
    "lines_table",
    "load_recipe",
    "process_cell",
    "resolve_parameters",
    "run_experiment",
    "stack_lines",
]
