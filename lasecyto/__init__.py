"""lasecyto: time-lapse analysis of lasing cells.

Raw spectral stacks in, per-cell tables out.  Subpackages, one per stage:

io           lazy readers of spectral stacks, sidecars and manifests; atomic table writers
calibration  wavelength axis from lamp lines; air <-> vacuum conversion
lines        background, detection and sub-pixel fitting of laser lines with uncertainties
tracks       linking lines over time into mode tracks (crossings, gaps, mode hops)
cavity       Fabry-Perot comb: mode identity, optical lengths, refractive-index change, cell lens
features     per-cell change, significance, onset and verdict
pipeline     batch runs over an experiment, run record
report       figures on axes passed in, static HTML report
synth        physically based synthetic experiments with ground truth (demo and tests)
"""

from ._version import __version__
from . import exceptions, tables

__all__ = ["__version__", "exceptions", "tables"]
