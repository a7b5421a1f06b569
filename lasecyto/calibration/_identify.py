"""Lamp-line identification without a dispersion guess.

Only a rough wavelength window of the detector is known.  Lines are identified from the
pattern of their spacings: every local triplet of measured peaks is compared with every
local triplet of reference lines; a pair whose spacing ratio agrees (and whose implied
dispersion fits the window) is a hypothesis.  Each hypothesis is grown outwards, matching
further peaks to reference lines with a polynomial refitted at every step, and the
hypothesis that explains the most peaks wins.  The identified lines then seed
:func:`solve_dispersion`.

Pixel centres are integers counted from 0, as in :class:`WavelengthAxis`; wavelengths
are in standard air, nm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numpy.polynomial import polynomial as P
from scipy import stats

from ..exceptions import CalibrationError, InputError
from ._lamp import _as_spectrum, _positive, find_lamp_peaks, solve_dispersion

__all__ = ["LineIdentification", "calibrate_lamp", "identify_lamp_lines"]

_ORIENTATIONS = ("either", "ascending", "descending")
_TRIPLET_REACH = 4          # a triplet spans at most this many neighbours (missing lines)
_SEED_TOL_PX = 2.0          # middle line of a triplet: allowed miss, px (plus 1 % of its span)
_GROW_TOL_PX = 2.5          # matching tolerance while growing, px
_MAX_SEEDS = 40             # hypotheses grown, best local score first
_MIN_LINES = 5
_MAX_RMS_PX = 0.25          # a grown hypothesis must fit its lines this well (chance alignments do not)
_MAX_CHANCE = 1e-6          # and explain more peaks than chance coincidences plausibly would


@dataclass(frozen=True, eq=False)
class LineIdentification:
    """Result of :func:`identify_lamp_lines`.

    Attributes
    ----------
    coefficients_nm : tuple of float
        Ascending coefficients of the provisional pixel -> air-wavelength polynomial
        (degree <= 3) fitted to the identified lines.
    descending : bool
        True when wavelength decreases with pixel index.
    n_identified : int
        Number of peaks identified with a reference line.
    rms_px : float
        RMS of the provisional fit's residuals, pixels.
    lines : pandas.DataFrame
        One row per detected peak, sorted by pixel: ``pixel``, ``pixel_err``,
        ``amplitude_e``, ``reference_air_nm`` (NaN when not identified).
    """

    coefficients_nm: tuple
    descending: bool
    n_identified: int
    rms_px: float
    lines: pd.DataFrame


def _peaks(y, read_noise_e, snr_min):
    """Lamp peaks, refitted with the measured width when it differs from the default."""
    peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=snr_min)
    if len(peaks) >= 3:
        fwhm_med = float(np.median(peaks["fwhm_px"]))
        if abs(fwhm_med / 2.5 - 1.0) > 0.3:
            peaks = find_lamp_peaks(y, read_noise_e=read_noise_e, snr_min=snr_min,
                                    fwhm_guess_px=min(fwhm_med, y.size / 4))
    return peaks


def _triplets(n, reach):
    """Index triplets i < j < k with k - i <= reach, in lexicographic order."""
    out = [(i, j, k) for i in range(n) for j in range(i + 1, min(i + reach, n))
           for k in range(j + 1, min(i + reach + 1, n))]
    return np.array(out, dtype=int).reshape(-1, 3)


def _seeds(u, lam, disp_range, centre_range, u_centre):
    """Triplet pairs whose spacing ratios agree; returns (peak triplets, ref triplets)."""
    tp = _triplets(u.size, _TRIPLET_REACH)
    tr = _triplets(lam.size, _TRIPLET_REACH)
    if tp.size == 0 or tr.size == 0:
        return np.empty((0, 3), int), np.empty((0, 3), int), np.empty(0)
    ui, uj, uk = (u[tp[:, c]][:, None] for c in range(3))
    li, lj, lk = (lam[tr[:, c]][None, :] for c in range(3))
    b = (lk - li) / (uk - ui)                                  # implied dispersion, nm/px
    mid = ui + (lj - li) / b                                   # where the middle line should be
    miss = np.abs(mid - uj)
    centre = li + b * (u_centre - ui)
    ok = ((b >= disp_range[0]) & (b <= disp_range[1]) & (centre >= centre_range[0])
          & (centre <= centre_range[1]) & (miss <= _SEED_TOL_PX + 0.01 * (uk - ui)))
    a, r = np.nonzero(ok)
    return tp[a], tr[r], miss[a, r]


def _match_px(u, lam_pred, disp, ref, tol_px, allowed):
    """One-to-one nearest matching of predicted wavelengths within tol_px pixels."""
    idx = np.clip(np.searchsorted(ref, lam_pred), 1, ref.size - 1) if ref.size > 1 else \
        np.zeros(lam_pred.size, dtype=int)
    cand = np.stack([np.maximum(idx - 1, 0), idx], axis=1)
    dist = np.abs(ref[cand] - lam_pred[:, None])
    pick = cand[np.arange(u.size), np.argmin(dist, axis=1)]
    dpx = np.abs(ref[pick] - lam_pred) / disp
    match = np.full(u.size, -1)
    taken = np.zeros(ref.size, dtype=bool)
    for i in np.lexsort((np.arange(u.size), dpx)):
        if allowed[i] and dpx[i] <= tol_px and not taken[pick[i]]:
            match[i] = pick[i]
            taken[pick[i]] = True
    return match


def _fit(u, lam, deg):
    return np.polynomial.Polynomial.fit(u, lam, deg).convert().coef


def _grow(u, ref, seed_p, seed_r, n_px):
    """Extend one triplet hypothesis over the detector; returns (match, coef, rms_px)."""
    match = np.full(u.size, -1)
    match[seed_p] = seed_r
    state = None
    coef = None
    for _ in range(60):
        used = match >= 0
        n_used = int(np.count_nonzero(used))
        deg = 1 if n_used < 5 else (2 if n_used < 8 else 3)
        coef = _fit(u[used], ref[match[used]], deg)
        lo, hi = u[used].min(), u[used].max()
        margin = max(0.05 * n_px, 0.5 * (hi - lo))
        allowed = (u >= lo - margin) & (u <= hi + margin)
        disp = P.polyval(u, P.polyder(coef))
        if not np.all(disp > 0):
            return match, coef, np.inf, False
        new = _match_px(u, P.polyval(u, coef), disp, ref, _GROW_TOL_PX, allowed)
        key = new.tobytes()
        if key == state or np.count_nonzero(new >= 0) < 3:
            break
        state, match = key, new
    used = match >= 0
    disp = P.polyval(u[used], P.polyder(coef))
    rms = float(np.sqrt(np.mean(((ref[match[used]] - P.polyval(u[used], coef)) / disp) ** 2)))
    return match, coef, rms, True


def _chance(n_matched, n_peaks, ref, ends_nm, n_px):
    """Probability that n_matched or more of n_peaks randomly placed peaks fall within
    the matching tolerance of a reference line on the detector (binomial)."""
    n_ref = int(np.count_nonzero((ref >= ends_nm.min()) & (ref <= ends_nm.max())))
    p_hit = min(1.0, n_ref * 2.0 * _GROW_TOL_PX / n_px)
    return float(stats.binom.sf(n_matched - 1, n_peaks, p_hit))


def _best(u, ref, n_px, disp_range, centre_range, ends_nm, slack_nm):
    """Best grown hypothesis for one orientation: (n, -rms, match, coef) or None.

    A grown hypothesis counts only if its provisional fit RMS is at most 0.25 px, its
    axis puts both detector ends inside the window, each within slack_nm, and chance
    coincidences would explain as many peaks with probability at most 1e-6.
    """
    u_c = (n_px - 1) / 2.0
    tp, tr, miss = _seeds(u, ref, disp_range, centre_range, u_c)
    if tp.shape[0] == 0:
        return None
    # local score of each seed: peaks within +-15 % of the detector explained by its line
    ui, uk = u[tp[:, 0]], u[tp[:, 2]]
    li, lk = ref[tr[:, 0]], ref[tr[:, 2]]
    b = (lk - li) / (uk - ui)
    pred = li[:, None] + b[:, None] * (u[None, :] - ui[:, None])
    near = np.abs(u[None, :] - 0.5 * (ui + uk)[:, None]) <= 0.15 * n_px
    pos = np.clip(np.searchsorted(ref, pred), 1, max(ref.size - 1, 1))
    d = np.minimum(np.abs(pred - ref[pos - 1]), np.abs(pred - ref[np.minimum(pos, ref.size - 1)]))
    local = np.sum(near & (d / b[:, None] <= _GROW_TOL_PX), axis=1)
    order = np.lexsort((np.arange(local.size), miss, -local))
    best = None
    tried = set()
    for s in order:
        key = (int(round(float(P.polyval(u_c, [li[s] - b[s] * ui[s], b[s]])) / (b[s] * 2.0))),
               int(round(math.log(b[s]) * 200)))
        if key in tried:                                       # same line: already grown
            continue
        tried.add(key)
        match, coef, rms, ok = _grow(u, ref, tp[s], tr[s], n_px)
        ends = P.polyval(np.array([0.0, n_px - 1.0]), coef)
        if ok and rms <= _MAX_RMS_PX and np.all(np.abs(ends - ends_nm) <= slack_nm):
            n = int(np.count_nonzero(match >= 0))
            if _chance(n, u.size, ref, ends, n_px) > _MAX_CHANCE:
                continue
            cand = (n, -rms, match, coef)
            if best is None or (n, -rms) > (best[0], best[1]):
                best = cand
        if len(tried) >= _MAX_SEEDS:
            break
    return best


def identify_lamp_lines(spectrum_e, reference_air_nm, *, window_nm, window_tolerance=0.1,
                        orientation="either", read_noise_e=0.0, snr_min=10.0):
    """Identify lamp lines with reference lines, knowing only the rough window.

    Parameters
    ----------
    spectrum_e : array, shape (n_pixels,)
        Lamp spectrum in photoelectrons per pixel.
    reference_air_nm : array
        Reference wavelengths in standard air, nm.
    window_nm : (float, float)
        Rough air wavelengths at the two ends of the detector, in either order.
    window_tolerance : float
        How far each end of the window may be off, as a fraction of its span
        (default 0.1, i.e. 13 nm for a 130 nm window).
    orientation : {"either", "ascending", "descending"}
        Whether wavelength grows with pixel index; "either" tries both.
    read_noise_e : float
        Read noise per pixel, photoelectrons rms.
    snr_min : float
        Minimum peak signal-to-noise ratio (see :func:`find_lamp_peaks`).

    Returns
    -------
    LineIdentification

    Raises
    ------
    CalibrationError
        When no hypothesis explains at least 5 peaks with a provisional fit RMS below
    0.25 px, an axis whose ends lie within the window tolerance and a chance
    probability (binomial, random peaks against the reference lines on the detector)
    of at most 1e-6.
    """
    y = _as_spectrum(spectrum_e)
    n_px = y.size
    try:
        lo, hi = sorted(float(v) for v in window_nm)
    except (TypeError, ValueError):
        raise InputError("window must be two wavelengths", field="window_nm",
                         expected="(shortest_nm, longest_nm)", found=repr(window_nm)) from None
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
        raise InputError("window must be two distinct positive wavelengths", field="window_nm",
                         expected="0 < shortest_nm < longest_nm", found=repr(window_nm))
    tol = _positive(window_tolerance, "window_tolerance")
    if tol >= 0.5:
        raise InputError("window tolerance too large", field="window_tolerance",
                         expected="a fraction of the span below 0.5", found=repr(window_tolerance))
    if orientation not in _ORIENTATIONS:
        raise InputError("unknown orientation", field="orientation",
                         expected=" | ".join(_ORIENTATIONS), found=repr(orientation))
    ref = np.asarray(reference_air_nm, dtype=float)
    if ref.ndim != 1 or ref.size == 0 or not np.all(np.isfinite(ref)):
        raise InputError("reference lines must be a non-empty 1-D list of finite wavelengths",
                         field="reference_air_nm", expected="finite values in nm",
                         found=f"shape {ref.shape}")
    span = hi - lo
    ref = np.unique(ref[(ref >= lo - tol * span) & (ref <= hi + tol * span)])
    if ref.size < _MIN_LINES:
        raise CalibrationError(f"only {ref.size} reference lines lie in {lo - tol * span:.2f}-"
                               f"{hi + tol * span:.2f} nm; identification needs at least "
                               f"{_MIN_LINES}")
    # The mean dispersion may differ by 2 x tol of the span; grating axes also curve, so
    # the local dispersion of a triplet is allowed a further 30 %.
    disp0 = span / (n_px - 1)
    disp_range = (disp0 * (1 - 2 * tol) / 1.3, disp0 * (1 + 2 * tol) * 1.3)
    # A seed extrapolates a local, linear axis to the detector centre: allow 10 % of the
    # span for the curvature on top of the window's own uncertainty.
    centre_range = (0.5 * (lo + hi) - (tol + 0.1) * span, 0.5 * (lo + hi) + (tol + 0.1) * span)

    peaks = _peaks(y, read_noise_e, snr_min)
    if len(peaks) < _MIN_LINES:
        raise CalibrationError(f"lamp spectrum has {len(peaks)} peaks above SNR {snr_min:g}; "
                               f"identification needs at least {_MIN_LINES}")
    pix = peaks["pixel"].to_numpy()
    results = []
    for name in ("ascending", "descending"):
        if orientation not in ("either", name):
            continue
        u = pix if name == "ascending" else (n_px - 1) - pix
        order = np.argsort(u, kind="stable")
        best = _best(u[order], ref, n_px, disp_range, centre_range, np.array([lo, hi]),
                     tol * span)
        if best is not None:
            match = np.full(pix.size, -1)
            match[order] = best[2]
            results.append((best[0], best[1], name == "descending", match, best[3]))
    if not results or max(r[0] for r in results) < _MIN_LINES:
        raise CalibrationError(
            f"no line pattern of the {len(peaks)} lamp peaks matches the {ref.size} reference "
            f"lines of {lo:.2f}-{hi:.2f} nm (ends +-{tol * span:.2f} nm): no hypothesis "
            f"explains {_MIN_LINES} or more peaks with a fit rms <= {_MAX_RMS_PX} px and a "
            f"chance probability <= {_MAX_CHANCE:g}; check the window, the lamp species and "
            f"the SNR cut")
    n, neg_rms, descending, match, coef_u = max(results, key=lambda r: (r[0], r[1], not r[2]))
    coef = np.asarray(coef_u, dtype=float)
    if descending:                                             # lambda(p) = f(n - 1 - p)
        coef = np.polynomial.Polynomial(coef)(np.polynomial.Polynomial([n_px - 1.0, -1.0])).coef
    lines = pd.DataFrame({
        "pixel": pix,
        "pixel_err": peaks["pixel_err"].to_numpy(),
        "amplitude_e": peaks["amplitude_e"].to_numpy(),
        "reference_air_nm": np.where(match >= 0, ref[np.maximum(match, 0)], np.nan),
    })
    return LineIdentification(coefficients_nm=tuple(float(c) for c in coef),
                              descending=bool(descending), n_identified=int(n),
                              rms_px=float(-neg_rms), lines=lines)


def calibrate_lamp(spectrum_e, reference_air_nm, *, window_nm, degree=3, window_tolerance=0.1,
                   orientation="either", read_noise_e=0.0, snr_min=10.0, clip_sigma=4.0,
                   reference_intensity=None):
    """Dispersion solution from a lamp spectrum with no initial guess.

    Lines are identified by :func:`identify_lamp_lines` from the pattern of their
    spacings; the provisional polynomial then seeds :func:`solve_dispersion`, which
    matches, fits and sigma-clips as documented there.

    Parameters
    ----------
    spectrum_e, reference_air_nm, window_nm, window_tolerance, orientation
        As for :func:`identify_lamp_lines`.
    degree, read_noise_e, snr_min, clip_sigma, reference_intensity
        As for :func:`solve_dispersion`.

    Returns
    -------
    DispersionSolution
    """
    ident = identify_lamp_lines(spectrum_e, reference_air_nm, window_nm=window_nm,
                                window_tolerance=window_tolerance, orientation=orientation,
                                read_noise_e=read_noise_e, snr_min=snr_min)
    n_px = np.asarray(spectrum_e).size
    disp = np.abs(P.polyval(np.arange(n_px), P.polyder(ident.coefficients_nm)))
    return solve_dispersion(spectrum_e, reference_air_nm, guess_nm=ident.coefficients_nm,
                            degree=degree, read_noise_e=read_noise_e,
                            tolerance_nm=float(3.0 * np.median(disp)), clip_sigma=clip_sigma,
                            snr_min=snr_min, reference_intensity=reference_intensity)
