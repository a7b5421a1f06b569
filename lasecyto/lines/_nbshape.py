"""Compiled line shapes: unit-area profiles integrated over detector pixels, with derivatives.

Pixel ``i`` covers ``[i - 0.5, i + 0.5]``.  Every shape gives, for the pixels of
a window, the fraction of a unit-area line falling into each pixel and its
derivatives with respect to the line's parameters:

* Lorentzian and Gaussian (parameter: FWHM ``w``): exact CDF differences at
  the pixel edges.
* Voigt (parameters: Lorentzian FWHM ``w`` and Gaussian FWHM ``w2``): the
  density is ``Re w(z) / (sigma sqrt(2 pi))`` with the Faddeeva function
  ``w`` evaluated by Weideman's rational expansion (Weideman 1994, SIAM J.
  Numer. Anal. 31, 1497; 40 terms, relative error below 1e-11 in the upper
  half plane); pixel integrals by Gauss-Legendre quadrature with a node count
  set by the FWHM (relative error below 1e-6), the centre derivative exactly
  from the edge densities.
* Instrument: an empirical pixel-integrated profile ``P(d)`` of the offset
  ``d = x - c``, stored as uniform cubic B-spline coefficients; its width
  parameter is a stretch ``s`` of it, ``P(d/s)/s`` (1 for a laser line: it is
  held at 1 in the fit and freed only to judge whether a line is wider than
  the instrument).

Shape codes: 0 Lorentzian, 1 Gaussian, 2 Voigt, 3 instrument.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

LORENTZIAN, GAUSSIAN, VOIGT, INSTRUMENT = 0, 1, 2, 3
SHAPE_CODES = {"lorentzian": LORENTZIAN, "gaussian": GAUSSIAN, "voigt": VOIGT, "instrument": INSTRUMENT}
#: parameters per line (centre, area, widths) of each shape code
PARAMS_PER_LINE = (3, 3, 4, 3)

GAUSSIAN_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))
_K = GAUSSIAN_FWHM_PER_SIGMA
_INV_PI = 1.0 / math.pi
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_INV_SQRT_PI = 1.0 / math.sqrt(math.pi)
_SQRT2 = math.sqrt(2.0)

#: Olivero & Longbothum (1977) coefficients of the Voigt FWHM
OL_A, OL_B = 0.5346, 0.2166


def _weideman_coefficients(n_terms):
    """Coefficients of Weideman's (1994) rational expansion of the Faddeeva function."""
    m = 2 * n_terms
    k = np.arange(-m + 1, m)
    scale = math.sqrt(n_terms / math.sqrt(2.0))
    t = scale * np.tan(k * np.pi / m / 2.0)
    f = np.concatenate([[0.0], np.exp(-t * t) * (scale * scale + t * t)])
    a = np.real(np.fft.fft(np.fft.fftshift(f))) / (2 * m)
    return np.ascontiguousarray(a[1:n_terms + 1][::-1]), scale


_coef, _W_L = _weideman_coefficients(40)
_W_COEF = tuple(float(c) for c in _coef)  # constants are tuples: frozen into the compiled code (and its cache)


def _gauss_legendre_rules():
    """Gauss-Legendre nodes and weights on [-1/2, 1/2] for the Voigt pixel integrals (zero-padded to 32)."""
    sizes = (4, 6, 8, 12, 16, 24, 32)
    xs, ws = [], []
    for n in sizes:
        x, w = np.polynomial.legendre.leggauss(n)
        xs.append(tuple(np.concatenate([0.5 * x, np.zeros(32 - n)]).tolist()))
        ws.append(tuple(np.concatenate([0.5 * w, np.zeros(32 - n)]).tolist()))
    return sizes, tuple(xs), tuple(ws)


QUAD_N, QUAD_X, QUAD_W = _gauss_legendre_rules()


@njit(cache=True)
def faddeeva(z):
    """Faddeeva function w(z) = exp(-z^2) erfc(-iz) for Im z >= 0 (Weideman 1994)."""
    iz = 1j * z
    den = _W_L - iz
    zz = (_W_L + iz) / den
    p = 0.0 + 0.0j
    for c in _W_COEF:
        p = p * zz + c
    return 2.0 * p / (den * den) + _INV_SQRT_PI / den


@njit(cache=True)
def voigt_fwhm(wl, wg):
    """Voigt FWHM from its Lorentzian and Gaussian FWHM (Olivero & Longbothum 1977, ~0.02 %)."""
    return OL_A * wl + math.sqrt(OL_B * wl * wl + wg * wg)


@njit(cache=True)
def voigt_density(x, wl, wg):
    """Voigt density at offset x and its derivatives (value, d/dx, d/dwl, d/dwg)."""
    sigma = wg / _K
    gamma = 0.5 * wl
    s2 = sigma * _SQRT2
    z = (x + 1j * gamma) / s2
    w = faddeeva(z)
    dw = -2.0 * z * w + 2.0j * _INV_SQRT_PI
    norm = 1.0 / (sigma * math.sqrt(2.0 * math.pi))
    v = w.real * norm
    dv_dx = dw.real * norm / s2
    dv_dgamma = -dw.imag * norm / s2
    dv_dsigma = -((dw * z).real + w.real) * norm / sigma
    return v, dv_dx, 0.5 * dv_dgamma, dv_dsigma / _K


@njit(cache=True)
def _quad_rule(fwhm):
    need = 10.0 / max(fwhm, 1e-6)
    for i in range(len(QUAD_N)):
        if QUAD_N[i] >= need:
            return i
    return len(QUAD_N) - 1


@njit(cache=True)
def bspline_profile(d, coef, start, step):
    """Cubic B-spline profile P(d) and dP/dd; zero outside the coefficients' support."""
    t = (d - start) / step
    if t < -2.0 or t > coef.size + 1.0:
        return 0.0, 0.0
    i = int(math.floor(t))
    u = t - i
    u2 = u * u
    u3 = u2 * u
    om = 1.0 - u
    wts = ((om * om * om) / 6.0, (3.0 * u3 - 6.0 * u2 + 4.0) / 6.0,
           (-3.0 * u3 + 3.0 * u2 + 3.0 * u + 1.0) / 6.0, u3 / 6.0)
    dws = (-0.5 * om * om, 0.5 * (3.0 * u2 - 4.0 * u), 0.5 * (-3.0 * u2 + 2.0 * u + 1.0), 0.5 * u2)
    val = 0.0
    der = 0.0
    for m in range(4):
        k = i - 1 + m
        if 0 <= k < coef.size:
            val += coef[k] * wts[m]
            der += coef[k] * dws[m]
    return val, der / step


def _atan_coefficients(degree=8):
    """Least-squares polynomial c(z), z = t^2, with atan(t) = t + t^3 c(t^2) on |t| <= tan(pi/8)."""
    top = math.tan(math.pi / 8.0) ** 2
    z = top * (0.5 - 0.5 * np.cos(np.pi * (np.arange(400) + 0.5) / 400))
    t = np.sqrt(z)
    f = (np.arctan(t) - t) / t ** 3
    vander = np.vander(z, degree + 1, increasing=True)
    coef = np.linalg.lstsq(vander * (t ** 3)[:, None], f * t ** 3, rcond=None)[0]
    return np.ascontiguousarray(coef[::-1])


_ATAN_C = tuple(float(c) for c in _atan_coefficients())  # max error 3e-16 on the reduced range
_TAN_PI_8 = math.tan(math.pi / 8.0)


@njit(cache=True, error_model="numpy")
def fast_atan(x):
    """arctan(x) to ~1e-15 by range reduction and a polynomial, written without branches (vectorises)."""
    ax = abs(x)
    big = ax > 1.0
    t = 1.0 / ax if big else ax
    mid = t > _TAN_PI_8
    t = (t - 1.0) / (t + 1.0) if mid else t
    z = t * t
    p = 0.0
    for c in _ATAN_C:
        p = p * z + c
    r = t + t * z * p
    r = r + 0.25 * math.pi if mid else r
    r = 0.5 * math.pi - r if big else r
    return -r if x < 0 else r


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def lorentz_edges(x0, n, c, inv, e0, e1, e2):
    """Lorentzian CDF (less 1/2), density p and u p at the n + 1 pixel edges, u = (x - c) * inv."""
    start = x0 - 0.5 - c
    for e in range(n + 1):
        u = (start + e) * inv
        e0[e] = fast_atan(2.0 * u) * _INV_PI
        p = 2.0 * _INV_PI / (1.0 + 4.0 * u * u)
        e1[e] = p
        e2[e] = u * p


@njit(cache=True, error_model="numpy")
def gauss_edges(x0, n, c, inv, e0, e1, e2):
    """Gaussian CDF, density p and u p at the n + 1 pixel edges, u = (x - c) * inv."""
    start = x0 - 0.5 - c
    for e in range(n + 1):
        u = (start + e) * inv
        v = _K * u
        e0[e] = 0.5 * math.erfc(-v / _SQRT2)
        p = _K * _INV_SQRT_2PI * math.exp(-0.5 * v * v)
        e1[e] = p
        e2[e] = u * p


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def line_terms(shape, x0, n, c, w, w2, prof, p_start, p_step, frac, dc, dw, dw2, edges):
    """Pixel fractions of a unit-area line over pixels x0 .. x0 + n - 1 and their derivatives.

    Writes ``frac`` (fraction of the line in each pixel), ``dc`` (d frac/d centre),
    ``dw`` (d frac/d width: FWHM, Lorentzian FWHM for the Voigt, stretch ``s``
    for the instrument shape) and ``dw2`` (Voigt: d frac/d Gaussian FWHM).  ``edges`` is
    scratch of shape (3, >= n + 1).
    """
    if shape == LORENTZIAN or shape == GAUSSIAN:
        inv = 1.0 / w
        e0, e1, e2 = edges[0], edges[1], edges[2]
        if shape == LORENTZIAN:
            lorentz_edges(x0, n, c, inv, e0, e1, e2)
        else:
            gauss_edges(x0, n, c, inv, e0, e1, e2)
        # unit-stride views of the upper edges (no index arithmetic in the loop, so it vectorises)
        u0, u1, u2 = edges[0, 1:n + 1], edges[1, 1:n + 1], edges[2, 1:n + 1]
        for i in range(n):
            frac[i] = u0[i] - e0[i]
            dc[i] = (e1[i] - u1[i]) * inv
            dw[i] = (e2[i] - u2[i]) * inv
    elif shape == VOIGT:
        q = _quad_rule(voigt_fwhm(w, w2))
        nq = QUAD_N[q]
        v_prev = voigt_density(x0 - 0.5 - c, w, w2)[0]
        for i in range(n):
            xc = x0 + i - c
            sf = 0.0
            sl = 0.0
            sg = 0.0
            qx, qw = QUAD_X[q], QUAD_W[q]
            for m in range(nq):
                v, _, dl, dg = voigt_density(xc + qx[m], w, w2)
                sf += qw[m] * v
                sl += qw[m] * dl
                sg += qw[m] * dg
            v_hi = voigt_density(xc + 0.5, w, w2)[0]
            frac[i] = sf
            dc[i] = -(v_hi - v_prev)
            dw[i] = sl
            dw2[i] = sg
            v_prev = v_hi
    else:
        inv = 1.0 / w
        for i in range(n):
            d = (x0 + i - c) * inv
            p, dp = bspline_profile(d, prof, p_start, p_step)
            frac[i] = p * inv
            dc[i] = -dp * inv * inv
            dw[i] = -(p + d * dp) * inv * inv


@njit(cache=True)
def profile_block(shape, x, centers, w, w2, prof, p_start, p_step, out):
    """Pixel fractions of unit-area lines (one per row of ``out``) on the contiguous pixels ``x``."""
    n = x.size
    scratch = np.empty((3, n))
    edges = np.empty((3, n + 2))
    for r in range(centers.size):
        line_terms(shape, x[0], n, centers[r], w[r], w2[r], prof, p_start, p_step, out[r],
                   scratch[0], scratch[1], scratch[2], edges)


@njit(cache=True)
def voigt_density_array(x, wl, wg, out):
    """Voigt density at the offsets ``x`` (for tests and plots)."""
    for i in range(x.size):
        out[i] = voigt_density(x[i], wl, wg)[0]


@njit(cache=True)
def line_terms_array(shape, x0, n, c, w, w2, prof, p_start, p_step):
    """(4, n) array: pixel fractions and their derivatives (centre, width, second width)."""
    out = np.zeros((4, n))
    edges = np.empty((3, n + 2))
    line_terms(shape, x0, n, c, w, w2, prof, p_start, p_step, out[0], out[1], out[2], out[3], edges)
    return out
