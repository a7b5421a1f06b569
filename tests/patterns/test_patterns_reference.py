"""Correlation of each pattern with the mean pattern of reference frames (pattern_baseline_corr)."""

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.patterns import mode_intensity, reference_correlation


def _patch(order, rng, noise=0.01):
    yy, xx = np.mgrid[-15:16, -15:16].astype(float)
    p = mode_intensity(order, xx, yy, w=5.0, orientation_rad=0.3)
    return p / p.max() + noise * rng.standard_normal(p.shape)


def test_reference_correlation_separates_orders():
    rng = np.random.default_rng(0)
    patches = [_patch("HG10", rng) for _ in range(6)] + [_patch("LG01", rng) for _ in range(4)]
    ref = np.arange(10) < 5
    c = reference_correlation(patches, ref)
    # reference frames are scored against the other reference frames (leave one out), as later frames are
    assert np.all(c[:6] > 0.98)
    # HG10 (two lobes) against LG01 (a ring): the overlap of the two normalised intensities is partial
    assert np.all(c[6:] < 0.8)
    yy, xx = np.mgrid[-15:16, -15:16].astype(float)
    a = mode_intensity("HG10", xx, yy, w=5.0, orientation_rad=0.3).ravel()
    b = mode_intensity("LG01", xx, yy, w=5.0).ravel()
    assert np.allclose(c[6:], np.corrcoef(a, b)[0, 1], atol=0.05)


def test_reference_correlation_edge_cases():
    rng = np.random.default_rng(1)
    patches = [_patch("HG00", rng) for _ in range(3)]
    patches[1][:5] = np.nan  # pixels off the image are left out
    assert np.isfinite(reference_correlation(patches, [True, True, False])).all()
    assert np.isnan(reference_correlation(patches, [True, False, False])).all()  # one reference frame
    assert np.isnan(reference_correlation([np.full((5, 5), 2.0)] * 3, [True] * 3)).all()  # flat patterns
    with pytest.raises(InputError, match="reference mask"):
        reference_correlation(patches, [True, False])
