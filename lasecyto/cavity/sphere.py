"""Whispering-gallery modes (WGMs) of a dielectric sphere in a medium.

Sphere of diameter D (radius a), index n_s, in a medium of index n_m; relative index
m = n_s/n_m and size parameter x = 2 pi n_m a / lambda0 = pi n_m D / lambda0 (lambda0 in
vacuum).  The resonances solve the characteristic equations of the Mie coefficients
(Bohren & Huffman 1983), written with the Riccati-Bessel functions psi_l(z) = z j_l(z)
and chi_l(z) = z y_l(z) (the real-root form: chi_l replaces the outgoing xi_l, which
agrees with the real part of the complex root to a few 1e-6 relative for Q >> 1):

- TE: m psi_l'(m x) / psi_l(m x) = chi_l'(x) / chi_l(x)
- TM: psi_l'(m x) / (m psi_l(m x)) = chi_l'(x) / chi_l(x)

Radial order n counts the roots upward from x = (l + 1/2)/m.  The asymptotic formula of
Lam, Leung & Young (1992), J. Opt. Soc. Am. B 9, 1585 (:func:`asymptotic_size_parameter`)
serves only to bracket the roots; it is off by 0.1-0.2 % for beads in water.

Functions: :func:`exact_size_parameter`, :func:`asymptotic_size_parameter`,
:func:`resonance_wavelengths` (indices may be callables of wavelength, solved
self-consistently), :func:`assign_modes` (polarisation, l, radial order of measured
lines) and :func:`fit_sphere` (diameter and medium index with uncertainties).
Wavelengths are vacuum nm, diameters um.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, least_squares, linear_sum_assignment
from scipy.special import ai_zeros, spherical_jn, spherical_yn
from scipy.stats import chi2 as _chi2_dist

from ..exceptions import InputError

__all__ = [
    "ModeAssignment",
    "SphereFit",
    "asymptotic_size_parameter",
    "exact_size_parameter",
    "resonance_wavelengths",
    "assign_modes",
    "fit_sphere",
]

_POLARIZATIONS = ("TE", "TM")
_MAX_RADIAL_ORDER = 3
_SCAN_STEP = 0.05          # size-parameter step of the bracketing scan (roots are >= 2 apart)
_HINT_HALF_WIDTH = 0.05    # half-width of the bracket around a known nearby root
_SELF_CONSISTENT_TOL_NM = 1e-9


# --- characteristic equations ------------------------------------------------------------------

def _characteristic(x, l, m, polarization):
    """Pole-free, normalized form of the TE/TM equation; zero exactly at the resonances."""
    x = np.atleast_1d(np.asarray(x, dtype=float))
    z = m * x
    orders = np.array([l - 1, l])[:, None]
    j = spherical_jn(orders, z[None, :])
    y = spherical_yn(orders, x[None, :])
    psi = z * j[1]
    dpsi = z * j[0] - l * j[1]        # psi_l'(z) = z j_{l-1}(z) - l j_l(z)
    chi = x * y[1]
    dchi = x * y[0] - l * y[1]
    if polarization == "TE":
        value = m * dpsi * chi - psi * dchi
    else:
        value = dpsi * chi - m * psi * dchi
    return value / (np.hypot(psi, dpsi) * np.hypot(chi, dchi))


def _check_polarization(polarization):
    pol = str(polarization).upper()
    if pol not in _POLARIZATIONS:
        raise InputError("unknown polarization", field="polarization", expected="'TE' or 'TM'",
                         found=repr(polarization))
    return pol


def _check_order(radial_order):
    n = int(radial_order)
    if n != radial_order or not 1 <= n <= _MAX_RADIAL_ORDER:
        raise InputError("radial order out of range", field="radial_order",
                         expected=f"integer 1-{_MAX_RADIAL_ORDER}", found=repr(radial_order))
    return n


def _check_m(m):
    m = float(m)
    if not (np.isfinite(m) and m > 1.0):
        raise InputError("whispering-gallery modes need a sphere denser than its medium",
                         field="relative_index", expected="n_sphere / n_medium > 1",
                         found=f"{m:g}")
    return m


def _asymptotic(l, m, polarization, n):
    nu = np.asarray(l, dtype=float) + 0.5
    alpha = -ai_zeros(n)[0][n - 1]
    p = m if polarization == "TE" else 1.0 / m
    root = math.sqrt(m * m - 1.0)
    mx = (nu + 2.0 ** (-1.0 / 3.0) * alpha * nu ** (1.0 / 3.0) - p / root
          + 0.3 * 2.0 ** (-2.0 / 3.0) * alpha**2 * nu ** (-1.0 / 3.0)
          - 2.0 ** (-1.0 / 3.0) * p * (m * m - 2.0 * p * p / 3.0) * alpha * nu ** (-2.0 / 3.0)
          / root**3)
    return mx / m


def asymptotic_size_parameter(l, relative_index, *, polarization, radial_order=1):
    """Lam, Leung & Young (1992) asymptotic resonance size parameter (starting guess only).

    Parameters
    ----------
    l : int or array_like of int
        Angular mode number(s).
    relative_index : float
        m = n_sphere / n_medium (> 1).
    polarization : {'TE', 'TM'}
    radial_order : int
        1-3.

    Returns
    -------
    float or ndarray
        x = pi n_medium D / lambda0 through the nu^(-2/3) term.
    """
    pol = _check_polarization(polarization)
    n = _check_order(radial_order)
    m = _check_m(relative_index)
    out = _asymptotic(_check_l(l), m, pol, n)
    return float(out) if out.ndim == 0 else out


def _check_l(l):
    arr = np.asarray(l)
    if arr.size == 0 or not np.all(np.isfinite(arr.astype(float))) or np.any(arr != np.round(arr)) \
            or np.any(arr < 1):
        raise InputError("angular mode numbers must be integers >= 1", field="l",
                         expected="integers >= 1", found=repr(np.ravel(arr)[:4].tolist()))
    return arr.astype(int)


def _root_scalar(l, m, polarization, n, hint=None):
    """Exact real root of radial order n; ``hint`` is a nearby root (skips the scan)."""
    fn = lambda t: float(_characteristic(t, l, m, polarization)[0])  # noqa: E731
    if hint is not None and np.isfinite(hint):
        lo, hi = hint - _HINT_HALF_WIDTH, hint + _HINT_HALF_WIDTH
        flo, fhi = fn(lo), fn(hi)
        if flo * fhi < 0:
            return brentq(fn, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps)
    nu = l + 0.5
    guesses = [float(_asymptotic(l, m, polarization, k)) for k in range(1, n + 2)]
    start = nu / m
    stop = guesses[n] + 0.5 * (guesses[n] - guesses[n - 1])
    grid = np.arange(start + 1e-9, stop + _SCAN_STEP, _SCAN_STEP)
    values = _characteristic(grid, l, m, polarization)
    changes = np.nonzero(np.signbit(values[:-1]) != np.signbit(values[1:]))[0]
    if changes.size < n:
        return math.nan
    i = changes[n - 1]
    return brentq(fn, grid[i], grid[i + 1], xtol=1e-13, rtol=4 * np.finfo(float).eps)


def exact_size_parameter(l, relative_index, *, polarization, radial_order=1):
    """Exact resonance size parameter from the Mie characteristic equation (real-root form).

    The sign changes of the pole-free equation are counted on a grid that starts at
    x = (l + 1/2)/m and ends beyond the asymptotic guess of order n + 1; the n-th one
    brackets the root, which brentq refines.  Orders whose root lies above l + 1/2
    (possible for n >= 2 at low contrast) are leaky, with Q of order 1.

    Parameters
    ----------
    l : int or array_like of int
        Angular mode number(s) (>= 1).
    relative_index : float
        m = n_sphere / n_medium (> 1).
    polarization : {'TE', 'TM'}
    radial_order : int
        1-3.

    Returns
    -------
    float or ndarray
        x = pi n_medium D / lambda0.
    """
    pol = _check_polarization(polarization)
    n = _check_order(radial_order)
    m = _check_m(relative_index)
    ls = _check_l(l)
    out = np.array([_root_scalar(int(li), m, pol, n) for li in np.ravel(ls)]).reshape(ls.shape)
    if not np.all(np.isfinite(out)):
        raise InputError("no resonance of this radial order found", field="radial_order",
                         expected="a root of the characteristic equation",
                         found=f"none for l={np.ravel(ls)[~np.isfinite(np.ravel(out))][:3].tolist()}")
    return float(out) if out.ndim == 0 else out


# --- resonance wavelengths ---------------------------------------------------------------------

def _as_index_fn(name, value):
    if callable(value):
        return value, True
    v = float(value)
    if not (np.isfinite(v) and v > 0):
        raise InputError("refractive index must be a positive number or a callable of wavelength",
                         field=name, expected="n > 0 or callable(wavelength_nm)", found=repr(value))
    return (lambda lam: v), False


def _predict_one(diameter_um, ns_fn, nm_fn, dispersive, pol, l, n, start_nm, x_hint=None):
    """Self-consistent vacuum wavelength of one mode; returns (lambda_nm, x)."""
    lam = start_nm
    x = x_hint
    for _ in range(60):
        ns, nm = float(ns_fn(lam)), float(nm_fn(lam))
        m = ns / nm
        if not m > 1.0:
            return math.nan, math.nan
        x = _root_scalar(l, m, pol, n, hint=x)
        if not np.isfinite(x):
            return math.nan, math.nan
        new = math.pi * nm * diameter_um * 1e3 / x
        if not dispersive or abs(new - lam) < _SELF_CONSISTENT_TOL_NM:
            return new, x
        lam = new
    return math.nan, math.nan


def resonance_wavelengths(diameter_um, n_sphere, n_medium, *, polarization, l, radial_order=1):
    """Vacuum resonance wavelengths of the (polarization, l, radial_order) modes of a sphere.

    Parameters
    ----------
    diameter_um : float
        Sphere diameter in um.
    n_sphere, n_medium : float or callable
        Indices, or callables of vacuum wavelength in nm (e.g. a
        :class:`lasecyto.cavity.media.Medium`); dispersive indices are solved
        self-consistently, lambda = pi n_m(lambda) D / x(n_s(lambda)/n_m(lambda)).
    polarization : {'TE', 'TM'}
    l : int or array_like of int
        Angular mode number(s).
    radial_order : int
        1-3.

    Returns
    -------
    float or ndarray
        Wavelengths in nm (vacuum), shaped like ``l``.
    """
    d = float(diameter_um)
    if not (np.isfinite(d) and d > 0):
        raise InputError("diameter must be positive", field="diameter_um", expected="> 0 um",
                         found=repr(diameter_um))
    pol = _check_polarization(polarization)
    n = _check_order(radial_order)
    ls = _check_l(l)
    ns_fn, ds = _as_index_fn("n_sphere", n_sphere)
    nm_fn, dm = _as_index_fn("n_medium", n_medium)
    out = []
    for li in np.ravel(ls):
        li = int(li)
        if ds or dm:
            # start from the non-dispersive answer at a representative wavelength
            lam0 = 600.0
            for _ in range(2):
                m0 = _check_m(float(ns_fn(lam0)) / float(nm_fn(lam0)))
                lam0 = math.pi * float(nm_fn(lam0)) * d * 1e3 / _root_scalar(li, m0, pol, n)
            lam, _ = _predict_one(d, ns_fn, nm_fn, True, pol, li, n, lam0)
        else:
            _check_m(float(ns_fn(0.0)) / float(nm_fn(0.0)))
            lam, _ = _predict_one(d, ns_fn, nm_fn, False, pol, li, n, 0.0)
        if not np.isfinite(lam):
            raise InputError("no self-consistent resonance found", field="l",
                             expected="a convergent mode", found=f"{pol} l={li} n={n}")
        out.append(lam)
    arr = np.array(out).reshape(ls.shape)
    return float(arr) if arr.ndim == 0 else arr


# --- mode assignment and size/index fit --------------------------------------------------------

@dataclass(frozen=True)
class ModeAssignment:
    """Mode identity of each measured line (input order) and how well it fits.

    Attributes
    ----------
    polarization : tuple of str
        'TE' or 'TM' per line.
    l, radial_order : ndarray of int
        Angular mode number and radial order per line.
    predicted_nm, residual_nm : ndarray
        Model wavelength of the assigned mode and measured minus model (nm).
    diameter_um : float
        Diameter at which the model was evaluated.
    rms_nm : float
        Root-mean-square residual (weighted when errors were given).
    runner_up_rms_nm : float
        rms of the best different assignment (inf if none was found); the ratio
        ``rms_nm / runner_up_rms_nm`` near 1 means the assignment is ambiguous.
    ok : bool
        True when the best assignment fits within tolerance and no other one does.
    message : str
        Why ``ok`` is False, or notes.
    """

    polarization: tuple
    l: np.ndarray
    radial_order: np.ndarray
    predicted_nm: np.ndarray
    residual_nm: np.ndarray
    diameter_um: float
    rms_nm: float
    runner_up_rms_nm: float
    ok: bool
    message: str


@dataclass(frozen=True)
class SphereFit:
    """Result of :func:`fit_sphere`.

    Attributes
    ----------
    diameter_um, diameter_err_um : float
        Fitted diameter and its 1-sigma error (NaN when ``ok`` is False).
    n_medium, n_medium_err : float
        Medium index (at the median line wavelength when the medium is dispersive)
        and its 1-sigma error (0 when the index was held fixed; NaN when ``ok`` is False).
    assignment : ModeAssignment or None
        Mode identity of each line for the best solution found.
    chi2 : float
        Sum of squared normalized residuals (NaN without ``wavelength_err_nm``).
    rms_nm : float
        Root-mean-square residual in nm.
    dof : int
        Number of lines minus number of fitted parameters.
    ok : bool
        False when the lines fit no sphere, the fit is ambiguous or at a bound.
    message : str
        Reason when ``ok`` is False; notes otherwise.
    """

    diameter_um: float
    diameter_err_um: float
    n_medium: float
    n_medium_err: float
    assignment: object
    chi2: float
    rms_nm: float
    dof: int
    ok: bool
    message: str


def _check_lines(wavelength_nm, wavelength_err_nm, min_lines):
    lam = np.asarray(wavelength_nm, dtype=float)
    if lam.ndim != 1:
        raise InputError("line wavelengths must be a 1-D array", field="wavelength_nm",
                         expected="1-D array", found=f"shape {lam.shape}")
    if lam.size < min_lines:
        raise InputError("too few lines", field="wavelength_nm", expected=f">= {min_lines} lines",
                         found=f"{lam.size}")
    if not np.all(np.isfinite(lam)) or np.any(lam <= 0):
        raise InputError("line wavelengths must be positive and finite", field="wavelength_nm",
                         expected="positive finite nm", found=f"{lam[:6].tolist()}")
    if np.unique(lam).size != lam.size:
        raise InputError("two lines have the same wavelength", field="wavelength_nm",
                         expected="distinct wavelengths", found=f"{lam.size - np.unique(lam).size} repeats")
    if wavelength_err_nm is None:
        return lam, None
    err = np.broadcast_to(np.asarray(wavelength_err_nm, dtype=float), lam.shape).copy()
    if not np.all(np.isfinite(err)) or np.any(err <= 0):
        raise InputError("wavelength errors must be positive and finite", field="wavelength_err_nm",
                         expected="> 0 nm", found=f"{err[:6].tolist()}")
    return lam, err


def _check_pairs(name, value):
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise InputError("must be a (low, high) pair", field=name, expected="(low, high)",
                         found=repr(value)) from None
    if not (np.isfinite(lo) and np.isfinite(hi) and 0 < lo < hi):
        raise InputError("must satisfy 0 < low < high", field=name, expected="0 < low < high",
                         found=f"({lo:g}, {hi:g})")
    return lo, hi


def _index_table(fn, grid_nm):
    """Values of an index (number or callable) on a wavelength grid."""
    try:
        vals = np.asarray(fn(grid_nm), dtype=float)
        if vals.shape != grid_nm.shape:
            raise ValueError
    except (TypeError, ValueError):
        vals = np.array([float(fn(g)) for g in grid_nm])
    return vals


class _ModeTable:
    """Exact first-guess size parameters of all (pol, l, n) modes near a relative index."""

    def __init__(self, m_ref, l_lo, l_hi, polarizations, radial_orders):
        pol, ell, order, x0, x1 = [], [], [], [], []
        eps = 1e-4
        for p in polarizations:
            for n in radial_orders:
                prev = []
                for li in range(l_lo, l_hi + 1):
                    hint = 2 * prev[-1] - prev[-2] if len(prev) >= 2 else None
                    x = _root_scalar(li, m_ref, p, n, hint=hint)
                    if not np.isfinite(x):
                        prev = []
                        continue
                    prev.append(x)
                    xd = _root_scalar(li, m_ref * (1 + eps), p, n, hint=x * (1 - eps))
                    pol.append(p)
                    ell.append(li)
                    order.append(n)
                    x0.append(x)
                    x1.append(xd)
        self.pol = np.array(pol)
        self.l = np.array(ell, dtype=int)
        self.n = np.array(order, dtype=int)
        self.x0 = np.array(x0)
        self.dxdm = (np.array(x1) - self.x0) / (m_ref * eps)
        self.m_ref = m_ref


def _screen(lam, weight, ns_fn, nm_fn, d_range, polarizations, radial_orders, max_keep):
    """Candidate assignments of sorted lines ``lam``, best first: list of (modes, D, rms)."""
    grid = np.linspace(lam.min(), lam.max(), 9)
    ns_g, nm_g = _index_table(ns_fn, grid), _index_table(nm_fn, grid)
    lam_ref = float(np.median(lam))
    ns_ref, nm_ref = np.interp(lam_ref, grid, ns_g), np.interp(lam_ref, grid, nm_g)
    m_ref = _check_m(ns_ref / nm_ref)
    x_lo = math.pi * nm_ref * d_range[0] * 1e3 / lam.max()
    x_hi = math.pi * nm_ref * d_range[1] * 1e3 / lam.min()
    l_lo = max(1, int(math.floor(0.95 * x_lo)) - 2)
    l_hi = int(math.ceil(m_ref * x_hi * 1.05)) + 2
    table = _ModeTable(m_ref, l_lo, l_hi, polarizations, radial_orders)
    if table.x0.size < lam.size:
        return [], table

    def predict(d_um):
        lam0 = math.pi * nm_ref * d_um * 1e3 / table.x0
        lc = np.clip(lam0, lam.min(), lam.max())
        nm_k = np.interp(lc, grid, nm_g)
        m_k = np.interp(lc, grid, ns_g) / nm_k
        x_k = table.x0 + table.dxdm * (m_k - m_ref)
        return math.pi * nm_k * d_um * 1e3 / x_k

    anchor = int(np.argsort(np.abs(lam - lam_ref), kind="stable")[0])
    # diameter at which each mode falls on the anchor line
    lc = lam[anchor]
    nm_a = np.interp(lc, grid, nm_g)
    m_a = np.interp(lc, grid, ns_g) / nm_a
    d_cand = lam[anchor] * (table.x0 + table.dxdm * (m_a - m_ref)) / (math.pi * nm_a * 1e3)
    margin = 0.02 * lam.max()
    found = {}
    for d0 in np.sort(d_cand[(d_cand >= d_range[0]) & (d_cand <= d_range[1])]):
        d_um = float(d0)
        cols = None
        for _ in range(2):
            pred = predict(d_um)
            window = np.nonzero((pred > lam.min() - margin) & (pred < lam.max() + margin))[0]
            if window.size < lam.size:
                cols = None
                break
            cost = weight[:, None] * (lam[:, None] - pred[window][None, :]) ** 2
            _, c = linear_sum_assignment(cost)
            cols = window[c]
            g = pred[cols] / d_um
            d_um = float(np.sum(weight * lam * g) / np.sum(weight * g * g))
        if cols is None or not (d_range[0] <= d_um <= d_range[1]):
            continue
        resid = lam - predict(d_um)[cols]
        rms = float(np.sqrt(np.sum(weight * resid**2) / np.sum(weight)))
        key = tuple(int(c) for c in cols)
        if key not in found or rms < found[key][1]:
            found[key] = (d_um, rms)
    items = sorted(found.items(), key=lambda kv: (kv[1][1], kv[1][0], kv[0]))
    return [(np.array(k), d, r) for k, (d, r) in items[:max_keep]], table


def _characteristic_many(x, l, m, is_te):
    """Vectorized :func:`_characteristic` over (x, l, m, polarization) arrays."""
    z = m * x
    j = spherical_jn(np.stack([l - 1, l]), np.stack([z, z]))
    y = spherical_yn(np.stack([l - 1, l]), np.stack([x, x]))
    psi, dpsi = z * j[1], z * j[0] - l * j[1]
    chi, dchi = x * y[1], x * y[0] - l * y[1]
    value = np.where(is_te, m * dpsi * chi - psi * dchi, dpsi * chi - m * psi * dchi)
    return value / (np.hypot(psi, dpsi) * np.hypot(chi, dchi))


def _polish(l, m, pols, orders, hint):
    """Roots near known nearby roots ``hint`` for many modes at once.

    Vectorized Illinois (regula falsi) iterations in [hint - h, hint + h]; a mode whose
    bracket shows no sign change falls back to the scan-and-brentq root finder.
    """
    is_te = pols == "TE"
    a, b = hint - _HINT_HALF_WIDTH, hint + _HINT_HALF_WIDTH
    fa, fb = _characteristic_many(a, l, m, is_te), _characteristic_many(b, l, m, is_te)
    good = np.isfinite(fa) & np.isfinite(fb) & (np.signbit(fa) != np.signbit(fb))
    x = np.where(good, 0.5 * (a + b), np.nan)
    side = np.zeros(l.size, dtype=int)
    for _ in range(60):
        if not np.any(good):
            break
        c = np.where(good, (a * fb - b * fa) / (fb - fa), x)
        fc = _characteristic_many(c, l, m, is_te)
        left = np.signbit(fc) == np.signbit(fa)
        # Illinois: halve the retained end's value when the same side is kept twice
        a_new = np.where(left, c, a)
        b_new = np.where(left, b, c)
        fa_new = np.where(left, fc, np.where(side == -1, 0.5 * fa, fa))
        fb_new = np.where(left, np.where(side == 1, 0.5 * fb, fb), fc)
        side = np.where(left, 1, -1)
        done = np.abs(c - x) < 1e-13 * np.maximum(1.0, np.abs(c))
        a, b, fa, fb = (np.where(good, a_new, a), np.where(good, b_new, b),
                        np.where(good, fa_new, fa), np.where(good, fb_new, fb))
        x = np.where(good, c, x)
        if np.all(done | ~good):
            break
    for k in np.nonzero(~good)[0]:
        x[k] = _root_scalar(int(l[k]), float(m[k]), str(pols[k]), int(orders[k]))
    return x


def _refine(lam, err, pols, ls, ns_orders, ns_fn, nm_base, dispersive, d0, d_range, delta_range):
    """Least-squares fit of D (and a medium-index offset) for one fixed assignment."""
    fit_medium = delta_range is not None
    scale = np.ones_like(lam) if err is None else err
    ls = ls.astype(float)
    state = {"x": None}

    def start_x(m):
        if state["x"] is None:
            state["x"] = np.array([_root_scalar(int(li), float(mi), str(p), int(n))
                                   for li, mi, p, n in zip(ls, m, pols, ns_orders)])
        return state["x"]

    def model(params):
        d_um = params[0]
        delta = params[1] if fit_medium else 0.0
        cur = lam.copy()
        for _ in range(60):
            ns = _index_table(ns_fn, cur)
            nm = _index_table(nm_base, cur) + delta
            m = ns / nm
            if not np.all(m > 1.0):
                return np.full_like(lam, np.nan)
            x = _polish(ls, m, pols, ns_orders, start_x(m))
            if np.all(np.isfinite(x)):
                state["x"] = x
            new = math.pi * nm * d_um * 1e3 / x
            if not dispersive or np.all(np.abs(new - cur) < _SELF_CONSISTENT_TOL_NM):
                return new
            cur = np.where(np.isfinite(new), new, cur)
        return np.full_like(lam, np.nan)

    def resid(params):
        r = (model(params) - lam) / scale
        return np.where(np.isfinite(r), r, 1e6)

    p0 = [d0] + ([0.0] if fit_medium else [])
    lo = [d_range[0]] + ([delta_range[0]] if fit_medium else [])
    hi = [d_range[1]] + ([delta_range[1]] if fit_medium else [])
    p0 = np.clip(p0, np.array(lo) + 1e-12, np.array(hi) - 1e-12)
    sol = least_squares(resid, p0, bounds=(lo, hi), diff_step=1e-7, xtol=1e-14, ftol=1e-14,
                        gtol=1e-14, max_nfev=200)
    pred = model(sol.x)
    r = lam - pred
    ssr = float(np.sum((r / scale) ** 2))
    dof = lam.size - len(p0)
    try:
        cov = np.linalg.inv(sol.jac.T @ sol.jac)
    except np.linalg.LinAlgError:
        cov = np.full((len(p0), len(p0)), np.nan)
    if err is None:
        cov = cov * (ssr / dof) if dof > 0 else np.full_like(cov, np.nan)
    at_bound = bool(np.any(np.isclose(sol.x, lo, rtol=0, atol=1e-9 * np.maximum(1, np.abs(lo))))
                    or np.any(np.isclose(sol.x, hi, rtol=0, atol=1e-9 * np.maximum(1, np.abs(hi)))))
    w = 1.0 / scale**2
    rms = float(np.sqrt(np.sum(w * r**2) / np.sum(w)))
    return dict(params=sol.x, cov=cov, pred=pred, resid=r, ssr=ssr, dof=dof, rms=rms,
                at_bound=at_bound, success=bool(sol.success) and bool(np.all(np.isfinite(pred))))


def _acceptable(fit, err, tolerance_nm):
    if err is not None and fit["dof"] > 0:
        return float(_chi2_dist.sf(fit["ssr"], fit["dof"])) > 1e-3
    return fit["rms"] <= tolerance_nm


def _search(lam_in, err_in, ns_in, nm_in, d_range, polarizations, radial_orders, fit_medium,
            nm_bounds, n_refine=4):
    """Screen candidate assignments, then refine the best ``n_refine`` exactly."""
    order = np.argsort(lam_in, kind="stable")
    lam = lam_in[order]
    err = None if err_in is None else err_in[order]
    weight = np.ones_like(lam) if err is None else (np.mean(err) / err) ** 2
    ns_fn, ds = _as_index_fn("n_sphere", ns_in)
    nm_fn, dm = _as_index_fn("n_medium", nm_in)
    dispersive = ds or dm
    cands, table = _screen(lam, weight, ns_fn, nm_fn, d_range, polarizations, radial_orders,
                           max_keep=max(n_refine, 2))
    delta_range = None
    if fit_medium:
        lam_ref = float(np.median(lam))
        base = float(nm_fn(lam_ref))
        delta_range = (nm_bounds[0] - base, nm_bounds[1] - base)
    refined = []
    for k, (cols, d0, _) in enumerate(cands):
        if k >= n_refine:
            break
        pols = table.pol[cols]
        fit = _refine(lam, err, pols, table.l[cols], table.n[cols], ns_fn, nm_fn, dispersive, d0,
                      d_range, delta_range)
        fit.update(cols=cols, order=order)
        refined.append(fit)
    refined.sort(key=lambda f: (f["rms"], float(f["params"][0])))
    return refined, table


def _assignment_of(fit, table, order, ok, message, runner_up):
    inv = np.empty_like(order)
    inv[order] = np.arange(order.size)
    cols = fit["cols"][inv]
    return ModeAssignment(polarization=tuple(str(p) for p in table.pol[cols]),
                          l=table.l[cols].copy(), radial_order=table.n[cols].copy(),
                          predicted_nm=fit["pred"][inv], residual_nm=fit["resid"][inv],
                          diameter_um=float(fit["params"][0]), rms_nm=fit["rms"],
                          runner_up_rms_nm=runner_up, ok=ok, message=message)


def _describe(fit, fit_medium, nm_ref):
    text = f"D={fit['params'][0]:.4f} um"
    if fit_medium:
        text += f", n_medium={nm_ref + fit['params'][1]:.5f}"
    return text + f", rms {fit['rms'] * 1e3:.2f} pm"


def _verdict(refined, err, tolerance_nm, fit_medium, nm_ref, d_range):
    """(ok, message, runner_up_rms) for the best refined fit."""
    if not refined:
        return False, "no set of sphere modes matches these lines in the diameter range", math.inf
    best = refined[0]
    runner_up = refined[1]["rms"] if len(refined) > 1 else math.inf
    if not best["success"]:
        return False, "the size fit did not converge: " + _describe(best, fit_medium, nm_ref), \
            runner_up
    if not _acceptable(best, err, tolerance_nm):
        limit = ("chi2 p-value > 1e-3" if err is not None and best["dof"] > 0
                 else f"rms <= {tolerance_nm * 1e3:.1f} pm")
        return False, ("lines fit no sphere: best solution " + _describe(best, fit_medium, nm_ref)
                       + f" fails {limit}"), runner_up
    if best["at_bound"]:
        return False, ("fit at a parameter bound (diameter range "
                       f"{d_range[0]:g}-{d_range[1]:g} um or medium-index bounds): "
                       + _describe(best, fit_medium, nm_ref)), runner_up
    others = [f for f in refined[1:] if f["success"] and _acceptable(f, err, tolerance_nm)]
    if others:
        return False, ("ambiguous: " + _describe(best, fit_medium, nm_ref) + " and "
                       + _describe(others[0], fit_medium, nm_ref)
                       + " both fit; add lines or narrow the diameter range"), runner_up
    return True, "", runner_up


def assign_modes(wavelength_nm, *, n_sphere, n_medium, diameter_range_um, radial_orders=(1,),
                 polarizations=("TE", "TM"), wavelength_err_nm=None, tolerance_nm=0.02):
    """Assign (polarization, l, radial order) to measured WGM lines, indices held fixed.

    Every mode whose exact resonance could fall on the central line within the
    diameter range is tried: the other lines are matched to the nearest modes by a
    one-to-one assignment, the diameter refitted, and the best few assignments are
    refined with the exact, self-consistent model (diameter only).

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum line wavelengths (>= 2).
    n_sphere, n_medium : float or callable
        Indices, or callables of vacuum wavelength in nm.
    diameter_range_um : (float, float)
        Diameters to consider.
    radial_orders : sequence of int
        Radial orders to consider (1-3).
    polarizations : sequence of str
        Subset of ('TE', 'TM').
    wavelength_err_nm : float or array_like, optional
        1-sigma line errors (weights and chi2 acceptance).
    tolerance_nm : float
        Largest acceptable rms residual when no errors are given.

    Returns
    -------
    ModeAssignment
    """
    lam, err = _check_lines(wavelength_nm, wavelength_err_nm, 2)
    d_range = _check_pairs("diameter_range_um", diameter_range_um)
    pols = tuple(_check_polarization(p) for p in polarizations)
    orders = tuple(sorted({_check_order(n) for n in radial_orders}))
    if not pols or not orders:
        raise InputError("need at least one polarization and radial order",
                         field="polarizations, radial_orders", expected="non-empty",
                         found=f"{polarizations!r}, {radial_orders!r}")
    refined, table = _search(lam, err, n_sphere, n_medium, d_range, pols, orders, False, None)
    ok, message, runner_up = _verdict(refined, err, float(tolerance_nm), False, 0.0, d_range)
    if not refined:
        nan = np.full(lam.size, np.nan)
        return ModeAssignment(polarization=("",) * lam.size, l=np.zeros(lam.size, int),
                              radial_order=np.zeros(lam.size, int), predicted_nm=nan,
                              residual_nm=nan, diameter_um=math.nan, rms_nm=math.nan,
                              runner_up_rms_nm=math.inf, ok=False, message=message)
    return _assignment_of(refined[0], table, refined[0]["order"], ok, message, runner_up)


def fit_sphere(wavelength_nm, wavelength_err_nm=None, *, n_sphere, n_medium_guess,
               diameter_guess_um=None, fit_medium=True, diameter_range_um=None,
               n_medium_bounds=None, radial_orders=(1,), polarizations=("TE", "TM"),
               tolerance_nm=0.02):
    """Diameter and medium index of a sphere from its WGM lines (mode identity found too).

    Parameters
    ----------
    wavelength_nm : array_like
        Vacuum line wavelengths; at least 3 (2 when ``fit_medium=False``).
    wavelength_err_nm : float or array_like, optional
        1-sigma errors.  With them, chi2 decides acceptance and the covariance is
        used as is; without them, the rms must be <= ``tolerance_nm`` and the
        covariance is scaled by the residual variance.
    n_sphere : float or callable
        Sphere index (e.g. ``get_medium("ps-sultanova")``), held fixed.
    n_medium_guess : float or callable
        Medium index; with ``fit_medium`` a constant offset to it is fitted.
    diameter_guess_um : float, optional
        Search 0.85-1.15 x this diameter (unless ``diameter_range_um`` is given).
    fit_medium : bool
        Fit the medium index (True) or hold it at ``n_medium_guess``.
    diameter_range_um : (float, float), optional
        Diameters to search; default 3-30 um without a guess.
    n_medium_bounds : (float, float), optional
        Bounds of the medium index; default guess +- 0.05.
    radial_orders, polarizations, tolerance_nm
        As for :func:`assign_modes`.

    Returns
    -------
    SphereFit
        ``ok=False`` with a message (and NaN numbers) when the lines fit no sphere,
        when two assignments fit equally well, or when the fit sits on a bound.
    """
    lam, err = _check_lines(wavelength_nm, wavelength_err_nm, 3 if fit_medium else 2)
    if diameter_range_um is not None:
        d_range = _check_pairs("diameter_range_um", diameter_range_um)
    elif diameter_guess_um is not None:
        g = float(diameter_guess_um)
        if not (np.isfinite(g) and g > 0):
            raise InputError("diameter guess must be positive", field="diameter_guess_um",
                             expected="> 0 um", found=repr(diameter_guess_um))
        d_range = (0.85 * g, 1.15 * g)
    else:
        d_range = (3.0, 30.0)
    pols = tuple(_check_polarization(p) for p in polarizations)
    orders = tuple(sorted({_check_order(n) for n in radial_orders}))
    nm_fn, _ = _as_index_fn("n_medium_guess", n_medium_guess)
    lam_ref = float(np.median(lam))
    nm_ref = float(nm_fn(lam_ref))
    nm_bounds = None
    if fit_medium:
        nm_bounds = (_check_pairs("n_medium_bounds", n_medium_bounds) if n_medium_bounds is not None
                     else (nm_ref - 0.05, nm_ref + 0.05))
        ns_fn, _ = _as_index_fn("n_sphere", n_sphere)
        ns_ref = float(ns_fn(lam_ref))
        nm_bounds = (max(nm_bounds[0], 1e-6), min(nm_bounds[1], ns_ref * 0.999))
        if not nm_bounds[0] < nm_ref < nm_bounds[1]:
            raise InputError("medium index guess outside its bounds", field="n_medium_guess",
                             expected=f"{nm_bounds[0]:.4f}-{nm_bounds[1]:.4f}", found=f"{nm_ref:.4f}")
    refined, table = _search(lam, err, n_sphere, n_medium_guess, d_range, pols, orders, fit_medium,
                             nm_bounds)
    ok, message, runner_up = _verdict(refined, err, float(tolerance_nm), fit_medium, nm_ref,
                                      d_range)
    nan = math.nan
    if not refined:
        return SphereFit(nan, nan, nan, nan, None, nan, nan, lam.size - (2 if fit_medium else 1),
                         False, message)
    best = refined[0]
    assignment = _assignment_of(best, table, best["order"], ok, message, runner_up)
    chi2 = best["ssr"] if err is not None else nan
    if not ok:
        return SphereFit(nan, nan, nan, nan, assignment, chi2, best["rms"], best["dof"], False, message)
    errs = np.sqrt(np.diag(best["cov"]))
    notes = []
    if not np.all(np.isfinite(errs)):
        notes.append("uncertainties unavailable (no wavelength errors and no spare degrees of freedom)")
    n_med = nm_ref + (float(best["params"][1]) if fit_medium else 0.0)
    n_med_err = float(errs[1]) if fit_medium else 0.0
    return SphereFit(diameter_um=float(best["params"][0]), diameter_err_um=float(errs[0]),
                     n_medium=n_med, n_medium_err=n_med_err, assignment=assignment, chi2=chi2,
                     rms_nm=best["rms"], dof=best["dof"], ok=True, message="; ".join(notes))
