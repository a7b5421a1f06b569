"""Batched Poisson maximum-likelihood fitting of laser lines."""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from ..exceptions import InputError
from ._baseline import BASELINE_METHODS, as_block, estimate_baseline, fill_nonfinite
from ._crlb import fisher_matrix, invert_fisher, line_jacobian, model_variance
from ._detect import _detect, check_nonneg, check_pos
from ._shapes import check_shape, pixel_terms

__all__ = ["LineFits", "fit_lines", "is_lasing"]

#: lines closer than this many FWHM (of the wider of the two) are fitted jointly
BLEND_SEPARATION_FWHM = 1.5
#: lines whose separation is below this fraction of the larger fit half window are fitted jointly
JOINT_OVERLAP = 2.0
#: largest number of lines in one jointly fitted group
MAX_GROUP = 4
#: convergence: the last accepted step moved every parameter by less than this many sigma
STEP_TOL_SIGMA = 1e-2
#: chi-square improvement needed to split one fitted line into a blend of two
BLEND_DCHI2 = 25.0
#: window lengths are rounded up to these sizes so that few batches are needed
_WINDOW_SIZES = np.unique(np.round(16 * 1.5 ** np.arange(20)).astype(int))


@dataclass(frozen=True)
class LineFits:
    """Fitted lines of a block of spectra, one entry per line.

    Entries are ordered by spectrum, then by fitted centre.  Pixel coordinates
    (pixel centres are integers) and photoelectrons throughout; errors are
    1-sigma, from the inverse Fisher information at the solution (the
    Cramer-Rao bound evaluated at the fitted parameters).
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

    def __len__(self):
        return int(self.spectrum.shape[0])

    def as_dict(self):
        """Columns as a dict of 1-D arrays (ready for ``pandas.DataFrame``)."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def is_lasing(fwhm_px, snr, fit_ok, *, max_fwhm_px=8.0, snr_min=10.0):
    """Decide which fitted lines are laser lines.

    Rule: a line is a laser line when its fit is ok, its SNR (area over area
    uncertainty) is at least ``snr_min`` and its FWHM is at most
    ``max_fwhm_px``.  Fluorescence bands are tens of nm wide and removed with
    the baseline; spikes narrower than the fit's ``min_fwhm_px`` never pass
    the fit (width at bound).

    Returns
    -------
    numpy.ndarray of bool
    """
    fwhm = np.asarray(fwhm_px, dtype=float)
    snr = np.asarray(snr, dtype=float)
    ok = np.asarray(fit_ok, dtype=bool)
    with np.errstate(invalid="ignore"):
        return ok & (snr >= snr_min) & (fwhm <= max_fwhm_px)


def _default_half_window(fwhm_px, shape):
    # Lorentzian wings carry information that separates area from background
    if shape == "lorentzian":
        return np.maximum(6.0, 5.0 * fwhm_px)
    return np.maximum(4.0, 3.0 * fwhm_px)


def _initial_estimates(resid, finite, spec, pix, fwhm_guess, wmin, wmax):
    """Sub-pixel centre, width (half-maximum crossings) and peak of each detection."""
    n = resid.shape[1]
    reach = int(np.ceil(wmax)) + 2
    off = np.arange(-reach, reach + 1)
    cols = pix[:, None] + off
    inside = (cols >= 0) & (cols < n)
    colc = np.clip(cols, 0, n - 1)
    r = np.where(inside & finite[spec[:, None], colc], resid[spec[:, None], colc], -np.inf)
    # local level: the lower of the two outermost pixel pairs (a neighbour line may sit on one side)
    side_l = np.where(np.isfinite(r[:, :2]), r[:, :2], np.inf).mean(axis=1)
    side_r = np.where(np.isfinite(r[:, -2:]), r[:, -2:], np.inf).mean(axis=1)
    level = np.minimum(side_l, side_r)
    level = np.where(np.isfinite(level), level, 0.0)
    r = r - level[:, None]
    mid = reach
    r0, rl, rr = r[:, mid], r[:, mid - 1], r[:, mid + 1]
    rl = np.where(np.isfinite(rl), rl, r0)
    rr = np.where(np.isfinite(rr), rr, r0)
    curv = rl - 2 * r0 + rr
    shift = np.where(curv < 0, 0.5 * (rl - rr) / np.where(curv < 0, curv, -1.0), 0.0)
    center = pix + np.clip(shift, -0.5, 0.5)
    half = 0.5 * r0
    below = r < half[:, None]
    # first pixel below half maximum on each side, with linear interpolation
    right_j = np.argmax(below[:, mid:], axis=1)
    left_j = np.argmax(below[:, mid::-1], axis=1)
    rows = np.arange(len(pix))

    def crossing(j, sign):
        j = np.where(j == 0, reach, j)
        v_in = r[rows, mid + sign * (j - 1)]
        v_out = r[rows, mid + sign * j]
        v_out = np.where(np.isfinite(v_out), v_out, 0.0)
        den = v_in - v_out
        t = np.where(den > 0, (v_in - half) / np.where(den > 0, den, 1.0), 0.5)
        return (j - 1) + np.clip(t, 0.0, 1.0)

    fwhm = crossing(right_j, 1) + crossing(left_j, -1)
    fwhm = np.where((r0 > 0) & np.isfinite(fwhm), fwhm, fwhm_guess)
    fwhm = np.clip(fwhm, max(wmin, 1.0), wmax)
    return center, fwhm, np.maximum(r0, 0.0), level


def _evaluate(theta, k, x, xref, y, extra, mask, rn, shape, observed=True):
    """Model, curvature matrix and score of a batch of windows.

    With ``observed=True`` the curvature is the Gauss-Newton part of the
    observed Hessian of the shifted-Poisson likelihood, weights ``y'/m**2``
    (clipped to ``[0.5, 2] / m``), which converges in a few steps even where the
    model misfits; with ``observed=False`` it is the Fisher information
    (weights ``1/m``), used for the covariance.
    """
    deg = theta.shape[1] - 3 * k - 1
    lines, jac, _ = line_jacobian(x, xref, theta[:, :k], theta[:, k:2 * k], theta[:, 2 * k:3 * k], shape,
                                  deg)
    mu = lines + np.matmul(jac[:, :, 3 * k:], theta[:, 3 * k:, None])[..., 0]
    total = model_variance(mu + extra, rn)  # expected signal + read noise variance
    w = np.where(mask, 1.0 / total, 0.0)
    resid = np.where(mask, y - mu, 0.0)
    grad = np.matmul(np.swapaxes(jac, 1, 2), (w * resid)[..., None])[..., 0]
    wh = w * np.clip(1.0 + resid * w, 0.5, 2.0) if observed else w  # y'/m = 1 + (y - mu)/m
    fisher = np.matmul(np.swapaxes(jac * wh[..., None], 1, 2), jac)
    return total, fisher, grad, w, resid


def _damped_solve(fisher, grad, lam):
    diag = np.einsum("gii->gi", fisher)
    scale = 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))
    a = fisher * scale[:, :, None] * scale[:, None, :]
    p = a.shape[-1]
    a = a + (lam[:, None, None] + 1e-12) * np.eye(p)
    bad = ~np.all(np.isfinite(a), axis=(1, 2))
    a[bad] = np.eye(p)
    step = np.linalg.solve(a, (grad * scale)[..., None])[..., 0] * scale
    step[bad] = 0.0
    return step


def _project(theta, k, wmin, wmax):
    theta[:, k:2 * k] = np.clip(theta[:, k:2 * k], wmin, wmax)
    return theta


def _lm(theta, k, x, xref, y, extra, mask, rn, shape, wmin, wmax, max_iterations):
    """Levenberg-Marquardt Fisher scoring of the shifted-Poisson likelihood, batched."""
    g = theta.shape[0]
    theta = _project(theta.copy(), k, wmin, wmax)
    lam = np.full(g, 1e-3)
    converged = np.zeros(g, dtype=bool)
    n_iter = np.zeros(g, dtype=int)
    total, fisher, grad, _, _ = _evaluate(theta, k, x, xref, y, extra, mask, rn, shape)
    y_shift = y + extra + rn ** 2
    active = np.arange(g)
    for _ in range(max_iterations):
        if active.size == 0:
            break
        a = active
        step = _damped_solve(fisher[a], grad[a], lam[a])
        trial = _project(theta[a] + step, k, wmin, wmax)
        t_total, t_fisher, t_grad, _, _ = _evaluate(trial, k, x[a], xref[a], y[a], extra[a], mask[a],
                                                    rn, shape)
        # change of the negative log-likelihood, sum (m - y' log m), written without cancellation
        dm = t_total - total[a]
        with np.errstate(divide="ignore", invalid="ignore"):
            dnll = np.sum(np.where(mask[a], dm - y_shift[a] * np.log1p(dm / total[a]), 0.0), axis=1)
        accept = np.isfinite(dnll) & (dnll <= 1e-12 * np.abs(np.sum(np.where(mask[a], total[a], 0), 1)))
        moved = trial - theta[a]
        sig = np.sqrt(np.maximum(np.einsum("gii->gi", fisher[a]), 0.0))
        small = np.all(np.abs(moved) * sig < STEP_TOL_SIGMA, axis=1)
        acc = a[accept]
        theta[acc] = trial[accept]
        total[acc], fisher[acc], grad[acc] = t_total[accept], t_fisher[accept], t_grad[accept]
        lam[acc] = np.maximum(lam[acc] * 0.1, 1e-9)
        rej = a[~accept]
        lam[rej] = lam[rej] * 10.0
        n_iter[a] += 1
        done = (accept & small) | (~accept & (lam[a] > 1e8))
        converged[a[done]] = True
        active = a[~done & (lam[a] < 1e12)]
    _, fisher, _, w, resid = _evaluate(theta, k, x, xref, y, extra, mask, rn, shape, observed=False)
    cov, singular = invert_fisher(fisher)
    chi2 = np.sum(w * resid ** 2, axis=1)
    return theta, cov, converged, singular, chi2


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


def _gather(arr, spec, lo, length, size):
    """Rows ``spec`` of ``arr`` from ``lo`` over ``size`` pixels; ``inside`` marks the first ``length``."""
    n = arr.shape[1]
    cols = lo[:, None] + np.arange(size)
    inside = (cols < n) & (np.arange(size) < length[:, None])
    vals = arr[spec[:, None], np.clip(cols, 0, n - 1)]
    return vals, inside, cols.astype(float)


def _half_window(fwhm_px, window_half_px, shape):
    if window_half_px is not None:
        return np.full(np.shape(fwhm_px), float(window_half_px))
    return _default_half_window(fwhm_px, shape)


def _neighbour_model(fit, spec, group, win_lo, win_len, n_pix, window_half_px, shape):
    """Fitted profiles of other lines reaching into each group's window.

    A line outside a group contributes where its own fit window overlaps the
    group's window; farther lines leave only smooth wings, taken up by the
    local polynomial background.  Returns ``(model, touched)`` with ``model`` of
    shape (n_groups, max window length).
    """
    n_groups = win_lo.size
    width = int(win_len.max())
    model = np.zeros((n_groups, width))
    c, w, a = fit["center_px"], fit["fwhm_px"], fit["area_e"]
    use = np.flatnonzero(np.isfinite(c) & np.isfinite(w) & np.isfinite(a) & (a > 0))
    if use.size < 2:
        return model, np.zeros(n_groups, dtype=bool)
    half = _half_window(w[use], window_half_px, shape)
    stride = 4.0 * (n_pix + 1000.0)
    key = spec[use] * stride + c[use]
    order = np.argsort(key, kind="stable")
    use, key, half = use[order], key[order], half[order]
    margin = float(half.max())
    g_spec = spec[np.searchsorted(group, np.arange(n_groups))]
    lo_key = g_spec * stride + win_lo - margin
    hi_key = g_spec * stride + win_lo + win_len - 1 + margin
    i0 = np.searchsorted(key, lo_key, side="left")
    i1 = np.searchsorted(key, hi_key, side="right")
    counts = i1 - i0
    pair_g = np.repeat(np.arange(n_groups), counts)
    pair_i = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts) + np.repeat(i0, counts)
    line = use[pair_i]
    lo_g = win_lo[pair_g].astype(float)
    hi_g = (win_lo + win_len - 1)[pair_g].astype(float)
    dist = np.maximum(np.maximum(lo_g - c[line], c[line] - hi_g), 0.0)
    keep = (group[line] != pair_g) & (dist < half[pair_i])
    pair_g, line = pair_g[keep], line[keep]
    if pair_g.size == 0:
        return model, np.zeros(n_groups, dtype=bool)
    x = win_lo[pair_g][:, None] + np.arange(width)
    frac, _, _ = pixel_terms(x.astype(float), c[line][:, None], w[line][:, None], shape)
    np.add.at(model, pair_g, a[line][:, None] * frac)
    touched = np.zeros(n_groups, dtype=bool)
    touched[pair_g] = True
    return model, touched


def _store(fit, flags, theta, cov, converged, singular, chi2, k, members, mask, inside, finite_win, raw_win,
           base_win, x, xref, saturation_e, wmin, wmax, shape):
    """Write the results of one batch of groups into the per-line output arrays."""
    c, w, a = theta[:, :k], theta[:, k:2 * k], theta[:, 2 * k:3 * k]
    bg_coef = theta[:, 3 * k:]
    var = np.einsum("gii->gi", cov)
    with np.errstate(invalid="ignore"):
        err = np.sqrt(var)
    frac_peak, _, _ = pixel_terms(np.round(c), c, w, shape)
    # baseline under each centre, interpolated inside the window
    lo = x[:, :1]
    pos = np.clip(np.where(np.isfinite(c), c, lo) - lo, 0, x.shape[1] - 1.000001)
    i0 = np.floor(pos).astype(int)
    t = pos - i0
    i1 = np.minimum(i0 + 1, x.shape[1] - 1)
    bl = (np.take_along_axis(base_win, i0, 1) * (1 - t) + np.take_along_axis(base_win, i1, 1) * t)
    n_valid = mask.sum(axis=1)
    dof = np.maximum(n_valid - theta.shape[1], 1)
    win_first = x[:, 0]
    win_last = win_first + inside.sum(axis=1) - 1
    kk = (theta.shape[0], k)
    with np.errstate(invalid="ignore"):
        saturated = np.any(inside & (raw_win >= saturation_e), axis=1)
        nonfinite = np.any(inside & (finite_win == 0), axis=1)
        bad_group = singular | ~np.all(np.isfinite(theta), axis=1)
        bad_line = ~np.isfinite(err[:, :3 * k]).reshape(-1, 3, k).all(axis=1)
        left = (c < win_first[:, None]) | (c > win_last[:, None])
        non_positive = a <= 0
        at_bound = (w <= wmin * (1 + 1e-6)) | (w >= wmax * (1 - 1e-6))
    reason = np.full(kk, "", dtype=object)
    for cond, text in ((np.broadcast_to(~converged[:, None], kk), "did not converge"),
                       (at_bound, "width at bound"), (non_positive, "non-positive area"),
                       (left, "centre left the window"),
                       (bad_line | bad_group[:, None], "singular Fisher matrix"),
                       (np.broadcast_to(nonfinite[:, None], kk), "non-finite pixels")):
        reason[cond] = text  # later entries take precedence
    fit["center_px"][members] = c
    fit["center_err_px"][members] = err[:, :k]
    fit["fwhm_px"][members] = w
    fit["fwhm_err_px"][members] = err[:, k:2 * k]
    fit["area_e"][members] = a
    fit["area_err_e"][members] = err[:, 2 * k:3 * k]
    fit["amplitude_e"][members] = a * frac_peak
    dxc = c - xref
    local_bg = np.zeros_like(c)
    for j in range(bg_coef.shape[1] - 1, -1, -1):  # Horner
        local_bg = local_bg * dxc + bg_coef[:, j:j + 1]
    fit["background_e"][members] = bl + local_bg
    fit["chi2_red"][members] = (chi2 / dof)[:, None]
    flags["saturated"][members] = saturated[:, None]
    flags["message"][members] = reason


def _empty_fits():
    f = np.zeros(0)
    return LineFits(spectrum=np.zeros(0, dtype=np.int64), center_px=f, center_err_px=f.copy(),
                    fwhm_px=f.copy(), fwhm_err_px=f.copy(), area_e=f.copy(), area_err_e=f.copy(),
                    amplitude_e=f.copy(), background_e=f.copy(), snr=f.copy(), chi2_red=f.copy(),
                    saturated=np.zeros(0, dtype=bool), fit_ok=np.zeros(0, dtype=bool),
                    fit_message=np.zeros(0, dtype=object))


def _fit_block(base, raw, filled, finite, read_noise_e, saturation_e, shape, snr_min, fwhm_guess_px,
               window_half_px, max_iterations, min_fwhm_px, max_fwhm_px, n_bg):
    """Detect and fit all lines of a block above a given baseline."""
    n_pix = raw.shape[1]
    det = _detect(filled, base, finite, float(read_noise_e), float(snr_min), float(fwhm_guess_px), 1.5)
    spec, pix = det["spectrum"], det["pixel"]
    n_lines = spec.size
    if n_lines == 0:
        return spec, {}, {}
    resid = filled - base
    c0, w0, h0, lev0 = _initial_estimates(resid, finite, spec, pix, fwhm_guess_px, min_fwhm_px,
                                          max_fwhm_px)
    frac0, _, _ = pixel_terms(np.round(c0), c0, w0, shape)
    a0 = h0 / np.maximum(frac0, 1e-12)

    # groups fitted jointly: consecutive detections of a spectrum closer than 1.5 FWHM (blends), or
    # whose cores lie inside each other's fit windows (a bright neighbour's core is not a smooth
    # background); at most MAX_GROUP lines per group
    half0 = _half_window(w0, window_half_px, shape)
    gap = c0[1:] - c0[:-1]
    near = (gap < BLEND_SEPARATION_FWHM * np.maximum(w0[1:], w0[:-1])) | (
        gap < JOINT_OVERLAP * np.maximum(half0[1:], half0[:-1]))
    join = np.zeros(n_lines, dtype=bool)
    join[1:] = (spec[1:] == spec[:-1]) & near
    run_start = np.maximum.accumulate(np.where(~join, np.arange(n_lines), 0))
    join &= ((np.arange(n_lines) - run_start) % MAX_GROUP) != 0  # split long chains
    group = np.cumsum(~join) - 1
    first = np.flatnonzero(~join)
    n_groups = first.size
    size = np.diff(np.append(first, n_lines))
    win_lo = np.maximum(np.floor(np.minimum.reduceat(c0 - half0, first)).astype(int), 0)
    win_hi = np.minimum(np.ceil(np.maximum.reduceat(c0 + half0, first)).astype(int), n_pix - 1)
    win_len = win_hi - win_lo + 1

    fit = {name: np.full(n_lines, np.nan) for name in (
        "center_px", "center_err_px", "fwhm_px", "fwhm_err_px", "area_e", "area_err_e", "amplitude_e",
        "background_e", "chi2_red")}
    flags = {"saturated": np.zeros(n_lines, dtype=bool), "message": np.full(n_lines, "", dtype=object)}
    rn = float(read_noise_e)
    start = np.stack([c0, w0, a0])
    for sweep in range(2):
        if sweep == 0:
            todo = np.arange(n_groups)
            neighbours = None
        else:
            neighbours, touched = _neighbour_model(fit, spec, group, win_lo, win_len, n_pix,
                                                   window_half_px, shape)
            todo = np.flatnonzero(touched)
            previous = np.stack([fit["center_px"], fit["fwhm_px"], fit["area_e"]])
            start = np.where(np.isfinite(previous), previous, start)
        bucket = _WINDOW_SIZES[np.searchsorted(_WINDOW_SIZES, win_len[todo])]
        # one batch per (lines in the group, window size): a handful of batches per block
        for k, bsize in sorted(set(zip(size[todo].tolist(), bucket.tolist()))):
            gsel = todo[(size[todo] == k) & (bucket == bsize)]
            members = first[gsel][:, None] + np.arange(k)
            sp, lo, length = spec[first[gsel]], win_lo[gsel], win_len[gsel]
            y, inside, x = _gather(resid, sp, lo, length, bsize)
            base_win, _, _ = _gather(base, sp, lo, length, bsize)
            finite_win, _, _ = _gather(finite.astype(float), sp, lo, length, bsize)
            raw_win, _, _ = _gather(raw, sp, lo, length, bsize)
            mask = inside & (finite_win > 0)
            extra = base_win
            if neighbours is not None:
                other = neighbours[gsel][:, :bsize]
                other = np.pad(other, ((0, 0), (0, bsize - other.shape[1])))
                y = y - other
                extra = base_win + other
            xref = (lo + (length - 1) / 2.0)[:, None]
            bg0 = np.zeros((gsel.size, n_bg))
            bg0[:, 0] = lev0[members].min(axis=1)
            theta0 = np.concatenate([start[0][members], start[1][members], start[2][members], bg0], axis=1)
            theta, cov, conv, sing, chi2 = _lm(theta0, k, x, xref, y, extra, mask, rn, shape,
                                               min_fwhm_px, max_fwhm_px, int(max_iterations))
            _store(fit, flags, theta, cov, conv, sing, chi2, k, members, mask, inside, finite_win, raw_win,
                   base_win, x, xref, saturation_e, min_fwhm_px, max_fwhm_px, shape)
    spec, fit, flags = _split_blends(spec, fit, flags, size, first, win_lo, win_len, resid, base, finite, raw,
                                     rn, shape, min_fwhm_px, max_fwhm_px, max_iterations, saturation_e,
                                     snr_min, lev0, n_bg)
    return spec, fit, flags


def _split_blends(spec, fit, flags, size, first, win_lo, win_len, resid, base, finite, raw, rn, shape, wmin,
                  wmax, max_iterations, saturation_e, snr_min, lev0, n_bg):
    """Refit single lines that a blend of two explains much better.

    Two lines closer than about 1.5 FWHM leave a single maximum after the
    matched filter.  A single-line fit whose reduced chi-square exceeds its
    5-sigma range is refitted as two lines; the pair replaces it when chi-square
    drops by more than ``BLEND_DCHI2`` and both lines are sound.
    """
    g = np.flatnonzero(size == 1)
    line = first[g]
    dof = np.maximum(win_len[g] - 4 - n_bg, 1)
    cand = ((flags["message"][line] == "") & (fit["chi2_red"][line] > 1 + 5 * np.sqrt(2.0 / dof))
            & (fit["area_e"][line] / fit["area_err_e"][line] > 2 * snr_min))
    g, line = g[cand], line[cand]
    if g.size == 0:
        return spec, fit, flags
    bucket = _WINDOW_SIZES[np.searchsorted(_WINDOW_SIZES, win_len[g])]
    new_rows = []
    for bsize in np.unique(bucket):
        sel = bucket == bsize
        gl, li = g[sel], line[sel]
        sp, lo, length = spec[li], win_lo[gl], win_len[gl]
        y, inside, x = _gather(resid, sp, lo, length, bsize)
        base_win, _, _ = _gather(base, sp, lo, length, bsize)
        finite_win, _, _ = _gather(finite.astype(float), sp, lo, length, bsize)
        raw_win, _, _ = _gather(raw, sp, lo, length, bsize)
        mask = inside & (finite_win > 0)
        xref = (lo + (length - 1) / 2.0)[:, None]
        c, w, a = fit["center_px"][li], fit["fwhm_px"][li], fit["area_e"][li]
        z = np.zeros((li.size, n_bg))
        z[:, 0] = lev0[li]
        one = _lm(np.column_stack([c, w, a, z]), 1, x, xref, y, base_win, mask, rn, shape, wmin, wmax,
                  max_iterations)
        half_sep = 0.4 * w
        w2 = np.maximum(0.7 * w, wmin * 1.5)
        theta2 = np.column_stack([c - half_sep, c + half_sep, w2, w2, 0.5 * a, 0.5 * a, z])
        two = _lm(theta2, 2, x, xref, y, base_win, mask, rn, shape, wmin, wmax, max_iterations)
        trial = {name: np.full((li.size, 2), np.nan) for name in fit}
        tflags = {"saturated": np.zeros((li.size, 2), dtype=bool),
                  "message": np.full((li.size, 2), "", dtype=object)}
        members = np.arange(2 * li.size).reshape(-1, 2)
        flat = {k: v.reshape(-1) for k, v in trial.items()}
        fflat = {k: v.reshape(-1) for k, v in tflags.items()}
        _store(flat, fflat, *two, 2, members, mask, inside, finite_win, raw_win, base_win, x, xref,
               saturation_e, wmin, wmax, shape)
        better = ((one[4] - two[4] > BLEND_DCHI2) & np.all(tflags["message"] == "", axis=1)
                  & np.all(trial["area_e"] / trial["area_err_e"] > snr_min, axis=1))
        for j in np.flatnonzero(better):
            for name in fit:
                fit[name][li[j]] = trial[name][j, 0]
            flags["saturated"][li[j]] = tflags["saturated"][j, 0]
            flags["message"][li[j]] = tflags["message"][j, 0]
            new_rows.append((sp[j], {name: trial[name][j, 1] for name in fit},
                             tflags["saturated"][j, 1], tflags["message"][j, 1]))
    if new_rows:
        spec = np.concatenate([spec, [r[0] for r in new_rows]])
        for name in fit:
            fit[name] = np.concatenate([fit[name], [r[1][name] for r in new_rows]])
        flags["saturated"] = np.concatenate([flags["saturated"], [r[2] for r in new_rows]])
        flags["message"] = np.concatenate([flags["message"], np.array([r[3] for r in new_rows], dtype=object)])
    return spec, fit, flags


def fit_lines(spectra_e, *, read_noise_e=0.0, saturation_e=np.inf, shape="lorentzian", snr_min=5.0,
              fwhm_guess_px=2.5, window_half_px=None, baseline="snip", baseline_window_px=30,
              max_iterations=30, min_fwhm_px=0.5, max_fwhm_px=20.0, background_degree=2):
    """Detect and fit every line of a block of spectra in one batched computation.

    Each spectrum's baseline is estimated and removed, lines are found with
    :func:`detect_lines`, and every line (or blend of lines closer than 1.5 FWHM,
    fitted jointly) is fitted in a window of ``+-window_half_px`` around it with
    the pixel-integrated profile plus a local polynomial background
    ``sum_j b_j (x - x_ref)**j`` (degree ``background_degree``).  All windows of the block are fitted together by
    Levenberg-Marquardt Fisher scoring of the likelihood with variance
    ``max(mu + baseline, 0) + read_noise_e**2`` re-evaluated at every step
    (iteratively reweighted: Poisson maximum likelihood, shifted for read noise).
    Lines whose window holds other lines are refitted once with those lines'
    fitted profiles subtracted (and added to the variance).

    Parameters
    ----------
    spectra_e : array_like, shape (N,) or (S, N)
        Spectra in photoelectrons (may be negative from read noise; NaN allowed).
    read_noise_e : float
        Read noise per pixel, photoelectrons RMS.
    saturation_e : float
        Raw level at or above which a pixel is saturated (flag only).
    shape : {"lorentzian", "gaussian"}
    snr_min, fwhm_guess_px : float
        Detection threshold and matched-kernel width, see :func:`detect_lines`.
    window_half_px : float, optional
        Half width of the fit window; default ``max(6, 5 FWHM)`` for a Lorentzian
        and ``max(4, 3 FWHM)`` for a Gaussian, from each line's initial width.
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

    Returns
    -------
    LineFits
    """
    _check_args(read_noise_e, saturation_e, shape, snr_min, fwhm_guess_px, window_half_px, max_iterations,
                min_fwhm_px, max_fwhm_px)
    raw, _ = as_block(spectra_e)
    n_pix = raw.shape[1]
    filled, finite = fill_nonfinite(raw)
    if isinstance(background_degree, bool) or background_degree not in (0, 1, 2, 3):
        raise InputError("local background degree out of range", field="background_degree",
                         expected="0, 1, 2 or 3", found=repr(background_degree))
    if baseline is None or (isinstance(baseline, str) and baseline == "local"):
        base = np.zeros_like(filled)
    elif isinstance(baseline, str):
        if baseline not in BASELINE_METHODS:
            raise InputError("unknown baseline method", field="baseline",
                             expected=" or ".join(repr(m) for m in BASELINE_METHODS)
                             + ", 'local', an array or None",
                             found=repr(baseline))
        base = (estimate_baseline(filled, method="snip", window_px=baseline_window_px)
                if baseline == "snip" else estimate_baseline(filled, method="asls"))
    else:
        base, _ = as_block(baseline, field="baseline")
        if base.shape != raw.shape:
            raise InputError("baseline shape differs from the spectra", field="baseline",
                             expected=f"shape {raw.shape}", found=f"shape {base.shape}")
        base, _ = fill_nonfinite(base)
    args = (raw, filled, finite, float(read_noise_e), saturation_e, shape, float(snr_min), float(fwhm_guess_px),
            window_half_px, int(max_iterations), float(min_fwhm_px), float(max_fwhm_px),
            int(background_degree) + 1)
    spec, fit, flags = _fit_block(base, *args)
    if spec.size == 0:
        return _empty_fits()
    order = np.lexsort((fit["center_px"], spec))
    message = flags["message"]
    with np.errstate(invalid="ignore", divide="ignore"):
        snr = fit["area_e"] / fit["area_err_e"]
    return LineFits(spectrum=spec[order].astype(np.int64),
                    **{name: fit[name][order] for name in (
                        "center_px", "center_err_px", "fwhm_px", "fwhm_err_px", "area_e", "area_err_e",
                        "amplitude_e", "background_e")},
                    snr=snr[order], chi2_red=fit["chi2_red"][order], saturated=flags["saturated"][order],
                    fit_ok=(message == "")[order], fit_message=message[order])
