"""Transverse ladder formulas against check-values section 5 (Kogelnik & Li 1966, Appl. Opt. 5, 1550)."""

import numpy as np
import pytest

from lasecyto.cavity import (
    cell_lens_focal_length_um,
    flat_mirror_waist_um,
    gouy_fraction,
    gouy_fraction_of_lens,
    lens_focal_length_um,
)
from lasecyto.exceptions import InputError


def test_gouy_fraction_check_values():
    # check-values.md section 5 (computed there from Kogelnik & Li's formula): confocal -> 0.5,
    # g1 = g2 = 0.5 -> 1/3, g1 = 1, g2 = 0.9 -> 0.10242, g1 = g2 = -0.5 -> 2/3 (5 decimals as printed)
    assert gouy_fraction(0.0, 0.0) == pytest.approx(0.5, abs=1e-12)
    assert gouy_fraction(0.5, 0.5) == pytest.approx(1 / 3, abs=1e-12)
    assert gouy_fraction(1.0, 0.9) == pytest.approx(0.10242, abs=5e-6)
    assert gouy_fraction(-0.5, -0.5) == pytest.approx(2 / 3, abs=1e-12)
    with pytest.raises(InputError, match="not stable"):
        gouy_fraction(1.0, 1.5)


# check-values.md section 5, cell-lens worked example: lambda = 515 nm, n = 1.37, L = 15 um, FSR = 6.4532 nm,
# 7.294 THz; columns f (um), g2, Gouy fraction, transverse spacing (nm, GHz), w0 on the flat mirror (um), z_R (um)
TABLE = [
    (100.0, 0.85000, 0.12659, 0.8169, 923.4, 2.067, 35.71),
    (381.4, 0.96067, 0.06355, 0.4101, 463.5, 2.978, 74.14),
    (1000.0, 0.98500, 0.03908, 0.2522, 285.1, 3.814, 121.55),
]


@pytest.mark.parametrize("f, g2, zeta, dlam, dnu, w0, zr", TABLE)
def test_cell_lens_worked_table(f, g2, zeta, dlam, dnu, w0, zr):
    # tolerances: half a unit of the last printed digit
    assert 1 - 15.0 / f == pytest.approx(g2, abs=5e-6)
    z = gouy_fraction_of_lens(f, 15.0)
    assert z == pytest.approx(zeta, abs=5e-6)
    assert 6.4532 * z == pytest.approx(dlam, abs=5e-5)
    assert 7294.0 * z == pytest.approx(dnu, abs=0.1)       # the FSR in GHz is printed to 4 digits
    w, r = flat_mirror_waist_um(515.0, 1.37, 15.0, f)
    assert w == pytest.approx(w0, abs=5e-4)
    assert r == pytest.approx(zr, abs=5e-3)
    # the inverse used on measured ladders: spacing / FSR -> Gouy fraction -> focal length
    f_back, f_err = lens_focal_length_um(dlam / 6.4532, 15.0, gouy_err=1e-4)
    assert f_back == pytest.approx(f, rel=2e-3)      # dlam is printed to 4 digits
    assert f_err > 0


def test_cell_lens_focal_length_formula():
    # check-values.md section 5: R_c = 10 um, n_c = 1.37, n_m = 1.335 -> f = n_m R_c / (n_c - n_m) = 381.4 um
    # (formula marked "from memory" there; the number is its evaluation)
    assert cell_lens_focal_length_um(10.0, 1.37, 1.335) == pytest.approx(381.43, abs=5e-3)
    with pytest.raises(InputError, match="n_cell > n_medium"):
        cell_lens_focal_length_um(10.0, 1.33, 1.335)


def test_focal_length_error_propagation_and_range():
    # d f / d zeta = 2 pi L cos(pi zeta) / sin^3(pi zeta); numerical derivative as the independent check
    z, L, dz = 0.08, 20.0, 1e-7
    f, err = lens_focal_length_um(z, L, gouy_err=1e-3)
    num = (lens_focal_length_um(z + dz, L)[0] - lens_focal_length_um(z - dz, L)[0]) / (2 * dz)
    assert err == pytest.approx(abs(num) * 1e-3, rel=1e-6)
    f_bad, _ = lens_focal_length_um(np.array([0.0, 0.7, np.nan]), L)
    assert np.isnan(f_bad).all()
    with pytest.raises(InputError, match="gap_um"):
        lens_focal_length_um(0.1, -1.0)
    with pytest.raises(InputError, match="too strong"):
        gouy_fraction_of_lens(10.0, 15.0)
