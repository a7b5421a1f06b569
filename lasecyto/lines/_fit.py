"""Batched Poisson maximum-likelihood fitting of laser lines (public API over the compiled engine)."""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, fields

import numba
import numpy as np

from ..exceptions import InputError
from ._baseline import BASELINE_METHODS, as_block, estimate_baseline
from ._detect import check_nonneg, check_pos, detection_kernel
from ._instrument import InstrumentProfile
from ._nbfit import MESSAGES, N_LINE_FIELDS, N_LINE_INTS, FitConfig, fit_rows, prepare_rows
from ._nbfit import _A, _AMP, _BG, _C, _CHI2, _CLG, _DPIX, _EA, _EC, _EW, _EW2, _MSG, _SAT, _W, _W2
from ._nbshape import OL_A, OL_B, PARAMS_PER_LINE, SHAPE_CODES, VOIGT
from ._shapes import check_shape

__all__ = ["LineFits", "fit_lines", "is_lasing"]

#: lines closer than this many FWHM (of the wider of the two) are fitted jointly
BLEND_SEPARATION_FWHM = 1.5
#: lines whose separation is below this fraction of the larger fit half window are fitted jointly
JOINT_OVERLAP = 2.0
#: largest number of lines in one jointly fitted group
MAX_GROUP = 4
#: convergence: an undamped step moving every parameter by less than this many sigma ends the fit
STEP_TOL_SIGMA = 0.1
#: chi-square improvement needed to split one fitted line into a blend of two
BLEND_DCHI2 = 25.0


@dataclass(frozen=True)
class LineFits:
    """Fitted lines of a block of spectra, one entry per line.

    Entries are ordered by spectrum, then by fitted centre.  Pixel coordinates
    (pixel centres are integers) and photoelectrons throughout; errors are
    1-sigma, from the inverse Fisher information at the solution (the
    Cramer-Rao bound evaluated at the fitted parameters).  ``fwhm_px`` is the
    fitted FWHM; for the Voigt shape the Olivero & Longbothum (1977) FWHM of
    the fitted components ``fwhm_lorentzian_px`` and ``fwhm_gaussian_px``
    (NaN for the other shapes); for the instrument shape, whose width is held
    at the instrument's in the fit, the maximum-likelihood stretch of the
    profile (from a second fit with it freed) times the instrument FWHM, used
    to judge whether a line is wider than the instrument.
    """

    spectrum: np.ndarray
    center_px: np.ndarray
    center_err_px: np.ndarray
    fwhm_px: np.ndarray
    fwhm_err_px: np.ndarray
    area_e: np.ndarray
    area_err_e: np.ndarray
    amplitude_e: np.ndarray
    background_e: np.ndarray
    snr: np.ndarray
    chi2_red: np.ndarray
    saturated: np.ndarray
    fit_ok: np.ndarray
    fit_message: np.ndarray
    fwhm_lorentzian_px: np.ndarray
    fwhm_gaussian_px: np.ndarray

    def __len__(self):
        return int(self.spectrum.shape[0])

    def as_dict(self):
        """Columns as a dict of 1-D arrays (ready for ``pandas.DataFrame``)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def is_lasing(fwhm_px, snr, fit_ok, *, max_fwhm_px=8.0, snr_min=10.0, instrument_fwhm_px=None,
              max_width_ratio=1.5, contrast=None, min_contrast=0.0, cosmic_ray=None):
    """Decide which fitted lines are laser lines.

    Rule: a line is a laser line when its fit is ok, it is not a cosmic-ray
    spike, its SNR (area over area uncertainty) is at least ``snr_min``, its
    contrast (peak over the background under it) is at least
    ``min_contrast``, and it is narrow: FWHM at most ``max_width_ratio`` times
    the instrument FWHM when that is known (a laser line is no wider than the
    spectrometer's resolution; cavity-filtered fluorescence below threshold is
    wider), otherwise at most ``max_fwhm_px``.  Fluorescence bands tens of nm
    wide are removed with the baseline.

    Parameters
    ----------
    fwhm_px, snr, fit_ok : array_like
        Per-line fitted FWHM, SNR and fit status.
    max_fwhm_px : float
        Width limit without an instrument FWHM.
    snr_min : float
    instrument_fwhm_px : float, optional
        FWHM of the instrument function (e.g. :attr:`InstrumentProfile.fwhm_px`).
    max_width_ratio : float
        Width limit in instrument FWHM.
    contrast : array_like, optional
        Per-line contrast (see :func:`line_contrast`); not tested when omitted.
    min_contrast : float
    cosmic_ray : array_like of bool, optional
        Per-line cosmic-ray flag (see :func:`flag_cosmic_rays`).

    Returns
    -------
    numpy.ndarray of bool
    """
    fwhm = np.asarray(fwhm_px, dtype=float)
    snr = np.asarray(snr, dtype=float)
    ok = np.asarray(fit_ok, dtype=bool)
    limit = max_fwhm_px if instrument_fwhm_px is None else max_width_ratio * float(instrument_fwhm_px)
    with np.errstate(invalid="ignore"):
        out = ok & (snr >= snr_min) & (fwhm <= limit)
        if contrast is not None:
            out &= np.asarray(contrast, dtype=float) >= min_contrast
    if cosmic_ray is not None:
        out &= ~np.asarray(cosmic_ray, dtype=bool)
    return out


def _check_args(read_noise_e, saturation_e, shape, snr_min, fwhm_guess_px, window_half_px, max_iterations,
                min_fwhm_px, max_fwhm_px):
    check_nonneg("read_noise_e", read_noise_e)
    if np.isnan(saturation_e):
        raise InputError("saturation level is NaN", field="saturation_e", expected="a number or inf",
                         found="nan")
    check_shape(shape)
    check_pos("snr_min", snr_min)
    check_pos("fwhm_guess_px", fwhm_guess_px)
    if window_half_px is not None and not (np.isfinite(window_half_px) and window_half_px >= 3):
        raise InputError("fit half window too small", field="window_half_px", expected="None or >= 3 px",
                         found=repr(window_half_px))
    if int(max_iterations) != max_iterations or max_iterations < 1:
        raise InputError("need at least one iteration", field="max_iterations", expected="integer >= 1",
                         found=repr(max_iterations))
    check_pos("min_fwhm_px", min_fwhm_px)
    if not (np.isfinite(max_fwhm_px) and max_fwhm_px > min_fwhm_px):
        raise InputError("width bounds out of order", field="max_fwhm_px",
                         expected=f"finite and > min_fwhm_px = {min_fwhm_px}", found=repr(max_fwhm_px))



def _empty_fits():
    f = np.zeros(0)
    cols = {f_.name: f.copy() for f_ in fields(LineFits)}
    cols["spectrum"] = np.zeros(0, dtype=np.int64)
    cols["saturated"] = np.zeros(0, dtype=bool)
    cols["fit_ok"] = np.zeros(0, dtype=bool)
    cols["fit_message"] = np.zeros(0, dtype=object)
    return LineFits(**cols)


_POOLS = {}


def _map(func, chunks, threads):
    """Run ``func(s0, s1)`` over the chunks in ``threads`` threads (the compiled kernels release the GIL)."""
    if threads <= 1 or len(chunks) <= 1:
        for s0, s1 in chunks:
            func(s0, s1)
        return
    pool = _POOLS.get(threads)
    if pool is None:
        pool = _POOLS[threads] = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="lasecyto-lines")
    for future in [pool.submit(func, s0, s1) for s0, s1 in chunks]:
        future.result()


def _run_engine(raw, base, cfg, kernel, prof):
    """Both passes of the compiled engine over a block, chunked over ``numba.get_num_threads()`` threads."""
    n_spec, n_pix = raw.shape
    threads = int(numba.get_num_threads())
    # a few chunks per thread keeps the threads busy when spectra differ in their number of lines
    n_chunks = max(1, min(n_spec, 4 * threads if threads > 1 else 1))
    edges = np.linspace(0, n_spec, n_chunks + 1).round().astype(int)
    chunks = [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:]) if b > a]
    filled = np.empty((n_spec, n_pix))
    finite = np.empty((n_spec, n_pix), dtype=bool)
    if cfg.base_mode == 1:
        base = np.empty((n_spec, n_pix))
    det = np.empty((n_spec, n_pix // 2 + 1), dtype=np.int64)
    n_det = np.zeros(n_spec, dtype=np.int64)
    _map(lambda s0, s1: prepare_rows(raw, s0, s1, base, cfg, kernel, filled, finite, det, n_det), chunks, threads)
    offsets = np.zeros(n_spec + 1, dtype=np.int64)
    np.cumsum(2 * n_det, out=offsets[1:])
    out_f = np.full((N_LINE_FIELDS, int(offsets[-1])), np.nan)
    out_i = np.zeros((N_LINE_INTS, int(offsets[-1])), dtype=np.int64)
    n_out = np.zeros(n_spec, dtype=np.int64)
    _map(lambda s0, s1: fit_rows(raw, s0, s1, base, cfg, prof, filled, finite, det, n_det, offsets, out_f, out_i,
                                 n_out), chunks, threads)
    return out_f, out_i, offsets, n_out


def _baseline_mode(baseline, filled_shape, spectra):
    """(mode, base array) for the compiled engine: 0 none, 1 SNIP inside the engine, 2 given."""
    if baseline is None or (isinstance(baseline, str) and baseline == "local"):
        return 0, np.zeros((1, 1))
    if isinstance(baseline, str):
        if baseline not in BASELINE_METHODS:
            raise InputError("unknown baseline method", field="baseline",
                             expected=" or ".join(repr(m) for m in BASELINE_METHODS) + ", 'local', an array or None",
                             found=repr(baseline))
        if baseline == "snip":
            return 1, np.zeros((1, 1))
        return 2, np.ascontiguousarray(estimate_baseline(spectra, method="asls"), dtype=float)
    base, _ = as_block(baseline, field="baseline")
    if base.shape != filled_shape:
        raise InputError("baseline shape differs from the spectra", field="baseline",
                         expected=f"shape {filled_shape}", found=f"shape {base.shape}")
    base = np.where(np.isfinite(base), base, 0.0)
    return 2, np.ascontiguousarray(base, dtype=float)


def fit_lines(spectra_e, *, read_noise_e=0.0, saturation_e=np.inf, shape="lorentzian", snr_min=5.0,
              fwhm_guess_px=2.5, window_half_px=None, baseline="snip", baseline_window_px=30,
              max_iterations=30, min_fwhm_px=0.5, max_fwhm_px=20.0, background_degree=2, instrument=None,
              gaussian_fwhm_px=None):
    """Detect and fit every line of a block of spectra in one compiled, parallel computation.

    Each spectrum's baseline is estimated and removed, lines are found with
    :func:`detect_lines`, and every line (or group of lines closer than 1.5
    FWHM, or whose cores lie in each other's fit windows: at most four,
    fitted jointly) is fitted in a window of ``+-window_half_px`` around it
    with the pixel-integrated profile plus a local polynomial background
    ``sum_j b_j (x - x_ref)**j`` (degree ``background_degree``).  The fit is
    Levenberg-Marquardt Fisher scoring of the likelihood with variance
    ``max(mu + baseline, 0) + read_noise_e**2`` re-evaluated at every step
    (Poisson maximum likelihood, shifted for read noise).  Groups whose
    window other lines reach are refitted once with those lines' fitted
    profiles subtracted (and added to the variance).  Spectra are processed in
    parallel by Numba threads (``numba.set_num_threads`` sets their number).

    Parameters
    ----------
    spectra_e : array_like, shape (N,) or (S, N)
        Spectra in photoelectrons (may be negative from read noise; NaN allowed).
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    saturation_e : float
        Raw level at or above which a pixel is saturated (flag only).
    shape : {"lorentzian", "gaussian", "voigt", "instrument"}
        Line profile, integrated over each pixel.  ``"voigt"`` fits a
        Lorentzian and a Gaussian FWHM per line (the Gaussian one is fixed at
        ``gaussian_fwhm_px`` when given); ``"instrument"`` fits centre and
        area of the measured instrument profile ``instrument`` (for laser
        lines narrower than the resolution).
    snr_min, fwhm_guess_px : float
        Detection threshold and matched-kernel width, see :func:`detect_lines`.
    window_half_px : float, optional
        Half width of the fit window; default ``max(6, 5 FWHM)`` for a
        Lorentzian or Voigt, ``max(4, 3 FWHM)`` for a Gaussian (from each
        line's initial width) and the profile's support plus 2 px for the
        instrument shape.
    baseline : {"snip", "asls", "local"}, array_like or None
        Global baseline removed before detection and fitting: SNIP (window
        ``baseline_window_px``), AsLS (default options), an explicit baseline of
        the block's shape, or ``"local"``/None for none, in which case the
        fluorescence is carried only by each window's polynomial background
        (fastest; the matched filter of the detection is blind to a local
        constant and slope).
    baseline_window_px : int
        SNIP window.
    max_iterations : int
        Iterations of the scoring loop.
    min_fwhm_px, max_fwhm_px : float
        Width bounds; a fit ending on a bound is flagged.
    background_degree : int
        Degree (0-3) of the polynomial background fitted jointly with the lines
        in every window, on top of the global baseline (default 2: a quadratic
        absorbs the curvature of a fluorescence band under a broad line).
    instrument : InstrumentProfile, optional
        Required by ``shape="instrument"``.
    gaussian_fwhm_px : float, optional
        Voigt only: fixed Gaussian FWHM (e.g. the spectrometer's), or None to fit it.

    Returns
    -------
    LineFits
    """
    _check_args(read_noise_e, saturation_e, shape, snr_min, fwhm_guess_px, window_half_px, max_iterations,
                min_fwhm_px, max_fwhm_px)
    raw, _ = as_block(spectra_e)
    if isinstance(background_degree, bool) or background_degree not in (0, 1, 2, 3):
        raise InputError("local background degree out of range", field="background_degree",
                         expected="0, 1, 2 or 3", found=repr(background_degree))
    code = SHAPE_CODES[shape]
    if shape == "instrument":
        if not isinstance(instrument, InstrumentProfile):
            raise InputError("the instrument shape needs a measured instrument profile", field="instrument",
                             expected="an InstrumentProfile (from a lamp frame)", found=repr(type(instrument).__name__))
        prof = np.ascontiguousarray(instrument.coefficients, dtype=float)
        p_start, p_step = instrument.start_px, instrument.step_px
        inst_fwhm, inst_half = instrument.fwhm_px, instrument.half_width_px + 2.0
    else:
        prof, p_start, p_step = np.zeros(8), 0.0, 1.0
        inst_fwhm = float(fwhm_guess_px) if instrument is None else float(instrument.fwhm_px)
        inst_half = 6.0
    w2_free = True
    w2_init = -1.0
    if gaussian_fwhm_px is not None:
        if shape != "voigt":
            raise InputError("a fixed Gaussian FWHM applies to the Voigt shape only", field="gaussian_fwhm_px",
                             expected="None unless shape='voigt'", found=repr(gaussian_fwhm_px))
        w2_init = check_pos("gaussian_fwhm_px", gaussian_fwhm_px)
        w2_free = False
    if int(baseline_window_px) != baseline_window_px or baseline_window_px < 1:
        raise InputError("SNIP window must be a positive integer", field="baseline_window_px",
                         expected="integer >= 1", found=repr(baseline_window_px))
    mode, base = _baseline_mode(baseline, raw.shape, raw)
    kernel, peak_frac = detection_kernel(float(fwhm_guess_px))
    cfg = FitConfig(
        shape=code, npl=PARAMS_PER_LINE[code], nb=int(background_degree) + 1, read_noise_e=float(read_noise_e),
        saturation_e=float(saturation_e), snr_min=float(snr_min), fwhm_guess_px=float(fwhm_guess_px),
        half_fixed_px=-1.0 if window_half_px is None else float(window_half_px),
        max_iterations=int(max_iterations), min_fwhm_px=float(min_fwhm_px), max_fwhm_px=float(max_fwhm_px),
        w2_init_px=float(w2_init), w2_free=bool(w2_free), inst_half_px=float(inst_half),
        inst_fwhm_px=float(inst_fwhm), p_start=float(p_start), p_step=float(p_step),
        radius=int(max(1, math.floor(1.5), math.floor(0.5 * fwhm_guess_px))), peak_frac=float(peak_frac),
        step_tol_sigma=float(STEP_TOL_SIGMA), blend_separation_fwhm=float(BLEND_SEPARATION_FWHM),
        joint_overlap=float(JOINT_OVERLAP), max_group=int(MAX_GROUP), blend_dchi2=float(BLEND_DCHI2),
        base_mode=int(mode), snip_window=int(baseline_window_px))
    out_f, out_i, offsets, counts = _run_engine(np.ascontiguousarray(raw, dtype=float), base, cfg, kernel, prof)
    if counts.sum() == 0:
        return _empty_fits()
    take = np.concatenate([np.arange(o, o + c) for o, c in zip(offsets[:-1], counts) if c])
    f = out_f[:, take]
    ints = out_i[:, take]
    message = np.array(MESSAGES, dtype=object)[ints[_MSG]]
    wl, wg, clg = f[_W], f[_W2], f[_CLG]
    if code == VOIGT:
        root = np.sqrt(OL_B * wl * wl + wg * wg)
        fwhm = OL_A * wl + root
        d_l = OL_A + OL_B * wl / root
        d_g = wg / root
        var = (d_l * f[_EW]) ** 2 + np.where(np.isfinite(f[_EW2]), (d_g * f[_EW2]) ** 2, 0.0) \
            + 2 * d_l * d_g * np.where(np.isfinite(clg), clg, 0.0)
        fwhm_err = np.sqrt(np.maximum(var, 0.0))
        comp_l, comp_g = wl, wg
    else:
        fwhm, fwhm_err = wl, f[_EW]
        comp_l = comp_g = np.full(take.size, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = f[_A] / f[_EA]
    return LineFits(spectrum=ints[_DPIX].astype(np.int64), center_px=f[_C], center_err_px=f[_EC], fwhm_px=fwhm,
                    fwhm_err_px=fwhm_err, area_e=f[_A], area_err_e=f[_EA], amplitude_e=f[_AMP],
                    background_e=f[_BG], snr=snr, chi2_red=f[_CHI2], saturated=ints[_SAT].astype(bool),
                    fit_ok=message == "", fit_message=message, fwhm_lorentzian_px=comp_l, fwhm_gaussian_px=comp_g)
