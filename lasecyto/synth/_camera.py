"""Synthetic detector frames with a known camera, cosmic-ray hits and a non-Gaussian instrument function.

Everything here is synthetic and keeps its own physics: shot noise of the
photoelectrons, Gaussian read noise, a conversion gain, a per-pixel offset
(fixed pattern), rounding to integer counts and clipping at saturation; a
spectrometer instrument function made of the image of a rectangular slit
blurred by a Gaussian (plus an optional offset shoulder: coma), integrated
exactly over each pixel.
"""

from __future__ import annotations

import numpy as np
from scipy.special import erf

from ..exceptions import InputError

__all__ = ["camera_frames", "slit_line_photons", "add_cosmic_rays"]

_SQRT2 = np.sqrt(2.0)
_FWHM_TO_SIGMA = 1.0 / (2.0 * np.sqrt(2.0 * np.log(2.0)))


def camera_frames(expected_e, *, n_frames, offset_counts=100.0, gain_counts_per_e=2.0, read_noise_e=3.0,
                  saturation_counts=65535, rng=None):
    """Frames of a detector exposed to a steady scene.

    Parameters
    ----------
    expected_e : array_like
        Expected photoelectrons per pixel per frame (any shape; 0 for dark frames).
    n_frames : int
    offset_counts : float or array_like
        Offset (bias) per pixel, broadcast against ``expected_e`` (a map gives a fixed pattern).
    gain_counts_per_e : float
        Conversion gain.
    read_noise_e : float
        Gaussian read noise per pixel, electrons RMS.
    saturation_counts : int
        Full scale; counts are rounded and clipped to ``[0, saturation_counts]``.
    rng : None, int or numpy.random.Generator

    Returns
    -------
    numpy.ndarray
        ``(n_frames,) + expected.shape`` unsigned 16-bit counts.
    """
    rng = np.random.default_rng(rng)
    mean = np.clip(np.asarray(expected_e, dtype=float), 0.0, None)
    if int(n_frames) != n_frames or n_frames < 1:
        raise InputError("need at least one frame", field="n_frames", expected="integer >= 1", found=n_frames)
    shape = (int(n_frames),) + mean.shape
    electrons = rng.poisson(np.broadcast_to(mean, shape)).astype(float)
    electrons += read_noise_e * rng.standard_normal(shape)
    counts = np.asarray(offset_counts, dtype=float) + gain_counts_per_e * electrons
    top = min(int(saturation_counts), 65535)
    return np.clip(np.rint(counts), 0, top).astype(np.uint16)


def _box_gauss_cdf(x, half_slit, sigma):
    """CDF of a unit-area box of half width ``half_slit`` convolved with a Gaussian (closed form)."""
    def antiderivative_erf(t):
        # integral of erf(t / (sigma sqrt 2)) dt
        s = sigma * _SQRT2
        return t * erf(t / s) + s / np.sqrt(np.pi) * np.exp(-(t / s) ** 2)

    return 0.5 + (antiderivative_erf(x + half_slit) - antiderivative_erf(x - half_slit)) / (4.0 * half_slit)


def slit_line_photons(center_px, photons, n_pixels, *, slit_px=2.0, blur_fwhm_px=1.2, shoulder_fraction=0.0,
                      shoulder_offset_px=0.0):
    """Expected photons per pixel of lines much narrower than the resolution (lamp or laser lines).

    Each line is spread by the instrument function: a rectangular slit image
    of width ``slit_px`` blurred by a Gaussian of FWHM ``blur_fwhm_px``; a
    fraction ``shoulder_fraction`` of the light forms a second, equal copy
    shifted by ``shoulder_offset_px`` (an asymmetric instrument).  Integrated
    exactly over pixels ``[p - 0.5, p + 0.5]``.  The instrument's centroid
    lies at ``center_px + shoulder_fraction * shoulder_offset_px``.

    Parameters
    ----------
    center_px, photons : array_like
        Line positions (the main component's centre) and photons; broadcast to shape S.
    n_pixels : int

    Returns
    -------
    numpy.ndarray, shape S + (n_pixels,)
    """
    if not (slit_px > 0 and blur_fwhm_px > 0 and 0 <= shoulder_fraction < 1):
        raise InputError("bad instrument function", field="slit_px",
                         expected="slit_px > 0, blur_fwhm_px > 0, 0 <= shoulder_fraction < 1",
                         found=f"{slit_px}, {blur_fwhm_px}, {shoulder_fraction}")
    c = np.asarray(center_px, dtype=float)[..., None]
    n = np.asarray(photons, dtype=float)[..., None]
    edges = np.arange(int(n_pixels) + 1, dtype=float) - 0.5
    sigma = blur_fwhm_px * _FWHM_TO_SIGMA
    main = np.diff(_box_gauss_cdf(edges - c, 0.5 * slit_px, sigma), axis=-1)
    out = (1.0 - shoulder_fraction) * main
    if shoulder_fraction:
        out = out + shoulder_fraction * np.diff(_box_gauss_cdf(edges - c - shoulder_offset_px, 0.5 * slit_px,
                                                               sigma), axis=-1)
    return n * out


def add_cosmic_rays(frames, *, rate_per_frame, amplitude_counts=(2000.0, 20000.0), rng=None):
    """Add single-pixel cosmic-ray hits to a copy of ``frames`` (T, ..., N); returns it and the hit list.

    The number of hits per frame is Poisson with mean ``rate_per_frame``; each
    hit adds a uniform random amplitude in ``amplitude_counts`` to one random
    pixel (clipped to the 16-bit range).

    Returns
    -------
    frames : numpy.ndarray (same dtype)
    hits : numpy.ndarray of int, shape (H, frames.ndim)
        Index of every hit pixel.
    """
    rng = np.random.default_rng(rng)
    out = np.array(frames, copy=True)
    n_frames = out.shape[0]
    counts = rng.poisson(rate_per_frame, n_frames)
    hits = []
    for t, k in enumerate(counts):
        for _ in range(k):
            idx = (t,) + tuple(int(rng.integers(0, s)) for s in out.shape[1:])
            value = float(out[idx]) + rng.uniform(*amplitude_counts)
            out[idx] = np.clip(value, 0, np.iinfo(out.dtype).max if out.dtype.kind in "ui" else value)
            hits.append(idx)
    return out, np.array(hits, dtype=np.int64).reshape(-1, out.ndim)
