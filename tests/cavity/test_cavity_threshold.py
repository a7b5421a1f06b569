"""Laser threshold from pump series (lasecyto.cavity.threshold)."""

import math

import numpy as np
import pytest

from lasecyto.cavity.threshold import (
    fit_threshold, integrate_rate_equations, linear_threshold_bias, linewidth_vs_pump,
    pump_from_photons, steady_state_inversion, steady_state_photons)
from lasecyto.exceptions import InputError

# check-values.md section 10 S table (closed-form steady state, computed): beta -> S at x = 0.1, 0.5, 1, 2, 10
S_TABLE = {
    1e-4: [0.1111, 0.9998, 100.0, 1.0002e4, 9.0001e4],
    1e-2: [0.1110, 0.9808, 10.00, 101.96, 901.11],
    0.1: [0.1098, 0.8541, 3.162, 11.708, 91.098],
    1.0: [0.1, 0.5, 1.0, 2.0, 10.0],
}


@pytest.mark.parametrize("beta", sorted(S_TABLE))
def test_s_table_and_inverse(beta):
    # check-values.md section 10 S table; values quoted to 4-5 significant digits -> rtol 5e-4
    x = np.array([0.1, 0.5, 1.0, 2.0, 10.0])
    s = steady_state_photons(x, beta)
    np.testing.assert_allclose(s, S_TABLE[beta], rtol=5e-4)
    assert steady_state_photons(1.0, beta) == pytest.approx(1 / math.sqrt(beta), rel=1e-12)
    np.testing.assert_allclose(pump_from_photons(s, beta), x, rtol=1e-12)


def test_closed_form_against_ode():
    # check-values.md section 10 ODE check: beta = 0.01, tau_sp = 3 ns, tau_c = 10 ps, P_th = 1e13 /s:
    # S = 0.9808 (x = 0.5) and 101.9615 (x = 2); N = 1.485e4 and 2.971e4
    for x, s_ref, n_ref in ((0.5, 0.9808, 1.485e4), (2.0, 101.9615, 2.971e4)):
        state = integrate_rate_equations(x * 1e13, beta=0.01, tau_sp_s=3e-9, tau_c_s=10e-12)
        assert state.settled
        assert state.x == pytest.approx(x, rel=1e-12)
        assert state.photons == pytest.approx(s_ref, abs=1e-4)
        assert state.inversion == pytest.approx(n_ref, rel=5e-4)
        # closed form vs time integration: tol 1e-8 relative
        assert state.photons == pytest.approx(steady_state_photons(x, 0.01), rel=1e-8)
        assert state.inversion == pytest.approx(
            steady_state_inversion(x, 0.01, tau_sp_s=3e-9, tau_c_s=10e-12), rel=1e-8)


@pytest.mark.parametrize("beta, slope, intercept", [
    (1e-4, 9999.79, 0.9998), (1e-2, 99.80, 0.9804), (0.1, 9.855, 0.8241), (1.0, 1.000, 0.000)])
def test_linear_fit_bias_table(beta, slope, intercept):
    # check-values.md section 10 table: straight line on x in [2, 5] (50 equally spaced points);
    # quoted to 4-6 digits -> tol 6e-3 on the slope (relative 1e-4), 1e-4 on the intercept
    s, x0 = linear_threshold_bias(beta)
    assert s == pytest.approx(slope, rel=1e-4)
    assert x0 == pytest.approx(intercept, abs=1e-4)


def test_exact_curve_recovered_and_linear_estimate_biased():
    # in-test synthetic truth: exact S-curve, beta = 0.01, P_th = 2.5 nJ, with 50 points on [2, 5] P_th
    p_th, beta, scale = 2.5e-9, 0.01, 40.0
    x = np.concatenate([np.geomspace(0.1, 1.9, 20), np.linspace(2.0, 5.0, 50), np.geomspace(6, 100, 10)])
    out = scale * steady_state_photons(x, beta)
    fit = fit_threshold(x * p_th, out, spot_area_cm2=3.1416e-6)
    assert fit.ok, fit.message
    assert fit.threshold == pytest.approx(p_th, rel=1e-6)
    assert fit.beta == pytest.approx(beta, rel=1e-5)
    assert fit.scale == pytest.approx(scale, rel=1e-6)
    assert fit.slope_efficiency == pytest.approx(scale / (beta * p_th), rel=1e-5)
    # the straight line underestimates the threshold by ~2 % (check-values.md section 10)
    assert fit.linear_n_points == 50
    assert fit.linear_threshold / p_th == pytest.approx(0.9804, abs=1e-4)
    assert fit.linear_bias == pytest.approx(-0.0196, abs=1e-4)
    assert fit.threshold_fluence_j_cm2 == pytest.approx(p_th / 3.1416e-6)


@pytest.mark.parametrize("beta, seed", [(1e-3, 1), (1e-2, 2), (0.1, 3), (0.1, 4)])
def test_noisy_curves_recover_threshold_and_beta(beta, seed):
    # in-test synthetic truth, 3 decades of pump, 2 % log-normal noise (seeded);
    # issue 4 / check-values.md section 10 test use: P_th within 2 %, beta within 20 %
    rng = np.random.default_rng(seed)
    p_th = 1.7e-9
    pump = np.geomspace(0.1, 100.0, 60) * p_th
    out = 5.0 * steady_state_photons(pump / p_th, beta) * np.exp(rng.normal(0.0, 0.02, pump.size))
    fit = fit_threshold(pump, out)
    assert fit.ok, fit.message
    assert abs(fit.threshold / p_th - 1) < 0.02
    assert abs(fit.beta / beta - 1) < 0.20
    assert fit.threshold_err > 0 and fit.beta_err > 0
    assert abs(fit.threshold - p_th) < 4 * fit.threshold_err
    # with given errors the covariance is not rescaled; chi2 near its dof
    fit_e = fit_threshold(pump, out, output_err=0.02 * out)
    assert fit_e.threshold == pytest.approx(fit.threshold, rel=1e-6)
    assert 0.4 * fit_e.dof < fit_e.chi2 < 2.0 * fit_e.dof


def test_thresholdless_curve_is_flagged():
    pump = np.geomspace(1.0, 1000.0, 20)
    fit = fit_threshold(pump, 3.0 * pump)  # straight line on log-log axes: beta = 1
    assert not fit.ok
    assert "thresholdless" in fit.message


def test_bad_pump_series():
    with pytest.raises(InputError, match="1 distinct value"):
        fit_threshold([1e-9] * 5, [1.0, 1.1, 0.9, 1.0, 1.05])
    with pytest.raises(InputError, match="distinct pump"):
        fit_threshold([1e-9, 2e-9], [1.0, 30.0])
    with pytest.raises(InputError, match="positive"):
        fit_threshold([1.0, 2.0, 3.0, 4.0], [1.0, 0.0, 5.0, 9.0])
    with pytest.raises(InputError, match="differ in length"):
        fit_threshold([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(InputError, match="beta"):
        steady_state_photons(1.0, 0.0)


def test_linewidth_against_instrument():
    pump = np.array([4.0, 1.0, 2.0, 8.0])
    fwhm = np.array([0.052, 0.30, 0.12, 0.051])
    summary = linewidth_vs_pump(pump, fwhm, instrument_fwhm_nm=0.05)
    np.testing.assert_array_equal(summary.pump, [1.0, 2.0, 4.0, 8.0])
    np.testing.assert_array_equal(summary.resolved, [True, True, False, False])
    assert summary.instrument_limited and "cannot be judged" in summary.message
    assert summary.narrowing_ratio == pytest.approx(0.30 / 0.051)
    assert summary.excess_fwhm_nm[0] == pytest.approx(math.sqrt(0.30**2 - 0.05**2))
    assert summary.excess_fwhm_nm[-1] == 0.0
