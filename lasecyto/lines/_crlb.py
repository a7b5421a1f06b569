"""Fisher information of the pixel-integrated line model and the Cramer-Rao bound."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError
from ._instrument import InstrumentProfile
from ._nbprep import VARIANCE_FLOOR_E2
from ._nbshape import SHAPE_CODES, line_terms_array
from ._shapes import check_shape

__all__ = ["crlb_center_px"]


def _positive(name, value, *, allow_zero=False):
    ok = np.isfinite(value) and (value >= 0 if allow_zero else value > 0)
    if not ok:
        raise InputError("must be finite and " + ("non-negative" if allow_zero else "positive"), field=name,
                         expected=">= 0" if allow_zero else "> 0", found=repr(value))
    return float(value)


def crlb_center_px(center_px, fwhm_px, area_e, background_e, *, n_pixels, read_noise_e=0.0,
                   shape="lorentzian", joint=True, fwhm2_px=None, instrument=None):
    """Cramer-Rao lower bound of a line centre on a pixelated detector.

    The model is the one :func:`fit_lines` fits: pixel ``i`` (``0 <= i <
    n_pixels``, covering ``[i - 0.5, i + 0.5]``) expects
    ``mu_i = area_e * frac_i(center, widths) + background_e`` photoelectrons, with
    variance ``mu_i + read_noise_e**2`` (Poisson plus read noise, the shifted-
    Poisson approximation).  The Fisher information is
    ``I = sum_i (d mu_i/d theta)(d mu_i/d theta)^T / var_i``.

    Parameters
    ----------
    center_px : float
        Line centre (pixel coordinates of the window).
    fwhm_px : float
        FWHM in pixels (the Lorentzian FWHM of a Voigt; ignored by the instrument shape).
    area_e : float
        Expected photoelectrons in the line.
    background_e : float
        Expected background photoelectrons per pixel.
    n_pixels : int
        Number of pixels of the window.
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    shape : {"lorentzian", "gaussian", "voigt", "instrument"}
    joint : bool
        If True, the bound of the centre when the widths (none for the
        instrument shape), area and a linear background (offset and slope)
        are estimated jointly, ``sqrt([I^-1]_cc)``; if False, the bound with
        everything else known, ``1/sqrt(I_cc)``.
    fwhm2_px : float, optional
        Gaussian FWHM of a Voigt (estimated jointly too).
    instrument : InstrumentProfile, optional
        Profile of the instrument shape.

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
    _positive("area_e", area_e)
    _positive("background_e", background_e, allow_zero=True)
    _positive("read_noise_e", read_noise_e, allow_zero=True)
    if shape == "instrument":
        if not isinstance(instrument, InstrumentProfile):
            raise InputError("the instrument shape needs a measured instrument profile", field="instrument",
                             expected="an InstrumentProfile", found=type(instrument).__name__)
        prof, start, step = np.ascontiguousarray(instrument.coefficients), instrument.start_px, instrument.step_px
        w, w2 = 1.0, 1.0
    else:
        prof, start, step = np.zeros(8), 0.0, 1.0
        w = _positive("fwhm_px", fwhm_px)
        w2 = 1.0
        if shape == "voigt":
            if fwhm2_px is None:
                raise InputError("the Voigt shape needs its Gaussian FWHM", field="fwhm2_px", expected="> 0",
                                 found="None")
            w2 = _positive("fwhm2_px", fwhm2_px)
    terms = line_terms_array(SHAPE_CODES[shape], 0.0, n, float(center_px), w, w2, prof, float(start), float(step))
    frac, d_c, d_w, d_w2 = terms
    a = float(area_e)
    x = np.arange(n, dtype=float)
    columns = [a * d_c]
    if shape != "instrument":
        columns.append(a * d_w)
    if shape == "voigt":
        columns.append(a * d_w2)
    columns += [frac, np.ones(n), x - (n - 1) / 2.0]
    jac = np.stack(columns, axis=1)
    var = np.maximum(np.maximum(a * frac + background_e, 0.0) + read_noise_e ** 2, VARIANCE_FLOOR_E2)
    if not joint:
        info = np.sum(jac[:, 0] ** 2 / var)
        return float(1.0 / np.sqrt(info)) if info > 0 else float("inf")
    fisher = jac.T @ (jac / var[:, None])
    scale = 1.0 / np.sqrt(np.diag(fisher))
    scaled = fisher * scale[:, None] * scale[None, :]
    if not np.all(np.isfinite(scaled)) or np.linalg.eigvalsh(scaled)[0] <= 1e-13:
        return float("inf")
    cov = np.linalg.inv(scaled) * scale[:, None] * scale[None, :]
    return float(np.sqrt(cov[0, 0]))
