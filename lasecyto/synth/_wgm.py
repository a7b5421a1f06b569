"""Whispering-gallery resonances of a dye-doped bead, solved independently for the generator.

The generator must not share code with the analysis it is used to test, so this module
has its own resonance solver.  It looks for the *complex* roots of the Mie
characteristic equations with the outgoing Riccati-Hankel function
xi_l(x) = x h_l^(1)(x) (Bohren & Huffman 1983), written without poles:

- TE: g(x) = m psi_l'(m x) xi_l(x) - psi_l(m x) xi_l'(x) = 0
- TM: g(x) = psi_l'(m x) xi_l(x) - m psi_l(m x) xi_l'(x) = 0

with psi_l(z) = z j_l(z), m = n_bead / n_medium and x = pi n_medium D / lambda0.  The
derivative g'(x) follows from the Riccati-Bessel equation f''(z) = (l(l+1)/z^2 - 1) f(z),
so Newton's method runs on all modes at once in complex arithmetic, started from the
Lam, Leung & Young (1992) asymptotic size parameter of the requested radial order.  A
root x = x_r - i x_i gives the vacuum resonance lambda0 = pi n_medium D / x_r and the
radiation-limited Q = x_r / (2 x_i).  (The analysis code uses the real-root form with
y_l instead of h_l; the two differ by a few 1e-6 relative, a model difference the
analysis must tolerate, as it would with measured data.)

Dispersive indices are solved self-consistently by fixed-point iteration on lambda0.
Polystyrene microspheres follow the Cauchy fit of Ma et al. (2003), Phys. Med. Biol.
48, 4165: n = 1.5725 + 3108/lambda^2 + 3.4779e8/lambda^4 (lambda in nm, 390-1310 nm).
"""

from __future__ import annotations

import numpy as np
from scipy.special import ai_zeros, spherical_jn, spherical_yn

from ..exceptions import InputError
from ._media import water_index_daimon

__all__ = ["polystyrene_index_ma", "wgm_resonances"]

# Ma et al. 2003: n = A + B / lambda^2 + C / lambda^4, lambda in nm.
_PS_MA = (1.5725, 3108.0, 3.4779e8)


def polystyrene_index_ma(wavelength_nm):
    """Refractive index of polystyrene microspheres (Ma et al. 2003), vacuum wavelength in nm."""
    lam = np.asarray(wavelength_nm, dtype=float)
    a, b, c = _PS_MA
    return a + b / lam**2 + c / lam**4


# zeros of Ai(-z): alpha_1 = 2.338107, alpha_2 = 4.087949, alpha_3 = 5.520560, alpha_4 = 6.786708
_AIRY_ZEROS = np.concatenate([[np.nan], -ai_zeros(4)[0]])


def _start(l, m, te, n):
    """Lam, Leung & Young (1992) size parameter through the nu^(-2/3) term (starting point)."""
    nu = l + 0.5
    alpha = _AIRY_ZEROS[np.asarray(n, dtype=int)]
    p = np.where(te, m, 1.0 / m)
    s = np.sqrt(m * m - 1.0)
    c1, c2 = 2.0 ** (-1.0 / 3.0), 2.0 ** (-2.0 / 3.0)
    mx = (nu + c1 * alpha * nu ** (1.0 / 3.0) - p / s + 0.3 * c2 * alpha**2 * nu ** (-1.0 / 3.0)
          - c1 * p * (m * m - 2.0 * p * p / 3.0) * alpha * nu ** (-2.0 / 3.0) / s**3)
    return mx / m


def _riccati(l, z, hankel):
    """f, f' and f'' of psi_l(z) = z j_l(z) (or xi_l(z) = z h_l(z) when ``hankel``).

    f'(z) = z f_{l-1}(z)/z ... written as z b_{l-1}(z) - l b_l(z) for b = j_l or h_l.
    """
    lm1 = l - 1
    b0, b1 = spherical_jn(lm1, z), spherical_jn(l, z)
    if hankel:
        b0 = b0 + 1j * spherical_yn(lm1, z)
        b1 = b1 + 1j * spherical_yn(l, z)
    f = z * b1
    df = z * b0 - l * b1
    ddf = (l * (l + 1.0) / z**2 - 1.0) * f
    return f, df, ddf


def _newton_complex(l, m, te, x0, *, tol=1e-13, max_iter=50):
    """Complex roots of g(x) for every mode, Newton from ``x0`` (arrays of one shape)."""
    x = np.asarray(x0, dtype=complex).copy()
    for _ in range(max_iter):
        psi, dpsi, ddpsi = _riccati(l, m * x, hankel=False)
        xi, dxi, ddxi = _riccati(l, x, hankel=True)
        g = np.where(te, m * dpsi * xi - psi * dxi, dpsi * xi - m * psi * dxi)
        dg = np.where(te, m * m * ddpsi * xi - psi * ddxi,
                      m * ddpsi * xi + (1.0 - m * m) * dpsi * dxi - m * psi * ddxi)
        step = g / dg
        x = x - step
        if np.all(np.abs(step) <= tol * np.abs(x)):
            return x
    return np.where(np.abs(step) <= 1e-9 * np.abs(x), x, np.nan)


def wgm_resonances(diameter_um, *, polarization, l, radial_order, n_bead=polystyrene_index_ma,
                   n_medium=None, index_offset=0.0, max_iter=40):
    """Vacuum resonance wavelengths and radiation-limited Q of bead modes.

    Parameters
    ----------
    diameter_um : float or array_like
        Bead diameter(s) in um; broadcast against the mode arrays.
    polarization : array_like of str
        'TE' or 'TM' per mode.
    l, radial_order : array_like of int
        Angular mode number and radial order (1-3) per mode.
    n_bead : callable
        Bead index as a function of vacuum wavelength in nm (default polystyrene
        microspheres, Ma et al. 2003).
    n_medium : callable, optional
        Index of the surroundings as a function of vacuum wavelength in nm; default
        water at 20 degC (Daimon & Masumura 2007) plus ``index_offset``.
    index_offset : float or array_like
        Wavelength-independent index added to the default medium (e.g. cytoplasm
        above water); broadcast against the mode arrays.

    Returns
    -------
    wavelength_nm, q_rad : ndarray
        Resonance wavelength (vacuum) and radiation-limited Q of every mode.

    Raises
    ------
    InputError
        For a bead not denser than its medium, an unknown polarization, or a root that
        did not converge to the requested radial order.
    """
    pol = np.asarray(polarization)
    if not np.all(np.isin(pol, ("TE", "TM"))):
        raise InputError("unknown polarization", field="polarization", expected="'TE' or 'TM'",
                         found=repr(np.unique(pol[~np.isin(pol, ("TE", "TM"))]).tolist()))
    ls = np.asarray(l)
    if ls.size and (np.any(ls != np.round(ls)) or np.any(ls < 1)):
        raise InputError("angular mode numbers must be integers >= 1", field="l", expected="integers >= 1",
                         found=repr(np.unique(ls)[:4].tolist()))
    ls = ls.astype(np.int64)
    order = np.asarray(radial_order, dtype=int)
    if np.any(order < 1) or np.any(order > 3):
        raise InputError("radial order out of range", field="radial_order", expected="1-3",
                         found=repr(np.unique(order).tolist()))
    d_nm = np.asarray(diameter_um, dtype=float) * 1e3
    offset = np.asarray(index_offset, dtype=float)
    d_nm, pol, ls, order, offset = np.broadcast_arrays(d_nm, pol, ls, order, offset)
    te = pol == "TE"
    if n_medium is None:
        def medium(lam):
            return water_index_daimon(lam * 1e-3) + offset
    else:
        def medium(lam):
            return np.asarray(n_medium(lam), dtype=float) + offset

    lam = np.full(d_nm.shape, 600.0)
    # cheap start: the asymptotic size parameter made self-consistent in lambda
    for _ in range(30):
        m = np.asarray(n_bead(lam), dtype=float) / medium(lam)
        if np.any(m <= 1.0):
            raise InputError("a whispering-gallery bead must be denser than its surroundings",
                             field="n_bead", expected="n_bead > n_medium",
                             found=f"m = {float(np.min(m)):.4f}")
        lam = np.pi * medium(lam) * d_nm / _start(ls, m, te, order)
    x = prev_guess = None
    lam_prev = h_prev = None
    for _ in range(max_iter):
        nb, nm = np.asarray(n_bead(lam), dtype=float), medium(lam)
        m = nb / nm
        if np.any(m <= 1.0):
            raise InputError("a whispering-gallery bead must be denser than its surroundings",
                             field="n_bead", expected="n_bead > n_medium",
                             found=f"m = {float(np.min(m)):.4f}")
        guess = _start(ls, m, te, order)
        # start from the previous root moved by the change of the asymptotic estimate
        x = _newton_complex(ls, m, te, guess if x is None else x + (guess - prev_guess))
        prev_guess = guess
        # the root must belong to the requested radial order: nearer its own guess than
        # to the guesses of the neighbouring orders
        below = np.where(order > 1, _start(ls, m, te, np.maximum(order - 1, 1)), -np.inf)
        above = _start(ls, m, te, order + 1)
        ok = (np.isfinite(x.real) & (x.real > 0.5 * (guess + below))
              & (x.real < 0.5 * (guess + above)))
        if not np.all(ok):
            bad = np.flatnonzero(~ok.ravel())[0]
            raise InputError("resonance did not converge to the requested radial order",
                             field="radial_order",
                             expected=f"a root near x = {guess.ravel()[bad]:.3f}",
                             found=f"x = {x.ravel()[bad]:.6f} for {pol.ravel()[bad]} "
                                   f"l={int(ls.ravel()[bad])} n={int(order.ravel()[bad])}")
        h = np.pi * nm * d_nm / x.real - lam      # fixed-point residual F(lambda) - lambda
        if np.all(np.abs(h) < 1e-9):
            lam = lam + h
            break
        if lam_prev is None:
            new = lam + h
        else:                                     # secant step on h(lambda) = 0
            denom = h - h_prev
            safe = np.abs(denom) > 1e-15
            new = np.where(safe, lam - h * (lam - lam_prev) / np.where(safe, denom, 1.0), lam + h)
        lam_prev, h_prev, lam = lam, h, new
    q_rad = x.real / (2.0 * np.abs(x.imag))
    return lam, q_rad
