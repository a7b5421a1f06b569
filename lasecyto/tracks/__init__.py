"""Linking fitted lines over time into mode tracks.

:func:`link_positions` is the array core (frame-to-frame linear assignment
with births, deaths and gaps); :func:`link_lines` applies it to one cell's
``lines`` table and returns a ``tracks`` table.
"""

from ._link import link_lines, link_positions

__all__ = ["link_lines", "link_positions"]
