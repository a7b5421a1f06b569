"""Physics of the synthetic generator against published values and exact identities."""

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.synth import (
    fp_mode_wavelengths,
    neon_lines_air_nm,
    neon_relative_intensities,
    render_lamp_frame,
    water_index_daimon,
)
from lasecyto.synth._media import (
    _air_to_vacuum_nm,
    _vacuum_to_air_nm,
    _water_dn_dlambda_per_um,
    _water_group_index,
)
from lasecyto.synth._modes import _mode_roots
from lasecyto.synth._render import (
    _gaussian_pixel_photons,
    _lorentzian_pixel_photons,
    _eval_polynomial,
    _wavelength_to_pixel,
)

POLY = (582.0, 0.050, -2.0e-6)


@pytest.mark.parametrize("lam_um, n_ref", [
    (0.45, 1.339608), (0.51, 1.336327), (0.52, 1.335884), (0.5876, 1.333402),
    (0.58926, 1.333350), (0.6, 1.333023), (0.633, 1.332101), (0.7, 1.330518),
])
def test_water_daimon_check_values(lam_um, n_ref):
    # check-values.md section 3b: Daimon & Masumura 2007 (Appl. Opt. 46, 3811), 20 degC,
    # values computed from the published Sellmeier coefficients; tolerance 1e-6.
    assert abs(water_index_daimon(lam_um) - n_ref) <= 1e-6


def test_water_daimon_equals_iapws_at_sodium_d():
    # check-values.md section 3a/3b: n(589.26 nm, 20 degC) = 1.333350 by both IAPWS R9-97 and
    # Daimon & Masumura; tolerance 1e-6.
    assert abs(water_index_daimon(0.58926) - 1.333350) <= 1e-6


def test_water_group_index():
    lam = np.array([0.51, 0.52, 0.6])
    # check-values.md section 3b: n_g = n - lambda dn/dlambda = 1.35957, 1.35834, 1.35089; tolerance 1e-5.
    np.testing.assert_allclose(_water_group_index(lam), [1.35957, 1.35834, 1.35089], atol=1e-5)
    h = 1e-5
    central = (water_index_daimon(lam + h) - water_index_daimon(lam - h)) / (2 * h)
    np.testing.assert_allclose(_water_dn_dlambda_per_um(lam), central, rtol=1e-7)


@pytest.mark.parametrize("air, vac", [
    (585.24878, 585.41101), (640.2248, 640.4018), (811.5311, 811.7542), (546.0750, 546.2268),
])
def test_ciddor_air_to_vacuum_nist_pairs(air, vac):
    # check-values.md section 2: NIST ASD air/vacuum pairs; Ciddor 1996 standard air; tolerance 2e-4 nm.
    assert abs(_air_to_vacuum_nm(air) - vac) <= 2e-4


def test_ciddor_computed_values_and_round_trip():
    # check-values.md section 2, Ciddor 1996 column (computed from the formula): tolerance 1e-5 nm.
    assert abs(_air_to_vacuum_nm(605.6125) - 605.78019) <= 1e-5
    assert abs(_air_to_vacuum_nm(486.1363) - 486.27210) <= 1e-5
    assert abs(_vacuum_to_air_nm(633.0) - 632.82500) <= 1e-5
    assert abs(_vacuum_to_air_nm(200.0) - 199.93526) <= 1e-5
    lam = np.linspace(400.0, 900.0, 51)
    np.testing.assert_allclose(_vacuum_to_air_nm(_air_to_vacuum_nm(lam)), lam, atol=1e-9)


def test_mode_wavelengths_solve_resonance_exactly():
    gap_um, offset, zeta = 20.0, 0.0371, 0.083
    modes = fp_mode_wavelengths(gap_um, index_offset=offset, zeta=zeta)
    lam = modes["lambda_vac_nm"]
    assert lam.size > 40 and np.all((lam >= 570) & (lam <= 670))
    n = water_index_daimon(lam * 1e-3) + offset
    rhs = (modes["q"] + modes["k"] * zeta) * lam
    # exact root of 2 n(lambda) L = (q + k zeta) lambda: tolerance 1e-9 relative (brief).
    assert np.max(np.abs(2 * n * gap_um * 1e3 - rhs) / rhs) < 1e-9
    # higher transverse orders of the same q lie at shorter wavelength
    for q in np.intersect1d(modes["q"][modes["k"] == 0], modes["q"][modes["k"] == 3]):
        sel = modes["q"] == q
        ks, ls = modes["k"][sel], lam[sel]
        assert np.all(np.diff(ls[np.argsort(ks)]) < 0)


def test_mode_wavelengths_dispersive_trap_example():
    # check-values.md section 4 (dispersive trap, computed): n = n_water + 0.035, L = 15 um,
    # q = 78..82 at 527.1465, 520.5793, 514.1772, 507.9341, 501.8442 nm; tolerance 1e-4 nm.
    modes = fp_mode_wavelengths(15.0, index_offset=0.035, zeta=0.0, orders=[0], window_nm=(500, 530))
    np.testing.assert_array_equal(modes["q"], [78, 79, 80, 81, 82])
    np.testing.assert_allclose(modes["lambda_vac_nm"],
                               [527.1465, 520.5793, 514.1772, 507.9341, 501.8442], atol=1e-4)


def test_mode_shift_follows_group_index():
    # check-values.md section 4: at fixed q, d lambda / lambda = dn / n_g.
    lam0 = _mode_roots(65.0, 20.0, 0.035)
    dn = 1e-4
    lam1 = _mode_roots(65.0, 20.0, 0.035 + dn)
    n_g = _water_group_index(lam0 * 1e-3) + 0.035
    assert abs((lam1 - lam0) / (lam0 * dn / n_g) - 1) < 1e-3


def test_mode_wavelengths_reject_bad_input():
    with pytest.raises(InputError, match="gap_um"):
        fp_mode_wavelengths(-1.0, index_offset=0.0, zeta=0.1)
    with pytest.raises(InputError, match="zeta"):
        fp_mode_wavelengths(20.0, index_offset=0.0, zeta=1.5)


@pytest.mark.parametrize("fwhm", [2.0, 2.5, 3.0])
def test_pixel_integrated_lines_conserve_photons(fwhm):
    n_pix, photons = 8001, 2.5e4
    centre = 4000.37
    lor = _lorentzian_pixel_photons(centre, fwhm, photons, n_pix)
    gau = _gaussian_pixel_photons(centre, fwhm, photons, n_pix)
    # a line far from the edges: summed pixel photons equal N within 1e-3 relative (brief).
    assert abs(lor.sum() / photons - 1) < 1e-3
    assert abs(gau.sum() / photons - 1) < 1e-12
    # exact CDF integration: the pixel holding the centre matches the closed form
    x = np.array([3999.5, 4000.5]) - centre
    expected = photons * np.diff(np.arctan(2 * x / fwhm))[0] / np.pi
    assert abs(lor[4000] - expected) < 1e-9 * photons
    # centroid of a symmetric window about the centre returns the centre
    idx = np.arange(3990, 4011)
    assert abs(np.sum(gau[idx] * idx) / gau[idx].sum() - centre) < 1e-6


def test_polynomial_inversion():
    px = np.array([0.0, 12.3, 669.5, 1339.0])
    lam = _eval_polynomial(POLY, px)
    np.testing.assert_allclose(_wavelength_to_pixel(POLY, lam), px, atol=1e-9)


def test_neon_table():
    lines, inten = neon_lines_air_nm(), neon_relative_intensities()
    assert lines.shape == inten.shape == (29,)
    assert np.all(np.diff(lines) > 0)
    # check-values.md section 1a (NIST ASD 2015 export): exact table values.
    assert 585.24878 in lines and 640.22480 in lines and 692.94672 in lines
    assert inten[lines == 640.22480][0] == 20000 and inten[lines == 692.94672][0] == 100000


def test_lamp_frame_lines_land_on_polynomial():
    lines = np.array([585.24878, 614.30627, 640.22480])
    counts = render_lamp_frame(1340, polynomial_air_nm=POLY, lines_air_nm=lines,
                               peak_photons=[2e4, 3e4, 4e4], rng=7)
    assert counts.shape == (1340,)
    signal = counts - 100.0
    for lam, n_ph in zip(lines, [2e4, 3e4, 4e4]):
        p = _wavelength_to_pixel(POLY, lam)
        idx = np.arange(int(round(p)) - 6, int(round(p)) + 7)
        w = signal[idx]
        assert abs(w.sum() / n_ph - 1) < 0.02
        # 2e4-4e4 photons: centroid to a few hundredths of a pixel
        assert abs(np.sum(w * idx) / w.sum() - p) < 0.05
    assert abs(np.median(signal[:40])) < 1.0  # no lines there: offset only


def test_lamp_frame_rejects_decreasing_polynomial():
    with pytest.raises(InputError, match="polynomial_air_nm"):
        render_lamp_frame(1340, polynomial_air_nm=(600.0, -0.05), lines_air_nm=[590.0],
                          peak_photons=1e4, rng=0)
