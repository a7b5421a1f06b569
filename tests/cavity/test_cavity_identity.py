"""Mode numbers and transverse orders: the dispersive trap of check-values section 4 and synthetic ladders."""

import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.cavity import (
    assign_mode_families,
    assign_mode_numbers,
    fit_mode_numbers,
    transverse_orders,
)
from lasecyto.cavity.media import Cauchy, get_medium
from lasecyto.exceptions import FitWarning, InputError
from lasecyto.synth import fp_mode_wavelengths

# check-values.md section 4 (computed there): n(lambda) = n_water,20degC(lambda) + 0.035, L = 15 um,
# exact roots of 2 n(lambda) L = q lambda for q = 78..82 (0.1 pm rounding)
TRAP_NM = np.array([527.1465, 520.5793, 514.1772, 507.9341, 501.8442])
# the non-dispersive comb of the same section: n = 1.37, L = 15 um, q = 78..82
PLAIN_NM = np.array([526.9231, 520.2532, 513.7500, 507.4074, 501.2195])


def test_water_model_matches_the_trap_medium():
    # check-values.md section 4: n = 1.37110 and n_g = 1.39394 at 515 nm (5 decimals as printed);
    # the water is Daimon & Masumura 2007 at 20 degC (section 3b)
    water = get_medium("water-daimon")
    assert water.n(515.0) + 0.035 == pytest.approx(1.37110, abs=5e-6)
    assert water.group_index(515.0) + 0.035 == pytest.approx(1.39394, abs=5e-6)


def test_non_dispersive_comb_needs_no_model():
    # check-values.md section 4: q_i = round(2 nL / lambda_i) -> 78..82, integer naive numbers
    fit = fit_mode_numbers(PLAIN_NM, np.arange(5))
    assert fit.mode_numbers.tolist() == [78, 79, 80, 81, 82]
    assert fit.naive_fraction < 0.01 and fit.method == "naive" and not fit.absolute


def test_dispersive_trap_naive_numbers_warn():
    # check-values.md section 4: naive q = (1/lambda)/spacing = 79.336, 80.337, 81.337, 82.337, 83.336,
    # non-integer and +1.34 too high (our spacing is the least-squares slope, theirs from the end points:
    # tolerance 0.003); the fractional part > 0.2 must warn
    with pytest.warns(FitWarning, match="not integers"):
        fit = fit_mode_numbers(TRAP_NM, np.arange(5))
    assert fit.naive_numbers == pytest.approx([79.336, 80.337, 81.337, 82.337, 83.336], abs=3e-3)
    assert fit.naive_fraction > 0.2
    # rounding the naive numbers falls into the trap: one too high
    assert fit.mode_numbers.tolist() == [79, 80, 81, 82, 83]
    # the spacing is the group optical length n_g L = 20.9108 um (1e-3 um: slope vs end points)
    assert 1 / (2 * fit.spacing_per_um) == pytest.approx(20.9108, abs=1e-3)


def test_dispersive_trap_solved_with_the_medium_and_a_fitted_gap():
    # section 4 test use: the inverse fit returns nL within 1e-4 um and integer q (78..82)
    water = get_medium("water-daimon")
    fit = fit_mode_numbers(TRAP_NM, np.arange(5), medium=water, index_offset=0.035)
    assert fit.mode_numbers.tolist() == [78, 79, 80, 81, 82]
    assert fit.absolute and fit.method == "medium"
    assert fit.gap_um == pytest.approx(15.0, abs=1e-4)
    assert fit.optical_length_um(515.0) == pytest.approx(15.0 * (water.n(515.0) + 0.035), abs=1e-4)
    assert fit.optical_length_um(515.0) == pytest.approx(20.567, abs=5e-4)     # printed to 3 decimals
    assert fit.delta_chi2 > 1e3


def test_dispersive_trap_solved_with_the_medium_and_the_gap():
    fit = fit_mode_numbers(TRAP_NM, np.arange(5), medium="water-daimon", gap_um=15.0)
    assert fit.mode_numbers.tolist() == [78, 79, 80, 81, 82]
    assert fit.index_offset == pytest.approx(0.035, abs=1e-5)
    assert fit.phase_optical_length_um == pytest.approx(fit.optical_length_um(fit.reference_nm))
    # a nominal gap 2 % off still gives the right q (the offset absorbs it)
    assert fit_mode_numbers(TRAP_NM, np.arange(5), medium="water-daimon", gap_um=15.3).mode_numbers[0] == 78


def test_ambiguous_assignment_warns():
    # two lines known to 0.2 nm cannot tell q0 from q0 +- 1
    with pytest.warns(FitWarning, match="ambiguous"):
        fit_mode_numbers(TRAP_NM[:2], [0, 1], wavelength_err_nm=[0.2, 0.2], medium="water-daimon", gap_um=15.0)


def test_fit_mode_numbers_bad_input():
    with pytest.raises(InputError, match="at least 2 distinct orders"):
        fit_mode_numbers(TRAP_NM[:2], [0, 0])
    with pytest.raises(InputError, match="integers"):
        fit_mode_numbers(TRAP_NM[:2], [0.0, 0.5])
    with pytest.raises(InputError, match="gap_um"):
        fit_mode_numbers(TRAP_NM, np.arange(5), medium="water-daimon", gap_um=-3.0)
    with pytest.raises(InputError, match="unknown medium"):
        fit_mode_numbers(TRAP_NM, np.arange(5), medium="honey")
    with pytest.raises(InputError, match="wavelength_nm"):
        fit_mode_numbers([500.0, -1.0], [0, 1])


def test_transverse_orders_of_a_ladder():
    # families at phases p0 + k zeta (mod 1), given out of order and with the fundamental not the brightest
    zeta, p0 = 0.09, 0.83
    k_true = np.array([2, 0, 3, 1])
    phase = (p0 + k_true * zeta) % 1.0
    orders, z, z_err = transverse_orders(phase, weights=[1.0, 0.5, 0.2, 0.8], phase_err=np.full(4, 1e-4))
    assert orders.tolist() == k_true.tolist()
    assert z == pytest.approx(zeta, abs=1e-9) and 0 < z_err < 1e-4
    # a family off the ladder gets -1; one family has no ladder
    orders, z, _ = transverse_orders(np.r_[phase, (p0 + 0.5) % 1.0])
    assert orders.tolist() == k_true.tolist() + [-1] and z == pytest.approx(zeta)
    orders, z, _ = transverse_orders([0.3])
    assert orders.tolist() == [0] and np.isnan(z)
    # a missing first order: families k = 0, 2, 3 still give zeta, not 2 zeta
    orders, z, _ = transverse_orders((p0 + np.array([0, 2, 3]) * zeta) % 1.0)
    assert orders.tolist() == [0, 2, 3] and z == pytest.approx(zeta)


def _ladder_tracks(*, gap_um, offset, zeta, n_frames=8, window=(590.0, 640.0), err_nm=0.002, seed=0):
    """Tracks of the exact dispersive resonances of lasecyto.synth (water + offset), with centre noise."""
    rng = np.random.default_rng(seed)
    modes = fp_mode_wavelengths(gap_um, index_offset=offset, zeta=zeta, window_nm=window)
    power = np.array([1.0, 0.6, 0.35, 0.2])[modes["k"]]
    rows = []
    for t, (k, q, lam, p) in enumerate(zip(modes["k"], modes["q"], modes["lambda_vac_nm"], power)):
        for f in range(n_frames):
            rows.append((t, f, lam + err_nm * rng.standard_normal(), p, k, q))
    tid, fr, lam, pw, k, q = (np.array(v) for v in zip(*rows))
    n = tid.size
    df = pd.DataFrame({
        "cell_id": ["c"] * n, "frame": fr, "time_s": 10.0 * fr, "line_id": np.zeros(n, int),
        "center_px": np.zeros(n), "center_err_px": np.full(n, err_nm / 0.05), "center_nm": lam,
        "center_err_nm": np.full(n, err_nm), "fwhm_px": np.full(n, 2.5), "fwhm_nm": np.full(n, 0.12),
        "area_counts": pw * 1e4, "area_err_counts": np.full(n, 50.0), "amplitude_counts": pw * 3e3,
        "background_counts": np.full(n, 20.0), "snr": np.full(n, 100.0), "chi2_red": np.ones(n),
        "lasing": np.ones(n, bool), "saturated": np.zeros(n, bool), "fit_ok": np.ones(n, bool),
        "fit_message": [""] * n, "track_id": tid, "mode_family": np.full(n, -1),
    })
    return tables.validate(df, "tracks"), k, q


@pytest.mark.parametrize("gap_um, offset, zeta", [(20.0, 0.035, 0.07), (15.0, 0.02, 0.11), (25.0, 0.05, 0.05)])
def test_assign_mode_numbers_on_exact_dispersive_ladders(gap_um, offset, zeta):
    tr, k_true, q_true = _ladder_tracks(gap_um=gap_um, offset=offset, zeta=zeta)
    out, ident = assign_mode_numbers(assign_mode_families(tr), medium="water-daimon", gap_um=gap_um)
    assert out["transverse_order"].tolist() == k_true.tolist()
    assert out["mode_number"].tolist() == q_true.tolist()
    assert ident.numbers.index_offset == pytest.approx(offset, abs=2e-5)
    assert ident.gouy_fraction == pytest.approx(zeta, abs=5e-4)
    assert ident.fundamental_family == 0 and ident.transverse_orders[0] == 0


def test_assign_mode_numbers_naive_is_off_by_the_dispersion_and_warns():
    # 2 (n_g - n) L / lambda = 2 x 0.0175 x 25 / 0.615 ~ 1.4: naive q one too high, fraction ~0.4 -> warning
    tr, k_true, q_true = _ladder_tracks(gap_um=25.0, offset=0.05, zeta=0.06)
    with pytest.warns(FitWarning, match="not integers"):
        out, ident = assign_mode_numbers(assign_mode_families(tr))
    assert np.all(out["mode_number"].to_numpy() - q_true == 1)
    assert out["transverse_order"].tolist() == k_true.tolist()
    assert not ident.numbers.absolute
    # at L = 20 um the dispersion shift is ~1.14: the fraction (0.14) hides it, q is still one too high;
    # this is why the pipeline uses the gap medium when the manifest names it
    tr, _, q_true = _ladder_tracks(gap_um=20.0, offset=0.035, zeta=0.07)
    out, _ = assign_mode_numbers(assign_mode_families(tr))
    assert np.all(out["mode_number"].to_numpy() - q_true == 1)


def test_assign_mode_numbers_with_a_user_medium_and_no_gap():
    # a user Cauchy medium describing the whole gap (offset 0): L is fitted
    tr, _, q_true = _ladder_tracks(gap_um=20.0, offset=0.0, zeta=0.08)
    water_like = Cauchy(A=1.32454, B=3.0e-3, valid_nm=(400.0, 800.0))   # close to water, not equal
    out, ident = assign_mode_numbers(assign_mode_families(tr), medium=water_like)
    assert ident.numbers.method == "medium"
    assert np.all(np.abs(out["mode_number"].to_numpy() - q_true) <= 1)
    assert ident.numbers.gap_um == pytest.approx(20.0, rel=5e-3)


def test_assign_mode_numbers_edge_cases():
    empty, ident = assign_mode_numbers(tables.empty("tracks").assign(comb_index=np.zeros(0, np.int64)))
    assert len(empty) == 0 and ident.numbers is None
    tr, _, _ = _ladder_tracks(gap_um=20.0, offset=0.035, zeta=0.07)
    with pytest.raises(InputError, match="comb_index"):
        assign_mode_numbers(tr)
