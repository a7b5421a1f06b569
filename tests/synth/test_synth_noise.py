"""Camera noise model of the generator: variance = mean + read_noise^2 in photoelectrons."""

import numpy as np
import pytest
import tifffile

from lasecyto.synth import render_lamp_frame, write_fp_experiment
from lasecyto.synth._render import _detector_counts, _to_uint16


@pytest.mark.parametrize("mean_e, gain", [(200.0, 1.0), (50.0, 2.0), (0.0, 1.0)])
def test_flat_background_variance(mean_e, gain):
    rng = np.random.default_rng(11)
    n = 200_000
    counts = _to_uint16(_detector_counts(np.full(n, mean_e), offset_counts=100.0,
                                         gain_counts_per_e=gain, read_noise_e=3.0, rng=rng))
    e = (counts.astype(float) - 100.0) / gain
    # Poisson + Gaussian read noise: var_e = mean_e + 3^2 (+ rounding 1/(12 g^2));
    # 2 % tolerance (the estimate's relative sd is sqrt(2/n) = 0.3 %).
    expected_var = mean_e + 9.0 + 1.0 / (12.0 * gain ** 2)
    assert abs(e.mean() - mean_e) < 0.05
    assert abs(e.var() / expected_var - 1) < 0.02


def test_lamp_frame_without_lines_is_read_noise():
    counts = render_lamp_frame(50_000, polynomial_air_nm=(500.0, 0.01), lines_air_nm=[],
                               peak_photons=[], read_noise_e=3.0, rng=2)
    assert abs(counts.mean() - 100.0) < 0.05
    assert abs(counts.var() / 9.0 - 1) < 0.03


def test_imaging_rows_outside_bands_hold_read_noise_only(tmp_path):
    m = write_fp_experiment(tmp_path / "e", n_dishes=1, cells_per_dish=3, n_frames=40, rng=4)
    data = tifffile.imread(m.parent / "spectra" / "A-imaging.tif").astype(float)
    outside = np.concatenate([data[:, :4].ravel(), data[:, -4:].ravel()])
    # offset 100 counts, read noise 3 e at gain 1 (+1/12 rounding); 3 % tolerance
    assert abs(outside.mean() - 100.0) < 0.05
    assert abs(outside.var() / (9.0 + 1 / 12) - 1) < 0.03
    band = data[:, 4:12]
    assert band.mean() > outside.mean() + 5.0
