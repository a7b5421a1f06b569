"""Transverse-mode ladder of a two-mirror cavity: Gouy fraction, g-parameters and the cell lens.

A stable two-mirror resonator with g_i = 1 - L / R_i resonates at

    nu_qmn = FSR * (q + (N + 1) zeta),   zeta = arccos(+-sqrt(g1 g2)) / pi

(Kogelnik & Li 1966, Appl. Opt. 5, 1550; sign + when g1, g2 > 0, - when both
< 0), so transverse order N sits N zeta free spectral ranges above the
fundamental of the same q: the ladder spacing over the FSR is the Gouy
fraction zeta.  A planar cavity holding a cell that acts as a thin lens of
focal length f on one mirror behaves as a flat mirror facing a mirror of
radius f: g1 = 1, g2 = 1 - L / f, hence f = L / sin^2(pi zeta).  All lengths
are geometric (a uniform medium in the gap changes the wavelength, not the
g-parameters).
"""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = [
    "gouy_fraction",
    "lens_focal_length_um",
    "gouy_fraction_of_lens",
    "flat_mirror_waist_um",
    "cell_lens_focal_length_um",
]


def _positive(name, value):
    a = np.asarray(value, dtype=float)
    if not np.all(np.isfinite(a) & (a > 0)):
        raise InputError("must be a positive length", field=name, expected="> 0", found=repr(value))
    return a


def _out(a):
    a = np.asarray(a, dtype=float)
    return float(a) if a.ndim == 0 else a


def gouy_fraction(g1, g2):
    """Transverse-mode spacing over the free spectral range, arccos(+-sqrt(g1 g2)) / pi.

    Parameters
    ----------
    g1, g2 : float or array
        Mirror g-parameters 1 - L / R_i (R_i > 0 for a concave mirror, inf for flat).

    Returns
    -------
    float or ndarray
        zeta in [0, 1]: in (0, 1/2] for g1, g2 >= 0, in [1/2, 1) for g1, g2 < 0.
    """
    g1 = np.asarray(g1, dtype=float)
    g2 = np.asarray(g2, dtype=float)
    prod = g1 * g2
    if np.any(~np.isfinite(prod)) or np.any((prod < 0) | (prod > 1)):
        raise InputError("resonator is not stable", field="g1, g2", expected="0 <= g1 g2 <= 1",
                         found=f"g1 g2 = {np.ravel(prod)[:3].tolist()}")
    sign = np.where((g1 < 0) & (g2 < 0), -1.0, 1.0)
    return _out(np.arccos(sign * np.sqrt(prod)) / np.pi)


def lens_focal_length_um(gouy, gap_um, *, gouy_err=None):
    """Focal length of a thin lens on one flat mirror from the Gouy fraction, L / sin^2(pi zeta).

    Parameters
    ----------
    gouy : float or array
        Gouy fraction zeta of the transverse ladder, 0 < zeta <= 1/2.
    gap_um : float
        Mirror gap L (geometric), um.
    gouy_err : float or array, optional
        1-sigma error of ``gouy``; the error of f is propagated linearly.

    Returns
    -------
    f_um : float or ndarray
        Focal length (um); NaN where zeta is outside (0, 1/2].
    f_err_um : float or ndarray
        Its 1-sigma error (NaN without ``gouy_err``).
    """
    L = _positive("gap_um", gap_um)
    z = np.asarray(gouy, dtype=float)
    ok = np.isfinite(z) & (z > 0) & (z <= 0.5)
    zz = np.where(ok, z, 0.25)
    s = np.sin(np.pi * zz)
    f = np.where(ok, L / s**2, np.nan)
    if gouy_err is None:
        err = np.full(np.shape(f), np.nan)
    else:
        dfdz = 2.0 * np.pi * L * np.cos(np.pi * zz) / s**3
        err = np.where(ok, np.abs(dfdz) * np.asarray(gouy_err, dtype=float), np.nan)
    return _out(f), _out(err)


def gouy_fraction_of_lens(focal_length_um, gap_um):
    """Gouy fraction of a planar cavity with a thin lens of focal length f on one mirror.

    g1 = 1, g2 = 1 - L / f (stable for f >= L): zeta = arccos(sqrt(1 - L / f)) / pi.
    """
    f = _positive("focal_length_um", focal_length_um)
    L = _positive("gap_um", gap_um)
    if np.any(f < L):
        raise InputError("lens too strong for a stable cavity", field="focal_length_um",
                         expected=f">= the gap ({np.ravel(L)[0]:g} um)", found=repr(focal_length_um))
    return gouy_fraction(1.0, 1.0 - L / f)


def flat_mirror_waist_um(wavelength_nm, index, gap_um, radius_um):
    """Beam waist (1/e^2 intensity radius) on the flat mirror of a flat-curved cavity.

    w0^2 = (lambda / (pi n)) sqrt(L (R - L)) (half-symmetric resonator, R > L);
    the Rayleigh range is z_R = sqrt(L (R - L)).

    Returns
    -------
    w0_um, rayleigh_range_um : float
    """
    lam_um = _positive("wavelength_nm", wavelength_nm) * 1e-3
    n = _positive("index", index)
    L = _positive("gap_um", gap_um)
    R = _positive("radius_um", radius_um)
    if np.any(R <= L):
        raise InputError("mirror radius must exceed the gap", field="radius_um", expected="> gap_um",
                         found=repr(radius_um))
    z_r = np.sqrt(L * (R - L))
    return _out(np.sqrt(lam_um / (np.pi * n) * z_r)), _out(z_r)


def cell_lens_focal_length_um(radius_um, n_cell, n_medium):
    """Focal length of a cell acting as a thin plano-convex lens in a medium, n_m R / (n_c - n_m).

    Parameters
    ----------
    radius_um : float
        Radius of curvature of the cell surface (um).
    n_cell, n_medium : float
        Refractive indices of the cell and of the medium around it (n_cell > n_medium).
    """
    R = _positive("radius_um", radius_um)
    nc = np.asarray(n_cell, dtype=float)
    nm = _positive("n_medium", n_medium)
    if np.any(~np.isfinite(nc)) or np.any(nc <= nm):
        raise InputError("a converging cell lens needs n_cell > n_medium", field="n_cell",
                         expected=f"> {np.ravel(nm)[0]:g}", found=repr(n_cell))
    return _out(nm * R / (nc - nm))
