"""Montage of one cell's emission patterns over time, drawn on axes passed in."""

from __future__ import annotations

import math

import numpy as np

from ..exceptions import InputError
from ._mpl import require_matplotlib
from ._style import sequential_cmap

__all__ = ["plot_pattern_montage"]


def plot_pattern_montage(images, *, axes=None, ax=None, times_s=None, labels=None, cmap=None, vmax=None,
                         n_cols=None):
    """Draw a cell's pattern images side by side.

    Parameters
    ----------
    images : sequence of 2-D arrays, or array (n, rows, cols)
        Patches of one cell (e.g. aligned patches cut around its centre).
    axes : sequence of matplotlib Axes, optional
        One axes per image (at least ``len(images)``); extra axes are hidden.
    ax : matplotlib Axes, optional
        Alternatively one axes on which the images are tiled in a grid.
    times_s : sequence of float, optional
        Frame times written above each image.
    labels : sequence of str, optional
        Extra text per image (e.g. the mode order).
    cmap, vmax : optional
        Colour map (default: the report's "ink to cream" map, readable in grey)
        and common upper limit (default: the largest finite value).
    n_cols : int, optional
        Grid width when tiling on ``ax`` (default about sqrt(n)).

    Returns
    -------
    list of matplotlib Axes or matplotlib Axes
    """
    require_matplotlib()
    if cmap is None:
        cmap = sequential_cmap()
    if (axes is None) == (ax is None):
        raise InputError("give exactly one of axes= or ax=", field="axes, ax",
                         expected="a sequence of axes or one axes", found="both" if axes is not None else "neither")
    imgs = [np.asarray(im, dtype=float) for im in images]
    if not imgs:
        raise InputError("no image to draw", field="images", expected="at least one 2-D image", found="none")
    for i, im in enumerate(imgs):
        if im.ndim != 2:
            raise InputError("not a 2-D image", field=f"images[{i}]", expected="a (rows, cols) array",
                             found=f"shape {im.shape}")
    n = len(imgs)
    for name, seq in (("times_s", times_s), ("labels", labels)):
        if seq is not None and len(seq) != n:
            raise InputError("length does not match the images", field=name, expected=f"{n} values",
                             found=f"{len(seq)} values")
    finite = [im[np.isfinite(im)] for im in imgs]
    top = vmax if vmax is not None else max((float(f.max()) for f in finite if f.size), default=1.0)
    low = min((float(f.min()) for f in finite if f.size), default=0.0)
    low = min(low, 0.0)

    def title(i):
        parts = []
        if times_s is not None:
            parts.append(f"{float(times_s[i]):g} s")
        if labels is not None:
            parts.append(str(labels[i]))
        return "  ".join(parts)

    if axes is not None:
        axes = list(np.ravel(np.asarray(axes, dtype=object)))
        if len(axes) < n:
            raise InputError("too few axes", field="axes", expected=f"at least {n}", found=f"{len(axes)}")
        for i, a in enumerate(axes):
            if i >= n:
                a.set_visible(False)
                continue
            a.imshow(imgs[i], cmap=cmap, vmin=low, vmax=top, interpolation="nearest")
            a.set_xticks([])
            a.set_yticks([])
            t = title(i)
            if t:
                a.set_title(t, fontsize="small")
        return axes[:n]
    cols = int(n_cols) if n_cols else int(math.ceil(math.sqrt(n)))
    rows = int(math.ceil(n / cols))
    h = max(im.shape[0] for im in imgs)
    w = max(im.shape[1] for im in imgs)
    gap = 1
    mosaic = np.full((rows * (h + gap) - gap, cols * (w + gap) - gap), np.nan)
    for i, im in enumerate(imgs):
        r, c = divmod(i, cols)
        mosaic[r * (h + gap):r * (h + gap) + im.shape[0], c * (w + gap):c * (w + gap) + im.shape[1]] = im
    ax.imshow(np.ma.masked_invalid(mosaic), cmap=cmap, vmin=low, vmax=top, interpolation="nearest")
    ax.set_xticks([])
    ax.set_yticks([])
    for i in range(n):
        t = title(i)
        if t:
            r, c = divmod(i, cols)
            ax.text(c * (w + gap) + 1, r * (h + gap) + 1, t, color="white", fontsize="x-small", va="top",
                    bbox={"facecolor": "black", "alpha": 0.5, "linewidth": 0, "pad": 1.0})
    return ax
