"""Per-cell features: change relative to baseline, its significance, onset and verdict.

Functions here work on arrays and tables in memory; they read and write no files.

summarize_cell       settled change, its significance, threshold onset and verdict of one cell
cell_features        the feature catalogue of one cell (docs/features.md)
track_features       per-track features of the tracks table
series_features      drift, noise, change, change-point onset and response fit of one series
allan_deviation      overlapping / non-overlapping Allan deviation
pelt, change_points  exact penalised change points (squared-error cost)
changepoint_onset    onset as the first significant change point after the perturbation
flag_cells           robust change score against controls, calibrated p-values, BH q-values, flags
"""

from ._allan import AllanDeviation, allan_deviation, allan_slope
from ._catalogue import (
    CELL_FEATURE_KEYS,
    DEFAULT_ALLAN_M,
    RESPONSE_FEATURE_KEYS,
    SERIES_KEYS,
    TRACK_FEATURE_COLUMNS,
    cell_features,
    exponential_response,
    series_features,
    track_features,
)
from ._cell import CHANGE_RULE, summarize_cell
from ._changepoint import ChangePoints, change_points, changepoint_onset, difference_noise, pelt
from ._flags import benjamini_hochberg, change_scores, flag_cells, relative_to_controls
from ._onset import onset_time
from ._stats import robust_std, wilson_interval

__all__ = [
    "AllanDeviation",
    "CELL_FEATURE_KEYS",
    "CHANGE_RULE",
    "ChangePoints",
    "DEFAULT_ALLAN_M",
    "RESPONSE_FEATURE_KEYS",
    "SERIES_KEYS",
    "TRACK_FEATURE_COLUMNS",
    "allan_deviation",
    "allan_slope",
    "benjamini_hochberg",
    "cell_features",
    "change_points",
    "change_scores",
    "changepoint_onset",
    "difference_noise",
    "exponential_response",
    "flag_cells",
    "onset_time",
    "pelt",
    "relative_to_controls",
    "robust_std",
    "series_features",
    "summarize_cell",
    "track_features",
    "wilson_interval",
]
