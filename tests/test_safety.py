"""Pump dose and cautions (lasecyto.safety)."""

import pytest

from lasecyto.exceptions import InputError, LasecytoWarning
from lasecyto.safety import CAUTIONS, pulse_dose, skin_mpe_j_cm2


@pytest.mark.parametrize("kwargs, fluence, i_square, i_gauss", [
    (dict(beam="tophat", diameter_um=20.0), 0.3183, 6.37e7, 5.98e7),
    (dict(beam="gaussian", w_um=10.0), 0.6366, 1.27e8, 1.20e8),
    (dict(beam="gaussian", diameter_um=20.0), 0.6366, 1.27e8, 1.20e8),  # 1/e^2 diameter = 2 w
    (dict(beam="gaussian", w_um=20.0), 0.1592, 3.18e7, 2.99e7),
])
def test_worked_dose_numbers(kwargs, fluence, i_square, i_gauss):
    # check-values.md section 11 worked numbers (E = 1 uJ, 5 ns, computed); quoted to 3-4 digits
    dose = pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=470.0, **kwargs)
    assert dose.fluence_j_cm2 == pytest.approx(fluence, abs=5e-5)
    assert dose.peak_irradiance_square_w_cm2 == pytest.approx(i_square, rel=5e-3)
    assert dose.peak_irradiance_gaussian_w_cm2 == pytest.approx(i_gauss, rel=5e-3)


def test_photons_and_mpe_ratio():
    # check-values.md section 11: 1 uJ = 2.366e12 photons at 470 nm, 2.457e12 at 488 nm;
    # 20 um top-hat fluence is 16x the skin MPE (0.020 J/cm^2 for 1e-9..1e-7 s)
    assert pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=470.0, diameter_um=20.0).photons == \
        pytest.approx(2.366e12, rel=2e-4)
    dose = pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0, diameter_um=20.0)
    assert dose.photons == pytest.approx(2.457e12, rel=2e-4)
    assert dose.skin_mpe_j_cm2 == pytest.approx(0.020)
    assert round(dose.mpe_ratio) == 16


def test_skin_mpe_rules():
    # check-values.md section 11: 1.1 C_A t^0.25 J/cm^2 = 0.0196 J/cm^2 at 100 ns
    assert skin_mpe_j_cm2(500.0, 1e-7)[0] == pytest.approx(0.0196, abs=1e-4)
    assert skin_mpe_j_cm2(450.0, 1e-3)[0] == pytest.approx(1.1 * 1e-3**0.25)
    for lam, t in ((800.0, 5e-9), (355.0, 5e-9), (500.0, 1e-12), (500.0, 100.0)):
        mpe, note = skin_mpe_j_cm2(lam, t)
        assert mpe is None and "no skin MPE" in note


def test_printed_result_always_carries_cautions():
    for dose in (pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0, diameter_um=20.0),
                 pulse_dose(1e-9, pulse_s=5e-9, wavelength_nm=1064.0, w_um=5.0, beam="gaussian")):
        text = str(dose)
        assert CAUTIONS in text
    for phrase in ("Class 3B", "Class 4", "eyewear", "enclose", "interlocks", "ANSI Z136.1",
                   "IEC 60825-1", "not doses for cells", "not a safety assessment",
                   "laser safety officer"):
        assert phrase in CAUTIONS
    outside = pulse_dose(1e-9, pulse_s=5e-9, wavelength_nm=1064.0, w_um=5.0, beam="gaussian")
    assert outside.skin_mpe_j_cm2 is None and outside.mpe_ratio is None
    assert "skin MPE: none" in str(outside)


def test_warn_fraction_guard():
    with pytest.warns(LasecytoWarning, match="skin MPE"):
        pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0, diameter_um=20.0, warn_fraction=0.1)
    dose = pulse_dose(1e-9, pulse_s=5e-9, wavelength_nm=488.0, diameter_um=20.0, warn_fraction=0.1)
    assert dose.mpe_ratio < 0.1  # 3.2e-4 J/cm^2: no warning


def test_bad_dose_inputs():
    with pytest.raises(InputError, match="energy_j"):
        pulse_dose(-1e-6, pulse_s=5e-9, wavelength_nm=488.0, diameter_um=20.0)
    with pytest.raises(InputError, match="diameter_um"):
        pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0)
    with pytest.raises(InputError, match="exactly one"):
        pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0, beam="gaussian", w_um=5.0, diameter_um=10.0)
    with pytest.raises(InputError, match="beam"):
        pulse_dose(1e-6, pulse_s=5e-9, wavelength_nm=488.0, beam="donut", diameter_um=10.0)
    with pytest.raises(InputError, match="pulse_s"):
        pulse_dose(1e-6, pulse_s=0.0, wavelength_nm=488.0, diameter_um=10.0)
