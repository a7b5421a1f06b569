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

The outgoing-wave form with xi_l = psi_l + i chi_l has complex roots x_r - i x_i: x_r is
the resonance of the (leaky) mode and Q = x_r / (2 x_i) its radiation-limited quality
factor (:func:`complex_size_parameter`).  Wavelength predictions and fits use the complex
root by default (``root="complex"``); for Q >> 1 the two forms agree to a few 1e-6, for a
leaky second-order mode of a bead in a cell (Q ~ 1e2) they differ by ~1e-3.

Functions: :func:`exact_size_parameter`, :func:`complex_size_parameter`,
:func:`asymptotic_size_parameter`, :func:`resonance_wavelengths` (indices may be callables
of wavelength, solved self-consistently), :func:`mode_wavelengths` (every mode in a
wavelength range), :func:`assign_modes` (polarisation, l, radial order of measured lines),
:func:`fit_sphere` (mode search, diameter and medium index with uncertainties) and
:func:`fit_sphere_modes` (diameter and medium index from lines of known identity, fast:
the exact x(m) of each mode is interpolated from exact roots).  Wavelengths are vacuum
nm, diameters um.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, linear_sum_assignment
from scipy.special import ai_zeros, spherical_jn, spherical_yn
from scipy.stats import chi2 as _chi2_dist

from ..exceptions import InputError

__all__ = [
    "ModeAssignment",
    "SphereFit",
    "asymptotic_size_parameter",
    "complex_size_parameter",
    "exact_size_parameter",
    "resonance_wavelengths",
    "assign_modes",
    "fit_sphere",
    "fit_sphere_modes",
    "mode_wavelengths",
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


def _predict_one(diameter_um, ns_fn, nm_fn, dispersive, pol, l, n, start_nm, x_hint=None,
                 root="complex"):
    """Self-consistent vacuum wavelength of one mode; returns (lambda_nm, x).

    ``x_hint`` is a nearby real-form root (speeds up the root search)."""
    lam = start_nm
    x_real = x_hint
    for _ in range(60):
        ns, nm = float(ns_fn(lam)), float(nm_fn(lam))
        m = ns / nm
        if not m > 1.0:
            return math.nan, math.nan
        x, x_real = _root(l, m, pol, n, hint=x_real, root=root)
        if not np.isfinite(x):
            return math.nan, math.nan
        new = math.pi * nm * diameter_um * 1e3 / x
        if not dispersive or abs(new - lam) < _SELF_CONSISTENT_TOL_NM:
            return new, x
        lam = new
    return math.nan, math.nan


def resonance_wavelengths(diameter_um, n_sphere, n_medium, *, polarization, l, radial_order=1,
                          root="complex"):
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
    root : {'complex', 'real'}
        'complex' (default): the real part of the complex (outgoing-wave) root, the
        resonance of a leaky mode; 'real': the real-root form with y_l (differs by a
        few 1e-6 relative for Q >> 1, by ~1e-3 for Q ~ 1e2).

    Returns
    -------
    float or ndarray
        Wavelengths in nm (vacuum), shaped like ``l``.
    """
    root = _check_root(root)
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
            lam, _ = _predict_one(d, ns_fn, nm_fn, True, pol, li, n, lam0, root=root)
        else:
            _check_m(float(ns_fn(0.0)) / float(nm_fn(0.0)))
            lam, _ = _predict_one(d, ns_fn, nm_fn, False, pol, li, n, 0.0, root=root)
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


def _asymptotic_many(l, m, is_te, n):
    """:func:`_asymptotic` for arrays of polarization (``is_te``) and radial order ``n``."""
    nu = np.asarray(l, dtype=float) + 0.5
    alpha = _AIRY_ZEROS[np.asarray(n, dtype=int)]
    m = np.asarray(m, dtype=float)
    p = np.where(is_te, m, 1.0 / m)
    root = np.sqrt(m * m - 1.0)
    mx = (nu + 2.0 ** (-1.0 / 3.0) * alpha * nu ** (1.0 / 3.0) - p / root
          + 0.3 * 2.0 ** (-2.0 / 3.0) * alpha**2 * nu ** (-1.0 / 3.0)
          - 2.0 ** (-1.0 / 3.0) * p * (m * m - 2.0 * p * p / 3.0) * alpha * nu ** (-2.0 / 3.0) / root**3)
    return mx / m


_AIRY_ZEROS = np.concatenate([[np.nan], -ai_zeros(_MAX_RADIAL_ORDER + 1)[0]])


def _roots_many(l, m, is_te, n, root):
    """Resonance size parameters of many modes at once (arrays of one shape).

    Newton's method on the real-root form g(x) = m psi'(mx) chi(x) - psi(mx) chi'(x)
    (TE; TM analogous), with g' from the Riccati-Bessel equation f'' = (l(l+1)/z^2 - 1) f,
    started from the asymptotic size parameter; a root that lands nearer to the guess of
    another radial order, or does not converge, is found again by the scan of
    :func:`_root_scalar`.  ``root='complex'`` then polishes every root to the real part of
    the complex root.  NaN where a mode has no root.
    """
    l, m, is_te, n = (np.array(a) for a in np.broadcast_arrays(
        np.asarray(l, dtype=np.int64), np.asarray(m, dtype=float), np.asarray(is_te, dtype=bool),
        np.asarray(n, dtype=np.int64)))
    guess = _asymptotic_many(l, m, is_te, n)
    lo_guess = np.where(n > 1, _asymptotic_many(l, m, is_te, np.maximum(n - 1, 1)), -np.inf)
    hi_guess = _asymptotic_many(l, m, is_te, n + 1)
    x = guess.copy()
    lf = l.astype(float)
    converged = np.zeros(x.shape, dtype=bool)
    with np.errstate(all="ignore"):
        for _ in range(30):
            z = m * x
            j0, j1 = spherical_jn(l - 1, z), spherical_jn(l, z)
            y0, y1 = spherical_yn(l - 1, x), spherical_yn(l, x)
            psi, dpsi = z * j1, z * j0 - lf * j1
            chi, dchi = x * y1, x * y0 - lf * y1
            ddpsi = (lf * (lf + 1.0) / z**2 - 1.0) * psi
            ddchi = (lf * (lf + 1.0) / x**2 - 1.0) * chi
            g = np.where(is_te, m * dpsi * chi - psi * dchi, dpsi * chi - m * psi * dchi)
            dg = np.where(is_te, m * m * ddpsi * chi - psi * ddchi,
                          m * ddpsi * chi + (1.0 - m * m) * dpsi * dchi - m * psi * ddchi)
            step = np.where(converged, 0.0, g / dg)
            step = np.clip(np.nan_to_num(step, nan=0.0), -0.5, 0.5)
            x = x - step
            converged |= np.abs(step) <= 1e-13 * np.abs(x)
            if np.all(converged):
                break
    ok = converged & (x > 0.5 * (guess + lo_guess)) & (x < 0.5 * (guess + hi_guess))
    leaky = guess > lf + 0.5        # above l + 1/2: a leaky order with Q of order 1, not a WGM
    x[leaky] = np.nan
    for k in np.flatnonzero((~ok & ~leaky).ravel()):
        idx = np.unravel_index(k, x.shape)
        x[idx] = _root_scalar(int(l[idx]), float(m[idx]), "TE" if is_te[idx] else "TM", int(n[idx]))
    polish = np.isfinite(x) & (root != "real") & ((root == "complex") | (n > 1))
    if polish.any():
        x[polish] = _complex_polish(l[polish], m[polish], is_te[polish], x[polish]).real
    return x


class _ModeTable:
    """Size parameters of all (pol, l, n) modes across a relative-index range.

    The range is cut into windows of at most ``_TABLE_WINDOW`` in m; in each window,
    exact roots at 4 Chebyshev points give a per-mode interpolant (a screening model,
    good to ~1e-8 relative; the refinement is exact).  A mode without a bound root in a
    window (a leaky higher radial order at low contrast) is left out of that window.
    With ``root='complex'`` only radial orders >= 2 are moved to the complex root here
    (by their shift at the window centre): first-order modes of Q > 1e3 move by < 0.01 nm,
    far below what screening needs.  Higher orders of radiation-limited Q below
    ``_MIN_Q_SCREEN`` (linewidth above ~3 nm: no sharp laser line) are left out.
    """

    def __init__(self, m_lo, m_hi, l_lo, l_hi, polarizations, radial_orders, root="complex"):
        fams = [(p, n) for p in polarizations for n in radial_orders]
        ls = np.arange(l_lo, l_hi + 1)
        pol = np.repeat([p for p, _ in fams], ls.size)
        order = np.repeat([n for _, n in fams], ls.size)
        ell = np.tile(ls, len(fams))
        n_win = max(1, int(math.ceil((m_hi - m_lo) / _TABLE_WINDOW)))
        self.edges = np.linspace(m_lo, m_hi, n_win + 1)
        nodes = 4
        t = np.cos(np.pi * (np.arange(nodes) + 0.5) / nodes)[::-1]
        mids = 0.5 * (self.edges[:-1] + self.edges[1:])
        halves = 0.5 * np.diff(self.edges)
        ms = (mids[:, None] + halves[:, None] * t[None, :]).ravel()
        te = pol == "TE"
        xs = _roots_many(ell[None, :], ms[:, None], te[None, :], order[None, :], "real").reshape(n_win, nodes, ell.size)
        self.windows = []
        for w in range(n_win):
            keep = np.all(np.isfinite(xs[w]), axis=0)
            high = keep & (order > 1)
            if root == "complex" and high.any():
                # leaky higher orders: the complex root moves them by up to ~1e-3; take that shift
                # at the window centre for the whole window, and leave out modes of Q < _MIN_Q_SCREEN
                xr = _roots_many(ell[high], np.full(high.sum(), mids[w]), te[high], order[high], "real")
                xc = _complex_polish(ell[high], np.full(high.sum(), mids[w]), te[high], xr)
                q = xc.real / (2.0 * np.abs(xc.imag))
                xs[w][:, high] += (xc.real - xr)[None, :]
                keep[np.flatnonzero(high)[~(np.isfinite(q) & (q >= _MIN_Q_SCREEN))]] = False
            coef = np.polynomial.chebyshev.chebfit(t, xs[w][:, keep], nodes - 1) if keep.any() \
                else np.zeros((nodes, 0))
            self.windows.append((pol[keep], ell[keep], order[keep], mids[w], halves[w], coef))

    def window(self, m):
        """(pol, l, n, x-function) of the window holding relative index ``m``."""
        w = int(np.clip(np.searchsorted(self.edges, m) - 1, 0, len(self.windows) - 1))
        pol, ell, order, mid, half, coef = self.windows[w]

        def x(mm, idx=None):
            c = coef if idx is None else coef[:, idx]
            u = (np.asarray(mm, dtype=float) - mid) / half
            return np.polynomial.chebyshev.chebval(np.broadcast_to(u, c.shape[1:]), c, tensor=False)

        return pol, ell, order, x


_TABLE_WINDOW = 0.04
_ORDER_PRIOR_NM = 0.03   # screening penalty per radial order above 1, as a wavelength distance
_GN_SCREEN_NM = 0.25     # candidates screened this well get their medium index refined too
_MIN_Q_SCREEN = 200.0    # higher radial orders leakier than this are not considered as lines
_AMBIGUITY_DCHI2 = 9.0   # a second assignment within this chi2 of the best one makes the result ambiguous


def _screen(lam, weight, ns_fn, nm_fn, d_range, polarizations, radial_orders, max_keep, root,
            delta_range=None, delta_step=0.01):
    """Candidate assignments of sorted lines ``lam``, best first.

    Returns a list of (pol, l, n, D, delta, rms): the mode identity of every line, the
    screened diameter and medium-index offset and the weighted rms.  With
    ``delta_range`` the medium-index offset is scanned in steps of ``delta_step`` (an
    index error of half a step moves lines by < 0.05 nm once D absorbs the mean).
    """
    grid = np.linspace(lam.min(), lam.max(), 9)
    ns_g, nm_g = _index_table(ns_fn, grid), _index_table(nm_fn, grid)
    lam_ref = float(np.median(lam))
    if delta_range is None:
        deltas = np.array([0.0])
    else:
        n_steps = max(1, int(math.ceil((delta_range[1] - delta_range[0]) / delta_step)))
        deltas = delta_range[0] + (np.arange(n_steps) + 0.5) * (delta_range[1] - delta_range[0]) / n_steps
        deltas = deltas[np.argsort(np.abs(deltas), kind="stable")]
    m_all = np.concatenate([ns_g / (nm_g + d) for d in (deltas.min(), deltas.max())])
    for mv in m_all:
        _check_m(mv)
    m_lo, m_hi = float(m_all.min()) * (1 - 1e-3), float(m_all.max()) * (1 + 1e-3)
    x_lo = math.pi * float(nm_g.min() + deltas.min()) * d_range[0] * 1e3 / lam.max()
    x_hi = math.pi * float(nm_g.max() + deltas.max()) * d_range[1] * 1e3 / lam.min()
    l_lo = max(1, int(math.floor(0.95 * x_lo)) - 2)
    l_hi = int(math.ceil(m_hi * x_hi * 1.05)) + 2
    table = _ModeTable(m_lo, m_hi, l_lo, l_hi, polarizations, radial_orders, root)
    anchor = int(np.argsort(np.abs(lam - lam_ref), kind="stable")[0])
    margin = 0.02 * lam.max()
    found = {}
    fit_medium = delta_range is not None
    for delta in deltas:
        nm_ref0 = float(np.interp(lam_ref, grid, nm_g))
        m_ref = float(np.interp(lam_ref, grid, ns_g)) / (nm_ref0 + delta)
        pol, ell, order, xfun = table.window(m_ref)
        if ell.size < lam.size:
            continue
        # a higher radial order (lower Q, higher threshold) takes a line only when it is
        # clearly nearer: a near-coincident first-order mode wins the tie
        prior = _ORDER_PRIOR_NM**2 * (order - 1)

        def predict(d_um, dl, idx=None, xfun=xfun):
            nm_ref = nm_ref0 + dl
            lam0 = math.pi * nm_ref * d_um * 1e3 / xfun(float(np.interp(lam_ref, grid, ns_g)) / nm_ref, idx)
            lc = np.clip(lam0, lam.min(), lam.max())
            nm_k = np.interp(lc, grid, nm_g) + dl
            return math.pi * nm_k * d_um * 1e3 / xfun(np.interp(lc, grid, ns_g) / nm_k, idx)

        # diameter at which each mode falls on the anchor line
        nm_a = float(np.interp(lam[anchor], grid, nm_g)) + delta
        d_cand = lam[anchor] * xfun(np.interp(lam[anchor], grid, ns_g) / nm_a) / (math.pi * nm_a * 1e3)
        for d0 in np.sort(d_cand[(d_cand >= d_range[0]) & (d_cand <= d_range[1])]):
            d_um, dl = float(d0), float(delta)
            cols = None
            for _ in range(2):
                pred = predict(d_um, dl)
                window = np.nonzero((pred > lam.min() - margin) & (pred < lam.max() + margin))[0]
                if window.size < lam.size:
                    cols = None
                    break
                cost = weight[:, None] * (lam[:, None] - pred[window][None, :]) ** 2 + prior[window][None, :]
                _, c = linear_sum_assignment(cost)
                cols = window[c]
                g = pred[cols] / d_um
                d_um = float(np.sum(weight * lam * g) / np.sum(weight * g * g))
            if cols is None or not (d_range[0] <= d_um <= d_range[1]):
                continue
            resid = lam - predict(d_um, dl, cols)
            rms = float(np.sqrt(np.sum(weight * resid**2) / np.sum(weight)))
            if fit_medium and lam.size >= 3 and rms < _GN_SCREEN_NM:
                # two Gauss-Newton steps in (D, delta) for this matching: ranks candidates by
                # their best nearby solution, not by the grid value of delta
                sw = np.sqrt(weight)
                for _ in range(2):
                    p0 = predict(d_um, dl, cols)
                    jd = (predict(d_um * (1 + 1e-6), dl, cols) - p0) / (d_um * 1e-6) * sw
                    jn = (predict(d_um, dl + 1e-5, cols) - p0) / 1e-5 * sw
                    step, *_ = np.linalg.lstsq(np.column_stack([jd, jn]), (lam - p0) * sw, rcond=None)
                    d_um = float(d_um + step[0])
                    dl = float(np.clip(dl + step[1], delta - delta_step, delta + delta_step))
                if not (d_range[0] <= d_um <= d_range[1] and delta_range[0] <= dl <= delta_range[1]):
                    continue
                resid = lam - predict(d_um, dl, cols)
                rms = float(np.sqrt(np.sum(weight * resid**2) / np.sum(weight)))
            key = tuple((str(pol[c]), int(ell[c]), int(order[c])) for c in cols)
            if key not in found or rms < found[key][2]:
                found[key] = (d_um, dl, rms)
    items = sorted(found.items(), key=lambda kv: (kv[1][2], kv[1][0], kv[0]))
    return [(np.array([k[0] for k in key]), np.array([k[1] for k in key]), np.array([k[2] for k in key]),
             d, dl, r) for key, (d, dl, r) in items[:max_keep]]


# --- complex roots, exact interpolants and the fit of a fixed assignment -----------------------

def _ratio_form(x, l, m, is_te):
    """m psi'(mx)/psi(mx) - xi'(x)/xi(x) (TE) or psi'(mx)/(m psi(mx)) - xi'(x)/xi(x) (TM),
    xi_l(x) = x h_l^(1)(x) the outgoing Riccati-Hankel function; complex x allowed."""
    z = m * x
    j0, j1 = spherical_jn(l - 1, z), spherical_jn(l, z)
    h0 = spherical_jn(l - 1, x) + 1j * spherical_yn(l - 1, x)
    h1 = spherical_jn(l, x) + 1j * spherical_yn(l, x)
    dlog_psi = (z * j0 - l * j1) / (z * j1)
    dlog_xi = (x * h0 - l * h1) / (x * h1)
    return np.where(is_te, m * dlog_psi, dlog_psi / m) - dlog_xi


def _complex_polish(l, m, is_te, x_real, *, max_iter=40):
    """Complex roots x_r - i x_i (outgoing waves) next to real-form roots ``x_real``.

    Secant iterations in the complex plane on the logarithmic-derivative form of the
    characteristic equation, vectorized over modes; the real-form root and a point
    shifted by -1e-3 i start each iteration.  Returns NaN where it does not converge.
    """
    l = np.asarray(l, dtype=float)
    m = np.asarray(m, dtype=float)
    is_te = np.asarray(is_te, dtype=bool)
    x0 = np.asarray(x_real, dtype=float).astype(complex)
    x1 = x0 - 1e-3j
    f0, f1 = _ratio_form(x0, l, m, is_te), _ratio_form(x1, l, m, is_te)
    done = np.zeros(x0.shape, dtype=bool)
    for _ in range(max_iter):
        denom = f1 - f0
        safe = np.abs(denom) > 0
        x2 = np.where(safe & ~done, x1 - f1 * (x1 - x0) / np.where(safe, denom, 1.0), x1)
        step = np.abs(x2 - x1)
        x0, f0 = x1, f1
        x1 = x2
        f1 = np.where(done, f1, _ratio_form(x1, l, m, is_te))
        done |= step <= 1e-14 * np.abs(x1)
        if np.all(done):
            break
    return np.where(done & (np.abs(x1 - np.asarray(x_real)) < 2.0), x1, np.nan + 0j)


def complex_size_parameter(l, relative_index, *, polarization, radial_order=1):
    """Complex resonance size parameter x_r - i x_i of the outgoing-wave Mie equations.

    The real part gives the resonance wavelength of the (leaky) mode,
    lambda0 = pi n_medium D / x_r, and the imaginary part its radiation-limited
    quality factor Q = x_r / (2 x_i).  For Q >> 1 the real part agrees with
    :func:`exact_size_parameter` (real-root form) to a few 1e-6 relative; for leaky
    modes (second radial order of a low-contrast bead, Q ~ 1e2) they differ by ~1e-3,
    and the complex root is the resonance.

    Parameters
    ----------
    l, relative_index, polarization, radial_order
        As for :func:`exact_size_parameter`.

    Returns
    -------
    complex or ndarray of complex
    """
    x_real = np.asarray(exact_size_parameter(l, relative_index, polarization=polarization,
                                             radial_order=radial_order))
    pol = _check_polarization(polarization)
    ls = np.broadcast_to(_check_l(l), x_real.shape)
    out = _complex_polish(ls, np.full(x_real.shape, float(relative_index)),
                          np.full(x_real.shape, pol == "TE"), x_real)
    if not np.all(np.isfinite(out)):
        raise InputError("complex resonance did not converge", field="l",
                         expected="a complex root next to the real-form root",
                         found=f"l={np.ravel(ls)[~np.isfinite(np.ravel(out))][:3].tolist()}")
    return complex(out) if out.ndim == 0 else out


def _root(l, m, pol, n, hint=None, root="complex"):
    """Resonance size parameter (real part for ``root='complex'``) and the real-form root."""
    x = _root_scalar(l, m, pol, n, hint=hint)
    if root == "real" or not np.isfinite(x):
        return x, x
    xc = _complex_polish(np.array([l]), np.array([m]), np.array([pol == "TE"]), np.array([x]))[0]
    return float(xc.real), x


def _check_root(root):
    if root not in ("complex", "real"):
        raise InputError("unknown resonance form", field="root", expected="'complex' or 'real'",
                         found=repr(root))
    return root


_CHEB_NODES = (16, 24, 32, 48)   # exact roots per mode across a relative-index range, tried in turn
_CHEB_TOL = 1e-10                # largest accepted interpolation error of x(m), relative
_M_GRID = 0.005                  # relative-index ranges are widened to this grid (cache reuse)


_X_OF_M_CACHE: dict = {}


def _x_of_m_many(keys):
    """Chebyshev coefficients of the exact x(m) of modes ``keys`` = [(pol, l, n, m_lo, m_hi, root)].

    Exact roots at Chebyshev points of [m_lo, m_hi] (all modes at once, :func:`_roots_many`);
    an interpolant is accepted when it matches exact roots half-way between nodes to
    ``_CHEB_TOL`` relative, else more nodes are used.  Results are cached per process.
    """
    todo = [k for k in dict.fromkeys(keys) if k not in _X_OF_M_CACHE]
    cheb = np.polynomial.chebyshev
    for nodes in _CHEB_NODES:
        if not todo:
            break
        t = np.cos(np.pi * (np.arange(nodes) + 0.5) / nodes)[::-1]
        t_test = 0.5 * (t[:-1] + t[1:])[[0, nodes // 2, -1]]
        tt = np.concatenate([t, t_test])
        pol = np.array([k[0] == "TE" for k in todo])
        ell = np.array([k[1] for k in todo])
        order = np.array([k[2] for k in todo])
        mid = np.array([0.5 * (k[3] + k[4]) for k in todo])
        half = np.array([0.5 * (k[4] - k[3]) for k in todo])
        root = todo[0][5]
        x = _roots_many(ell[None, :], mid[None, :] + half[None, :] * tt[:, None], pol[None, :],
                        order[None, :], root)
        bad = ~np.all(np.isfinite(x), axis=0)
        if bad.any():
            k = todo[int(np.flatnonzero(bad)[0])]
            raise InputError("no resonance of this mode in the relative-index range",
                             field="radial_order", expected="a bound mode",
                             found=f"{k[0]} l={k[1]} n={k[2]}, m {k[3]:.4f}-{k[4]:.4f}")
        coef = cheb.chebfit(t, x[:nodes], nodes - 1)
        err = np.abs(cheb.chebval(t_test, coef) - x[nodes:].T)
        good = np.all(err <= _CHEB_TOL * x[nodes:].T, axis=1)
        for j in np.flatnonzero(good):
            _X_OF_M_CACHE[todo[j]] = coef[:, j].copy()
        todo = [k for j, k in enumerate(todo) if not good[j]]
    if todo:
        k = todo[0]
        raise InputError("relative-index range too wide for an exact interpolant", field="n_medium_bounds",
                         expected="a narrower medium-index range", found=f"m {k[3]:.4f}-{k[4]:.4f}")
    return np.column_stack([_X_OF_M_CACHE[k] for k in keys])


_M_WINDOW = 0.02                 # half-width in m of the interpolation window of a fit


def _m_window(m_center):
    """Grid-aligned relative-index window around ``m_center`` (cache reuse between frames)."""
    m_lo = round(math.floor((m_center - _M_WINDOW) / _M_GRID) * _M_GRID, 6)
    m_hi = round(math.ceil((m_center + _M_WINDOW) / _M_GRID) * _M_GRID, 6)
    return max(m_lo, 1.0 + _M_GRID), m_hi


class _FixedModes:
    """Self-consistent wavelengths of modes of known identity (Chebyshev x(m), fast)."""

    def __init__(self, pols, ls, orders, ns_fn, nm_fn, dispersive, m_lo, m_hi, root):
        self.coef = _x_of_m_many([(str(p), int(li), int(n), m_lo, m_hi, root)
                                  for p, li, n in zip(pols, ls, orders)])
        self.ns_fn, self.nm_fn, self.dispersive = ns_fn, nm_fn, dispersive
        self.mid, self.half = 0.5 * (m_lo + m_hi), 0.5 * (m_hi - m_lo)
        self._grid = None

    def _indices(self, lam):
        """ns and nm at ``lam``: linear interpolation on a 0.05 nm table of the callables
        (error < 1e-10 for the media of :mod:`lasecyto.cavity.media`), built on first use."""
        if self._grid is None:
            g = np.arange(float(np.min(lam)) - 5.0, float(np.max(lam)) + 5.0, 0.05)
            self._grid = (g, _index_table(self.ns_fn, g), _index_table(self.nm_fn, g))
        g, ns_g, nm_g = self._grid
        if np.min(lam) < g[0] or np.max(lam) > g[-1]:
            return _index_table(self.ns_fn, lam), _index_table(self.nm_fn, lam)
        return np.interp(lam, g, ns_g), np.interp(lam, g, nm_g)

    def x(self, m):
        u = (np.asarray(m, dtype=float) - self.mid) / self.half
        out = np.polynomial.chebyshev.chebval(u, self.coef, tensor=False)
        return np.where(np.abs(u) <= 1.0 + 1e-9, out, np.nan)

    def wavelengths(self, d_um, delta, start_nm):
        lam = np.asarray(start_nm, dtype=float).copy()
        for _ in range(60):
            ns, nm = self._indices(lam)
            nm = nm + delta
            new = math.pi * nm * d_um * 1e3 / self.x(ns / nm)
            if not np.all(np.isfinite(new)):
                return np.full_like(lam, np.nan)
            if not self.dispersive or np.all(np.abs(new - lam) < _SELF_CONSISTENT_TOL_NM):
                return new
            lam = new
        return np.full_like(lam, np.nan)


@dataclass(frozen=True)
class _LsqResult:
    x: np.ndarray
    jac: np.ndarray
    success: bool


def _small_lsq(resid, p0, lo, hi, h, *, max_iter=40):
    """Damped Gauss-Newton for a handful of bounded parameters (forward-difference Jacobian).

    The size/index model is smooth and nearly linear in (D, index offset), so a few steps
    from a good start converge; each step costs 1 + n_par model evaluations.  Steps are
    clipped to the bounds and halved while they do not lower the sum of squares.
    """
    p = np.clip(np.asarray(p0, dtype=float), lo, hi)
    r = resid(p)
    ssr = float(r @ r)
    jac = np.zeros((r.size, p.size))
    for _ in range(max_iter):
        for i in range(p.size):
            q = p.copy()
            q[i] = q[i] + h[i] if q[i] + h[i] <= hi[i] else q[i] - h[i]
            jac[:, i] = (resid(q) - r) / (q[i] - p[i])
        step, *_ = np.linalg.lstsq(jac, -r, rcond=None)
        for _ in range(12):
            q = np.clip(p + step, lo, hi)
            rq = resid(q)
            sq = float(rq @ rq)
            if sq <= ssr:
                break
            step = 0.5 * step
        else:
            return _LsqResult(p, jac, True)   # no descent left: at the minimum (to rounding)
        moved = np.abs(q - p)
        p, r, ssr = q, rq, sq
        if np.all(moved <= 1e-12 * np.maximum(1.0, np.abs(p)) + 1e-3 * np.abs(h)):
            break
    else:
        return _LsqResult(p, jac, False)
    for i in range(p.size):  # Jacobian at the solution
        q = p.copy()
        q[i] = q[i] + h[i] if q[i] + h[i] <= hi[i] else q[i] - h[i]
        jac[:, i] = (resid(q) - r) / (q[i] - p[i])
    return _LsqResult(p, jac, True)


def _fit_fixed(lam, err, pols, ls, orders, ns_fn, nm_fn, dispersive, d_range, delta_range, root,
               d0=None, delta0=0.0, fixed_diameter=None):
    """Least-squares fit of D and/or a constant medium-index offset for one fixed assignment.

    ``delta_range`` None holds the medium index; otherwise it bounds the offset added to
    ``nm_fn``.  ``fixed_diameter`` holds D.  The model interpolates x(m) exactly inside a
    window of relative index (+-``_M_WINDOW``); when the solution reaches the edge of the
    window (not a bound of the caller) the window moves there and the fit is repeated.
    Returns a dict of plain values: params (D, offset), their 2 x 2 covariance (zero for a
    held parameter), pred, resid, ssr, dof, rms, at_bound, success.
    """
    fit_medium = delta_range is not None
    fit_d = fixed_diameter is None
    free = np.array([fit_d, fit_medium])
    n_par = int(free.sum())
    if n_par == 0:
        raise InputError("nothing to fit", field="fit_medium", expected="a free diameter or medium index",
                         found="both held")
    grid = np.array([float(lam.min()) - 3.0, float(np.median(lam)), float(lam.max()) + 3.0])
    ns_g, nm_g = _index_table(ns_fn, grid), _index_table(nm_fn, grid)
    scale = np.ones_like(lam) if err is None else err
    delta_c = float(delta0) if fit_medium else 0.0
    failed = dict(params=np.full(2, np.nan), cov=np.full((2, 2), np.nan), pred=np.full_like(lam, np.nan),
                  resid=np.full_like(lam, np.nan), ssr=math.inf, dof=lam.size - n_par, rms=math.inf,
                  at_bound=False, success=False)
    for _ in range(6):
        m_lo, m_hi = _m_window(float(ns_g[1] / (nm_g[1] + delta_c)))
        try:
            model = _FixedModes(pols, ls, orders, ns_fn, nm_fn, dispersive, m_lo, m_hi, root)
        except InputError:  # a mode of this assignment has no resonance here: not a solution
            return failed
        lo_d, hi_d = 0.0, 0.0
        if fit_medium:
            win = (float(np.max(ns_g / m_hi - nm_g)), float(np.min(ns_g / m_lo - nm_g)))
            lo_d, hi_d = max(delta_range[0], win[0]), min(delta_range[1], win[1])
            if not lo_d < hi_d:
                return failed
        start = d0 if fit_d else float(fixed_diameter)
        if start is None:  # each line alone at the current medium index, median over lines
            nm0 = _index_table(nm_fn, lam) + delta_c
            start = float(np.nanmedian(lam * model.x(_index_table(ns_fn, lam) / nm0) / (math.pi * nm0 * 1e3)))
            if not np.isfinite(start):
                start = 0.5 * (d_range[0] + d_range[1])
        full0 = np.array([start, min(max(delta_c, lo_d), hi_d)])

        def unpack(q, full0=full0):
            full = full0.copy()
            full[free] = q
            return full

        def resid(q, model=model, unpack=unpack):
            d_um, dl = unpack(q)
            r = (model.wavelengths(d_um, dl, lam) - lam) / scale
            return np.where(np.isfinite(r), r, 1e6)

        lo = np.array([d_range[0], lo_d])[free]
        hi = np.array([d_range[1], hi_d])[free]
        p0 = np.clip(full0[free], lo + 1e-9, hi - 1e-9)
        sol = _small_lsq(resid, p0, lo, hi, np.array([1e-6 * float(full0[0]), 1e-5])[free])
        params = unpack(sol.x)
        if not fit_medium:
            break
        at_window = ((abs(params[1] - lo_d) < 1e-7 and lo_d > delta_range[0])
                     or (abs(params[1] - hi_d) < 1e-7 and hi_d < delta_range[1]))
        if not at_window:
            break
        delta_c, d0 = float(params[1]), float(params[0])
    pred = model.wavelengths(params[0], params[1], lam)
    r = lam - pred
    ssr = float(np.sum((r / scale) ** 2))
    dof = lam.size - n_par
    try:
        cov_free = np.linalg.inv(sol.jac.T @ sol.jac)
    except np.linalg.LinAlgError:
        cov_free = np.full((n_par, n_par), np.nan)
    if err is None:
        cov_free = cov_free * (ssr / dof) if dof > 0 else np.full_like(cov_free, np.nan)
    cov = np.zeros((2, 2))
    cov[np.ix_(free, free)] = cov_free
    user_lo = np.array([d_range[0], delta_range[0] if fit_medium else 0.0])[free]
    user_hi = np.array([d_range[1], delta_range[1] if fit_medium else 0.0])[free]
    tol = 1e-7 * np.maximum(1.0, np.abs(np.concatenate([user_lo, user_hi])))
    at_bound = bool(np.any(np.abs(sol.x - user_lo) < tol[:n_par]) or np.any(np.abs(sol.x - user_hi) < tol[n_par:]))
    w = 1.0 / scale**2
    rms = float(np.sqrt(np.sum(w * r**2) / np.sum(w)))
    return dict(params=params, cov=cov, pred=pred, resid=r, ssr=ssr, dof=dof, rms=rms,
                at_bound=at_bound, success=bool(sol.success) and bool(np.all(np.isfinite(pred))))


def _refine(lam, err, pols, ls, ns_orders, ns_fn, nm_base, dispersive, d0, d_range, delta_range,
            root="complex", delta0=0.0):
    """Exact fit of one candidate assignment of the search (see :func:`_fit_fixed`)."""
    return _fit_fixed(lam, err, pols, ls, ns_orders, ns_fn, nm_base, dispersive, d_range,
                      delta_range, root, d0=d0, delta0=delta0)


def _acceptable(fit, err, tolerance_nm):
    if err is not None and fit["dof"] > 0:
        return float(_chi2_dist.sf(fit["ssr"], fit["dof"])) > 1e-3
    return fit["rms"] <= tolerance_nm


def _search(lam_in, err_in, ns_in, nm_in, d_range, polarizations, radial_orders, fit_medium,
            nm_bounds, root, n_refine=4):
    """Screen candidate assignments, then refine the best ``n_refine`` exactly."""
    order = np.argsort(lam_in, kind="stable")
    lam = lam_in[order]
    err = None if err_in is None else err_in[order]
    weight = np.ones_like(lam) if err is None else (np.mean(err) / err) ** 2
    ns_fn, ds = _as_index_fn("n_sphere", ns_in)
    nm_fn, dm = _as_index_fn("n_medium", nm_in)
    dispersive = ds or dm
    delta_range = None
    if fit_medium:
        lam_ref = float(np.median(lam))
        base = float(nm_fn(lam_ref))
        delta_range = (nm_bounds[0] - base, nm_bounds[1] - base)
    cands = _screen(lam, weight, ns_fn, nm_fn, d_range, polarizations, radial_orders,
                    max_keep=3 * max(n_refine, 2), root=root, delta_range=delta_range)
    refined = []
    for pols, ls, ns, d0, delta0, _ in cands:
        fit = _refine(lam, err, pols, ls, ns, ns_fn, nm_fn, dispersive, d0, d_range, delta_range, root,
                      delta0=delta0)
        if not np.isfinite(fit["rms"]):   # a mode of this candidate has no resonance there
            continue
        fit.update(modes=(pols, ls, ns), order=order)
        refined.append(fit)
        if len(refined) >= n_refine:
            break
    refined.sort(key=lambda f: (f["rms"], float(f["params"][0])))
    return refined


def _assignment_of(fit, order, ok, message, runner_up):
    inv = np.empty_like(order)
    inv[order] = np.arange(order.size)
    pols, ls, ns = (a[inv] for a in fit["modes"])
    return ModeAssignment(polarization=tuple(str(p) for p in pols),
                          l=ls.astype(int), radial_order=ns.astype(int),
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
    if err is not None:  # with line errors, a clearly worse chi2 is no rival
        others = [f for f in others if f["ssr"] - best["ssr"] < _AMBIGUITY_DCHI2]
    if others:
        return False, ("ambiguous: " + _describe(best, fit_medium, nm_ref) + " and "
                       + _describe(others[0], fit_medium, nm_ref)
                       + " both fit; add lines or narrow the diameter range"), runner_up
    return True, "", runner_up


def assign_modes(wavelength_nm, *, n_sphere, n_medium, diameter_range_um, radial_orders=(1,),
                 polarizations=("TE", "TM"), wavelength_err_nm=None, tolerance_nm=0.02,
                 root="complex"):
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
    root : {'complex', 'real'}
        Resonance form of the model (see :func:`resonance_wavelengths`).

    Returns
    -------
    ModeAssignment
    """
    root = _check_root(root)
    lam, err = _check_lines(wavelength_nm, wavelength_err_nm, 2)
    d_range = _check_pairs("diameter_range_um", diameter_range_um)
    pols = tuple(_check_polarization(p) for p in polarizations)
    orders = tuple(sorted({_check_order(n) for n in radial_orders}))
    if not pols or not orders:
        raise InputError("need at least one polarization and radial order",
                         field="polarizations, radial_orders", expected="non-empty",
                         found=f"{polarizations!r}, {radial_orders!r}")
    refined = _search(lam, err, n_sphere, n_medium, d_range, pols, orders, False, None, root)
    ok, message, runner_up = _verdict(refined, err, float(tolerance_nm), False, 0.0, d_range)
    if not refined:
        nan = np.full(lam.size, np.nan)
        return ModeAssignment(polarization=("",) * lam.size, l=np.zeros(lam.size, int),
                              radial_order=np.zeros(lam.size, int), predicted_nm=nan,
                              residual_nm=nan, diameter_um=math.nan, rms_nm=math.nan,
                              runner_up_rms_nm=math.inf, ok=False, message=message)
    return _assignment_of(refined[0], refined[0]["order"], ok, message, runner_up)


def fit_sphere(wavelength_nm, wavelength_err_nm=None, *, n_sphere, n_medium_guess,
               diameter_guess_um=None, fit_medium=True, diameter_range_um=None,
               n_medium_bounds=None, radial_orders=(1,), polarizations=("TE", "TM"),
               tolerance_nm=0.02, reference_nm=None, root="complex"):
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
        Bounds of the medium index at the median line wavelength; default guess +- 0.05.
    radial_orders, polarizations, tolerance_nm, root
        As for :func:`assign_modes`.
    reference_nm : float, optional
        Wavelength at which ``n_medium`` is reported (default: the median line); the
        fitted constant offset is added to ``n_medium_guess`` there.

    Returns
    -------
    SphereFit
        ``ok=False`` with a message (and NaN numbers) when the lines fit no sphere,
        when two assignments fit equally well, or when the fit sits on a bound.
    """
    root = _check_root(root)
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
    refined = _search(lam, err, n_sphere, n_medium_guess, d_range, pols, orders, fit_medium,
                      nm_bounds, root)
    ok, message, runner_up = _verdict(refined, err, float(tolerance_nm), fit_medium, nm_ref,
                                      d_range)
    nan = math.nan
    if not refined:
        return SphereFit(nan, nan, nan, nan, None, nan, nan, lam.size - (2 if fit_medium else 1),
                         False, message)
    best = refined[0]
    assignment = _assignment_of(best, best["order"], ok, message, runner_up)
    chi2 = best["ssr"] if err is not None else nan
    if not ok:
        return SphereFit(nan, nan, nan, nan, assignment, chi2, best["rms"], best["dof"], False, message)
    errs = np.sqrt(np.diag(best["cov"]))
    notes = []
    if not np.all(np.isfinite(errs)):
        notes.append("uncertainties unavailable (no wavelength errors and no spare degrees of freedom)")
    n_at = nm_ref if reference_nm is None else float(_index_table(nm_fn, np.array([float(reference_nm)]))[0])
    n_med = n_at + (float(best["params"][1]) if fit_medium else 0.0)
    n_med_err = float(errs[1]) if fit_medium else 0.0
    return SphereFit(diameter_um=float(best["params"][0]), diameter_err_um=float(errs[0]),
                     n_medium=n_med, n_medium_err=n_med_err, assignment=assignment, chi2=chi2,
                     rms_nm=best["rms"], dof=best["dof"], ok=True, message="; ".join(notes))


def fit_sphere_modes(wavelength_nm, wavelength_err_nm=None, *, polarization, l, radial_order,
                     n_sphere, n_medium_guess, fit_medium=True, diameter_range_um=(3.0, 30.0),
                     n_medium_bounds=None, reference_nm=None, tolerance_nm=0.02, root="complex",
                     diameter_um=None):
    """Diameter and medium index from lines whose mode identity is known (no search).

    In a time-lapse the identity of each track is found once (:func:`fit_sphere` on a
    frame with many lines) and every frame is then fitted with this function: two
    parameters from as few as 3 lines (2 with ``fit_medium=False``).  The exact size
    parameter x(m) of each mode is interpolated from exact roots (Chebyshev, checked
    against exact roots to 1e-10 relative), so a fit takes milliseconds.

    Parameters
    ----------
    wavelength_nm, wavelength_err_nm
        As for :func:`fit_sphere`.
    polarization : sequence of str
        'TE' or 'TM' per line.
    l, radial_order : array_like of int
        Angular mode number and radial order per line.
    n_sphere, n_medium_guess, fit_medium, tolerance_nm, root
        As for :func:`fit_sphere`.
    diameter_range_um : (float, float)
        Bounds of the diameter.
    n_medium_bounds : (float, float), optional
        Bounds of the medium index at the median line wavelength; default guess
        -0.05 / +0.10, never above 0.995 x the sphere index.
    reference_nm : float, optional
        Wavelength at which ``n_medium`` is reported (default: the median line).
    diameter_um : float, optional
        Hold the diameter at this value and fit the medium index only (for lines of a
        single family, which cannot separate the two; ``diameter_err_um`` is then 0).

    Returns
    -------
    SphereFit
        ``ok=False`` with NaN numbers and a message when the lines do not fit these
        modes (chi2 or rms test) or the fit sits on a bound.
    """
    root = _check_root(root)
    if diameter_um is not None and not fit_medium:
        raise InputError("nothing to fit", field="diameter_um, fit_medium",
                         expected="a free diameter or a free medium index", found="both held")
    lam, err = _check_lines(wavelength_nm, wavelength_err_nm, 2 if (diameter_um is not None or not fit_medium) else 3)
    def per_line(v):  # a single value applies to every line
        a = np.atleast_1d(np.asarray(v, dtype=object))
        return np.repeat(a, lam.size) if a.size == 1 else a

    pols = tuple(_check_polarization(p) for p in per_line(polarization))
    ls = np.atleast_1d(_check_l(per_line(l).astype(float)))
    orders = np.array([_check_order(n) for n in per_line(radial_order)], dtype=int)
    if not (len(pols) == ls.size == orders.size == lam.size):
        raise InputError("one mode identity per line is needed", field="polarization, l, radial_order",
                         expected=f"{lam.size} values each", found=f"{len(pols)}, {ls.size}, {orders.size}")
    if len(set(zip(pols, ls.tolist(), orders.tolist()))) != lam.size:
        raise InputError("two lines carry the same mode identity", field="l",
                         expected="distinct (polarization, l, radial_order)", found="a repeat")
    d_range = _check_pairs("diameter_range_um", diameter_range_um)
    ns_fn, ds = _as_index_fn("n_sphere", n_sphere)
    nm_fn, dm = _as_index_fn("n_medium_guess", n_medium_guess)
    lam_med = float(np.median(lam))
    nm_med = float(_index_table(nm_fn, np.array([lam_med]))[0])
    ns_med = float(_index_table(ns_fn, np.array([lam_med]))[0])
    delta_range = None
    if fit_medium:
        nb = (_check_pairs("n_medium_bounds", n_medium_bounds) if n_medium_bounds is not None
              else (nm_med - 0.05, min(nm_med + 0.10, 0.995 * ns_med)))
        if not nb[1] < ns_med:
            raise InputError("medium-index bounds reach the sphere index", field="n_medium_bounds",
                             expected=f"< {ns_med:.4f}", found=f"{nb[1]:.4f}")
        if not nb[0] < nm_med < nb[1]:
            raise InputError("medium index guess outside its bounds", field="n_medium_guess",
                             expected=f"{nb[0]:.4f}-{nb[1]:.4f}", found=f"{nm_med:.4f}")
        delta_range = (nb[0] - nm_med, nb[1] - nm_med)
    fixed = None
    if diameter_um is not None:
        fixed = float(diameter_um)
        if not (np.isfinite(fixed) and d_range[0] <= fixed <= d_range[1]):
            raise InputError("held diameter outside the diameter range", field="diameter_um",
                             expected=f"{d_range[0]:g}-{d_range[1]:g} um", found=repr(diameter_um))
    fit = _fit_fixed(lam, err, np.array(pols), ls, orders, ns_fn, nm_fn, ds or dm, d_range, delta_range, root,
                     fixed_diameter=fixed)
    n_at = nm_med if reference_nm is None else float(_index_table(nm_fn, np.array([float(reference_nm)]))[0])
    n_med = n_at + (float(fit["params"][1]) if fit_medium else 0.0)
    text = _describe(fit, False, 0.0) if not fit_medium else (
        f"D={fit['params'][0]:.4f} um, n_medium={n_med:.5f}, rms {fit['rms'] * 1e3:.2f} pm")
    ok, message = True, ""
    if not fit["success"]:
        ok, message = False, "the size fit did not converge: " + text
    elif not _acceptable(fit, err, float(tolerance_nm)):
        limit = ("chi2 p-value > 1e-3" if err is not None and fit["dof"] > 0
                 else f"rms <= {float(tolerance_nm) * 1e3:.1f} pm")
        ok, message = False, f"lines do not fit these modes: {text} fails {limit}"
    elif fit["at_bound"]:
        ok, message = False, (f"fit at a parameter bound (diameter {d_range[0]:g}-{d_range[1]:g} um "
                              f"or the medium-index bounds): {text}")
    assignment = ModeAssignment(polarization=pols, l=ls.copy(), radial_order=orders.copy(),
                                predicted_nm=fit["pred"], residual_nm=fit["resid"],
                                diameter_um=float(fit["params"][0]), rms_nm=fit["rms"],
                                runner_up_rms_nm=math.inf, ok=ok, message=message)
    chi2 = fit["ssr"] if err is not None else math.nan
    if not ok:
        return SphereFit(math.nan, math.nan, math.nan, math.nan, assignment, chi2, fit["rms"], fit["dof"],
                         False, message)
    errs = np.sqrt(np.clip(np.diag(fit["cov"]), 0.0, None))
    notes = []
    if not np.all(np.isfinite(errs)):
        notes.append("uncertainties unavailable (no wavelength errors and no spare degrees of freedom)")
    return SphereFit(diameter_um=float(fit["params"][0]), diameter_err_um=float(errs[0]), n_medium=n_med,
                     n_medium_err=float(errs[1]) if fit_medium else 0.0, assignment=assignment,
                     chi2=chi2, rms_nm=fit["rms"], dof=fit["dof"], ok=True, message="; ".join(notes))


def mode_wavelengths(diameter_um, n_sphere, n_medium, *, wavelength_range_nm,
                     polarizations=("TE", "TM"), radial_orders=(1,), root="complex"):
    """Every (polarization, l, radial order) resonance of a sphere inside a wavelength range.

    Parameters
    ----------
    diameter_um : float
        Sphere diameter.
    n_sphere, n_medium : float or callable
        Indices or callables of vacuum wavelength in nm.
    wavelength_range_nm : (float, float)
        Vacuum wavelength range.
    polarizations, radial_orders
        Families to list.
    root : {'complex', 'real'}
        Resonance form (see :func:`resonance_wavelengths`).

    Returns
    -------
    dict of ndarray
        ``polarization``, ``l``, ``radial_order`` and ``wavelength_nm``, sorted by
        wavelength.
    """
    root = _check_root(root)
    lo, hi = _check_pairs("wavelength_range_nm", wavelength_range_nm)
    d = float(diameter_um)
    if not (np.isfinite(d) and d > 0):
        raise InputError("diameter must be positive", field="diameter_um", expected="> 0 um",
                         found=repr(diameter_um))
    ns_fn, ds = _as_index_fn("n_sphere", n_sphere)
    nm_fn, dm = _as_index_fn("n_medium", n_medium)
    mid = np.array([0.5 * (lo + hi)])
    ns_mid, nm_mid = float(_index_table(ns_fn, mid)[0]), float(_index_table(nm_fn, mid)[0])
    m_mid = _check_m(ns_mid / nm_mid)
    x_lo = math.pi * nm_mid * d * 1e3 / (1.03 * hi)
    x_hi = math.pi * nm_mid * d * 1e3 / (0.97 * lo)
    fams = [(p, n) for p in (_check_polarization(p) for p in polarizations)
            for n in sorted({_check_order(k) for k in radial_orders})]
    pol, ell, order = [], [], []
    for p, n in fams:
        ls = np.arange(max(1, int(x_lo * 0.9)), int(m_mid * x_hi) + 2)
        xs = _asymptotic(ls, m_mid, p, n)
        ls = ls[(xs > 0.97 * x_lo) & (xs < 1.03 * x_hi)]
        pol += [p] * ls.size
        ell += ls.tolist()
        order += [n] * ls.size
    pol, ell, order = np.array(pol, dtype=object), np.array(ell, dtype=int), np.array(order, dtype=int)
    rows = []
    if ell.size:
        # modes bound across the whole interpolation window (leaky high orders are left out)
        m_lo, m_hi = _m_window(m_mid)
        te = pol == "TE"
        ends = _roots_many(ell[None, :], np.array([[m_lo], [m_hi]]), te[None, :], order[None, :], root)
        keep = np.all(np.isfinite(ends), axis=0)
        pol, ell, order = pol[keep], ell[keep], order[keep]
        if ell.size:
            model = _FixedModes(pol, ell, order, ns_fn, nm_fn, ds or dm, m_lo, m_hi, root)
            lam = math.pi * nm_mid * d * 1e3 / model.x(np.full(ell.size, m_mid))
            lam = model.wavelengths(d, 0.0, lam)
            for k in np.flatnonzero(np.isfinite(lam) & (lam >= lo) & (lam <= hi)):
                rows.append((str(pol[k]), int(ell[k]), int(order[k]), float(lam[k])))
    rows.sort(key=lambda r: r[3])
    return {"polarization": np.array([r[0] for r in rows], dtype=object),
            "l": np.array([r[1] for r in rows], dtype=int),
            "radial_order": np.array([r[2] for r in rows], dtype=int),
            "wavelength_nm": np.array([r[3] for r in rows], dtype=float)}
