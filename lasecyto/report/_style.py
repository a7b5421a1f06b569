"""The report's own colours, markers and line styles.

Qualitative colours (:data:`SERIES_COLOURS`): six colours picked by a search
in the CAM02-UCS colour space (Luo, Cui & Li 2006) for the largest smallest
pairwise difference under normal vision and under simulated deuteranopia,
protanopia and tritanopia (Machado, Oliveira & Fernandes 2009, severity 1),
each at its own lightness J' (25, 75, 45, 35, 55, 65 in order of use), so that
the series stay apart when printed in grey.  Every series also has its own
marker and line style, so that a grey print or a reader who sees no colour
still tells the series apart; beyond six series the colours repeat with other
markers and line styles.  The test ``tests/report/test_report_style.py``
checks the differences with the general-purpose ``colorspacious`` library.

Sequential map (:data:`SEQUENTIAL_ANCHORS`, "ink to cream"): eleven anchors
on a path in CAM02-UCS from dark navy through teal and olive gold to pale
cream, equally spaced in lightness, so that intensity reads the same in colour,
in grey and for colour-blind readers (lightness rises monotonically in all of
them).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["SERIES_COLOURS", "SERIES_MARKERS", "SERIES_LINESTYLES", "SEQUENTIAL_ANCHORS", "NEUTRAL",
           "HOP_MARKER", "ONSET_COLOUR", "SeriesStyle", "series_style", "series_styles", "sequential_cmap"]

SERIES_COLOURS = ("#133b57", "#f89161", "#2b726f", "#91100d", "#8a5ff9", "#ae87b8")
SERIES_MARKERS = ("o", "s", "^", "D", "v", "P")
SERIES_LINESTYLES = ("-", "--", "-.", ":", (0, (6, 1.5, 1, 1.5, 1, 1.5)), (0, (1, 2.5)))
SEQUENTIAL_ANCHORS = ("#0b1a2c", "#18303e", "#22464f", "#295d60", "#32736f", "#63846b", "#8c955d",
                      "#baa442", "#cebd6d", "#e3d698", "#fbf1c4")
NEUTRAL = "#5c5c5c"      # reference lines (perturbation), text on plots
HOP_MARKER = "X"         # a mode hop on a kymograph
ONSET_COLOUR = "#91100d"  # the onset line and its band (dark red: also dark in grey)


@dataclass(frozen=True)
class SeriesStyle:
    """Colour, marker and line style of one series (a condition, a mode family, ...)."""

    colour: str
    marker: str
    linestyle: object

    def line(self):
        """Keyword arguments of ``Axes.plot`` for a line of this series."""
        return {"color": self.colour, "linestyle": self.linestyle}

    def points(self):
        """Keyword arguments of ``Axes.plot`` / ``errorbar`` for markers of this series."""
        return {"color": self.colour, "marker": self.marker, "linestyle": "none"}


def series_style(i):
    """Style of the ``i``-th series (from 0); markers and line styles shift each time the colours repeat."""
    i = int(i)
    n = len(SERIES_COLOURS)
    turn = i // n
    return SeriesStyle(SERIES_COLOURS[i % n], SERIES_MARKERS[(i + turn) % len(SERIES_MARKERS)],
                       SERIES_LINESTYLES[(i + turn) % len(SERIES_LINESTYLES)])


def series_styles(names):
    """Dict of name -> :class:`SeriesStyle` in the given order."""
    return {name: series_style(i) for i, name in enumerate(names)}


def sequential_cmap():
    """The "ink to cream" sequential colour map (a matplotlib colormap)."""
    from matplotlib.colors import LinearSegmentedColormap

    return LinearSegmentedColormap.from_list("lasecyto_ink_cream", list(SEQUENTIAL_ANCHORS), N=256)
