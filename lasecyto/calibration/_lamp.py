"""Lamp-line wavelength calibration: sub-pixel lamp peaks and the dispersion solution.

The lamp spectrum is in photoelectrons per pixel; pixel centres are integers counted
from 0, the convention of :class:`WavelengthAxis`.  Lamp wavelengths are in standard
air, and so is the solution (``medium="air"``).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.polynomial import polynomial as P
from scipy import ndimage, special, stats

from ..exceptions import CalibrationError, CalibrationWarning, InputError
from ._axis import WavelengthAxis

__all__ = ["DispersionSolution", "find_lamp_peaks", "solve_dispersion"]

_SIGMA_PER_FWHM = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))
_SQRT2 = math.sqrt(2.0)
_INV_SQRT2PI = 1.0 / math.sqrt(2.0 * math.pi)
_VAR_FLOOR_E2 = 1.0          # keeps empty pixels finite-weighted when read noise is 0

# Coarse alignment of the nominal axis before line matching: the guess may be off by
# up to this much in offset (nm, at the detector centre) and in relative scale.
_SEARCH_OFFSET_NM = 1.5
_SEARCH_SCALE = 0.0075
_MAX_ITERATIONS = 30

_PEAK_COLUMNS = ["pixel", "pixel_err", "amplitude_e", "fwhm_px", "snr"]


# ----------------------------------------------------------------------------- validation

def _as_spectrum(spectrum_e):
    y = np.asarray(spectrum_e, dtype=float)
    if y.ndim != 1 or y.size < 8:
        raise InputError("lamp spectrum must be one row of pixels", field="spectrum_e",
                         expected="a 1-D array of at least 8 pixels", found=f"shape {y.shape}")
    bad = np.count_nonzero(~np.isfinite(y))
    if bad:
        raise InputError("lamp spectrum has non-finite pixels", field="spectrum_e",
                         expected="finite values", found=f"{bad} NaN or infinite pixels")
    return y


def _positive(value, field, *, allow_zero=False):
    v = float(value)
    ok = math.isfinite(v) and (v >= 0 if allow_zero else v > 0)
    if not ok:
        raise InputError("invalid value", field=field,
                         expected="a finite number >= 0" if allow_zero else "a finite number > 0",
                         found=repr(value))
    return v


# ----------------------------------------------------------------------------- peak fitting

def _model_and_jacobian(pix, theta):
    """Pixel-integrated Gaussian + constant and its Jacobian, batched over windows.

    theta[:, k] = (centre_px, sigma_px, area_e, background_e); pix has shape (n, w).
    """
    x0, s, area, bg = (theta[:, k, None] for k in range(4))
    up = (pix + 0.5 - x0) / s
    um = (pix - 0.5 - x0) / s
    frac = 0.5 * (special.erf(up / _SQRT2) - special.erf(um / _SQRT2))
    php = _INV_SQRT2PI * np.exp(-0.5 * up * up)
    phm = _INV_SQRT2PI * np.exp(-0.5 * um * um)
    model = area * frac + bg
    jac = np.empty(pix.shape + (4,))
    jac[..., 0] = area * (phm - php) / s
    jac[..., 1] = area * (um * phm - up * php) / s
    jac[..., 2] = frac
    jac[..., 3] = 1.0
    return model, jac


def _chi2(data, model, weight):
    return np.sum(weight * (data - model) ** 2, axis=1)


def _fit_windows(y, centres, half_px, sigma0_px, read_noise_e):
    """Weighted least squares (Levenberg-Marquardt, batched) of one line per window.

    The weights are re-derived from the model, var = max(model, 0) + read_noise**2,
    between passes (iteratively reweighted least squares).
    """
    n = y.size
    offsets = np.arange(-half_px, half_px + 1)
    idx = centres[:, None] + offsets[None, :]
    inside = (idx >= 0) & (idx < n)
    data = np.where(inside, y[np.clip(idx, 0, n - 1)], 0.0)
    pix = idx.astype(float)
    rn2 = read_noise_e ** 2

    # Starting values: background from the outer two pixels of each side, area from the
    # sum above it, centre from the centroid of the three central pixels.
    edge = inside & (np.abs(offsets)[None, :] >= half_px - 1)
    bg0 = np.array([np.median(d[m]) if m.any() else 0.0 for d, m in zip(data, edge)])
    excess = np.where(inside, data - bg0[:, None], 0.0)
    area0 = np.maximum(excess.sum(axis=1), 1.0)
    core = inside & (np.abs(offsets)[None, :] <= 1)
    wcore = np.clip(np.where(core, excess, 0.0), 0.0, None)
    x00 = np.where(wcore.sum(axis=1) > 0,
                   (wcore * pix).sum(axis=1) / np.maximum(wcore.sum(axis=1), 1e-300), centres)
    theta = np.column_stack([x00, np.full(len(centres), sigma0_px), area0, bg0])

    s_lo, s_hi = 0.1 * sigma0_px, 6.0 * sigma0_px
    var = np.maximum(np.maximum(data, 0.0) + rn2, _VAR_FLOOR_E2)
    eye = np.eye(4)
    for _ in range(4):                                   # reweighting passes
        weight = np.where(inside, 1.0 / var, 0.0)
        model, jac = _model_and_jacobian(pix, theta)
        chi2 = _chi2(data, model, weight)
        lam = np.full(len(centres), 1e-3)
        for _ in range(30):                              # damped Gauss-Newton steps
            jw = jac * weight[..., None]
            hess = np.einsum("nwi,nwj->nij", jw, jac)
            grad = np.einsum("nwi,nw->ni", jw, data - model)
            damp = hess + lam[:, None, None] * (hess * eye + 1e-12 * eye)
            try:
                step = np.linalg.solve(damp, grad[..., None])[..., 0]
            except np.linalg.LinAlgError:
                step = np.stack([np.linalg.lstsq(a, b, rcond=None)[0] for a, b in zip(damp, grad)])
            trial = theta + step
            trial[:, 1] = np.clip(trial[:, 1], s_lo, s_hi)
            m_trial, j_trial = _model_and_jacobian(pix, trial)
            chi2_trial = _chi2(data, m_trial, weight)
            better = np.isfinite(chi2_trial) & (chi2_trial <= chi2)
            theta = np.where(better[:, None], trial, theta)
            model = np.where(better[:, None], m_trial, model)
            jac = np.where(better[:, None, None], j_trial, jac)
            gain = np.where(better, chi2 - chi2_trial, 0.0)
            chi2 = np.where(better, chi2_trial, chi2)
            lam = np.clip(np.where(better, lam * 0.3, lam * 10.0), 1e-9, 1e9)
            if np.all((gain <= 1e-9 * (1.0 + chi2)) & better | (lam >= 1e9)):
                break
        var = np.maximum(np.maximum(model, 0.0) + rn2, _VAR_FLOOR_E2)

    weight = np.where(inside, 1.0 / var, 0.0)
    model, jac = _model_and_jacobian(pix, theta)
    jw = jac * weight[..., None]
    hess = np.einsum("nwi,nwj->nij", jw, jac)
    dof = np.maximum(inside.sum(axis=1) - 4, 1)
    chi2_red = _chi2(data, model, weight) / dof
    cov = np.full_like(hess, np.nan)
    for k, h in enumerate(hess):
        if np.all(np.isfinite(h)) and np.linalg.matrix_rank(h) == 4:
            cov[k] = np.linalg.inv(h)
    # Inflate by the reduced chi-square only where the model is demonstrably poor
    # (p < 0.001), so that errors of good fits stay those of the noise model.
    poor = chi2_red > stats.chi2.isf(1e-3, dof) / dof
    inflation = np.where(poor, chi2_red, 1.0)
    return theta, cov * inflation[:, None, None], chi2_red, inflation


def find_lamp_peaks(spectrum_e, *, read_noise_e=0.0, snr_min=10.0, fwhm_guess_px=2.5):
    """Sub-pixel centres of the emission lines of a lamp spectrum.

    Every local maximum of the (lightly smoothed) spectrum that stands out of the noise
    is fitted with a pixel-integrated Gaussian plus a constant, by weighted least
    squares over a window of +-2 FWHM, with the noise model
    var = max(model, 0) + read_noise_e**2 (photoelectrons; floored at 1 e^2).

    Parameters
    ----------
    spectrum_e : array, shape (n_pixels,)
        Lamp spectrum in photoelectrons per pixel (dark-subtracted).
    read_noise_e : float
        Read noise per pixel, photoelectrons rms.
    snr_min : float
        Minimum line signal-to-noise ratio, fitted area over its standard error.
    fwhm_guess_px : float
        Expected line FWHM in pixels (sets the smoothing and the fit window).

    Returns
    -------
    pandas.DataFrame
        One row per line, sorted by pixel: ``pixel`` (fitted centre), ``pixel_err``
        (its standard error from the fit covariance, scaled by the square root of the
        reduced chi-square where that is improbably large, p < 0.001), ``amplitude_e``
        (peak height of the Gaussian above the constant, e per pixel), ``fwhm_px`` and
        ``snr`` (fitted area over its standard error under the noise model alone, so that
        a bright line with a non-Gaussian profile is not rejected).
    """
    y = _as_spectrum(spectrum_e)
    read_noise_e = _positive(read_noise_e, "read_noise_e", allow_zero=True)
    snr_min = _positive(snr_min, "snr_min")
    fwhm_guess_px = _positive(fwhm_guess_px, "fwhm_guess_px")
    if fwhm_guess_px > y.size / 4:
        raise InputError("line width guess too large for the spectrum", field="fwhm_guess_px",
                         expected=f"at most {y.size / 4:g} px", found=f"{fwhm_guess_px:g} px")
    sigma0 = fwhm_guess_px * _SIGMA_PER_FWHM
    half = max(3, int(math.ceil(2.0 * fwhm_guess_px)))

    smooth = ndimage.gaussian_filter1d(y, sigma0, mode="nearest")
    inner = smooth[1:-1]
    cand = np.flatnonzero((inner > smooth[:-2]) & (inner >= smooth[2:])) + 1

    # Pre-screen with a box sum over the line core against a wide running median.
    size = max(25, int(10 * fwhm_guess_px)) | 1
    bg = ndimage.median_filter(y, size=size, mode="nearest")
    k = max(1, int(round(fwhm_guess_px / 2)))
    box = np.ones(2 * k + 1)
    signal = np.convolve(y, box, mode="same") - np.convolve(bg, box, mode="same")
    noise = np.sqrt(np.convolve(np.maximum(y, 0.0), box, mode="same") + box.size * read_noise_e ** 2)
    pre = signal[cand] / np.maximum(noise[cand], 1e-12)
    cand = cand[pre >= 0.5 * snr_min]
    if cand.size == 0:
        return pd.DataFrame({c: np.empty(0) for c in _PEAK_COLUMNS})

    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):   # bad trial steps are rejected
        theta, cov, _, inflation = _fit_windows(y, cand, half, sigma0, read_noise_e)
    x0, s, area = theta[:, 0], theta[:, 1], theta[:, 2]
    var_x = cov[:, 0, 0]
    var_a = cov[:, 2, 2]
    ok = (np.isfinite(theta).all(axis=1) & np.isfinite(var_x) & (var_x > 0) & (var_a > 0)
          & (area > 0) & (s > 0.15 * sigma0) & (s < 5.0 * sigma0)
          & (np.abs(x0 - cand) <= half / 2) & (x0 > -0.5) & (x0 < y.size - 0.5))
    # The detection statistic uses the noise-model error of the area (not inflated by
    # the misfit): a bright line whose profile is not Gaussian (a flat-topped slit image)
    # is still a line.
    var_a_noise = var_a / inflation
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = np.where(ok, area / np.sqrt(np.where(var_a > 0, var_a_noise, np.nan)), 0.0)
    ok &= snr >= snr_min
    sel = np.flatnonzero(ok)

    # Two maxima that converged onto the same line: keep the one of higher SNR.
    order = sel[np.lexsort((sel, -snr[sel]))]
    kept = []
    for i in order:
        if all(abs(x0[i] - x0[j]) >= 0.5 * fwhm_guess_px for j in kept):
            kept.append(i)
    kept = np.array(sorted(kept, key=lambda i: (x0[i], i)), dtype=int)
    return pd.DataFrame({
        "pixel": x0[kept],
        "pixel_err": np.sqrt(var_x[kept]),
        "amplitude_e": area[kept] * _INV_SQRT2PI / s[kept],
        "fwhm_px": s[kept] / _SIGMA_PER_FWHM,
        "snr": snr[kept],
    })


# ----------------------------------------------------------------------------- dispersion

@dataclass(frozen=True, eq=False)
class DispersionSolution:
    """Result of :func:`solve_dispersion`.

    Attributes
    ----------
    coefficients_nm : tuple of float
        Ascending coefficients of lambda_air(pixel) in nm.
    degree : int
        Polynomial degree.
    rms_nm : float
        RMS of the residuals (reference - fitted) of the lines used in the fit, nm.
    n_used : int
        Number of lines used in the fit.
    lines : pandas.DataFrame
        One row per detected peak: ``pixel``, ``pixel_err``, ``reference_air_nm``
        (NaN when unmatched), ``fitted_air_nm``, ``residual_nm`` (reference - fitted),
        ``used`` and ``reason`` ("" when used, else ``"unmatched"``, ``"duplicate"``
        (its reference line went to a closer peak), ``"blend"`` or ``"clipped"``).
    """

    coefficients_nm: tuple
    degree: int
    rms_nm: float
    n_used: int
    lines: pd.DataFrame

    def axis(self):
        """The solution as a :class:`WavelengthAxis` in air."""
        return WavelengthAxis(polynomial_nm=self.coefficients_nm, medium="air")

    def report(self):
        """Plain-text residual report: one line per detected peak and a summary."""
        coef = np.asarray(self.coefficients_nm)
        lines = self.lines
        out = [f"dispersion solution: pixel -> air wavelength, degree {self.degree}, "
               f"{self.n_used} of {len(lines)} detected lines used",
               f"{'pixel':>10} {'err_px':>8} {'reference_nm':>13} {'fitted_nm':>12} "
               f"{'resid_pm':>9}  status"]
        for row in lines.itertuples(index=False):
            ref = "-" if np.isnan(row.reference_air_nm) else f"{row.reference_air_nm:.5f}"
            res = "-" if np.isnan(row.residual_nm) else f"{row.residual_nm * 1e3:+.2f}"
            status = "used" if row.used else row.reason
            out.append(f"{row.pixel:10.3f} {row.pixel_err:8.4f} {ref:>13} "
                       f"{row.fitted_air_nm:12.5f} {res:>9}  {status}")
        used = lines["used"].to_numpy(dtype=bool)
        disp = np.abs(P.polyval(lines["pixel"].to_numpy()[used], P.polyder(coef)))
        disp_px = float(np.median(disp)) if disp.size else float("nan")
        out.append(f"rms {self.rms_nm * 1e3:.3f} pm = {self.rms_nm / disp_px:.4f} px "
                   f"(dispersion {disp_px:.5f} nm/px) over {self.n_used} lines")
        counts = lines.loc[~lines["used"], "reason"].value_counts(sort=False)
        if len(counts):
            out.append("not used: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
        out.append("coefficients_nm: " + ", ".join(f"c{k}={c:.10g}" for k, c in enumerate(coef)))
        return "\n".join(out)


def _nearest(lam, ref):
    """Index of and distance to the nearest reference line (ties go to the shorter one)."""
    i = np.searchsorted(ref, lam)
    left = np.clip(i - 1, 0, ref.size - 1)
    right = np.clip(i, 0, ref.size - 1)
    dl = np.abs(lam - ref[left])
    dr = np.abs(lam - ref[right])
    pick_right = dr < dl
    return np.where(pick_right, right, left), np.where(pick_right, dr, dl)


def _match(lam, ref, tol):
    """One-to-one nearest matching within tol; returns (ref index or -1, duplicate flag)."""
    nearest, dist = _nearest(lam, ref)
    within = dist <= tol
    match = np.full(lam.size, -1)
    taken = np.zeros(ref.size, dtype=bool)
    for i in np.lexsort((np.arange(lam.size), dist)):
        if within[i] and not taken[nearest[i]]:
            match[i] = nearest[i]
            taken[nearest[i]] = True
    return match, within & (match < 0)


def _coarse_alignment(lam_guess, lam_centre, half_span_nm, ref, weight_ref, tol):
    """Offset and scale of the nominal axis that match the most peaks to lines.

    A grid search; a match counts the weight of its reference line, ties go to the
    smaller summed squared distance, then to the smaller correction.
    """
    # keep the grid below ~400 offsets x ~40 scales however small the tolerance
    tol = max(tol, _SEARCH_OFFSET_NM / 25.0, _SEARCH_SCALE * half_span_nm / 5.0)
    n_scale = 2 * int(math.ceil(_SEARCH_SCALE * half_span_nm / (tol / 4))) + 1
    scales = np.linspace(-_SEARCH_SCALE, _SEARCH_SCALE, n_scale)
    n_off = 2 * int(math.ceil(_SEARCH_OFFSET_NM / (tol / 8))) + 1
    offsets = np.linspace(-_SEARCH_OFFSET_NM, _SEARCH_OFFSET_NM, n_off)
    pred = (lam_guess[None, None, :] + offsets[None, :, None]
            + scales[:, None, None] * (lam_guess - lam_centre)[None, None, :])
    nearest, dist = _nearest(pred, ref)
    hit = dist <= tol
    score = np.sum(np.where(hit, weight_ref[nearest], 0.0), axis=2)
    cost = np.sum(np.where(hit, dist, tol) ** 2, axis=2)
    ss, oo = np.meshgrid(np.arange(n_scale), np.arange(n_off), indexing="ij")
    keys = (np.abs(scales)[ss].ravel(), np.abs(offsets)[oo].ravel(), cost.ravel(),
            -np.round(score.ravel(), 9))
    best = np.lexsort(keys)[0]
    return scales[ss.ravel()[best]], offsets[oo.ravel()[best]]


def _window_text(lo, hi, n_pixels):
    return f"the guess predicts {lo:.3f}-{hi:.3f} nm (air) over the {n_pixels} pixels"


def solve_dispersion(spectrum_e, reference_air_nm, *, guess_nm, degree=3, read_noise_e=0.0,
                     tolerance_nm=None, clip_sigma=4.0, snr_min=10.0, reference_intensity=None):
    """Pixel -> air-wavelength polynomial from a lamp spectrum and a reference line list.

    Peaks are found with :func:`find_lamp_peaks`.  The nominal axis ``guess_nm`` is first
    aligned by a coarse search over offset (+-1.5 nm) and scale (+-0.75 %).  Then, for a
    polynomial degree raised step by step from 1 to ``degree``, peaks are matched one to
    one to the nearest reference line within the tolerance, the polynomial is fitted by
    weighted least squares (sigma_lambda = pixel_err x local dispersion) and lines are
    sigma-clipped, until the matched and clipped sets no longer change; after each degree
    the tolerance is tightened to max(5 x rms, 1 px).  Below the final degree the fit is a
    correction of that degree added to the guess, so the guess's curvature is kept.
    Reference lines closer to another reference line than 2 x the fitted FWHM are blends
    and are excluded from the fit.

    Parameters
    ----------
    spectrum_e : array, shape (n_pixels,)
        Lamp spectrum in photoelectrons per pixel.
    reference_air_nm : array
        Reference wavelengths in standard air, nm (e.g. from :func:`reference_lines`).
    guess_nm : sequence of float
        Ascending coefficients of a nominal pixel -> air nm axis.
    degree : int
        Degree of the final polynomial.
    read_noise_e : float
        Read noise per pixel, photoelectrons rms.
    tolerance_nm : float, optional
        Initial matching tolerance; default 5 x the guess dispersion per pixel.
    clip_sigma : float
        Lines whose normalised residual exceeds clip_sigma x max(1, robust scatter) are
        clipped.
    snr_min : float
        Minimum peak signal-to-noise ratio (see :func:`find_lamp_peaks`).
    reference_intensity : array, optional
        Relative intensities of the reference lines; used only to rank lines in the
        coarse alignment (a match to a brighter line counts more).

    Returns
    -------
    DispersionSolution

    Raises
    ------
    CalibrationError
        When fewer than degree + 2 lines can be identified.

    Warns
    -----
    CalibrationWarning
        When the residual RMS exceeds 0.1 pixel.
    """
    y = _as_spectrum(spectrum_e)
    n_px = y.size
    ref = np.asarray(reference_air_nm, dtype=float)
    if ref.ndim != 1 or ref.size == 0 or not np.all(np.isfinite(ref)):
        raise InputError("reference lines must be a non-empty 1-D list of finite wavelengths",
                         field="reference_air_nm", expected="finite values in nm",
                         found=f"shape {ref.shape}")
    order = np.argsort(ref, kind="stable")
    ref = ref[order]
    if reference_intensity is None:
        weight_ref = np.ones(ref.size)
    else:
        inten = np.asarray(reference_intensity, dtype=float)
        if inten.shape != order.shape or not np.all(np.isfinite(inten)):
            raise InputError("reference intensities do not fit the reference lines",
                             field="reference_intensity",
                             expected=f"{ref.size} finite values", found=f"shape {inten.shape}")
        inten = inten[order]
        rank = np.argsort(np.argsort(inten, kind="stable"), kind="stable")
        weight_ref = 0.25 + 0.75 * rank / max(ref.size - 1, 1)
    distinct = np.concatenate([[True], np.diff(ref) > 0])     # a line listed twice is one line
    ref, weight_ref = ref[distinct], weight_ref[distinct]
    guess = np.asarray(guess_nm, dtype=float)
    if guess.ndim != 1 or guess.size < 2 or not np.all(np.isfinite(guess)):
        raise InputError("nominal axis must be ascending polynomial coefficients", field="guess_nm",
                         expected="at least 2 finite coefficients", found=repr(guess_nm))
    if isinstance(degree, bool) or int(degree) != degree or degree < 1:
        raise InputError("invalid polynomial degree", field="degree",
                         expected="an integer >= 1", found=repr(degree))
    degree = int(degree)
    clip_sigma = _positive(clip_sigma, "clip_sigma")

    pixels = np.arange(n_px, dtype=float)
    lam_axis = P.polyval(pixels, guess)
    disp_guess = np.abs(P.polyval(pixels, P.polyder(guess)))
    if not np.all(disp_guess > 0):
        raise InputError("nominal axis is not monotonic over the detector", field="guess_nm",
                         expected="a dispersion of one sign on all pixels", found=repr(guess_nm))
    lo, hi = float(lam_axis.min()), float(lam_axis.max())
    disp0 = float(np.median(disp_guess))
    tol = 5.0 * disp0 if tolerance_nm is None else _positive(tolerance_nm, "tolerance_nm")
    needed = degree + 2

    def fail(found, what):
        in_window = int(np.count_nonzero((ref >= lo) & (ref <= hi)))
        raise CalibrationError(
            f"lamp calibration found {found} usable lines ({what}), needs at least {needed} for a "
            f"degree-{degree} polynomial; {_window_text(lo, hi, n_px)}, which holds {in_window} "
            f"reference lines")

    peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=snr_min)
    if len(peaks) >= 3:
        fwhm_med = float(np.median(peaks["fwhm_px"]))
        if abs(fwhm_med / 2.5 - 1.0) > 0.3:               # lines wider or narrower than assumed
            peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=snr_min,
                                    fwhm_guess_px=fwhm_med)
    if len(peaks) < needed:
        fail(len(peaks), f"{len(peaks)} peaks above SNR {snr_min:g}")
    pix = peaks["pixel"].to_numpy()
    pix_err = peaks["pixel_err"].to_numpy()
    fwhm_px = np.maximum(peaks["fwhm_px"].to_numpy(), np.median(peaks["fwhm_px"]))
    gap = np.full(ref.size, np.inf)
    if ref.size > 1:
        step = np.diff(ref)
        gap[:-1] = step
        gap[1:] = np.minimum(gap[1:], step)

    lam_g = P.polyval(pix, guess)
    lam_c = float(P.polyval((n_px - 1) / 2.0, guess))
    eps, off = _coarse_alignment(lam_g, lam_c, (hi - lo) / 2.0, ref, weight_ref, tol)
    coef = guess * (1.0 + eps)
    coef[0] += off - eps * lam_c

    stages = list(range(1, degree + 1)) + [degree]
    clipped = np.zeros(pix.size, dtype=bool)
    for d in stages:
        base = guess if (guess.size - 1 > d and d < degree) else np.zeros(1)
        state = None
        for _ in range(_MAX_ITERATIONS):
            lam = P.polyval(pix, coef)
            disp = np.abs(P.polyval(pix, P.polyder(coef)))
            match, duplicate = _match(lam, ref, tol)
            matched = match >= 0
            blend = matched & (gap[np.maximum(match, 0)] < 2.0 * fwhm_px * disp)
            candidate = matched & ~blend
            use = candidate & ~clipped
            if np.count_nonzero(use) < d + 2:
                fail(int(np.count_nonzero(use)),
                     f"{pix.size} peaks, {int(np.count_nonzero(matched))} matched within "
                     f"{tol:.4f} nm, {int(np.count_nonzero(blend))} blends")
            sigma = pix_err * disp
            target = ref[np.maximum(match, 0)] - P.polyval(pix, base)
            fit = np.polynomial.Polynomial.fit(pix[use], target[use], d, w=1.0 / sigma[use])
            fit_coef = fit.convert().coef
            new_coef = np.zeros(max(d + 1, base.size))
            new_coef[: fit_coef.size] = fit_coef
            new_coef[: base.size] += base

            resid = ref[np.maximum(match, 0)] - P.polyval(pix, new_coef)
            z = resid / sigma
            zu = z[use]
            scale = 1.4826 * float(np.median(np.abs(zu - np.median(zu))))
            over = candidate & (np.abs(z) > clip_sigma * max(1.0, scale))
            spare = int(np.count_nonzero(candidate)) - (d + 2)
            if np.count_nonzero(over) > spare:             # never clip below a solvable set
                worst = np.flatnonzero(over)[np.lexsort((np.flatnonzero(over),
                                                         -np.abs(z[over])))]
                over = np.zeros_like(over)
                over[worst[:max(spare, 0)]] = True
            new_state = (match.tobytes(), over.tobytes())
            coef, last_use, last = new_coef, use, (match, duplicate, blend, resid)
            if new_state == state:
                break
            state, clipped = new_state, over
        rms = float(np.sqrt(np.mean(last[3][last_use] ** 2)))
        tol = min(tol, max(5.0 * rms, float(np.median(disp))))

    match, duplicate, blend, resid = last
    used = last_use
    fitted = P.polyval(pix, coef)
    reason = np.full(pix.size, "", dtype=object)
    reason[match < 0] = "unmatched"
    reason[duplicate] = "duplicate"
    reason[(match >= 0) & ~used] = "clipped"
    reason[blend] = "blend"
    ref_col = np.where(match >= 0, ref[np.maximum(match, 0)], np.nan)
    lines = pd.DataFrame({
        "pixel": pix, "pixel_err": pix_err, "reference_air_nm": ref_col,
        "fitted_air_nm": fitted, "residual_nm": ref_col - fitted,
        "used": used.astype(bool), "reason": pd.array(reason.tolist(), dtype="str"),
    })
    coef_out = np.zeros(degree + 1)
    coef_out[: min(coef.size, degree + 1)] = coef[: degree + 1]
    rms = float(np.sqrt(np.mean(lines["residual_nm"].to_numpy()[used] ** 2)))
    solution = DispersionSolution(coefficients_nm=tuple(float(c) for c in coef_out), degree=degree,
                                  rms_nm=rms, n_used=int(np.count_nonzero(used)), lines=lines)
    disp_med = float(np.median(np.abs(P.polyval(pixels, P.polyder(coef_out)))))
    if rms > 0.1 * disp_med:
        warnings.warn(CalibrationWarning(
            f"lamp calibration residual rms {rms * 1e3:.2f} pm is {rms / disp_med:.2f} px, above "
            f"0.1 px; check the line list, the degree ({degree}) and the lamp frame"), stacklevel=2)
    return solution
