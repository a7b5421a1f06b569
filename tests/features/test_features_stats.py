import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import robust_std, wilson_interval


def test_robust_std_matches_sigma_of_normal_sample():
    rng = np.random.default_rng(11)
    x = rng.normal(3.0, 0.2, 20000)
    # 1.4826 * MAD is consistent for a normal sigma; 20000 samples -> ~1 % standard error
    assert robust_std(x) == pytest.approx(0.2, rel=0.03)


def test_robust_std_ignores_outliers_and_nan():
    x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 1e9, np.nan, np.inf])
    # finite values 1..5, 1e9: median 3.5, |dev| = 2.5 1.5 .5 .5 1.5 ~1e9 -> MAD 1.5
    assert robust_std(x) == pytest.approx(1.4826 * 1.5, rel=1e-12)


def test_robust_std_needs_three_values():
    assert np.isnan(robust_std([1.0, 2.0, np.nan]))
    assert robust_std([1.0, 1.0, 1.0]) == 0.0


@pytest.mark.parametrize("k, n, low, high", [
    (81, 263, 0.2553, 0.3662),
    (15, 148, 0.0624, 0.1605),
    (0, 20, 0.0000, 0.1611),
    (1, 29, 0.0061, 0.1718),
])
def test_wilson_interval_reference_values(k, n, low, high):
    # Newcombe (1998), Stat. Med. 17, 857-872, Table I, Wilson score method without continuity
    # correction; values printed to 4 decimals, so tolerance 5e-5
    lo, hi = wilson_interval(k, n)
    assert lo == pytest.approx(low, abs=5e-5)
    assert hi == pytest.approx(high, abs=5e-5)


def test_wilson_interval_is_the_inverted_score_test():
    # independent brute force: the interval is the set of p with |k/n - p| <= z sqrt(p (1 - p) / n)
    z = 1.959963984540054
    p = np.linspace(0.0, 1.0, 200001)
    for k, n in [(3, 7), (12, 12), (40, 90)]:
        inside = p[np.abs(k / n - p) <= z * np.sqrt(p * (1 - p) / n)]
        lo, hi = wilson_interval(k, n)
        assert lo == pytest.approx(inside.min(), abs=1e-5)  # grid step 5e-6
        assert hi == pytest.approx(inside.max(), abs=1e-5)


def test_wilson_interval_edges_and_errors():
    assert all(np.isnan(wilson_interval(0, 0)))
    with pytest.raises(InputError, match="k, n"):
        wilson_interval(5, 3)
