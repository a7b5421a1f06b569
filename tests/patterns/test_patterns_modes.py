"""HG/LG intensities against check-values.md section 5 (Kogelnik & Li 1966, Appl. Opt. 5, 1550)."""

import math

import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.patterns import hg_intensity, lg_intensity, mode_intensity, parse_order


def _grid(half=8.0, n=801):
    g = np.linspace(-half, half, n)
    xx, yy = np.meshgrid(g, g)
    return xx, yy, (g[1] - g[0]) ** 2


@pytest.mark.parametrize("m,n", [(0, 0), (1, 0), (1, 1), (2, 0)])
def test_hg_normalisation(m, n):
    xx, yy, da = _grid()
    # check-values.md section 5: integrals of the formulas = 1.000000 (tolerance 1e-6)
    assert abs(hg_intensity(xx, yy, m, n, w=1.0).sum() * da - 1.0) < 1e-6


@pytest.mark.parametrize("p,l", [(0, 0), (0, 1), (1, 0), (0, 2)])
def test_lg_normalisation(p, l):
    xx, yy, da = _grid()
    # check-values.md section 5: integrals of the formulas = 1.000000 (tolerance 1e-6)
    assert abs(lg_intensity(np.hypot(xx, yy), p, l, w=1.0).sum() * da - 1.0) < 1e-6


def test_check_values_peaks_and_nodes():
    s = 1 / math.sqrt(2)
    # check-values.md section 5 (Kogelnik & Li 1966), values to 5 decimals as tabulated (atol 5e-6)
    assert hg_intensity(0.0, 0.0, 0, 0, w=1.0) == pytest.approx(0.63662, abs=5e-6)
    assert hg_intensity(0.0, 0.0, 2, 0, w=1.0) == pytest.approx(0.31831, abs=5e-6)
    assert lg_intensity(s, 0, 1, w=1.0) == pytest.approx(0.23420, abs=5e-6)
    assert lg_intensity(s, 0, 2, w=1.0) == pytest.approx(0.11710, abs=5e-6)
    # HG10 maximum at x = w/sqrt(2); LG01 ring maximum at r = w/sqrt(2) (node positions, 1e-3 w on a fine grid)
    x = np.linspace(0, 2, 200001)
    assert x[np.argmax(hg_intensity(x, 0.0, 1, 0, w=1.0))] == pytest.approx(s, abs=1e-3)
    assert x[np.argmax(lg_intensity(x, 0, 1, w=1.0))] == pytest.approx(s, abs=1e-3)
    # LG10 dark ring at r = w/sqrt(2): zero there (1e-12)
    assert lg_intensity(s, 1, 0, w=1.0) < 1e-12


def test_petal_and_rotation_identities():
    xx, yy, _ = _grid(4.0, 161)
    r, phi = np.hypot(xx, yy), np.arctan2(yy, xx)
    # 2 cos^2(phi) LG01 is HG10; HG10 turned 90 deg is HG01
    np.testing.assert_allclose(lg_intensity(r, 0, 1, w=1.3, phi=phi), hg_intensity(xx, yy, 1, 0, w=1.3), atol=1e-12)
    np.testing.assert_allclose(mode_intensity("HG10", xx, yy, w=1.0, orientation_rad=math.pi / 2),
                               hg_intensity(xx, yy, 0, 1, w=1.0), atol=1e-12)


def test_bad_order_names_the_field():
    with pytest.raises(InputError, match="order"):
        parse_order("TEM01")


def test_polynomial_recurrences_match_scipy():
    # reference library: scipy.special.eval_hermite / eval_genlaguerre (the intensities use recurrences)
    from scipy import special

    from lasecyto.patterns._modes import _genlaguerre, _hermite

    t = np.linspace(-4.0, 4.0, 257)
    for n in range(1, 6):
        np.testing.assert_allclose(_hermite(n, t), special.eval_hermite(n, t), rtol=1e-12, atol=1e-9)
    u = np.linspace(0.0, 9.0, 257)
    for p in range(1, 4):
        for a in range(4):
            np.testing.assert_allclose(_genlaguerre(p, a, u), special.eval_genlaguerre(p, a, u), rtol=1e-12,
                                       atol=1e-12)
