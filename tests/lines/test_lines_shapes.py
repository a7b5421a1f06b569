import numpy as np
import pytest
from scipy import special

from lasecyto.exceptions import InputError
from lasecyto.lines import GAUSSIAN_FWHM_PER_SIGMA, line_profile_pixels


def test_gaussian_fwhm_per_sigma():
    # check-values.md section 7 (line shapes): Gaussian FWHM = 2.354820 sigma; tolerance 1e-6
    assert GAUSSIAN_FWHM_PER_SIGMA == pytest.approx(2.354820, abs=1e-6)


@pytest.mark.parametrize("shape", ["lorentzian", "gaussian"])
def test_pixel_fractions_equal_cdf_difference(shape):
    x = np.arange(-40, 41)
    c, w = 0.3, 2.5
    frac = line_profile_pixels(x, c, w, shape=shape)
    if shape == "lorentzian":
        cdf = lambda t: 0.5 + np.arctan((t - c) / (w / 2)) / np.pi
    else:
        sigma = w / 2.354820045
        cdf = lambda t: 0.5 * (1 + special.erf((t - c) / (sigma * np.sqrt(2))))
    np.testing.assert_allclose(frac, cdf(x + 0.5) - cdf(x - 0.5), rtol=1e-9, atol=1e-15)
    assert frac.sum() == pytest.approx(cdf(40.5) - cdf(-40.5), rel=1e-12)


@pytest.mark.parametrize("shape", ["lorentzian", "gaussian"])
def test_fwhm_definition_on_fine_pixels(shape):
    # pixels much narrower than the line sample the density: half maximum at centre +- FWHM/2
    # (a 3000 px FWHM; pixel integration changes the ratio by ~1e-7; tolerance 1e-6 relative)
    frac = line_profile_pixels(np.arange(-1600, 1601), 0.0, 3000.0, shape=shape)
    assert frac[1600 + 1500] / frac[1600] == pytest.approx(0.5, rel=1e-6)


def test_broadcasting_and_errors():
    out = line_profile_pixels(np.arange(10), np.array([3.0, 4.0, 5.0]), 2.0)
    assert out.shape == (3, 10)
    with pytest.raises(InputError, match="shape"):
        line_profile_pixels(np.arange(10), 3.0, 2.0, shape="sinc")
    with pytest.raises(InputError, match="fwhm2_px"):
        line_profile_pixels(np.arange(10), 3.0, 2.0, shape="voigt")
    with pytest.raises(InputError, match="fwhm_px"):
        line_profile_pixels(np.arange(10), 3.0, -1.0)
