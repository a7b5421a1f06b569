"""Voigt shape: density against scipy, FWHM against Olivero & Longbothum, pixel integrals, fits."""

import numpy as np
import pytest
from scipy import integrate, special

from lasecyto.lines import GAUSSIAN_FWHM_PER_SIGMA, fit_lines, line_profile_pixels, voigt_fwhm, voigt_profile


def _components(sigma, gamma):
    return 2.0 * gamma, GAUSSIAN_FWHM_PER_SIGMA * sigma  # Lorentzian FWHM, Gaussian FWHM


def test_documented_scipy_values():
    # check-values.md section 7 [S: scipy documentation]: voigt_profile(2, 1, 1) = 0.09071519942627544;
    # voigt_profile([-2, 0, 5], 1, 1) = [0.0907152, 0.20870928, 0.01388492]; tolerance 1e-12 relative
    fl, fg = _components(1.0, 1.0)
    assert voigt_profile(2.0, fl, fg) == pytest.approx(0.09071519942627544, rel=1e-12)
    np.testing.assert_allclose(voigt_profile(np.array([-2.0, 0.0, 5.0]), fl, fg),
                               [0.0907152, 0.20870928, 0.01388492], rtol=5e-7)


@pytest.mark.parametrize("sigma, gamma", [(1.0, 1e-3), (1.0, 0.1), (0.5, 2.0), (2.0, 0.5), (0.05, 1.0)])
def test_density_against_scipy(sigma, gamma):
    # reference library: scipy.special.voigt_profile (Faddeeva function); tolerance 1e-10 relative
    # (Weideman's 40-term expansion is good to ~1e-11 in the upper half plane)
    x = np.linspace(-40, 40, 801)
    ours = voigt_profile(x, *_components(sigma, gamma))
    np.testing.assert_allclose(ours, special.voigt_profile(x, sigma, gamma), rtol=1e-10, atol=1e-300)


@pytest.mark.parametrize("fg, fl, numeric, ol", [
    (1, 0.1, 1.054382, 1.054542), (1, 0.5, 1.293776, 1.294018), (1, 1, 1.637595, 1.637596),
    (1, 2, 2.435731, 2.435363), (0.1, 1, 1.010688, 1.010625), (0.05, 0.05, 0.081880, 0.081880),
    (0.03, 0.05, 0.064705, 0.064697),
])
def test_fwhm_olivero_longbothum(fg, fl, numeric, ol):
    # check-values.md section 7: Olivero & Longbothum (1977), JQSRT 17, 233 (the approximation), and the
    # numerical FWHM of the exact profile; the table gives 6 decimals (tolerance 6e-7 absolute)
    assert voigt_fwhm(fl, fg) == pytest.approx(ol, abs=6e-7)
    half_max = 0.5 * voigt_profile(0.0, fl, fg)
    from scipy.optimize import brentq
    right = brentq(lambda x: voigt_profile(x, fl, fg) - half_max, 0.0, 10 * (fl + fg))
    assert 2 * right == pytest.approx(numeric, abs=6e-7)
    # the approximation's stated accuracy, 0.02 % (section 7 finds 0.0237 % at most)
    assert abs(voigt_fwhm(fl, fg) / (2 * right) - 1) < 2.4e-4


@pytest.mark.parametrize("fl, fg", [(0.6, 0.8), (2.5, 1.0), (1.0, 4.0), (5.0, 0.3)])
def test_pixel_integrals(fl, fg):
    # pixel fractions equal scipy.integrate.quad of scipy's profile over each pixel (tolerance 1e-6 relative
    # of the peak pixel: the quadrature's node count is set for that)
    sigma, gamma = fg / GAUSSIAN_FWHM_PER_SIGMA, fl / 2.0
    x = np.arange(-12, 13)
    c = 0.3
    ours = line_profile_pixels(x, c, fl, shape="voigt", fwhm2_px=fg)
    ref = np.array([integrate.quad(lambda t: special.voigt_profile(t - c, sigma, gamma), p - 0.5, p + 0.5,
                                   epsabs=1e-13, epsrel=1e-12)[0] for p in x])
    np.testing.assert_allclose(ours, ref, atol=1e-6 * ref.max())


def _voigt_block(n_spectra, fl, fg, photons, rng, center=100.37, n_pix=220, background=20.0):
    # rendered independently of the package: scipy's profile integrated over pixels by fine sampling
    sigma, gamma = fg / GAUSSIAN_FWHM_PER_SIGMA, fl / 2.0
    sub = (np.arange(200) + 0.5) / 200 - 0.5
    x = np.arange(n_pix)
    frac = special.voigt_profile((x[:, None] + sub[None, :]) - center, sigma, gamma).mean(axis=1)
    rng = np.random.default_rng(rng)
    return rng.poisson(photons * frac + background, size=(n_spectra, n_pix)).astype(float)


def test_fitted_fwhm_matches_olivero_longbothum():
    # section 7 "test use": fitted FWHM from synthetic Voigt lines must match the O&L value of the truth;
    # here within 1 % (3-4 times the fit's own error at 2e5 photons), components within 5 %
    fl, fg = 3.0, 4.0
    y = _voigt_block(60, fl, fg, 2e5, 1)
    fits = fit_lines(y, shape="voigt", baseline="local")
    assert len(fits) == 60 and fits.fit_ok.all()
    assert np.median(fits.fwhm_px) == pytest.approx(voigt_fwhm(fl, fg), rel=0.01)
    assert np.median(fits.fwhm_lorentzian_px) == pytest.approx(fl, rel=0.05)
    assert np.median(fits.fwhm_gaussian_px) == pytest.approx(fg, rel=0.05)
    pull = (fits.center_px - 100.37) / fits.center_err_px
    assert 0.75 < np.std(pull) < 1.3
    width_pull = (fits.fwhm_px - voigt_fwhm(fl, fg)) / fits.fwhm_err_px
    assert 0.7 < np.std(width_pull) < 1.4


def test_fixed_gaussian_component():
    # the spectrometer's Gaussian FWHM fixed: only the Lorentzian one is fitted
    fl, fg = 1.5, 2.5
    y = _voigt_block(40, fl, fg, 1e5, 2)
    fits = fit_lines(y, shape="voigt", gaussian_fwhm_px=fg, baseline="local")
    assert fits.fit_ok.all()
    np.testing.assert_array_equal(fits.fwhm_gaussian_px, fg)
    assert np.median(fits.fwhm_lorentzian_px) == pytest.approx(fl, rel=0.05)
