"""Emission-pattern images: lasing regions, their transverse modes and how they change.

Works on (frames, rows, cols) grayscale stacks streamed in blocks (any array,
memory map or :class:`lasecyto.io` image stack); needs scikit-image
(``pip install "lasecyto[images]"``).  Intensity formulas: Kogelnik & Li 1966.

analyze_patterns        segment, track, describe and detect changes over a whole stack
patterns_table          its per-region-per-frame table
pattern_track_features  per-track features (dominant order, changes, decorrelation time)
segment_frame           lasing regions of one frame (robust threshold, touching cells split)
estimate_background     sigma-clipped background level and noise of a frame
saturation_mask         saturated pixels
fit_mode                best HG/LG order with centre, waist, orientation and confidence
moment_descriptors      centroid, second moments, orientation, eccentricity
count_lobes             number of bright lobes
radial_profile          azimuthal mean around a centre
RegionLinker            streaming gated linear assignment of regions into tracks
link_regions            the same on flat arrays
match_tracks_to_cells   give tracks the manifest cell (position or ROI) they belong to
pattern_correlation     correlation of two aligned patterns
decorrelation_time      lag at which the mean correlation falls to 1/e
reference_correlation   correlation of each pattern with the mean pattern of reference frames
hg_intensity, lg_intensity, mode_intensity   normalised HG_mn and LG_pl intensities
"""

from ._analyze import REGION_COLUMNS, PatternAnalysis, analyze_patterns, pattern_track_features, patterns_table
from ._background import Background, estimate_background, saturation_mask
from ._change import aligned_patch, decorrelation_time, pattern_correlation, reference_correlation
from ._describe import ModeFit, count_lobes, extract_patch, fit_mode, moment_descriptors, radial_profile
from ._modes import MODE_ORDERS, hg_intensity, lg_intensity, mode_intensity, order_symmetry_deg, parse_order
from ._segment import Segmentation, segment_frame
from ._track import RegionLinker, link_regions, match_tracks_to_cells

__all__ = [
    "analyze_patterns",
    "patterns_table",
    "pattern_track_features",
    "PatternAnalysis",
    "REGION_COLUMNS",
    "segment_frame",
    "Segmentation",
    "estimate_background",
    "Background",
    "saturation_mask",
    "fit_mode",
    "ModeFit",
    "moment_descriptors",
    "count_lobes",
    "radial_profile",
    "extract_patch",
    "aligned_patch",
    "RegionLinker",
    "link_regions",
    "match_tracks_to_cells",
    "pattern_correlation",
    "decorrelation_time",
    "reference_correlation",
    "MODE_ORDERS",
    "hg_intensity",
    "lg_intensity",
    "mode_intensity",
    "order_symmetry_deg",
    "parse_order",
]
