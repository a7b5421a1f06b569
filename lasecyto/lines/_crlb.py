"""Fisher information of the pixel-integrated line model and the Cramer-Rao bound."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError
from ._shapes import check_shape, pixel_terms

__all__ = ["crlb_center_px"]

#: variance floor (e^2): keeps a pixel with (nearly) zero or negative model finite-weighted
VARIANCE_FLOOR_E2 = 0.5


def model_variance(total_e, read_noise_e):
    """Variance of a pixel under the Poisson + read-noise approximation, mu + sigma_r^2."""
    return np.maximum(np.maximum(total_e, 0.0) + read_noise_e ** 2, VARIANCE_FLOOR_E2)


def line_jacobian(x_px, x_ref_px, centers_px, fwhms_px, areas_e, shape, bg_degree=1):
    """Line signal and Jacobian of K profiles plus a polynomial background.

    Parameters are ordered ``(c_1..c_K, w_1..w_K, A_1..A_K, b0, ..., b_D)``; the
    local background is ``sum_j b_j (x - x_ref)**j`` with ``D = bg_degree``.

    Parameters
    ----------
    x_px : array (..., L)
    x_ref_px : array (..., 1)
    centers_px, fwhms_px, areas_e : arrays (..., K)

    Returns
    -------
    lines_e : array (..., L)
        Sum of the line profiles (no background).
    jac : array (..., L, 3K + D + 1)
    amp_frac : array (..., K, L)
        Pixel fractions of each line (for peak values).
    """
    c = centers_px[..., :, None]
    w = fwhms_px[..., :, None]
    a = areas_e[..., :, None]
    frac, dc, dw = pixel_terms(x_px[..., None, :], c, w, shape)
    lines = np.einsum("...kl,...kl->...l", frac, np.broadcast_to(a, frac.shape))
    k = centers_px.shape[-1]
    jac = np.empty(x_px.shape + (3 * k + bg_degree + 1,))
    jac[..., :k] = np.moveaxis(a * dc, -2, -1)
    jac[..., k:2 * k] = np.moveaxis(a * dw, -2, -1)
    jac[..., 2 * k:3 * k] = np.moveaxis(frac, -2, -1)
    jac[..., 3 * k] = 1.0
    dx = x_px - x_ref_px
    power = np.ones_like(dx)
    for j in range(1, bg_degree + 1):
        power = power * dx
        jac[..., 3 * k + j] = power
    return lines, jac, frac


def fisher_matrix(jac, weights):
    """Stacked Fisher matrices J^T diag(weights) J, shape (..., P, P)."""
    jw = jac * weights[..., None]
    return np.matmul(np.swapaxes(jw, -1, -2), jac)


def invert_fisher(fisher, *, rcond=1e-13):
    """Covariances from stacked Fisher matrices, with a singularity flag.

    The matrix is scaled to unit diagonal before inversion; a matrix whose
    scaled smallest eigenvalue falls below ``rcond`` is declared singular and
    its covariance set to NaN.
    """
    diag = np.einsum("...ii->...i", fisher)
    good_diag = np.all(diag > 0, axis=-1) & np.all(np.isfinite(fisher), axis=(-2, -1))
    scale = 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))
    scaled = fisher * scale[..., :, None] * scale[..., None, :]
    scaled = np.where(good_diag[..., None, None], scaled, np.eye(fisher.shape[-1]))
    eig_min = np.linalg.eigvalsh(scaled)[..., 0]
    singular = ~good_diag | ~(eig_min > rcond)
    safe = np.where(singular[..., None, None], np.eye(fisher.shape[-1]), scaled)
    cov = np.linalg.inv(safe) * scale[..., :, None] * scale[..., None, :]
    cov = np.where(singular[..., None, None], np.nan, cov)
    return cov, singular


def crlb_center_px(center_px, fwhm_px, area_e, background_e, *, n_pixels, read_noise_e=0.0,
                   shape="lorentzian", joint=True):
    """Cramer-Rao lower bound of a line centre on a pixelated detector.

    The model is the one :func:`fit_lines` fits: pixel ``i`` (``0 <= i <
    n_pixels``, covering ``[i - 0.5, i + 0.5]``) expects
    ``mu_i = area_e * frac_i(center, fwhm) + background_e`` photoelectrons, with
    variance ``mu_i + read_noise_e**2`` (Poisson plus read noise, the shifted-
    Poisson approximation).  The Fisher information is
    ``I = sum_i (d mu_i/d theta)(d mu_i/d theta)^T / var_i``.

    Parameters
    ----------
    center_px, fwhm_px : float
        Line centre (pixel coordinates of the window) and FWHM in pixels.
    area_e : float
        Expected photoelectrons in the line.
    background_e : float
        Expected background photoelectrons per pixel.
    n_pixels : int
        Number of pixels of the window.
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    shape : {"lorentzian", "gaussian"}
    joint : bool
        If True, the bound of the centre when width, area and a linear background
        (offset and slope, as in the fit) are estimated jointly, ``sqrt([I^-1]_cc)``;
        if False, the bound with everything else known, ``1/sqrt(I_cc)``.

    Returns
    -------
    float
        One-sigma bound of the centre in pixels (``inf`` if the information is singular).
    """
    check_shape(shape)
    n = int(n_pixels)
    if n != n_pixels or n < 6:
        raise InputError("window too small or not an integer", field="n_pixels",
                         expected="integer >= 6", found=repr(n_pixels))
    for name, value in (("fwhm_px", fwhm_px), ("area_e", area_e)):
        if not np.isfinite(value) or value <= 0:
            raise InputError("must be finite and positive", field=name, expected="> 0", found=repr(value))
    if not np.isfinite(background_e) or background_e < 0:
        raise InputError("must be finite and non-negative", field="background_e",
                         expected=">= 0", found=repr(background_e))
    if not np.isfinite(read_noise_e) or read_noise_e < 0:
        raise InputError("must be finite and non-negative", field="read_noise_e",
                         expected=">= 0", found=repr(read_noise_e))
    x = np.arange(n, dtype=float)
    lines, jac, _ = line_jacobian(x, np.array([(n - 1) / 2.0]), np.array([float(center_px)]),
                                  np.array([float(fwhm_px)]), np.array([float(area_e)]), shape)
    var = model_variance(lines + background_e, read_noise_e)
    if not joint:
        info = np.sum(jac[:, 0] ** 2 / var)
        return float(1.0 / np.sqrt(info)) if info > 0 else float("inf")
    cov, singular = invert_fisher(fisher_matrix(jac, 1.0 / var))
    if singular:
        return float("inf")
    return float(np.sqrt(cov[0, 0]))
