import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import onset_time, robust_std


def _worked_trace():
    # check-values.md section 13 worked check: 520.00 nm (100 frames) -> 520.05 (100) -> 519.98 (100),
    # Gaussian noise sigma = 0.005 nm, seed 0
    rng = np.random.default_rng(0)
    level = np.repeat([520.00, 520.05, 519.98], 100)
    return np.arange(300, dtype=float), level + rng.normal(0.0, 0.005, 300)


def test_onset_of_worked_step_within_one_frame():
    t, x = _worked_trace()
    noise = robust_std(x[:100])
    onset, err = onset_time(t, x, start_s=0.0, baseline_mean=float(np.mean(x[:100])), noise=noise,
                            direction=1, k_sigma=5.0, n_consecutive=3)
    # check-values.md section 13: one-sided CUSUM (k = 5, h = 5) first alarms at index 100; we accept
    # the onset within one frame of index 100
    assert abs(onset - 100.0) <= 1.0
    assert onset == pytest.approx(99.5)  # half-way between frames 99 and 100
    assert err == pytest.approx(0.5)


def test_downward_step_found_with_negative_direction():
    t, x = _worked_trace()
    seg_t, seg_x = t[100:], x[100:]
    noise = robust_std(seg_x[:100])
    onset, err = onset_time(seg_t, seg_x, start_s=100.0, baseline_mean=float(np.mean(seg_x[:100])),
                            noise=noise, direction=-1)
    # check-values.md section 13: second change at index 200; within one frame
    assert abs(onset - 200.0) <= 1.0
    up, _ = onset_time(seg_t, seg_x, start_s=100.0, baseline_mean=float(np.mean(seg_x[:100])),
                       noise=noise, direction=1)
    assert np.isnan(up)


def test_no_onset_on_pure_noise():
    # check-values.md section 13 "test use": no false alarm on 1000 frames of pure noise
    rng = np.random.default_rng(1)
    x = 520.0 + rng.normal(0.0, 0.005, 1000)
    t = np.arange(1000) * 2.0
    for direction in (1, -1):
        onset, err = onset_time(t, x, start_s=0.0, baseline_mean=520.0, noise=0.005, direction=direction)
        assert np.isnan(onset) and np.isnan(err)


def test_single_outlier_is_not_an_onset_and_nan_frames_are_skipped():
    t = np.arange(50) * 10.0
    x = np.zeros(50)
    x[10] = 1.0                      # lone spike
    x[30:] = 1.0                     # real step at frame 30
    x[31] = np.nan                   # a missing frame inside the run does not break it
    onset, err = onset_time(t, x, start_s=0.0, baseline_mean=0.0, noise=0.01, direction=1)
    assert onset == pytest.approx(295.0) and err == pytest.approx(5.0)


def test_onset_respects_start_and_irregular_sampling():
    t = np.array([0.0, 1.0, 2.0, 3.0, 7.0, 8.0, 9.0, 10.0])
    x = np.array([0, 0, 0, 0, 1, 1, 1, 1], dtype=float)
    onset, err = onset_time(t, x, start_s=0.0, baseline_mean=0.0, noise=0.1, direction=1)
    assert (onset, err) == pytest.approx((5.0, 2.0))
    # an onset frame must lie at or after start_s
    onset, err = onset_time(t, x, start_s=7.5, baseline_mean=0.0, noise=0.1, direction=1)
    assert (onset, err) == pytest.approx((7.5, 0.5))
    # already changed at the first frame: time known, interval unknown
    onset, err = onset_time(t, x + 1.0, start_s=0.0, baseline_mean=0.0, noise=0.1, direction=1)
    assert onset == 0.0 and np.isnan(err)


def test_onset_argument_errors():
    t = np.arange(5.0)
    with pytest.raises(InputError, match="direction"):
        onset_time(t, t, start_s=0.0, baseline_mean=0.0, noise=1.0, direction=0)
    with pytest.raises(InputError, match="noise"):
        onset_time(t, t, start_s=0.0, baseline_mean=0.0, noise=0.0, direction=1)
    with pytest.raises(InputError, match="values"):
        onset_time(t, t[:3], start_s=0.0, baseline_mean=0.0, noise=1.0, direction=1)
