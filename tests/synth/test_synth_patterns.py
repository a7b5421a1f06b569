"""The synthetic pattern generator: its own HG/LG formulas, truth table, noise level, files."""

import math

import numpy as np
import pytest
import tifffile

from lasecyto.synth._patterns import PATTERN_ORDERS, mode_intensity, pattern_truth, simulate_pattern_stack


@pytest.mark.parametrize("order", PATTERN_ORDERS)
def test_own_formulas_are_normalised(order):
    g = np.linspace(-8, 8, 801)
    xx, yy = np.meshgrid(g, g)
    # check-values.md section 5 (Kogelnik & Li 1966): integral 1.000000, tolerance 1e-6
    assert abs(mode_intensity(order, xx, yy, waist_px=1.0).sum() * (g[1] - g[0]) ** 2 - 1) < 1e-6


def test_own_formulas_check_values():
    s = 1 / math.sqrt(2)
    # check-values.md section 5: HG00 peak 0.63662, HG20 origin 0.31831, LG01 and LG02 at w/sqrt(2) (atol 5e-6)
    assert mode_intensity("HG00", 0.0, 0.0, waist_px=1.0) == pytest.approx(0.63662, abs=5e-6)
    assert mode_intensity("HG20", 0.0, 0.0, waist_px=1.0) == pytest.approx(0.31831, abs=5e-6)
    assert mode_intensity("LG01", s, 0.0, waist_px=1.0) == pytest.approx(0.23420, abs=5e-6)
    assert mode_intensity("LG02", 0.0, s, waist_px=1.0) == pytest.approx(0.11710, abs=5e-6)
    assert mode_intensity("LG10", s, 0.0, waist_px=1.0) < 1e-12  # dark ring at w/sqrt(2)


def test_truth_changes_dwell_and_drift():
    t = pattern_truth(n_frames=80, n_cells=3, change_prob=0.3, min_dwell_frames=4, dropout_prob=0.1, rng=6)
    assert len(t) == 240 and t["changed"].any() and (~t["lasing"]).any()
    for _, g in t.groupby("cell"):
        g = g[g["lasing"]]
        changes = g["frame"][g["order"].ne(g["order"].shift()) & (g.index != g.index[0])]
        assert changes.tolist() == g["frame"][g["changed"]].tolist()
    assert pattern_truth(n_frames=5, rng=6).equals(pattern_truth(n_frames=5, rng=6))


def test_peak_snr_is_as_asked():
    stack, truth = simulate_pattern_stack(n_frames=30, shape=(64, 64), n_cells=1, orders=("HG00",), peak_snr=20,
                                          jitter_px=0.0, drift_px_per_frame=(0, 0), min_separation_px=10.0, rng=8)
    r, c = int(round(truth["row_px"][0])), int(round(truth["col_px"][0]))
    peak = stack[:, r, c].astype(float)
    snr = (peak.mean() - np.median(stack)) / peak.std()
    assert 15 < snr < 25  # 30 samples: the estimate scatters by about 13 %


def test_written_stack_round_trips(tmp_path):
    from lasecyto.synth._patterns import write_pattern_stack

    truth = write_pattern_stack(tmp_path / "p.ome.tif", n_frames=4, shape=(40, 48), n_cells=1, waist_px=(3.0, 3.5),
                                min_separation_px=5.0, rng=1)
    data = tifffile.imread(tmp_path / "p.ome.tif")
    assert data.shape == (4, 40, 48) and len(truth) == 4
    assert (tmp_path / "p.ome.json").exists() and (tmp_path / "p.ome.truth.csv").exists()
