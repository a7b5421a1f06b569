"""Fabry-Perot cavity quantities from laser lines.

:func:`fit_comb` gives the optical length and mode numbers of one comb
family, :func:`comb_spacing` the spacing of a comb holding several
(transverse-mode) families, :func:`assign_mode_families` sorts one cell's
tracks into families, and :func:`cell_frames` gives per frame the optical
length and the relative shift, optical-length change and index change since
baseline.
"""

from ._comb import CombFit, assign_mode_families, comb_spacing, fit_comb
from ._frames import cell_frames

__all__ = ["CombFit", "assign_mode_families", "cell_frames", "comb_spacing", "fit_comb"]
