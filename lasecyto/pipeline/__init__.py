"""Batch runs: per-cell processing, engines, the item store, the experiment runner and its run record."""

from ._cell import CellJob, CellResult, process_cell
from ._engines import PARALLEL_MIN_S, DaskEngine, Engine, LocalEngine, make_engine
from ._lines_stage import lines_table, stack_lines
from ._lines_only import fit_stack
from ._params import (DEFAULT_PARAMETERS, builtin_recipes, find_recipe, load_recipe, parameter_problems,
                      resolve_parameters)
from ._run import ExperimentPlan, ItemProgress, RunResult, calibrate_lamp, check_experiment, run_experiment

__all__ = [
    "DEFAULT_PARAMETERS",
    "PARALLEL_MIN_S",
    "CellJob",
    "CellResult",
    "DaskEngine",
    "Engine",
    "ExperimentPlan",
    "ItemProgress",
    "LocalEngine",
    "RunResult",
    "builtin_recipes",
    "calibrate_lamp",
    "check_experiment",
    "find_recipe",
    "fit_stack",
    "lines_table",
    "load_recipe",
    "make_engine",
    "parameter_problems",
    "process_cell",
    "resolve_parameters",
    "run_experiment",
    "stack_lines",
]
