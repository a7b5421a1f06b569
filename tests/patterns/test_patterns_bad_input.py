"""Bad inputs: RGB where grayscale is expected, empty frames, a field with no lasing cell."""

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.patterns import analyze_patterns, estimate_background, patterns_table, segment_frame


def test_rgb_stack_and_frame_are_refused():
    with pytest.raises(InputError, match="colour image stack.*RGB"):
        analyze_patterns(np.zeros((3, 16, 16, 3), np.uint16))
    with pytest.raises(InputError, match="colour image where a grayscale frame"):
        segment_frame(np.zeros((16, 16, 3), np.uint8))


def test_empty_stack_and_empty_frame():
    with pytest.raises(InputError, match="empty image stack"):
        analyze_patterns(np.zeros((0, 16, 16)))
    with pytest.raises(InputError, match="empty frame"):
        estimate_background(np.zeros((0, 5)))
    with pytest.raises(InputError, match="single 2-D frame"):
        analyze_patterns(np.zeros((16, 16)))


def test_blank_frame_gives_reason_not_error():
    stack = np.full((2, 32, 32), 100, np.uint16)
    res = analyze_patterns(stack)
    assert res.regions.empty and "constant" in res.frames["message"][0]
    assert "no lasing cell" in res.reason


def test_field_without_lasing_cell():
    rng = np.random.default_rng(5)
    stack = rng.normal(100, 3, (4, 64, 64)).astype(np.float32)
    table = patterns_table(stack)
    assert table.empty and "no lasing cell in any of the 4 frames" in table.attrs["reason"]
    assert "threshold 5 sigma" in table.attrs["reason"]


def test_frame_times_must_match():
    with pytest.raises(InputError, match="frame_times_s"):
        analyze_patterns(np.zeros((3, 8, 8)), frame_times_s=[0.0, 1.0])


def test_saturated_regions_are_flagged():
    from lasecyto.synth._patterns import simulate_pattern_stack

    stack, _ = simulate_pattern_stack(n_frames=2, shape=(64, 64), n_cells=1, peak_snr=20.0, rng=4,
                                      camera={"saturation_counts": 400}, min_separation_px=10.0)
    reg = analyze_patterns(stack, saturation_counts=400).regions
    assert len(reg) == 2 and reg["saturated"].all() and (reg["n_saturated_px"] > 0).all()
