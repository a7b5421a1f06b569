"""Rendering of spectra on a pixel detector: pixel-integrated lines and camera noise.

Pixel ``p`` is centred on the integer ``p`` and spans [p - 0.5, p + 0.5).
"""

from __future__ import annotations

import numpy as np
from scipy.special import erf

from ..exceptions import InputError

__all__ = ["render_lamp_frame"]

_FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))


def _pixel_edges(n_pixels):
    return np.arange(n_pixels + 1, dtype=float) - 0.5


def _lorentzian_pixel_photons(center_px, fwhm_px, photons, n_pixels):
    """Expected photons per pixel of Lorentzian lines, integrated exactly over each pixel.

    ``center_px``, ``fwhm_px`` and ``photons`` broadcast to a common shape S; the
    result has shape S + (n_pixels,) (one spectrum per line).  The Lorentzian CDF is
    1/2 + arctan(2 (x - x0) / FWHM) / pi.
    """
    c = np.asarray(center_px, dtype=float)[..., None]
    hw = 0.5 * np.asarray(fwhm_px, dtype=float)[..., None]
    cdf = np.arctan((_pixel_edges(n_pixels) - c) / hw) / np.pi
    return np.asarray(photons, dtype=float)[..., None] * np.diff(cdf, axis=-1)


def _lines_spectrum(center_px, photons, lasing, fwhm_px, n_pixels):
    """Photons per pixel (frames, n_pixels) of the lasing lines; the other arguments are (frames, modes)."""
    spectrum = np.zeros((lasing.shape[0], n_pixels))
    fi, mi = np.nonzero(lasing)
    if fi.size:
        prof = _lorentzian_pixel_photons(center_px[fi, mi], fwhm_px, photons[fi, mi], n_pixels)
        onehot = np.zeros((lasing.shape[0], fi.size))
        onehot[fi, np.arange(fi.size)] = 1.0
        spectrum += onehot @ prof
    return spectrum


def _gaussian_band(x, center, fwhm):
    """Peak-normalised Gaussian band ``exp(-4 ln2 ((x - center) / fwhm)^2)`` (gain window, dye fluorescence)."""
    return np.exp(-4.0 * np.log(2.0) * ((x - center) / fwhm) ** 2)


def _gaussian_pixel_photons(center_px, fwhm_px, photons, n_pixels):
    """Expected photons per pixel of Gaussian lines, integrated exactly over each pixel (erf CDF)."""
    c = np.asarray(center_px, dtype=float)[..., None]
    sig = np.asarray(fwhm_px, dtype=float)[..., None] * _FWHM_TO_SIGMA
    cdf = 0.5 * erf((_pixel_edges(n_pixels) - c) / (sig * np.sqrt(2.0)))
    return np.asarray(photons, dtype=float)[..., None] * np.diff(cdf, axis=-1)


def _eval_polynomial(coefficients, px):
    """lambda(p) = sum_k c_k p**k with ascending coefficients."""
    px = np.asarray(px, dtype=float)
    out = np.zeros_like(px)
    for c in reversed(list(coefficients)):
        out = out * px + float(c)
    return out


def _check_polynomial(coefficients, n_pixels):
    coeffs = [float(c) for c in coefficients]
    if len(coeffs) < 2 or not all(np.isfinite(coeffs)):
        raise InputError("pixel-to-wavelength polynomial needs at least two finite coefficients",
                         field="polynomial_air_nm", expected="[c0, c1, ...]", found=coeffs)
    deriv = np.polynomial.polynomial.polyder(coeffs)
    slope = _eval_polynomial(deriv, np.arange(n_pixels))
    if not np.all(slope > 0):
        raise InputError("pixel-to-wavelength polynomial must increase over the detector",
                         field="polynomial_air_nm", expected="d lambda/dp > 0 on all pixels",
                         found=f"minimum slope {slope.min():.3g} nm/px")
    return coeffs


def _wavelength_to_pixel(coefficients, wavelength_nm, *, tol_px=1e-11, max_iter=50):
    """Fractional pixel at which the (increasing) polynomial equals ``wavelength_nm``.

    Newton iteration from the linear estimate; valid where the polynomial is monotone.
    """
    coeffs = [float(c) for c in coefficients]
    deriv = np.polynomial.polynomial.polyder(coeffs)
    lam = np.asarray(wavelength_nm, dtype=float)
    px = (lam - coeffs[0]) / coeffs[1]
    for _ in range(max_iter):
        step = (_eval_polynomial(coeffs, px) - lam) / _eval_polynomial(deriv, px)
        px = px - step
        if np.all(np.abs(step) <= tol_px):
            break
    return px


def _detector_counts(photoelectrons, *, offset_counts, gain_counts_per_e, read_noise_e, rng):
    """Camera counts (float, before quantisation) from expected photoelectrons.

    Poisson shot noise on the photoelectrons, Gaussian read noise (in electrons),
    conversion gain and offset.
    """
    mean_e = np.clip(np.asarray(photoelectrons, dtype=float), 0.0, None)
    electrons = rng.poisson(mean_e).astype(float)
    electrons += read_noise_e * rng.standard_normal(mean_e.shape)
    return offset_counts + gain_counts_per_e * electrons


def _to_uint16(counts, *, saturation_counts=65535):
    """Round camera counts to integers and clip to [0, saturation] as uint16."""
    top = min(int(saturation_counts), 65535)
    return np.clip(np.rint(counts), 0, top).astype(np.uint16)


def render_lamp_frame(n_pixels, *, polynomial_air_nm, lines_air_nm, peak_photons, fwhm_px=2.5,
                      offset_counts=100.0, read_noise_e=3.0, gain_counts_per_e=1.0, rng=None):
    """One detector frame of an emission-line lamp through a known wavelength axis.

    Each line lands at the fractional pixel where the air-wavelength polynomial equals
    its air wavelength and is spread by a Gaussian instrument profile integrated
    exactly over each pixel.  Shot noise, read noise, gain and offset are applied; the
    result is not rounded or clipped.

    Parameters
    ----------
    n_pixels : int
        Number of detector pixels.
    polynomial_air_nm : sequence of float
        Ascending coefficients of lambda_air(p) in nm, increasing over the detector.
    lines_air_nm : array_like
        Air wavelengths of the lines (nm); lines off the detector add only their tails.
    peak_photons : float or array_like
        Photoelectrons in each line (integral over all pixels), scalar or one per line.
    fwhm_px : float
        Instrument FWHM in pixels.
    offset_counts, read_noise_e, gain_counts_per_e : float
        Camera model (counts offset, Gaussian read noise in electrons, counts per electron).
    rng : None, int or numpy.random.Generator
        Seed or generator of the noise.

    Returns
    -------
    ndarray, shape (n_pixels,)
        Camera counts (float).
    """
    n_pixels = int(n_pixels)
    if n_pixels < 2:
        raise InputError("detector needs at least two pixels", field="n_pixels", expected=">= 2",
                         found=n_pixels)
    if not fwhm_px > 0:
        raise InputError("line width must be positive", field="fwhm_px", expected="> 0", found=fwhm_px)
    coeffs = _check_polynomial(polynomial_air_nm, n_pixels)
    lines = np.atleast_1d(np.asarray(lines_air_nm, dtype=float))
    photons = np.broadcast_to(np.asarray(peak_photons, dtype=float), lines.shape)
    if np.any(photons < 0) or not np.all(np.isfinite(photons)):
        raise InputError("line photons must be finite and >= 0", field="peak_photons",
                         expected=">= 0", found=photons.min() if photons.size else None)
    rng = np.random.default_rng(rng)
    centres = _wavelength_to_pixel(coeffs, lines)
    expected = _gaussian_pixel_photons(centres, fwhm_px, photons, n_pixels).sum(axis=0)
    if lines.size == 0:
        expected = np.zeros(n_pixels)
    return _detector_counts(expected, offset_counts=float(offset_counts),
                            gain_counts_per_e=float(gain_counts_per_e),
                            read_noise_e=float(read_noise_e), rng=rng)
