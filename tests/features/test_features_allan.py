"""Allan deviation: NBS Monograph 140 test set, white-noise slope, linear drift, allantools cross-check."""

import allantools
import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import allan_deviation, allan_slope

NBS140 = [892, 809, 823, 798, 671, 644, 883, 903, 677]


def _sig(a, b, digits=7):
    return abs(a - b) <= 0.5 * 10 ** (np.floor(np.log10(abs(b))) - digits + 1)


def test_nbs140_overlapping_and_non_overlapping():
    # check-values.md section 9 (NBS Monograph 140, Annex 8.E test set; values as quoted in Riley SP 1065 §12):
    # 7 significant digits
    o = allan_deviation(NBS140, m=[1, 2, 3])
    for got, ref in zip(o.adev, [91.22945, 85.95287, 71.13065]):
        assert _sig(got, ref), (got, ref)
    assert list(o.n_terms) == [8, 6, 4]
    a = allan_deviation(NBS140, m=[1, 2], overlapping=False)
    for got, ref in zip(a.adev, [91.22945, 115.8082]):
        assert _sig(got, ref), (got, ref)


def test_white_noise_slope_and_allantools_cross_check():
    y = np.random.default_rng(3).standard_normal(50_000)
    r = allan_deviation(y, m=2 ** np.arange(9))  # tau = 1 ... 256 samples (>= 195 independent averages)
    # check-values.md section 9: white FM slope -1/2 within 0.05
    slope = allan_slope(r)
    assert abs(slope + 0.5) < 0.05
    # exact expectation sigma(m) = 1/sqrt(m) for unit white noise (section 9): within 5 % up to m = 64
    keep = r.m <= 64
    assert np.allclose(r.adev[keep], 1 / np.sqrt(r.m[keep]), rtol=0.05)
    # independent implementation: allantools.oadev on the same data, agreement to 1e-9 relative
    taus, dev, _, _ = allantools.oadev(y, rate=1.0, data_type="freq", taus=r.m.astype(float))
    assert np.allclose(taus, r.tau_s)
    assert np.allclose(dev, r.adev, rtol=1e-9)
    taus, dev, _, _ = allantools.adev(y, rate=2.0, data_type="freq", taus=[0.5, 1.0, 4.0])
    na = allan_deviation(y, tau0_s=0.5, m=[1, 2, 8], overlapping=False)
    assert np.allclose(dev, na.adev, rtol=1e-9)


def test_linear_drift_is_exact():
    # check-values.md section 9: a linear drift D gives sigma = D tau / sqrt(2) exactly
    d, tau0 = 3e-4, 10.0
    y = d * tau0 * np.arange(200)
    r = allan_deviation(y, tau0_s=tau0, m=[1, 3, 7, 20])
    assert np.allclose(r.adev, d * r.tau_s / np.sqrt(2), rtol=1e-9)


@pytest.mark.parametrize("bad, field", [([1.0, 2.0], "values"), ([1.0, np.nan, 2.0, 3.0], "values"),
                                        (np.ones((3, 3)), "values")])
def test_bad_series(bad, field):
    with pytest.raises(InputError, match=field):
        allan_deviation(bad)


def test_bad_factors():
    with pytest.raises(InputError, match="m"):
        allan_deviation(NBS140, m=[0, 1])
