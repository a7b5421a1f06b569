"""The pattern montage draws on axes passed in."""

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.report._montage import plot_pattern_montage


def test_montage_on_axes_and_on_one_ax():
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    imgs = np.random.default_rng(0).random((5, 9, 9))
    fig = Figure()
    axes = fig.subplots(2, 3)
    drawn = plot_pattern_montage(imgs, axes=axes, times_s=np.arange(5) * 2.0, labels=list("abcde"))
    assert len(drawn) == 5 and drawn[0].get_title() == "0 s  a" and not axes[1, 2].get_visible()
    ax = Figure().subplots()
    plot_pattern_montage(imgs, ax=ax, n_cols=5)
    assert ax.images[0].get_array().shape == (9, 5 * 10 - 1)
    with pytest.raises(InputError, match="exactly one"):
        plot_pattern_montage(imgs)
