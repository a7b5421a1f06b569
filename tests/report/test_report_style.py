"""The report's colours, checked with the general-purpose colour-science library colorspacious.

CAM02-UCS is the uniform colour space of Luo, Cui & Li (2006, Color Res. Appl. 31, 320); colour-vision
deficiency is simulated with Machado, Oliveira & Fernandes (2009, IEEE TVCG 15, 1291), both as
implemented in colorspacious.  A CAM02-UCS difference of about 1 is a just-noticeable difference (from
memory); we ask for at least 15 between any two series colours under each kind of vision.
"""

import itertools

import numpy as np
import pytest

cs = pytest.importorskip("colorspacious")
pytest.importorskip("matplotlib")
from matplotlib.colors import to_rgb  # noqa: E402

from lasecyto.report._style import (SEQUENTIAL_ANCHORS, SERIES_COLOURS, SERIES_LINESTYLES, SERIES_MARKERS,  # noqa: E402
                                    series_style)

RGB = np.array([to_rgb(c) for c in SERIES_COLOURS])


def _min_difference(rgb):
    ucs = cs.cspace_convert(np.clip(rgb, 0, 1), "sRGB1", "CAM02-UCS")
    return min(cs.deltaE(a, b, input_space="CAM02-UCS") for a, b in itertools.combinations(ucs, 2))


@pytest.mark.parametrize("vision", [None, "deuteranomaly", "protanomaly", "tritanomaly"])
def test_series_colours_stay_apart(vision):
    rgb = RGB if vision is None else cs.cspace_convert(
        RGB, {"name": "sRGB1+CVD", "cvd_type": vision, "severity": 100}, "sRGB1")
    assert _min_difference(rgb) > 15


def test_series_colours_stay_apart_in_grey():
    lightness = np.sort(cs.cspace_convert(RGB, "sRGB1", "CAM02-UCS")[:, 0])
    assert np.diff(lightness).min() > 8


def test_series_also_differ_without_colour():
    styles = [series_style(i) for i in range(12)]
    assert len(set(SERIES_MARKERS)) == len(SERIES_MARKERS) == len(SERIES_LINESTYLES)
    # the first twelve series differ in colour, or else in marker and line style
    for a, b in itertools.combinations(styles, 2):
        assert a.colour != b.colour or (a.marker != b.marker and a.linestyle != b.linestyle)


def test_sequential_map_lightness_rises_evenly():
    lightness = cs.cspace_convert(np.array([to_rgb(c) for c in SEQUENTIAL_ANCHORS]), "sRGB1", "CAM02-UCS")[:, 0]
    steps = np.diff(lightness)
    assert (steps > 0).all() and steps.max() - steps.min() < 1.5
