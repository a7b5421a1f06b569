"""Fabry-Perot mode comb: spacing, optical length, mode numbers and families.

A planar cavity of gap L filled with index n resonates where 2 n L = q lambda
(q integer, mirror phase ignored), i.e. at wavenumbers sigma = 1/lambda
spaced by 1/(2 n L).  With dispersion the spacing is 1/(2 n_g L) instead,
n_g = n - lambda dn/dlambda, and the naive mode numbers sigma/spacing are no
longer integers (check-values section 4).  Transverse modes of order k sit at
sigma = (q + k zeta)/(2 n L): each order forms its own comb ("family") with a
constant phase k zeta in units of the spacing (check-values section 5).

Wavenumbers are in 1/um, wavelengths in nm (vacuum).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.optimize import minimize_scalar

from .. import tables
from ..exceptions import FitWarning, InputError

__all__ = ["CombFit", "fit_comb", "comb_spacing", "assign_mode_families"]

_PHASE_TOL = 0.02       # cycles: lines of one family agree in phase within this
_FRACTION_WARN = 0.2    # naive mode numbers further than this from integers -> FitWarning
_N_PEAKS = 8             # periodogram peaks examined
_DIVISOR_POWER = 0.4     # a divisor nL/k of the best peak needs this fraction of its periodogram power
_DIVISOR_SHARPNESS = 0.8  # ... and this fraction of its phase sharpness
_SHARPEN_WINDOW = 0.03   # relative search window of the sharpness refinement
_HARMONICS = np.arange(1, 49)
_KERNEL = np.exp(-0.5 * (2 * np.pi * _HARMONICS * _PHASE_TOL / 2) ** 2)


@dataclass(frozen=True)
class CombFit:
    """Result of :func:`fit_comb`.

    Attributes
    ----------
    optical_length_um, optical_length_err_um : float
        n L from the least-squares slope of 1/lambda against q (the group
        optical length n_g L when the medium is dispersive) and its 1-sigma error.
    fsr_nm : float
        Free spectral range lambda**2 / (2 n L) at the mean wavelength of the lines.
    mode_numbers : ndarray of int
        q of every line (input order).
    mode_numbers_raw : ndarray of float
        Naive q = (1/lambda) / spacing; integers for a non-dispersive cavity.
    max_fraction : float
        max |raw - round(raw)|; above 0.2 the mode numbers are unreliable.
    offset_per_um : float
        Intercept b of 1/lambda = q / (2 n L) + b (mirror phase, dispersion).
    """

    optical_length_um: float
    optical_length_err_um: float
    fsr_nm: float
    mode_numbers: np.ndarray
    mode_numbers_raw: np.ndarray
    max_fraction: float
    offset_per_um: float


def _finite_1d(name, values):
    a = np.asarray(values, dtype=float)
    if a.ndim != 1:
        raise InputError("must be a 1-D array", field=name, expected="1-D array", found=f"shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise InputError("non-finite values", field=name, expected="finite numbers",
                         found=f"{int(np.sum(~np.isfinite(a)))} NaN or inf")
    return a


def _spacing_from_sorted(sigma):
    """Common spacing of sorted wavenumbers: differences divided by their integer multiple.

    The smallest difference may itself span several orders (orders 88, 90, 93
    give differences of 2 and 3 spacings), so the first sub-multiple
    ``min / k`` (k = 1..8) that divides every difference to within 0.1 is used.
    """
    d = np.diff(sigma)
    base = d.min()
    s = base
    for k in range(1, 9):
        ratio = d / (base / k)
        if np.max(np.abs(ratio - np.rint(ratio))) < 0.1:
            s = base / k
            break
    for _ in range(3):
        mult = np.maximum(np.rint(d / s), 1.0)
        s = d.sum() / mult.sum()
    return s


def _wls_line(x, y, w):
    """Weighted straight line y = a x + b; returns a, b, cov (unscaled), chi2, dof."""
    sw = np.sqrt(w)
    design = np.column_stack([x, np.ones_like(x)]) * sw[:, None]
    coef, *_ = np.linalg.lstsq(design, y * sw, rcond=None)
    cov = np.linalg.pinv(design.T @ design)
    resid = (y - (coef[0] * x + coef[1])) * sw
    return coef[0], coef[1], cov, float(resid @ resid), x.size - 2


def fit_comb(wavelength_nm, *, wavelength_err_nm=None):
    """Optical length and mode numbers from the lines of one longitudinal family.

    Parameters
    ----------
    wavelength_nm : array of float
        Vacuum wavelengths of lines of one comb family (consecutive orders or
        with missing orders), at least 2.
    wavelength_err_nm : array of float, optional
        1-sigma errors; used as weights (and the errors are scaled up by the
        square root of the reduced chi-square when it exceeds 1).  Without
        them the lines are weighted equally and the error comes from the
        scatter (NaN with 2 lines).

    Returns
    -------
    CombFit

    Warns
    -----
    FitWarning
        When the naive mode numbers are further than 0.2 from integers:
        dispersion or a mirror phase; the spacing then gives the group optical
        length n_g L, not n L.
    """
    lam = _finite_1d("wavelength_nm", wavelength_nm)
    if lam.size < 2:
        raise InputError("too few lines for a comb fit", field="wavelength_nm",
                         expected="at least 2 lines", found=f"{lam.size}")
    if np.any(lam <= 0):
        raise InputError("wavelengths must be positive", field="wavelength_nm",
                         expected="> 0 nm", found=f"min {lam.min():g}")
    sigma = 1e3 / lam
    srt = np.sort(sigma)
    if np.any(np.diff(srt) <= 0):
        raise InputError("repeated wavelength", field="wavelength_nm",
                         expected="distinct lines", found="two equal values")
    s = _spacing_from_sorted(srt)
    raw = sigma / s
    q = np.rint(raw)
    max_fraction = float(np.max(np.abs(raw - q)))
    if wavelength_err_nm is None:
        w = np.ones_like(sigma)
        absolute = False
    else:
        err = _finite_1d("wavelength_err_nm", wavelength_err_nm)
        if err.shape != lam.shape or np.any(err <= 0):
            raise InputError("errors must be positive, one per line", field="wavelength_err_nm",
                             expected=f"{lam.size} values > 0", found=f"{err.size} values")
        w = 1.0 / (err * 1e3 / lam**2) ** 2
        absolute = True
    a, b, cov, chi2, dof = _wls_line(q, sigma, w)
    if absolute:
        var_a = cov[0, 0] * (max(1.0, chi2 / dof) if dof > 0 else 1.0)
    else:
        var_a = cov[0, 0] * chi2 / dof if dof > 0 else np.nan
    optical_length = 1.0 / (2.0 * a)
    optical_length_err = np.sqrt(var_a) / (2.0 * a * a)
    fsr_nm = float(np.mean(lam)) ** 2 * a / 1e3
    if max_fraction > _FRACTION_WARN:
        warnings.warn(f"mode numbers are not integers (max fraction {max_fraction:.2f}): dispersion or "
                      "mirror phase; the spacing gives the group optical length n_g L, not n L",
                      FitWarning, stacklevel=2)
    return CombFit(optical_length_um=float(optical_length), optical_length_err_um=float(optical_length_err),
                   fsr_nm=float(fsr_nm), mode_numbers=q.astype(np.int64), mode_numbers_raw=raw,
                   max_fraction=max_fraction, offset_per_um=float(b))


def _cluster_circle(phase, tol):
    """Single-linkage clusters of phases (cycles, in [0, 1)) on the circle.

    Labels are numbered by increasing phase, starting after the widest gap.
    """
    n = phase.size
    labels = np.zeros(n, dtype=np.int64)
    if n < 2:
        return labels
    order = np.argsort(phase, kind="stable")
    ps = phase[order]
    gap_after = np.diff(np.r_[ps, ps[0] + 1.0])
    if not np.any(gap_after > tol):
        return labels
    start = (int(np.argmax(gap_after)) + 1) % n
    walk = np.r_[order[start:], order[:start]]
    gap_before = np.r_[0.0, np.roll(gap_after, -start)[:-1]]
    labels[walk] = np.cumsum(gap_before > tol)
    return labels


def _circular_mean(phase, w):
    z = np.sum(w * np.exp(2j * np.pi * phase))
    return (np.angle(z) / (2 * np.pi)) % 1.0


def _family_fit(sigma, w, s, tol):
    """Cluster the comb phases at spacing s, then refit s with one offset per cluster.

    Returns the refined spacing, cluster labels, integer orders and the
    per-cluster phase.
    """
    for _ in range(4):
        phase = (sigma / s) % 1.0
        labels = _cluster_circle(phase, tol)
        k = labels.max() + 1
        centre = np.array([_circular_mean(phase[labels == j], w[labels == j]) for j in range(k)])
        orders = np.rint(sigma / s - centre[labels])
        distinct = [np.unique(orders[labels == j]).size for j in range(k)]
        if max(distinct) < 2:
            break
        design = np.zeros((sigma.size, 1 + k))
        design[:, 0] = orders
        design[np.arange(sigma.size), 1 + labels] = 1.0
        sw = np.sqrt(w)
        coef, *_ = np.linalg.lstsq(design * sw[:, None], sigma * sw, rcond=None)
        s_new = float(coef[0])
        if not (s_new > 0):
            break
        done = abs(s_new - s) <= 1e-12 * s
        s = s_new
        if done:
            break
    phase = (sigma / s) % 1.0
    labels = _cluster_circle(phase, tol)
    k = labels.max() + 1
    centre = np.array([_circular_mean(phase[labels == j], w[labels == j]) for j in range(k)])
    orders = np.rint(sigma / s - centre[labels]).astype(np.int64)
    return s, labels, orders, centre


def _periodogram(sigma, w, optical_length_um):
    z = np.exp(4j * np.pi * np.multiply.outer(optical_length_um, sigma - sigma.mean())) @ w
    return np.abs(z) ** 2 / w.sum() ** 2


def _sharpness(sigma, w, spacing):
    """How tightly the phases sigma/spacing cluster (any number of clusters), in [0, 1].

    Sum over line pairs of w_i w_j K(phase_i - phase_j) / (sum w)**2 with K a wrapped
    Gaussian of width _PHASE_TOL / 2 (cycles), computed from its Fourier series.
    """
    spacing = np.atleast_1d(np.asarray(spacing, dtype=float))
    phase = np.multiply.outer(1.0 / spacing, sigma - sigma.min())          # (G, N)
    total = np.zeros(spacing.size)
    for h, g in zip(_HARMONICS, _KERNEL):
        z = np.exp(2j * np.pi * h * phase) @ w
        total += g * np.abs(z) ** 2
    return total / (_KERNEL.sum() * w.sum() ** 2)


def _sharpen(sigma, w, nl, span):
    """Refine an optical length by maximising the phase sharpness within +-3 %."""
    n_orders = max(2.0 * nl * span, 1.0)
    step = 0.25 * _PHASE_TOL / n_orders                                    # relative
    rel = np.arange(-_SHARPEN_WINDOW, _SHARPEN_WINDOW + step, step)
    cand = nl * (1.0 + rel)
    score = _sharpness(sigma, w, 1.0 / (2.0 * cand))
    i = int(np.argmax(score))
    a, b = cand[max(i - 1, 0)], cand[min(i + 1, cand.size - 1)]
    if b > a:
        res = minimize_scalar(lambda x: -_sharpness(sigma, w, 1.0 / (2.0 * x))[0], bounds=(a, b),
                              method="bounded", options={"xatol": 1e-9 * nl})
        if -res.fun >= score[i]:
            return float(res.x), float(-res.fun)
    return float(cand[i]), float(score[i])


def _refine_power(sigma, w, nl, step, lo, hi):
    a, b = max(lo, nl - step), min(hi, nl + step)
    res = minimize_scalar(lambda x: -_periodogram(sigma, w, np.array([x]))[0], bounds=(a, b),
                          method="bounded", options={"xatol": 1e-6 * step})
    return float(res.x), float(-res.fun)


def comb_spacing(wavenumber_per_um, *, weights=None, optical_length_range_um=(5.0, 200.0)):
    """Spacing of a comb of lines that may hold several families.

    A weighted periodogram ``|sum_i w_i exp(4 pi i nL sigma_i)|**2`` is
    scanned over candidate optical lengths nL in ``optical_length_range_um``.
    The strongest peak may be a multiple k nL of the fundamental (all
    families line up there when k zeta is near an integer), so the shortest
    divisor nL/k is preferred whose periodogram peak reaches 40 % of the
    strongest and whose phase sharpness (how tightly the phases 2 nL sigma mod
    1 gather into clusters, whatever their number) reaches 80 % of it.  The
    choice is refined by maximising the sharpness within +-3 %, then the
    phases are clustered into families and the spacing is refit by least
    squares with one offset per family.

    Parameters
    ----------
    wavenumber_per_um : array of float
        Line wavenumbers 1/lambda in 1/um (at least 2 distinct).
    weights : array of float, optional
        Non-negative weights (e.g. line power); equal when omitted.
    optical_length_range_um : (float, float)
        Range of n L searched.

    Returns
    -------
    float
        Spacing in 1/um (= 1 / (2 n_g L)).
    """
    sigma = _finite_1d("wavenumber_per_um", wavenumber_per_um)
    if np.unique(sigma).size < 2:
        raise InputError("too few distinct lines for a comb spacing", field="wavenumber_per_um",
                         expected="at least 2 distinct values", found=f"{np.unique(sigma).size}")
    if weights is None:
        w = np.ones_like(sigma)
    else:
        w = _finite_1d("weights", weights)
        if w.shape != sigma.shape or np.any(w < 0) or not np.any(w > 0):
            raise InputError("weights must be non-negative, one per line, not all zero", field="weights",
                             expected=f"{sigma.size} values >= 0", found=f"{w.size} values")
    lo, hi = (float(v) for v in optical_length_range_um)
    if not (0 < lo < hi):
        raise InputError("bad search range", field="optical_length_range_um",
                         expected="0 < low < high", found=repr(optical_length_range_um))
    span = sigma.max() - sigma.min()
    step = min(0.25 / (4 * np.pi * span), (hi - lo) / 50)
    grid = np.arange(lo, hi + step, step)
    power = _periodogram(sigma, w, grid)
    interior = np.flatnonzero((power[1:-1] >= power[:-2]) & (power[1:-1] > power[2:])) + 1
    peaks = np.r_[interior, [i for i in (0, grid.size - 1) if grid.size > 1]].astype(int)
    peaks = peaks[np.argsort(-power[peaks], kind="stable")[:_N_PEAKS]]
    nl_best, p_best = max((_refine_power(sigma, w, grid[i], step, lo, hi) for i in peaks),
                          key=lambda v: v[1])
    nl, s_best = _sharpen(sigma, w, nl_best, span)
    # the best peak may be a multiple k nL of the fundamental (all families line up there when
    # k zeta is near an integer): take the shortest divisor that is a strong periodogram peak
    # and keeps the phases nearly as sharp
    for k in range(int(nl_best // lo), 1, -1):
        c, p_c = _refine_power(sigma, w, nl_best / k, step, lo, hi)
        if p_c < _DIVISOR_POWER * p_best:
            continue
        c, s_c = _sharpen(sigma, w, c, span)
        if s_c >= _DIVISOR_SHARPNESS * s_best:
            nl = c
            break
    # a ladder with k zeta close to an integer lines all families up at k nL (or a fraction of it),
    # leaving most orders of that comb empty or splitting it into many small families: among the
    # strong divisors of the best peak, keep the comb needing the fewest families plus empty orders
    best_cost = _comb_cost(sigma, 1.0 / (2.0 * nl))
    for k in range(1, int(nl_best // lo) + 1):
        c, p_c = _refine_power(sigma, w, nl_best / k, step, lo, hi)
        if p_c < _DIVISOR_POWER * p_best or abs(c - nl) <= 1e-6 * nl:
            continue
        c, _ = _sharpen(sigma, w, c, span)
        cost = _comb_cost(sigma, 1.0 / (2.0 * c))
        if cost < best_cost:
            nl, best_cost = c, cost
    s, *_ = _family_fit(sigma, w, 1.0 / (2.0 * nl), _PHASE_TOL)
    return float(s)


def _comb_cost(sigma, spacing):
    """Phase clusters (families) at ``spacing`` plus the orders they span without a line."""
    phase = (sigma / spacing) % 1.0
    labels = _cluster_circle(phase, _PHASE_TOL)
    cost = 0
    for j in np.unique(labels):
        sel = labels == j
        centre = _circular_mean(phase[sel], np.ones(int(sel.sum())))
        orders = np.unique(np.rint(sigma[sel] / spacing - centre))
        cost += 1 + int(orders.max() - orders.min()) + 1 - orders.size
    return cost


def _common_drift(track, frame, y, n_iter=20):
    """Two-way median polish y = a_track + c_frame (c of the first frame = 0).

    Returns the per-row value of ``y - c_frame``.
    """
    tids, t_inv = np.unique(track, return_inverse=True)
    fids, f_inv = np.unique(frame, return_inverse=True)
    a = np.zeros(tids.size)
    c = np.zeros(fids.size)
    for _ in range(n_iter):
        r = y - c[f_inv]
        a_new = pd.Series(r).groupby(t_inv).median().to_numpy()
        r = y - a_new[t_inv]
        c_new = pd.Series(r).groupby(f_inv).median().to_numpy()
        c_new = c_new - c_new[0]
        change = max(np.max(np.abs(a_new - a)), np.max(np.abs(c_new - c)))
        a, c = a_new, c_new
        if change < 1e-13:
            break
    return y - c[f_inv]


def _track_wavenumbers(tr):
    """Per-track wavenumber (1/um) after removing the drift common to all tracks, and helpers.

    Returns ``ids`` (sorted track ids), ``inv`` (row -> position in ``ids``),
    ``sigma_t`` (drift-free median wavenumber, referred to the first frame),
    ``sigma_err_t`` (its 1-sigma error: median row error / sqrt(rows)) and
    ``power_t`` (summed positive ``area_counts``).
    """
    tid = tr["track_id"].to_numpy(np.int64)
    lam = tr["center_nm"].to_numpy(float)
    y = _common_drift(tid, tr["frame"].to_numpy(np.int64), np.log(1e3 / lam))
    ids, inv = np.unique(tid, return_inverse=True)
    sigma_t = np.exp(pd.Series(y).groupby(inv).median().to_numpy())
    err = tr["center_err_nm"].to_numpy(float) * 1e3 / lam**2
    err = np.where(np.isfinite(err) & (err > 0), err, np.nan)
    g = pd.Series(err).groupby(inv)
    sigma_err_t = (g.median() / np.sqrt(g.size())).to_numpy()
    fill = np.nanmedian(sigma_err_t) if np.any(np.isfinite(sigma_err_t)) else 1e-6
    sigma_err_t = np.where(np.isfinite(sigma_err_t), sigma_err_t, fill)
    power_t = pd.Series(np.clip(tr["area_counts"].to_numpy(float), 0, None)).groupby(inv).sum().to_numpy()
    return ids, inv, sigma_t, sigma_err_t, power_t


def assign_mode_families(tracks, *, optical_length_range_um=(5.0, 200.0)):
    """Assign comb families and comb indices to one cell's tracks.

    Each track's wavenumber is its median after removing the drift common to
    all tracks (a median polish over tracks and frames), so that tracks seen
    at different times compare.  The spacing comes from :func:`comb_spacing`
    on the track wavenumbers weighted by the tracks' summed ``area_counts``;
    the phases sigma/spacing are clustered on the circle (tolerance 0.02
    cycles).  Family 0 is the cluster with the largest summed
    ``area_counts``, the others follow by decreasing power.

    Parameters
    ----------
    tracks : pandas.DataFrame
        A ``tracks`` table of a single cell.
    optical_length_range_um : (float, float)
        Range of the group optical length n_g L searched (see
        :func:`comb_spacing`); with a known gap, narrowing it to gap x (1, 2)
        rules out a comb k times longer when k zeta is an integer.

    Returns
    -------
    pandas.DataFrame
        The table with ``mode_family`` filled and a column ``comb_index``:
        the track's order within its family counted from the family's
        longest-wavelength track, round((sigma - sigma_ref) / spacing).
    """
    tr = tables.validate(tracks, "tracks")
    if len(pd.unique(tr["cell_id"])) > 1:
        raise InputError("tracks of more than one cell", field="cell_id", expected="one cell",
                         found=f"{len(pd.unique(tr['cell_id']))} cells")
    if len(tr) == 0:
        tr["comb_index"] = np.zeros(0, dtype=np.int64)
        return tr
    ids, inv, sigma_t, _, power_t = _track_wavenumbers(tr)
    w = power_t if np.any(power_t > 0) else np.ones(ids.size)
    if np.unique(sigma_t).size < 2:
        family_t = np.zeros(ids.size, dtype=np.int64)
        index_t = np.zeros(ids.size, dtype=np.int64)
    else:
        s = comb_spacing(sigma_t, weights=w, optical_length_range_um=optical_length_range_um)
        _, labels, _, centre = _family_fit(sigma_t, w, s, _PHASE_TOL)
        k = labels.max() + 1
        fam_power = np.array([power_t[labels == j].sum() for j in range(k)])
        rank = np.empty(k, dtype=np.int64)
        rank[np.lexsort((centre, -fam_power))] = np.arange(k)
        family_t = rank[labels]
        index_t = np.zeros(ids.size, dtype=np.int64)
        for j in range(k):
            sel = labels == j
            ref = sigma_t[sel].min()
            index_t[sel] = np.rint((sigma_t[sel] - ref) / s).astype(np.int64)
    tr["mode_family"] = family_t[inv]
    tr["comb_index"] = index_t[inv]
    return tables.validate(tr, "tracks")
