"""The instrument function measured from a lamp frame, and laser lines fitted with it."""

import numpy as np
import pytest

from lasecyto.calibration import find_lamp_peaks, measure_instrument_profile
from lasecyto.exceptions import CalibrationError, InputError
from lasecyto.lines import (InstrumentProfile, crlb_center_px, fit_lines, instrument_profile_from_samples,
                            line_profile_pixels)
from lasecyto.synth import slit_line_photons

# an asymmetric instrument: 2.5 px slit image, 1.3 px blur, a quarter of the light in a shoulder 1.8 px away
SLIT = dict(slit_px=2.5, blur_fwhm_px=1.3, shoulder_fraction=0.25, shoulder_offset_px=1.8)
N_PIX = 1340


def _lamp(rng, n_lines=25, photons=2e5, background=30.0):
    rng = np.random.default_rng(rng)
    centres = np.linspace(40, N_PIX - 40, n_lines) + rng.uniform(-0.5, 0.5, n_lines)
    mu = slit_line_photons(centres, photons, N_PIX, **SLIT).sum(axis=0) + background
    return rng.poisson(mu).astype(float), centres


@pytest.fixture(scope="module")
def profile():
    y, _ = _lamp(1)
    return measure_instrument_profile(y, read_noise_e=3.0)


def test_profile_reproduces_the_instrument(profile):
    # the measured pixel-integrated profile against the exact one of the generator, at several sub-pixel
    # phases, after aligning the reference points: agreement within 0.5 % of the peak
    assert profile.n_lines >= 20
    x = np.arange(30)
    for phase in (0.0, 0.17, 0.5, 0.83):
        truth = slit_line_photons(15.0 + phase, 1.0, 30, **SLIT)
        errors = [np.max(np.abs(line_profile_pixels(x, 15.0 + phase + shift, shape="instrument",
                                                    instrument=profile) - truth))
                  for shift in np.linspace(-1, 1, 201)]
        assert min(errors) < 5e-3 * truth.max()
    # normalised: the pixels collect the whole line for any placement (tolerance 1e-3)
    for c in (0.0, 0.31, 0.5):
        assert line_profile_pixels(np.arange(-20, 21), c, shape="instrument", instrument=profile).sum() == \
            pytest.approx(1.0, abs=1e-3)


def test_reference_point_is_the_lamp_calibration_convention(profile):
    # lamp lines fitted with the profile land where the lamp calibration's Gaussian peak fit puts them
    # (mean difference below 0.01 px), so laser-line centres and the wavelength scale share one convention
    y, _ = _lamp(2)
    gauss = find_lamp_peaks(y, read_noise_e=3.0, fwhm_guess_px=3.4)["pixel"].to_numpy()
    fits = fit_lines(y, read_noise_e=3.0, shape="instrument", instrument=profile, baseline="local",
                     background_degree=1)
    near = np.abs(fits.center_px[:, None] - gauss[None, :]).argmin(axis=1)
    assert abs(np.mean(fits.center_px - gauss[near])) < 0.01


def test_laser_lines_fitted_with_the_instrument_shape(profile):
    # laser lines narrower than the resolution are images of the instrument: fitted with the measured profile,
    # the centre offset from the truth does not depend on the sub-pixel phase (spread of the mean offset per
    # phase bin < 0.01 px), pulls are unit-wide (0.85-1.15 over 400 seeded spectra) and the scatter is at the
    # Cramer-Rao bound of the fitted model (within 10 %)
    rng = np.random.default_rng(3)
    n = 400
    centres = 150.0 + rng.uniform(0, 1, n)
    mu = slit_line_photons(centres, 2e4, 300, **SLIT) + 40.0
    y = rng.poisson(mu).astype(float)
    fits = fit_lines(y, read_noise_e=0.0, shape="instrument", instrument=profile, baseline="local")
    assert len(fits) == n and fits.fit_ok.all()
    off = fits.center_px - centres
    phase_bin = np.floor(4 * (centres % 1)).astype(int)
    means = [off[phase_bin == b].mean() for b in range(4)]
    assert np.ptp(means) < 0.01
    pull = (off - off.mean()) / fits.center_err_px
    assert 0.85 < np.std(pull) < 1.15
    bound = crlb_center_px(20.5, 1.0, 2e4, 40.0, n_pixels=41, shape="instrument", instrument=profile)
    assert np.std(off) == pytest.approx(bound, rel=0.10)
    # width diagnostic: a laser line is as wide as the instrument
    assert np.median(fits.fwhm_px) == pytest.approx(profile.fwhm_px, rel=0.05)
    # a Lorentzian model misreads the instrument's shoulder as a second line in many spectra
    lor = fit_lines(y, shape="lorentzian", baseline="local")
    assert len(lor) > 1.1 * n


def test_broad_line_is_wider_than_the_instrument(profile):
    # a line three times as wide as the resolution (cavity-filtered fluorescence): the width diagnostic of
    # the instrument fit says so (more than 1.5 instrument FWHM)
    x = np.arange(300)
    mu = 40 + 3e4 * line_profile_pixels(x, 150.2, 3 * profile.fwhm_px, shape="gaussian")
    y = np.random.default_rng(4).poisson(mu, size=(20, 300)).astype(float)
    fits = fit_lines(y, shape="instrument", instrument=profile, baseline="local")
    assert np.median(fits.fwhm_px) > 1.5 * profile.fwhm_px


def test_too_few_lines_and_bad_input():
    y = np.random.default_rng(5).poisson(30, N_PIX).astype(float)
    with pytest.raises(CalibrationError, match="lamp lines"):
        measure_instrument_profile(y)
    with pytest.raises(InputError, match="instrument"):
        fit_lines(y, shape="instrument")
    with pytest.raises(InputError, match="samples"):
        instrument_profile_from_samples(np.zeros(3), np.zeros(3), half_width_px=5.0)
    with pytest.raises(InputError, match="coefficients"):
        InstrumentProfile(coefficients=np.zeros(3), start_px=0.0, step_px=0.25, fwhm_px=1.0, half_width_px=1.0)
