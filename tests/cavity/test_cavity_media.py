"""Refractive index and group index of media (lasecyto.cavity.media)."""

import numpy as np
import pytest

from lasecyto.cavity.media import (
    MEDIA, Cauchy, Sellmeier, WaterIAPWS, get_medium, water_density_kg_m3)
from lasecyto.exceptions import FitWarning, InputError

WAVELENGTHS_NM = np.array([450.0, 480.0, 510.0, 520.0, 589.26, 600.0, 633.0, 700.0])
# check-values.md section 3a (IAPWS R9-97 with IAPWS-95 densities at 0.101325 MPa, computed)
IAPWS_TABLE = {
    20.0: (998.2072, [1.339608, 1.337817, 1.336326, 1.335883, 1.333350, 1.333024, 1.332102, 1.330519]),
    25.0: (997.0476, [1.339104, 1.337317, 1.335829, 1.335386, 1.332859, 1.332534, 1.331614, 1.330036]),
    37.0: (993.3298, [1.337584, 1.335807, 1.334327, 1.333887, 1.331378, 1.331054, 1.330141, 1.328576]),
}


@pytest.mark.parametrize("t_k, rho, lam_um, expected", [
    (298.15, 997.047435, 0.5893, 1.3328581926),
    (298.15, 997.047435, 0.2265, 1.39277824),
    (773.15, 30.4758534, 0.5893, 1.00949307),
])
def test_iapws_verification_values(t_k, rho, lam_um, expected):
    # check-values.md section 3a: IAPWS R9-97 verification values (Harvey et al. 1998); tol 1e-8
    water = WaterIAPWS(temperature_c=t_k - 273.15, density_kg_m3=rho)
    assert water.n(lam_um * 1e3) == pytest.approx(expected, abs=1e-8)


@pytest.mark.parametrize("t_c", sorted(IAPWS_TABLE))
def test_iapws_table_with_iapws95_density(t_c):
    # check-values.md section 3a table (IAPWS R9-97, rho from IAPWS-95); tol 1e-6
    rho, expected = IAPWS_TABLE[t_c]
    water = get_medium("water-iapws", temperature_c=t_c, density_kg_m3=rho)
    np.testing.assert_allclose(water.n(WAVELENGTHS_NM), expected, rtol=0, atol=1e-6)


@pytest.mark.parametrize("t_c", sorted(IAPWS_TABLE))
def test_default_density_correlation(t_c):
    # check-values.md section 3a: IAPWS-95 densities at 0.101325 MPa; the Tanaka et al. 2001
    # correlation must agree within 0.01 kg/m^3, and the indices built on it within 1e-6
    rho, expected = IAPWS_TABLE[t_c]
    assert water_density_kg_m3(t_c) == pytest.approx(rho, abs=0.01)
    water = get_medium("water-iapws", temperature_c=t_c)
    assert water.density_kg_m3 == pytest.approx(rho, abs=0.01)
    np.testing.assert_allclose(water.n(WAVELENGTHS_NM), expected, rtol=0, atol=1e-6)


def test_water_dn_dt():
    # check-values.md section 3a: dn/dT at 589.3 nm = -0.98e-4 /K (20-25 degC); tol 0.02e-4
    n20 = get_medium("water-iapws", temperature_c=20.0).n(589.3)
    n25 = get_medium("water-iapws", temperature_c=25.0).n(589.3)
    assert (n25 - n20) / 5.0 == pytest.approx(-0.98e-4, abs=0.02e-4)


def test_daimon_masumura_values():
    # check-values.md section 3b (Daimon & Masumura 2007, 20 degC, computed); tol 1e-6
    water = get_medium("water-daimon")
    lam = [450.0, 510.0, 520.0, 587.6, 589.26, 600.0, 633.0, 700.0]
    expected = [1.339608, 1.336327, 1.335884, 1.333402, 1.333350, 1.333023, 1.332101, 1.330518]
    np.testing.assert_allclose(water.n(lam), expected, rtol=0, atol=1e-6)
    # check-values.md section 3a check value: IAPWS and Daimon agree at 589.26 nm, 20 degC
    iapws = get_medium("water-iapws", temperature_c=20.0)
    assert iapws.n(589.26) == pytest.approx(1.333350, abs=1e-6)
    # check-values.md section 3b group index (computed); values quoted to 1e-5
    np.testing.assert_allclose(water.group_index([510.0, 520.0, 600.0]),
                               [1.35957, 1.35834, 1.35089], rtol=0, atol=1e-5)


def test_polymer_tables():
    # check-values.md section 3c formula check values (Sultanova 2009, Ma 2003, Kasarova 2007); tol 1e-4
    lam = [436.8, 587.6, 600.0, 632.8, 833.0]
    table = {
        "ps-sultanova": [1.6170, 1.5916, 1.5904, 1.5875, 1.5770],
        "ps-ma": [1.5983, 1.5844, 1.5838, 1.5824, 1.5777],
        "pmma-sultanova": [1.5021, 1.4906, 1.4900, 1.4887, 1.4837],
        "pmma-kasarova": [1.5023, 1.4914, 1.4907, 1.4890, 1.4839],
    }
    for name, expected in table.items():
        np.testing.assert_allclose(get_medium(name).n(lam), expected, rtol=0, atol=1e-4, err_msg=name)
    # check-values.md section 3c PS group index (computed); tol 1e-4
    np.testing.assert_allclose(get_medium("ps-sultanova").group_index([510.0, 520.0, 600.0]),
                               [1.6840, 1.6788, 1.6476], rtol=0, atol=1e-4)


@pytest.mark.parametrize("name", MEDIA)
def test_group_index_equals_central_difference(name):
    # check-values.md section 3 test use: n_g = n - lambda dn/dlambda by central difference
    medium = get_medium(name)
    lam = np.array([480.0, 550.0, 640.0, 800.0])
    h = 1e-3
    numeric = medium.n(lam) - lam * (medium.n(lam + h) - medium.n(lam - h)) / (2 * h)
    np.testing.assert_allclose(medium.group_index(lam), numeric, rtol=0, atol=1e-9)
    assert np.all(medium.group_index(lam) > medium.n(lam))  # normal dispersion in the visible


def test_outside_validity_range_raises_or_warns():
    ps = get_medium("ps-sultanova")
    assert ps.valid_nm == (436.8, 1052.0)
    with pytest.raises(InputError, match="validity range"):
        ps.n(400.0)
    with pytest.raises(InputError, match="validity range"):
        ps.group_index([500.0, 1200.0])
    loose = get_medium("ps-sultanova", extrapolate=True)
    with pytest.warns(FitWarning, match="extrapolated"):
        value = loose.n(400.0)
    assert 1.6 < value < 1.7
    with pytest.raises(InputError, match="validity range"):
        get_medium("water-iapws").n(1500.0)


def test_user_media_match_named_formulas():
    ma = Cauchy(1.5725, 3108.0e-6, 3.4779e-4, valid_nm=(390.0, 1310.0))
    np.testing.assert_allclose(ma.n([450.0, 600.0]), get_medium("ps-ma").n([450.0, 600.0]), rtol=1e-14)
    daimon = Sellmeier((5.684027565e-1, 1.726177391e-1, 2.086189578e-2, 1.130748688e-1),
                       (5.101829712e-3, 1.821153936e-2, 2.620722293e-2, 1.069792721e1))
    np.testing.assert_allclose(daimon(np.array([450.0, 600.0])),
                               get_medium("water-daimon").n([450.0, 600.0]), rtol=1e-14)
    assert daimon.valid_nm == (0.0, np.inf)
    bounded = Cauchy(1.5, 0.004, valid_nm=(400.0, 800.0))
    with pytest.raises(InputError, match="400-800 nm"):
        bounded.n(900.0)


def test_bad_media_inputs():
    with pytest.raises(InputError, match="equally long"):
        Sellmeier((1.0, 0.5), (0.01,))
    with pytest.raises(InputError, match="finite"):
        Cauchy(float("nan"))
    with pytest.raises(InputError, match="unknown medium"):
        get_medium("glycerol")
    with pytest.raises(InputError, match="no temperature dependence"):
        get_medium("ps-sultanova", temperature_c=25.0)
    with pytest.raises(InputError, match="no temperature dependence"):
        get_medium("water-daimon", temperature_c=25.0)
    assert get_medium("water-daimon", temperature_c=20.0).n(600.0) == pytest.approx(1.333023, abs=1e-6)
    with pytest.raises(InputError, match="0-40 degC"):
        get_medium("water-iapws", temperature_c=60.0)
    hot = get_medium("water-iapws", temperature_c=60.0, density_kg_m3=983.2)
    assert 1.32 < hot.n(589.3) < 1.33
    with pytest.raises(InputError, match="IAPWS R9-97 range"):
        WaterIAPWS(temperature_c=600.0, density_kg_m3=100.0)
    with pytest.raises(InputError, match="positive and finite"):
        get_medium("water-iapws").n([500.0, -1.0])
    with pytest.raises(InputError, match="no real index"):
        Sellmeier((1.0,), (0.25,)).n(500.0)  # on the pole lambda^2 = C
