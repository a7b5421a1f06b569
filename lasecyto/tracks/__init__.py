"""Linking fitted lines over time into mode tracks.

:func:`link_detections` is the array core (frame-to-frame linear assignment
with motion prediction, then a second assignment over track segments that
closes gaps; intensity, width and velocity tell crossing modes apart);
:func:`link_positions` is the same on positions alone; :func:`flag_hops`
marks tracks that began by a mode hop of one comb spacing;
:func:`link_lines` applies them to one cell's ``lines`` table and returns a
``tracks`` table; :func:`identity_scores` scores a linking against known
identities (synthetic truth).
"""

from ._hops import common_drift, flag_hops
from ._link import LinkResult, link_detections, link_lines, link_positions
from ._score import LinkScores, identity_scores

__all__ = ["LinkResult", "LinkScores", "common_drift", "flag_hops", "identity_scores", "link_detections",
           "link_lines", "link_positions"]
