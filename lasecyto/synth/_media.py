"""Dispersion of water and standard air, written independently for the generator.

The generator keeps its own copies of these formulas so that the analysis code it
is used to test is checked against an independent implementation (and, for air,
a different formula from the analysis code's default).
"""

from __future__ import annotations

import numpy as np

__all__ = ["water_index_daimon"]

# Daimon & Masumura (2007), Appl. Opt. 46, 3811: water at 20.0 degC, 4-term Sellmeier,
# n^2 - 1 = sum_i B_i lambda^2 / (lambda^2 - C_i), lambda in um, C_i in um^2.
_DAIMON_B = np.array([5.684027565e-1, 1.726177391e-1, 2.086189578e-2, 1.130748688e-1])
_DAIMON_C = np.array([5.101829712e-3, 1.821153936e-2, 2.620722293e-2, 1.069792721e1])


def water_index_daimon(wavelength_um):
    """Refractive index of liquid water at 20 degC (Daimon & Masumura 2007).

    Parameters
    ----------
    wavelength_um : float or array_like
        Vacuum wavelength in micrometres (fitted range 0.182-1.129 um).

    Returns
    -------
    n : float or ndarray
        Refractive index, same shape as the input.
    """
    lam2 = np.asarray(wavelength_um, dtype=float)[..., None] ** 2
    n2 = 1.0 + np.sum(_DAIMON_B * lam2 / (lam2 - _DAIMON_C), axis=-1)
    return np.sqrt(n2)


def _water_dn_dlambda_per_um(wavelength_um):
    """Analytic derivative dn/dlambda (per um) of :func:`water_index_daimon`."""
    lam = np.asarray(wavelength_um, dtype=float)
    lam2 = lam[..., None] ** 2
    # d/dlam [B lam^2 / (lam^2 - C)] = -2 B C lam / (lam^2 - C)^2
    dn2 = np.sum(-2.0 * _DAIMON_B * _DAIMON_C * lam[..., None] / (lam2 - _DAIMON_C) ** 2, axis=-1)
    return dn2 / (2.0 * water_index_daimon(lam))


def _water_group_index(wavelength_um):
    """Group index n - lambda dn/dlambda of water at 20 degC."""
    lam = np.asarray(wavelength_um, dtype=float)
    return water_index_daimon(lam) - lam * _water_dn_dlambda_per_um(lam)


def _air_index_ciddor(wavelength_vacuum_nm):
    """Refractive index of standard dry air, Ciddor (1996) standard-air dispersion.

    Ciddor 1996, Appl. Opt. 35, 1566 (15 degC, 101.325 kPa, 450 ppm CO2):
    n - 1 = 5.792105e-2/(238.0185 - s^2) + 1.67917e-3/(57.362 - s^2), s = 1/lambda_vac in 1/um.
    """
    s2 = (1e3 / np.asarray(wavelength_vacuum_nm, dtype=float)) ** 2
    return 1.0 + 5.792105e-2 / (238.0185 - s2) + 1.67917e-3 / (57.362 - s2)


def _vacuum_to_air_nm(wavelength_vacuum_nm):
    """Air wavelength (nm) of a vacuum wavelength (nm), Ciddor 1996 standard air."""
    lam = np.asarray(wavelength_vacuum_nm, dtype=float)
    return lam / _air_index_ciddor(lam)


def _air_to_vacuum_nm(wavelength_air_nm):
    """Vacuum wavelength (nm) of an air wavelength (nm), Ciddor 1996 standard air.

    Fixed-point iteration lambda_vac = lambda_air * n(lambda_vac); eight steps reach
    machine precision in the visible (each step gains a factor ~3e-4).
    """
    lam_air = np.asarray(wavelength_air_nm, dtype=float)
    lam_vac = lam_air * 1.0
    for _ in range(8):
        lam_vac = lam_air * _air_index_ciddor(lam_vac)
    return lam_vac
