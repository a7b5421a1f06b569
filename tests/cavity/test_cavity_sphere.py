"""Whispering-gallery modes of a sphere (lasecyto.cavity.sphere)."""

import math

import numpy as np
import pytest

from lasecyto.cavity.media import get_medium
from lasecyto.cavity.sphere import (
    asymptotic_size_parameter, assign_modes, complex_size_parameter, exact_size_parameter, fit_sphere,
    fit_sphere_modes, mode_wavelengths, resonance_wavelengths)
from lasecyto.exceptions import InputError

# check-values.md section 6, worked example A: D = 10 um, n_s = 1.59, n_m = 1.333, first radial
# order, l = 74..79 (computed there from the exact characteristic equations)
M_A = 1.59 / 1.333
L_A = np.arange(74, 80)
X_EXACT = {"TE": [67.408903, 68.279231, 69.149223, 70.018886, 70.888226, 71.757250],
           "TM": [67.750311, 68.622253, 69.493817, 70.365010, 71.235840, 72.106313]}
X_LAM = {"TE": [67.491671, 68.359884, 69.227822, 70.095490, 70.962895, 71.830044],
         "TM": [67.873783, 68.742658, 69.611244, 70.479547, 71.347573, 72.215329]}
LAMBDA_EXACT = {"TE": [621.2448, 613.3260, 605.6096, 598.0876, 590.7530, 583.5986],
                "TM": [618.1142, 610.2602, 602.6066, 595.1457, 587.8702, 580.7734]}
LINES_A = np.array(LAMBDA_EXACT["TE"] + LAMBDA_EXACT["TM"])


@pytest.mark.parametrize("pol", ["TE", "TM"])
def test_exact_size_parameters_example_a(pol):
    # check-values.md section 6 example A, "x exact" column; tol 1e-6
    x = exact_size_parameter(L_A, M_A, polarization=pol)
    np.testing.assert_allclose(x, X_EXACT[pol], rtol=0, atol=1e-6)
    # "lambda exact" column (quoted to 1e-4 nm)
    lam = resonance_wavelengths(10.0, 1.59, 1.333, polarization=pol, l=L_A, root="real")
    np.testing.assert_allclose(lam, LAMBDA_EXACT[pol], rtol=0, atol=1e-4)


@pytest.mark.parametrize("pol", ["TE", "TM"])
def test_asymptotic_formula_is_not_exact(pol):
    # check-values.md section 6 example A, "x Lam 1992" column; tol 1e-6
    asym = asymptotic_size_parameter(L_A, M_A, polarization=pol)
    np.testing.assert_allclose(asym, X_LAM[pol], rtol=0, atol=1e-6)
    # the asymptotic value must be rejected as "exact": it is off by >= 0.05 in x
    assert np.all(np.abs(asym - np.array(X_EXACT[pol])) >= 0.05)
    assert not np.allclose(asym, X_EXACT[pol], rtol=0, atol=1e-6)


def test_polystyrene_in_air_and_radial_orders():
    # check-values.md section 6 findings: PS in air, D = 10 um: TE78 585.4193 nm, TM78 580.2220 nm
    assert resonance_wavelengths(10.0, 1.59, 1.0, polarization="TE", l=78) == pytest.approx(585.4193, abs=1e-4)
    assert resonance_wavelengths(10.0, 1.59, 1.0, polarization="TM", l=78) == pytest.approx(580.2220, abs=1e-4)
    x = [exact_size_parameter(78, 1.59, polarization="TE", radial_order=n) for n in (1, 2, 3)]
    assert x[0] < x[1] < x[2] < 78.5
    # at high contrast the asymptotic formula is close (same radial order identified)
    for n, xn in zip((1, 2, 3), x):
        assert abs(asymptotic_size_parameter(78, 1.59, polarization="TE", radial_order=n) - xn) < 0.05


def test_dispersive_example_b():
    # check-values.md section 6 example B (PS Sultanova 2009 in water Daimon & Masumura 2007,
    # D = 10 um, self-consistent); tol 1e-3 nm
    ps, water = get_medium("ps-sultanova"), get_medium("water-daimon")
    te = resonance_wavelengths(10.0, ps, water, polarization="TE", l=L_A, root="real")
    tm = resonance_wavelengths(10.0, ps, water, polarization="TM", l=L_A, root="real")
    np.testing.assert_allclose(te, [620.7017, 613.0322, 605.5625, 598.2848, 591.1919, 584.2770],
                               rtol=0, atol=1e-3)
    np.testing.assert_allclose(tm, [617.6764, 610.0663, 602.6542, 595.4325, 588.3942, 581.5323],
                               rtol=0, atol=1e-3)


def test_assign_modes_example_a():
    # check-values.md section 6 test use: (pol, l) of the 12 lines, diameter within 1 nm
    order = np.array([3, 9, 0, 11, 5, 7, 1, 10, 2, 6, 8, 4])  # shuffled input
    a = assign_modes(LINES_A[order], n_sphere=1.59, n_medium=1.333, diameter_range_um=(8.0, 12.0),
                     root="real")
    assert a.ok, a.message
    expected_pol = np.array(["TE"] * 6 + ["TM"] * 6)[order]
    expected_l = np.concatenate([L_A, L_A])[order]
    assert a.polarization == tuple(expected_pol)
    np.testing.assert_array_equal(a.l, expected_l)
    np.testing.assert_array_equal(a.radial_order, 1)
    assert a.diameter_um == pytest.approx(10.0, abs=1e-3)
    assert a.rms_nm < 1e-4 and a.runner_up_rms_nm > 0.1  # clear winner


def test_fit_sphere_twelve_lines():
    # check-values.md section 6: from the 12 wavelengths recover D = 10.000 um (1 nm) and n_m = 1.333 (1e-4)
    fit = fit_sphere(LINES_A, n_sphere=1.59, n_medium_guess=1.336, diameter_guess_um=10.4)
    assert fit.ok, fit.message
    assert fit.diameter_um == pytest.approx(10.0, abs=1e-3)
    assert fit.n_medium == pytest.approx(1.333, abs=1e-4)
    assert 0 < fit.diameter_err_um < 1e-3 and 0 < fit.n_medium_err < 1e-4
    assert fit.dof == 10 and math.isnan(fit.chi2)  # no errors given
    assert fit.assignment.polarization == ("TE",) * 6 + ("TM",) * 6


def test_fit_sphere_four_and_three_lines():
    # same source and tolerances from 4 (TE75, TE77, TM76, TM78) and 3 (TE74, TM74, TM79) lines
    for idx in ([1, 3, 8, 10], [0, 6, 11]):
        fit = fit_sphere(LINES_A[idx], n_sphere=1.59, n_medium_guess=1.335, diameter_guess_um=10.3)
        assert fit.ok, fit.message
        assert fit.diameter_um == pytest.approx(10.0, abs=1e-3)
        assert fit.n_medium == pytest.approx(1.333, abs=1e-4)


def test_four_lines_of_one_polarization_are_ambiguous():
    # TE74-77 alone: another (l, D, n_m) also fits at sub-pm level; must not return a number
    fit = fit_sphere(LINES_A[:4], n_sphere=1.59, n_medium_guess=1.335, diameter_guess_um=10.3)
    assert not fit.ok
    assert "ambiguous" in fit.message
    assert math.isnan(fit.diameter_um) and math.isnan(fit.n_medium)
    # with the medium index known the same lines are unambiguous
    fixed = fit_sphere(LINES_A[:4], n_sphere=1.59, n_medium_guess=1.333, diameter_guess_um=10.3,
                       fit_medium=False)
    assert fixed.ok, fixed.message
    assert fixed.diameter_um == pytest.approx(10.0, abs=1e-3) and fixed.n_medium_err == 0.0


def test_fit_sphere_dispersive_media():
    # check-values.md section 6 example B wavelengths, fitted with the same named dispersions
    ps, water = get_medium("ps-sultanova"), get_medium("water-daimon")
    lines = np.array([620.7017, 613.0322, 605.5625, 598.2848, 591.1919, 584.2770,
                      617.6764, 610.0663, 602.6542, 595.4325, 588.3942, 581.5323])
    fit = fit_sphere(lines, n_sphere=ps, n_medium_guess=water, diameter_guess_um=9.8)
    assert fit.ok, fit.message
    assert fit.diameter_um == pytest.approx(10.0, abs=1e-3)
    assert fit.n_medium == pytest.approx(water.n(np.median(lines)), abs=1e-4)


def test_fit_sphere_noisy_lines():
    # in-test synthetic truth: example A lines + 2 pm Gaussian noise (seeded); issue 4 acceptance:
    # diameter within 10 nm and medium index within 5e-4; errors honest (within 4 sigma)
    rng = np.random.default_rng(20240601)
    for _ in range(3):
        noisy = LINES_A + rng.normal(0.0, 0.002, LINES_A.size)
        fit = fit_sphere(noisy, 0.002, n_sphere=1.59, n_medium_guess=1.335, diameter_guess_um=10.3)
        assert fit.ok, fit.message
        assert abs(fit.diameter_um - 10.0) < 0.010
        assert abs(fit.n_medium - 1.333) < 5e-4
        assert abs(fit.diameter_um - 10.0) < 4 * fit.diameter_err_um
        assert abs(fit.n_medium - 1.333) < 4 * fit.n_medium_err
        assert np.isfinite(fit.chi2) and fit.dof == 10


def test_lines_that_fit_no_sphere():
    # three lines 0.5 nm apart: no first-order WGM set of a 8.5-11.5 um bead is that dense
    fit = fit_sphere([600.0, 600.5, 601.0], n_sphere=1.59, n_medium_guess=1.335, diameter_guess_um=10.0)
    assert not fit.ok
    assert "fit no sphere" in fit.message
    assert math.isnan(fit.diameter_um) and math.isnan(fit.n_medium_err)
    a = assign_modes([600.0, 600.5, 601.0], n_sphere=1.59, n_medium=1.333, diameter_range_um=(9, 11))
    assert not a.ok and "fit no sphere" in a.message


def test_bad_sphere_inputs():
    with pytest.raises(InputError, match="too few lines"):
        fit_sphere([600.0, 605.0], n_sphere=1.59, n_medium_guess=1.333)
    with pytest.raises(InputError, match="same wavelength"):
        fit_sphere([600.0, 600.0, 605.0], n_sphere=1.59, n_medium_guess=1.333)
    with pytest.raises(InputError, match="positive and finite"):
        fit_sphere([600.0, np.nan, 605.0], n_sphere=1.59, n_medium_guess=1.333)
    with pytest.raises(InputError, match="wavelength errors"):
        fit_sphere([600.0, 603.0, 605.0], [0.001, 0.0, 0.001], n_sphere=1.59, n_medium_guess=1.333)
    with pytest.raises(InputError, match="denser than its medium"):
        exact_size_parameter(75, 0.9, polarization="TE")
    with pytest.raises(InputError, match="polarization"):
        resonance_wavelengths(10.0, 1.59, 1.333, polarization="TX", l=75)
    with pytest.raises(InputError, match="radial order"):
        exact_size_parameter(75, 1.2, polarization="TE", radial_order=4)
    with pytest.raises(InputError, match="integers"):
        exact_size_parameter(75.5, 1.2, polarization="TE")
    with pytest.raises(InputError, match="diameter"):
        resonance_wavelengths(-1.0, 1.59, 1.333, polarization="TE", l=75)
    with pytest.raises(InputError, match="low < high"):
        assign_modes([600.0, 605.0], n_sphere=1.59, n_medium=1.333, diameter_range_um=(12, 8))


# check-values.md section 6 example A, "lambda complex root (nm)" and "Q_rad" columns (computed
# there from the complex roots of the outgoing-wave equations)
LAMBDA_COMPLEX = {"TE": [621.2463, 613.3273, 605.6106, 598.0885, 590.7537, 583.5992],
                  "TM": [618.1163, 610.2620, 602.6080, 595.1468, 587.8712, 580.7742]}
Q_RAD = {"TE": [2.48e3, 2.74e3, 3.02e3, 3.33e3, 3.68e3, 4.07e3],
         "TM": [1.91e3, 2.10e3, 2.32e3, 2.56e3, 2.83e3, 3.12e3]}
LINES_COMPLEX = np.array(LAMBDA_COMPLEX["TE"] + LAMBDA_COMPLEX["TM"])


@pytest.mark.parametrize("pol", ["TE", "TM"])
def test_complex_roots_example_a(pol):
    # check-values.md section 6 example A: complex-root wavelengths (quoted to 1e-4 nm) and
    # radiation-limited Q = x_r / (2 x_i) (quoted to 3 digits)
    x = complex_size_parameter(L_A, M_A, polarization=pol)
    np.testing.assert_allclose(np.pi * 1.333 * 10e3 / x.real, LAMBDA_COMPLEX[pol], rtol=0, atol=1e-4)
    np.testing.assert_allclose(x.real / (2 * np.abs(x.imag)), Q_RAD[pol], rtol=6e-3)
    lam = resonance_wavelengths(10.0, 1.59, 1.333, polarization=pol, l=L_A)  # default: complex
    np.testing.assert_allclose(lam, LAMBDA_COMPLEX[pol], rtol=0, atol=1e-4)


def test_fixed_assignment_fit_from_few_lines():
    # check-values.md section 6: D = 10.000 um (tol 1 nm) and n_m = 1.333 (tol 1e-4) from the
    # complex-root lines, mode identity given, from all 12 lines and from 3 (TE74, TM74, TM79)
    pols = ["TE"] * 6 + ["TM"] * 6
    ls = np.concatenate([L_A, L_A])
    for idx in (np.arange(12), np.array([0, 6, 11]), np.array([2, 3, 8])):
        fit = fit_sphere_modes(LINES_COMPLEX[idx], 5e-5, polarization=[pols[i] for i in idx], l=ls[idx],
                               radial_order=1, n_sphere=1.59, n_medium_guess=1.34,
                               diameter_range_um=(8.0, 12.0))
        assert fit.ok, fit.message
        assert fit.diameter_um == pytest.approx(10.0, abs=1e-3)
        assert fit.n_medium == pytest.approx(1.333, abs=1e-4)
        assert 0 < fit.n_medium_err < 1e-4
    # the interpolated model equals the exact self-consistent resonances (dispersive media)
    ps, water = get_medium("ps-ma"), get_medium("water-daimon")
    exact = [resonance_wavelengths(12.0, ps, water, polarization=p, l=li) for p, li in
             (("TE", 90), ("TM", 89), ("TE", 88))]
    fit = fit_sphere_modes(exact, 1e-6, polarization=["TE", "TM", "TE"], l=[90, 89, 88], radial_order=1,
                           n_sphere=ps, n_medium_guess=water, diameter_range_um=(10.0, 14.0))
    assert fit.ok, fit.message
    np.testing.assert_allclose(fit.assignment.predicted_nm, exact, rtol=0, atol=1e-6)
    assert fit.diameter_um == pytest.approx(12.0, abs=1e-6)


def test_wrong_identity_is_rejected():
    fit = fit_sphere_modes(LINES_COMPLEX[[0, 1, 6]], 1e-4, polarization=["TE", "TE", "TE"],
                           l=[74, 75, 76], radial_order=1, n_sphere=1.59, n_medium_guess=1.34,
                           diameter_range_um=(8.0, 12.0))
    assert not fit.ok and "do not fit these modes" in fit.message
    assert math.isnan(fit.diameter_um)
    with pytest.raises(InputError, match="one mode identity per line"):
        fit_sphere_modes(LINES_COMPLEX[:3], polarization=["TE", "TM"], l=[74, 75, 76], radial_order=1,
                         n_sphere=1.59, n_medium_guess=1.34)
    with pytest.raises(InputError, match="same mode identity"):
        fit_sphere_modes(LINES_COMPLEX[:3], polarization=["TE"] * 3, l=[74, 74, 76], radial_order=1,
                         n_sphere=1.59, n_medium_guess=1.34)


def test_mode_table_lists_the_resonances():
    table = mode_wavelengths(10.0, 1.59, 1.333, wavelength_range_nm=(580.0, 622.0))
    assert len(table["l"]) == 12
    np.testing.assert_allclose(np.sort(table["wavelength_nm"]), np.sort(LINES_COMPLEX), atol=1e-4)
    assert set(zip(table["polarization"], table["l"])) == {(p, int(li)) for p in ("TE", "TM") for li in L_A}
