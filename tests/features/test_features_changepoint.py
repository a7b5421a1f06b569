"""Exact PELT change points and the onset they give."""

import math

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import change_points, changepoint_onset, pelt
from lasecyto.synth._scenario import SCENARIO


def _optimal_partition(y, pen, k):
    """Brute-force O(n^2) optimal partitioning (no pruning), for comparison."""
    n = len(y)
    f = np.full(n + 1, np.inf)
    f[0] = -pen
    last = np.zeros(n + 1, int)
    for t in range(k, n + 1):
        for s in range(0, t - k + 1):
            if 0 < s < k:
                continue
            seg = y[s:t]
            c = f[s] + ((seg - seg.mean()) ** 2).sum() + pen
            if c < f[t]:
                f[t], last[t] = c, s
    out, t = [], n
    while last[t] > 0:
        t = last[t]
        out.append(t)
    return out[::-1]


def test_worked_example_section13():
    # check-values.md section 13 worked check: 520.00 (100) -> 520.05 (100) -> 519.98 (100) nm + N(0, 0.005 nm),
    # pen = 6 sigma^2 ln 300, min_size 5 -> breakpoints [100, 200] (exact)
    rng = np.random.default_rng(0)
    y = np.r_[np.full(100, 520.0), np.full(100, 520.05), np.full(100, 519.98)] + 0.005 * rng.standard_normal(300)
    assert pelt(y, penalty=6 * 0.005 ** 2 * math.log(300), min_size=5).tolist() == [100, 200]
    cp = change_points(y, min_size=5)  # penalty from the measured noise
    assert cp.breakpoints.tolist() == [100, 200]
    assert abs(cp.noise - 0.005) < 0.001
    assert np.allclose(cp.segment_means, [520.0, 520.05, 519.98], atol=0.002)


@pytest.mark.parametrize("min_size", [1, 3, 5])
def test_pelt_is_exact(min_size):
    for seed in range(8):
        rng = np.random.default_rng(seed)
        y = np.repeat(2 * rng.standard_normal(5), 12) + rng.standard_normal(60)
        assert pelt(y, penalty=3.0, min_size=min_size).tolist() == _optimal_partition(y, 3.0, min_size)


def test_no_false_onset_on_noise():
    # check-values.md section 13 test use: no false alarm on 1000 frames of pure noise at the chosen penalty
    for seed in range(10):
        rng = np.random.default_rng(100 + seed)
        y = 1e-6 * rng.standard_normal(1000)
        t = np.arange(1000) * 10.0
        out = changepoint_onset(t, y, start_s=0.0)
        assert out["n_changepoints"] == 0 and math.isnan(out["onset_s"])


def test_onset_of_generated_responders():
    # Responders as in lasecyto.synth's scenario: exponential rise after perturbation + lag, random-walk drift,
    # 1-3e-6 white noise, 2 % dropouts. Acceptance: median onset error <= 2 frames.
    sc = SCENARIO
    rng = np.random.default_rng(5)
    dt, tp, n = 10.0, 300.0, 90
    t = np.arange(n) * dt
    errs, errs_reported = [], []
    for _ in range(60):
        onset = tp + rng.uniform(*sc["response_lag_s"])
        amp, tau = rng.uniform(*sc["response_amplitude"]), rng.uniform(*sc["response_tau_s"])
        drift = np.concatenate([[0], np.cumsum(sc["drift_rms"] / np.sqrt(n - 1) * rng.standard_normal(n - 1))])
        y = drift + amp * (1 - np.exp(-np.clip(t - onset, 0, None) / tau)) + rng.uniform(1e-6, 3e-6) \
            * rng.standard_normal(n)
        y[rng.random(n) < sc["dropout_probability"]] = np.nan
        out = changepoint_onset(t, y, start_s=tp)
        errs.append(abs(out["onset_s"] - onset) / dt)
        errs_reported.append(out["onset_err_s"] / dt)
    errs = np.asarray(errs)
    assert np.all(np.isfinite(errs))
    assert np.median(errs) <= 2.0
    assert np.max(errs) <= 2.0
    # the reported uncertainty is about the frame quantisation (interval / sqrt 12 = 0.29 frames) or more
    assert np.all(np.asarray(errs_reported) >= 0.28)


def test_step_onset_delay_and_direction():
    # check-values.md section 13 test use: detection delay <= 2 frames for a 10 sigma step
    rng = np.random.default_rng(9)
    y = rng.standard_normal(200)
    y[120:] += 10
    t = np.arange(200.0)
    out = changepoint_onset(t, y, start_s=50.0)
    assert abs(out["onset_s"] - 119.5) <= 2.0
    assert out["onset_step"] == pytest.approx(10, abs=1)
    assert math.isnan(changepoint_onset(t, y, start_s=50.0, direction=-1)["onset_s"])


def test_single_outlier_is_not_an_onset():
    rng = np.random.default_rng(2)
    y = rng.standard_normal(300)
    y[150] += 60.0
    out = changepoint_onset(np.arange(300.0), y, start_s=0.0, noise=1.0)
    assert math.isnan(out["onset_s"])


def test_bad_input():
    with pytest.raises(InputError, match="too few values"):
        change_points([1.0, 2.0, 3.0])
    with pytest.raises(InputError, match="non-finite"):
        pelt([1.0, np.nan, 2.0, 3.0], penalty=1.0)
    with pytest.raises(InputError, match="penalty"):
        pelt(np.zeros(10), penalty=0.0)
    with pytest.raises(InputError, match="noise"):
        change_points(np.zeros(20))
    with pytest.raises(InputError, match="differ in length"):
        changepoint_onset(np.arange(5.0), np.zeros(6), start_s=0.0)
