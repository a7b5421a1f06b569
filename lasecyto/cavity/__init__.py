"""Fabry-Perot cavity quantities from laser lines.

:func:`fit_comb` gives the optical length and mode numbers of one comb
family, :func:`comb_spacing` the spacing of a comb holding several
(transverse-mode) families, :func:`assign_mode_families` sorts one cell's
tracks into families, :func:`assign_mode_numbers` gives their transverse
orders, the Gouy fraction and the longitudinal mode numbers q with a
dispersion model (:func:`fit_mode_numbers` on arrays), and
:func:`cell_frames` gives per frame the optical length, the relative shift,
optical-length change and index change since baseline, the phase optical
length and the Gouy fraction and cell-lens focal length of the transverse
ladder.  :mod:`lasecyto.cavity.media` holds the dispersion of gap media; the
ladder formulas (Kogelnik & Li 1966) are :func:`gouy_fraction`,
:func:`gouy_fraction_of_lens`, :func:`lens_focal_length_um`,
:func:`flat_mirror_waist_um` and :func:`cell_lens_focal_length_um`.
"""

from ._comb import CombFit, assign_mode_families, comb_spacing, fit_comb
from ._frames import cell_frames
from ._identity import ModeIdentity, ModeNumberFit, assign_mode_numbers, fit_mode_numbers, transverse_orders
from ._ladder import (
    cell_lens_focal_length_um,
    flat_mirror_waist_um,
    gouy_fraction,
    gouy_fraction_of_lens,
    lens_focal_length_um,
)

__all__ = [
    "CombFit",
    "ModeIdentity",
    "ModeNumberFit",
    "assign_mode_families",
    "assign_mode_numbers",
    "cell_frames",
    "cell_lens_focal_length_um",
    "comb_spacing",
    "fit_comb",
    "fit_mode_numbers",
    "flat_mirror_waist_um",
    "gouy_fraction",
    "gouy_fraction_of_lens",
    "lens_focal_length_um",
    "transverse_orders",
]
