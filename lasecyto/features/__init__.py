"""Per-cell features: change relative to baseline, its significance, onset and verdict.

Functions here work on arrays and tables in memory; they read and write no files.
"""

from ._cell import CHANGE_RULE, summarize_cell
from ._onset import onset_time
from ._stats import robust_std, wilson_interval

__all__ = ["CHANGE_RULE", "onset_time", "robust_std", "summarize_cell", "wilson_interval"]
