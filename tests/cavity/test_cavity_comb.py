import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.cavity import CombFit, assign_mode_families, comb_spacing, fit_comb
from lasecyto.exceptions import FitWarning, InputError


def test_fit_comb_non_dispersive_worked_example():
    # check-values.md section 4 (mode comb from measured modes, computed there): n = 1.37, L = 15 um,
    # q = 78..82 -> nL = 20.5500 um (tolerance 1e-4 um, the inputs are rounded to 0.1 pm), b ~ 0
    fit = fit_comb([526.9231, 520.2532, 513.7500, 507.4074, 501.2195])
    assert isinstance(fit, CombFit)
    assert abs(fit.optical_length_um - 20.5500) < 1e-4
    assert fit.mode_numbers.tolist() == [78, 79, 80, 81, 82]
    assert fit.max_fraction < 0.01
    assert abs(fit.offset_per_um) < 1e-4
    # FSR at the mean wavelength: lambda^2 / (2 nL), section 4 formula
    lam_mean = np.mean([526.9231, 520.2532, 513.7500, 507.4074, 501.2195])
    assert fit.fsr_nm == pytest.approx(lam_mean**2 / (2 * 20550.0), rel=1e-5)
    assert 0 < fit.optical_length_err_um < 1e-3


def test_fit_comb_dispersive_trap_warns():
    # check-values.md section 4 (dispersive trap, computed there): naive q non-integer (+1.34),
    # the spacing gives n_g L = 20.9108 um (tolerance 1e-3 um), not nL = 20.567 um
    lam = [527.1465, 520.5793, 514.1772, 507.9341, 501.8442]
    with pytest.warns(FitWarning, match="not integers"):
        fit = fit_comb(lam)
    assert abs(fit.optical_length_um - 20.9108) < 1e-3
    assert fit.max_fraction > 0.2
    assert fit.mode_numbers_raw[0] == pytest.approx(79.336, abs=2e-3)


def test_fit_comb_with_gaps_and_errors():
    nl = 27.4
    q = np.array([88, 89, 91, 94])
    lam = 2e3 * nl / q
    err = np.full(q.size, 0.002)
    fit = fit_comb(lam[::-1], wavelength_err_nm=err)
    assert fit.mode_numbers.tolist() == q[::-1].tolist()
    assert fit.optical_length_um == pytest.approx(nl, abs=1e-9)
    # error from the weights: sigma errors 1e3 * err / lam^2 propagate to nL
    assert 0 < fit.optical_length_err_um < 0.01


def test_fit_comb_smallest_difference_spans_two_orders():
    # orders 88, 90, 93: differences of 2 and 3 spacings, the spacing is their common divisor
    nl = 27.4
    q = np.array([88, 90, 93])
    fit = fit_comb(2e3 * nl / q)
    assert fit.mode_numbers.tolist() == q.tolist()
    assert fit.optical_length_um == pytest.approx(nl, rel=1e-12)


def test_fit_comb_input_errors():
    with pytest.raises(InputError, match="at least 2"):
        fit_comb([600.0])
    with pytest.raises(InputError, match="repeated"):
        fit_comb([600.0, 600.0, 610.0])
    with pytest.raises(InputError, match="wavelength_err_nm"):
        fit_comb([600.0, 610.0], wavelength_err_nm=[0.0, 0.01])


def _ladder_comb(nl_um, zeta, *, window_nm=(598.0, 632.0), powers=(1.0, 0.6, 0.35, 0.2)):
    s = 1.0 / (2.0 * nl_um)
    lo, hi = 1e3 / window_nm[1], 1e3 / window_nm[0]
    sig, w, fam, order = [], [], [], []
    for k, p in enumerate(powers):
        q = np.arange(int(lo / s) - 2, int(hi / s) + 3)
        sg = (q + k * zeta) * s
        m = (sg > lo) & (sg < hi)
        sig += list(sg[m]); w += [p] * int(m.sum()); fam += [k] * int(m.sum()); order += list(q[m])
    return np.array(sig), np.array(w), np.array(fam), np.array(order)


@pytest.mark.parametrize("nl_um, zeta", [(27.9, 0.05), (27.9, 0.08), (27.9, 0.12), (20.9, 0.1), (20.9, 0.12),
                                         (20.9, 0.111), (27.9, 0.1105)])
def test_comb_spacing_four_families(nl_um, zeta):
    # families at phases 0, zeta, 2 zeta, 3 zeta (transverse ladder, check-values.md section 5);
    # (20.9 um, 0.12) is the case where 8 zeta ~ 1 lines all families up at 8 nL: the fundamental must win;
    # with zeta ~ 1/9 they line up at 9 nL, where most orders of that long comb are empty
    rng = np.random.default_rng(11)
    sig, w, _, _ = _ladder_comb(nl_um, zeta)
    sig = sig + rng.normal(0, 3e-6, sig.size)  # ~1 pm at 615 nm
    perm = rng.permutation(sig.size)
    s = comb_spacing(sig[perm], weights=w[perm])
    assert s == pytest.approx(1 / (2 * nl_um), rel=2e-4)


def test_comb_spacing_errors():
    with pytest.raises(InputError, match="distinct"):
        comb_spacing([1.6, 1.6])
    with pytest.raises(InputError, match="weights"):
        comb_spacing([1.6, 1.62], weights=[-1.0, 1.0])


def _tracks_from_sigma(sig, power, *, n_frames=6, drift_per_frame=0.0):
    rows = []
    for t, (sg, p) in enumerate(zip(sig, power)):
        for f in range((t * t) % 7, (t * t) % 7 + n_frames):  # staggered: tracks cover different times
            lam = 1e3 / sg * (1 + drift_per_frame * f)
            rows.append((t, f, lam, p))
    tid, fr, lam, pw = (np.array(v) for v in zip(*rows))
    n = tid.size
    df = pd.DataFrame({
        "cell_id": ["c"] * n, "frame": fr, "time_s": 10.0 * fr, "line_id": np.zeros(n, int),
        "center_px": np.zeros(n), "center_err_px": np.full(n, 0.02), "center_nm": lam,
        "center_err_nm": np.full(n, 0.001), "fwhm_px": np.full(n, 2.5), "fwhm_nm": np.full(n, 0.12),
        "area_counts": pw * 1e4, "area_err_counts": np.full(n, 50.0), "amplitude_counts": pw * 3e3,
        "background_counts": np.full(n, 20.0), "snr": np.full(n, 100.0), "chi2_red": np.ones(n),
        "lasing": np.ones(n, bool), "saturated": np.zeros(n, bool), "fit_ok": np.ones(n, bool),
        "fit_message": [""] * n, "track_id": tid, "mode_family": np.full(n, -1),
    })
    return tables.validate(df, "tracks")


def test_assign_mode_families_recovers_ladder():
    sig, w, fam, order = _ladder_comb(27.9, 0.09)
    # tracks seen at different times under a common red drift must still sort into families
    tr = _tracks_from_sigma(sig, w, drift_per_frame=5e-4)
    out = assign_mode_families(tr)
    per = out.groupby("track_id").agg(f=("mode_family", "first"), c=("comb_index", "first"))
    assert per["f"].tolist() == fam.tolist()  # powers 1 > 0.6 > 0.35 > 0.2 -> families 0..3
    for k in range(4):
        q = order[fam == k]
        assert per["c"][fam == k].tolist() == (q - q.min()).tolist()
    assert out["comb_index"].dtype == np.int64
    assert len(assign_mode_families(tables.empty("tracks"))) == 0


def test_assign_mode_families_single_track():
    tr = _tracks_from_sigma(np.array([1.62]), np.array([1.0]))
    out = assign_mode_families(tr)
    assert (out["mode_family"] == 0).all() and (out["comb_index"] == 0).all()
