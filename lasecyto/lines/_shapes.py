"""Unit-area line profiles integrated exactly over detector pixels.

Pixel ``i`` covers ``[i - 0.5, i + 0.5]``.  A profile of width ``w`` (full
width at half maximum) centred at ``c`` is written in the reduced coordinate
``u = (x - c) / w``; its cumulative distribution gives the fraction of the
line falling into each pixel, so no sampling error enters the model.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from ..exceptions import InputError

__all__ = ["SHAPES", "GAUSSIAN_FWHM_PER_SIGMA", "line_profile_pixels"]

SHAPES = ("lorentzian", "gaussian")

#: FWHM of a Gaussian in units of its standard deviation, 2 sqrt(2 ln 2).
GAUSSIAN_FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))

_SQRT_HALF = np.sqrt(0.5)
_INV_SQRT_2PI = 1.0 / np.sqrt(2.0 * np.pi)


def check_shape(shape):
    """Return ``shape`` if it names a known profile, else raise InputError."""
    if shape not in SHAPES:
        raise InputError("unknown line shape", field="shape",
                         expected=" or ".join(repr(s) for s in SHAPES), found=repr(shape))
    return shape


def cdf(u, shape):
    """Cumulative fraction of a unit-area profile below reduced coordinate ``u``."""
    if shape == "lorentzian":
        return 0.5 + np.arctan(2.0 * u) / np.pi
    return 0.5 * special.erfc(-GAUSSIAN_FWHM_PER_SIGMA * _SQRT_HALF * u)


def pdf(u, shape):
    """Density of the unit-area profile in the reduced coordinate ``u``."""
    if shape == "lorentzian":
        return (2.0 / np.pi) / (1.0 + 4.0 * u * u)
    k = GAUSSIAN_FWHM_PER_SIGMA
    return k * _INV_SQRT_2PI * np.exp(-0.5 * (k * u) ** 2)


def pixel_terms(x_px, center_px, fwhm_px, shape):
    """Pixel fractions and their derivatives with respect to centre and width.

    Parameters
    ----------
    x_px : array
        Pixel centres.
    center_px, fwhm_px : array
        Broadcastable against ``x_px``.
    shape : str
        Profile name.

    Returns
    -------
    frac, dfrac_dcenter, dfrac_dfwhm : arrays
        Fraction of the line in each pixel and its partial derivatives.
    """
    inv_w = 1.0 / fwhm_px
    u_hi = (x_px + 0.5 - center_px) * inv_w
    u_lo = (x_px - 0.5 - center_px) * inv_w
    if shape == "lorentzian":
        # arctan difference written as one arctan: exact and free of cancellation in the far wings
        a, b = 2.0 * u_hi, 2.0 * u_lo
        frac = np.arctan2(a - b, 1.0 + a * b) / np.pi
    else:
        frac = cdf(u_hi, shape) - cdf(u_lo, shape)
    q_hi = pdf(u_hi, shape)
    q_lo = pdf(u_lo, shape)
    d_center = -(q_hi - q_lo) * inv_w
    d_fwhm = -(u_hi * q_hi - u_lo * q_lo) * inv_w
    return frac, d_center, d_fwhm


def line_profile_pixels(pixel_edges_or_centres, center_px, fwhm_px, *, shape="lorentzian",
                        edges=False):
    """Fraction of a unit-area line collected by each pixel.

    Parameters
    ----------
    pixel_edges_or_centres : array_like, 1-D
        Pixel centres (each pixel spans centre +- 0.5), or, with ``edges=True``,
        the M + 1 increasing pixel edges of M pixels of any widths.
    center_px, fwhm_px : float or array_like
        Line centre and full width at half maximum, in pixels; arrays broadcast
        against each other and add leading dimensions to the result.
    shape : {"lorentzian", "gaussian"}
        Line profile; both are parametrised by their FWHM.
    edges : bool
        Interpret the first argument as pixel edges.

    Returns
    -------
    numpy.ndarray
        Shape ``broadcast(center_px, fwhm_px).shape + (M,)``: the exact integral
        of the profile over each pixel (CDF difference).
    """
    check_shape(shape)
    x = np.asarray(pixel_edges_or_centres, dtype=float)
    if x.ndim != 1:
        raise InputError("pixel positions must be one-dimensional", field="pixel_edges_or_centres",
                         expected="1-D array", found=f"{x.ndim}-D array")
    c = np.asarray(center_px, dtype=float)[..., None]
    w = np.asarray(fwhm_px, dtype=float)[..., None]
    if np.any(~(w > 0)):
        raise InputError("line width must be positive", field="fwhm_px",
                         expected="> 0", found=f"min {np.min(w)}")
    if edges:
        if x.size < 2 or np.any(np.diff(x) <= 0):
            raise InputError("pixel edges must increase", field="pixel_edges_or_centres",
                             expected="at least 2 increasing edges", found=f"{x.size} values")
        f = cdf((x - c) / w, shape)
        return np.diff(f, axis=-1)
    frac, _, _ = pixel_terms(x, c, w, shape)
    return frac
