"""Figures and a static HTML report of a run.

The figures draw on matplotlib axes passed in by the caller and keep no pyplot
state; matplotlib is imported only when a function is called (install it with
``pip install "lasecyto[report]"``).  Nothing here computes results: the
report draws and lists what the other stages wrote.
"""

from ._figures import (plot_kymograph, plot_onsets, plot_threshold_curves, plot_trace, plot_traces_by_condition,
                       plot_values_by_condition)
from ._html import write_html_report
from ._montage import plot_pattern_montage

__all__ = ["plot_kymograph", "plot_onsets", "plot_pattern_montage", "plot_threshold_curves", "plot_trace",
           "plot_traces_by_condition", "plot_values_by_condition", "write_html_report"]
