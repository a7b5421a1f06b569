"""Camera noise model from frames: dark-frame offset and read noise, photon-transfer gain.

Method: the photon-transfer relation var = read^2 + K (mean - offset) (Janesick 2007, "Photon Transfer",
SPIE Press, ch. 2; EMVA Standard 1288 release 4.0 (2021), section 6: gain from the slope of temporal
variance against mean signal, temporal variance from the difference of frames).  Truth: frames from
lasecyto.synth.camera_frames with known offset map, gain and read noise.
"""

import numpy as np
import pytest

from lasecyto.calibration import dark_frame_estimate, photon_transfer
from lasecyto.exceptions import CalibrationError, InputError
from lasecyto.synth import camera_frames

GAIN, READ_E = 2.0, 3.0


def _offset_map(rng, shape=(1, 1340)):
    return 100.0 + np.random.default_rng(rng).normal(0.0, 5.0, shape)


def test_dark_frames_give_offset_map_and_read_noise():
    offset = _offset_map(1, (4, 500))
    dark = camera_frames(np.zeros((4, 500)), n_frames=60, offset_counts=offset, gain_counts_per_e=GAIN,
                         read_noise_e=READ_E, rng=2)
    est = dark_frame_estimate(dark)
    # read noise 6 counts: 2000 pixels x 59 differences estimate it to ~0.2 %; tolerance 2 % (rounding to
    # integer counts adds 1/12 count^2)
    assert est.read_noise_counts == pytest.approx(GAIN * READ_E, rel=0.02)
    # the offset map to within 4 sigma of a 60-frame mean (6 / sqrt(60) = 0.8 counts)
    assert np.max(np.abs(est.offset_map_counts - offset)) < 4 * 6.0 / np.sqrt(60) + 0.5
    assert est.offset_map_counts.shape == (4, 500) and est.n_frames == 60


def test_hot_pixels_left_out_of_the_read_noise():
    offset = _offset_map(3)
    dark = camera_frames(np.zeros((1, 1340)), n_frames=30, offset_counts=offset, gain_counts_per_e=GAIN,
                         read_noise_e=READ_E, rng=4).astype(float)
    noisy = np.random.default_rng(5).normal(0, 200, (30, 5))
    dark[:, 0, :5] += noisy  # five telegraph-noise pixels
    est = dark_frame_estimate(dark)
    assert est.n_hot >= 5
    assert est.read_noise_counts == pytest.approx(GAIN * READ_E, rel=0.03)


def _flat(rng, n_frames=40, fluctuation=0.0):
    # a continuum lamp through the spectrometer: levels from 50 to 20000 e across the detector
    x = np.arange(1340)
    level = 50.0 + 20000.0 * np.exp(-0.5 * ((x - 670) / 300.0) ** 2)
    offset = _offset_map(rng)
    gen = np.random.default_rng(rng)
    scale = 1.0 + fluctuation * gen.standard_normal(n_frames)
    frames = np.concatenate([camera_frames(level[None, :] * s, n_frames=1, offset_counts=offset,
                                           gain_counts_per_e=GAIN, read_noise_e=READ_E, rng=gen)
                             for s in scale])
    return frames, offset


def test_photon_transfer_gain_on_a_flat():
    frames, offset = _flat(6)
    ptc = photon_transfer(frames, offset_counts=offset)
    # EMVA 1288 / Janesick: the slope is the gain; tolerance 3 % (the fit's own error is ~1 %)
    assert ptc.gain_counts_per_e == pytest.approx(GAIN, rel=0.03)
    assert abs(ptc.gain_counts_per_e - GAIN) < 3 * ptc.gain_err_counts_per_e + 0.01
    # with the read noise known from dark frames the intercept is fixed
    fixed = photon_transfer(frames, offset_counts=offset, read_noise_counts=GAIN * READ_E)
    assert fixed.gain_counts_per_e == pytest.approx(GAIN, rel=0.02)


def test_photon_transfer_on_data_with_pump_fluctuations():
    # 3 % frame-to-frame fluctuation of the light common to all pixels (pump energy): normalising every
    # frame to the mean total removes it; without that the slope is far off
    frames, offset = _flat(7, fluctuation=0.03)
    ptc = photon_transfer(frames, offset_counts=offset, normalise=True, read_noise_counts=GAIN * READ_E)
    assert ptc.gain_counts_per_e == pytest.approx(GAIN, rel=0.04)
    raw = photon_transfer(frames, offset_counts=offset, read_noise_counts=GAIN * READ_E)
    assert abs(raw.gain_counts_per_e / GAIN - 1) > 0.2


def test_bad_frames():
    with pytest.raises(InputError, match="two frames"):
        dark_frame_estimate(np.zeros((1, 10)))
    with pytest.raises(InputError, match="three frames"):
        photon_transfer(np.zeros((2, 100)))
    with pytest.raises(InputError, match="non-finite"):
        dark_frame_estimate(np.full((3, 10), np.nan))
    flat = camera_frames(np.full((1, 200), 500.0), n_frames=10, rng=8)
    with pytest.raises(CalibrationError, match="levels"):
        photon_transfer(flat, offset_counts=100.0)  # one level only: no slope
