"""Laser threshold from a pump series: single-mode rate-equation S-curve.

Rate equations with spontaneous-emission coupling factor beta (ideal four-level
medium; Yokoyama & Brorson 1989, J. Appl. Phys. 66, 4801)::

    dN/dt = P - N/tau_sp - beta N S / tau_sp
    dS/dt = beta N (S + 1) / tau_sp - S / tau_c

With the normalized pump x = beta tau_c P (threshold at x = 1) the steady state is

    S(x) = [(x - 1) + sqrt((x - 1)^2 + 4 beta x)] / (2 beta),   x = S (1 + beta S) / (1 + S).

Below threshold S ~ x, above S ~ (x - 1)/beta: on log-log axes an "S" whose jump is
1/beta.  :func:`fit_threshold` fits log(output) = log(A S(pump/P_th; beta)) and reports
beside it the straight line above threshold (slope efficiency and x-intercept), whose
intercept underestimates P_th by 2 % at beta = 0.01 and 18 % at beta = 0.1
(:func:`linear_threshold_bias`).  :func:`integrate_rate_equations` integrates the
equations in time (an independent check of the closed form).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.integrate import solve_ivp
from scipy.optimize import least_squares

from ..exceptions import InputError

__all__ = [
    "RateEquationState",
    "ThresholdFit",
    "LinewidthSummary",
    "steady_state_photons",
    "pump_from_photons",
    "steady_state_inversion",
    "integrate_rate_equations",
    "linear_threshold_bias",
    "fit_threshold",
    "linewidth_vs_pump",
]

_BETA_BOUNDS = (1e-9, 1.0)


def _check_beta(beta):
    b = np.asarray(beta, dtype=float)
    if not np.all(np.isfinite(b)) or np.any((b <= 0) | (b > 1)):
        raise InputError("spontaneous-emission factor must lie in (0, 1]", field="beta",
                         expected="0 < beta <= 1", found=repr(np.ravel(b)[:3].tolist()))
    return b


def steady_state_photons(x, beta):
    """Steady-state photon number S at normalized pump ``x`` (threshold x = 1).

    Uses the cancellation-free form 2x / [(1 - x) + sqrt((x - 1)^2 + 4 beta x)] below
    threshold.

    Parameters
    ----------
    x : float or array_like
        Normalized pump beta tau_c P (>= 0).
    beta : float or array_like
        Spontaneous-emission coupling factor, 0 < beta <= 1.

    Returns
    -------
    float or ndarray
    """
    x = np.asarray(x, dtype=float)
    b = _check_beta(beta)
    if np.any(x < 0) or not np.all(np.isfinite(x)):
        raise InputError("normalized pump must be finite and >= 0", field="x", expected=">= 0",
                         found=repr(np.ravel(x)[:3].tolist()))
    root = np.sqrt((x - 1.0) ** 2 + 4.0 * b * x)
    with np.errstate(divide="ignore", invalid="ignore"):
        above = ((x - 1.0) + root) / (2.0 * b)
        below = 2.0 * x / ((1.0 - x) + root)
    out = np.where(x >= 1.0, above, below)
    return float(out) if out.ndim == 0 else out


def pump_from_photons(photons, beta):
    """Inverse of :func:`steady_state_photons`: x = S (1 + beta S) / (1 + S)."""
    s = np.asarray(photons, dtype=float)
    b = _check_beta(beta)
    if np.any(s < 0) or not np.all(np.isfinite(s)):
        raise InputError("photon number must be finite and >= 0", field="photons", expected=">= 0",
                         found=repr(np.ravel(s)[:3].tolist()))
    out = s * (1.0 + b * s) / (1.0 + s)
    return float(out) if out.ndim == 0 else out


def steady_state_inversion(x, beta, *, tau_sp_s, tau_c_s):
    """Steady-state number of excited emitters N = S tau_sp / (beta tau_c (S + 1))."""
    s = np.asarray(steady_state_photons(x, beta))
    out = s * tau_sp_s / (np.asarray(beta, dtype=float) * tau_c_s * (s + 1.0))
    return float(out) if out.ndim == 0 else out


@dataclass(frozen=True)
class RateEquationState:
    """End state of :func:`integrate_rate_equations`.

    Attributes
    ----------
    inversion, photons : float
        N and S at ``t_end_s``.
    x : float
        Normalized pump beta tau_c P.
    t_end_s : float
        Integration time.
    settled : bool
        True when N and S changed by less than 1e-8 relative over the last 10 % of
        the integration.
    """

    inversion: float
    photons: float
    x: float
    t_end_s: float
    settled: bool


def integrate_rate_equations(pump_rate_per_s, *, beta, tau_sp_s, tau_c_s, t_end_s=None):
    """Integrate the single-mode rate equations from N = S = 0 (scipy solve_ivp, Radau).

    Parameters
    ----------
    pump_rate_per_s : float
        Pump rate P (excitations per second).
    beta : float
        Spontaneous-emission coupling factor.
    tau_sp_s, tau_c_s : float
        Spontaneous lifetime and photon lifetime in seconds.
    t_end_s : float, optional
        Integration time; default 200 tau_sp.

    Returns
    -------
    RateEquationState
    """
    b = float(_check_beta(beta))
    for name, v in (("pump_rate_per_s", pump_rate_per_s), ("tau_sp_s", tau_sp_s),
                    ("tau_c_s", tau_c_s)):
        if not (np.isfinite(v) and v > 0):
            raise InputError("must be positive and finite", field=name, expected="> 0", found=repr(v))
    p, tsp, tc = float(pump_rate_per_s), float(tau_sp_s), float(tau_c_s)
    t_end = 200.0 * tsp if t_end_s is None else float(t_end_s)

    def rhs(_t, y):
        n, s = y
        return [p - n / tsp - b * n * s / tsp, b * n * (s + 1.0) / tsp - s / tc]

    def jac(_t, y):
        n, s = y
        return [[-1.0 / tsp - b * s / tsp, -b * n / tsp], [b * (s + 1.0) / tsp, b * n / tsp - 1.0 / tc]]

    sol = solve_ivp(rhs, (0.0, t_end), [0.0, 0.0], method="Radau", jac=jac, rtol=1e-10,
                    atol=[1e-6, 1e-9], dense_output=True)
    n_end, s_end = sol.y[:, -1]
    n_prev, s_prev = sol.sol(0.9 * t_end)
    settled = bool(sol.success and abs(n_end - n_prev) <= 1e-8 * abs(n_end)
                   and abs(s_end - s_prev) <= 1e-8 * max(abs(s_end), 1e-30))
    return RateEquationState(inversion=float(n_end), photons=float(s_end), x=b * tc * p,
                             t_end_s=t_end, settled=settled)


def _line_fit(x, y):
    """Least-squares line y = slope (x - x0); returns (slope, x0)."""
    slope, icpt = np.polyfit(x, y, 1)
    return float(slope), float(-icpt / slope) if slope != 0 else math.nan


def linear_threshold_bias(beta, *, x_range=(2.0, 5.0), n_points=50):
    """Slope and x-intercept of a straight line fitted to S(x) on ``x_range``.

    The x-intercept is the "threshold" a straight line above threshold reports, in
    units of the true threshold (1 = unbiased).

    Parameters
    ----------
    beta : float
        Spontaneous-emission coupling factor.
    x_range : (float, float)
        Normalized pump range of the fit.
    n_points : int
        Equally spaced points in the range.

    Returns
    -------
    slope, x_intercept : float
    """
    lo, hi = (float(v) for v in x_range)
    if not (0 <= lo < hi):
        raise InputError("fit range must satisfy 0 <= low < high", field="x_range",
                         expected="0 <= low < high", found=repr(x_range))
    x = np.linspace(lo, hi, int(n_points))
    return _line_fit(x, steady_state_photons(x, beta))


@dataclass(frozen=True)
class ThresholdFit:
    """Result of :func:`fit_threshold` (pump and output in the caller's units).

    Attributes
    ----------
    threshold, threshold_err : float
        P_th of the S-curve fit and its 1-sigma error.
    beta, beta_err : float
        Spontaneous-emission factor and its 1-sigma error.
    scale, scale_err : float
        A in output = A S(pump/P_th; beta).
    slope_efficiency, slope_efficiency_err : float
        d output / d pump well above threshold, A / (beta P_th).
    linear_slope, linear_threshold : float
        Straight line fitted to the points with pump in ``linear_range`` x P_th:
        its slope and x-intercept (NaN with a note when fewer than 2 points).
    linear_n_points : int
        Points used by the straight line.
    linear_bias : float
        Expected relative bias of the straight-line threshold for the fitted beta
        (x-intercept of the model minus 1 on the same range; e.g. -0.02 at beta = 0.01).
    threshold_fluence_j_cm2 : float
        threshold / spot area when ``spot_area_cm2`` was given (pump in J), else NaN.
    chi2 : float
        Sum of squared normalized log residuals (NaN without ``output_err``).
    rms_log : float
        rms of log(output) residuals.
    dof : int
        Points minus 3.
    ok : bool
        False when the fit failed, beta or P_th sits on a bound, or P_th lies outside
        the pump range; the numbers are kept for inspection.
    message : str
    """

    threshold: float
    threshold_err: float
    beta: float
    beta_err: float
    scale: float
    scale_err: float
    slope_efficiency: float
    slope_efficiency_err: float
    linear_slope: float
    linear_threshold: float
    linear_n_points: int
    linear_bias: float
    threshold_fluence_j_cm2: float
    chi2: float
    rms_log: float
    dof: int
    ok: bool
    message: str


def _series(name, values):
    a = np.asarray(values, dtype=float)
    if a.ndim != 1:
        raise InputError("must be a 1-D array", field=name, expected="1-D array",
                         found=f"shape {a.shape}")
    if not np.all(np.isfinite(a)):
        raise InputError("non-finite values", field=name, expected="finite numbers",
                         found=f"{int(np.sum(~np.isfinite(a)))} NaN or inf")
    return a


def _log_s(log_x, log_beta):
    return np.log(steady_state_photons(np.exp(log_x), math.exp(log_beta)))


def fit_threshold(pump, output, *, output_err=None, linear_range=(2.0, 5.0), spot_area_cm2=None,
                  absolute_sigma=True):
    """Fit the rate-equation S-curve to a pump series on log-log axes.

    Parameters
    ----------
    pump : array_like
        Pump per frame (pulse energy, fluence or rate; > 0), at least 3 distinct values.
    output : array_like
        Laser output per frame (> 0), same length.
    output_err : float or array_like, optional
        1-sigma errors of ``output`` (used as output_err/output in log space).  Without
        them the covariance is scaled by the residual variance.
    linear_range : (float, float)
        Pump range, in units of the fitted threshold, of the straight-line estimate.
    spot_area_cm2 : float, optional
        Pump spot area; with the pump in J gives the threshold fluence.  For a Gaussian
        spot pass pi w^2 / 2, so that the fluence is the peak fluence.
    absolute_sigma : bool
        With ``output_err``: True uses the errors as they are; False scales the
        covariance up by the reduced chi-square when it exceeds 1 (Birge ratio), for
        errors known only up to unmodelled scatter.

    Returns
    -------
    ThresholdFit
    """
    p = _series("pump", pump)
    y = _series("output", output)
    if p.shape != y.shape:
        raise InputError("pump and output differ in length", field="output",
                         expected=f"{p.size} values", found=f"{y.size} values")
    if np.any(p <= 0) or np.any(y <= 0):
        which = "pump" if np.any(p <= 0) else "output"
        raise InputError("a log-log fit needs positive values", field=which, expected="> 0",
                         found=f"{int(np.sum((p if which == 'pump' else y) <= 0))} values <= 0")
    n_distinct = np.unique(p).size
    if n_distinct < 3:
        raise InputError("a threshold fit needs a pump series (3 parameters: scale, threshold, beta)",
                         field="pump", expected=">= 3 distinct pump values",
                         found=f"{n_distinct} distinct value{'s' if n_distinct != 1 else ''}")
    if output_err is not None:
        err = np.broadcast_to(np.asarray(output_err, dtype=float), y.shape)
        if not np.all(np.isfinite(err)) or np.any(err <= 0):
            raise InputError("output errors must be positive and finite", field="output_err",
                             expected="> 0", found=f"{err[:4].tolist()}")
        sig = err / y
    else:
        sig = np.ones_like(y)
    lp, ly = np.log(p), np.log(y)
    w = 1.0 / sig**2
    lp_lo, lp_hi = lp.min() - math.log(100.0), lp.max() + math.log(100.0)
    lb_lo, lb_hi = math.log(_BETA_BOUNDS[0]), math.log(_BETA_BOUNDS[1])

    # start: grid over (P_th, beta) with the scale solved in closed form
    best = None
    for lb in np.linspace(math.log(1e-7), 0.0, 15):
        for lt in np.linspace(lp.min(), lp.max(), 25):
            model = _log_s(lp - lt, lb)
            la = float(np.sum(w * (ly - model)) / np.sum(w))
            ssr = float(np.sum(w * (ly - la - model) ** 2))
            if best is None or ssr < best[0]:
                best = (ssr, la, lt, lb)
    theta0 = np.array(best[1:])

    def resid(theta):
        return (ly - theta[0] - _log_s(lp - theta[1], theta[2])) / sig

    lo = [-np.inf, lp_lo, lb_lo]
    hi = [np.inf, lp_hi, lb_hi]
    theta0 = np.clip(theta0, np.array(lo) + 1e-9, np.array(hi) - 1e-9)
    sol = least_squares(resid, theta0, bounds=(lo, hi), x_scale=[1.0, 0.1, 1.0], xtol=1e-12,
                        ftol=1e-12, gtol=1e-12, max_nfev=2000)
    la, lt, lb = sol.x
    r = sol.fun
    ssr = float(np.sum(r**2))
    dof = p.size - 3
    try:
        cov = np.linalg.inv(sol.jac.T @ sol.jac)
    except np.linalg.LinAlgError:
        cov = np.full((3, 3), np.nan)
    if output_err is None:
        cov = cov * (ssr / dof) if dof > 0 else np.full((3, 3), np.nan)
    elif not absolute_sigma and dof > 0:
        cov = cov * max(1.0, ssr / dof)
    sd = np.sqrt(np.clip(np.diag(cov), 0, None))
    a, p_th, beta = math.exp(la), math.exp(lt), math.exp(lb)
    # slope efficiency A / (beta P_th): gradient of its log is (1, -1, -1)
    g = np.array([1.0, -1.0, -1.0])
    eta = a / (beta * p_th)
    eta_err = eta * float(np.sqrt(max(g @ cov @ g, 0.0))) if np.all(np.isfinite(cov)) else math.nan

    notes, ok = [], bool(sol.success)
    if not sol.success:
        notes.append(f"fit did not converge ({sol.message})")
    if np.isclose(lb, lb_hi, atol=1e-6):
        ok = False
        notes.append("beta at its upper bound 1 (thresholdless: no kink, threshold undefined)")
    if np.isclose(lb, lb_lo, atol=1e-6):
        ok = False
        notes.append(f"beta at its lower bound {_BETA_BOUNDS[0]:g}")
    if not p.min() <= p_th <= p.max():
        ok = False
        notes.append(f"threshold {p_th:.4g} outside the pump range {p.min():.4g}-{p.max():.4g}"
                     " (extrapolated)")
    if not np.all(np.isfinite(sd)):
        notes.append("uncertainties unavailable (no output errors and no spare degrees of freedom)")

    x_lo, x_hi = (float(v) for v in linear_range)
    sel = (p >= x_lo * p_th * (1 - 1e-9)) & (p <= x_hi * p_th * (1 + 1e-9))
    if np.unique(p[sel]).size >= 2:
        lin_slope, lin_thr = _line_fit(p[sel], y[sel])
    else:
        lin_slope = lin_thr = math.nan
        notes.append(f"straight-line estimate skipped: fewer than 2 pump values in "
                     f"{x_lo:g}-{x_hi:g} x threshold")
    bias = linear_threshold_bias(beta, x_range=(x_lo, x_hi))[1] - 1.0
    fluence = math.nan
    if spot_area_cm2 is not None:
        area = float(spot_area_cm2)
        if not (np.isfinite(area) and area > 0):
            raise InputError("spot area must be positive", field="spot_area_cm2", expected="> 0 cm^2",
                             found=repr(spot_area_cm2))
        fluence = p_th / area
    return ThresholdFit(
        threshold=p_th, threshold_err=p_th * float(sd[1]), beta=beta, beta_err=beta * float(sd[2]),
        scale=a, scale_err=a * float(sd[0]), slope_efficiency=eta, slope_efficiency_err=eta_err,
        linear_slope=lin_slope, linear_threshold=lin_thr, linear_n_points=int(np.sum(sel)),
        linear_bias=bias, threshold_fluence_j_cm2=fluence,
        chi2=ssr if output_err is not None else math.nan,
        rms_log=float(np.sqrt(np.mean((ly - la - _log_s(lp - lt, lb)) ** 2))), dof=dof, ok=ok,
        message="; ".join(notes))


@dataclass(frozen=True)
class LinewidthSummary:
    """Result of :func:`linewidth_vs_pump` (arrays sorted by pump).

    Attributes
    ----------
    pump, fwhm_nm : ndarray
        Input, sorted by pump.
    ratio_to_instrument : ndarray
        fwhm / instrument FWHM.
    resolved : ndarray of bool
        ratio > ``resolved_factor``.
    excess_fwhm_nm : ndarray
        sqrt(fwhm^2 - instrument^2), 0 where unresolved (quadrature deconvolution,
        exact for Gaussian shapes only: a rough figure).
    narrowing_ratio : float
        fwhm at the lowest pump / fwhm at the highest pump.
    instrument_limited : bool
        The line at the highest pump is not resolved.
    message : str
    """

    pump: np.ndarray
    fwhm_nm: np.ndarray
    ratio_to_instrument: np.ndarray
    resolved: np.ndarray
    excess_fwhm_nm: np.ndarray
    narrowing_ratio: float
    instrument_limited: bool
    message: str


def linewidth_vs_pump(pump, fwhm_nm, *, instrument_fwhm_nm, resolved_factor=1.1):
    """Line width against pump, judged against the instrument function.

    Intrinsic laser linewidths (kHz-MHz) lie far below grating resolution, so
    "linewidth narrowing" above threshold can only be claimed while the measured
    width is clearly above the instrument FWHM.

    Parameters
    ----------
    pump, fwhm_nm : array_like
        Pump per frame and fitted FWHM (nm).
    instrument_fwhm_nm : float
        FWHM of the instrument function.
    resolved_factor : float
        A width counts as resolved above this multiple of the instrument FWHM.

    Returns
    -------
    LinewidthSummary
    """
    p = _series("pump", pump)
    f = _series("fwhm_nm", fwhm_nm)
    if p.shape != f.shape or p.size < 2:
        raise InputError("pump and fwhm_nm must have the same length >= 2", field="fwhm_nm",
                         expected=f"{p.size} values (>= 2)", found=f"{f.size} values")
    inst = float(instrument_fwhm_nm)
    if not (np.isfinite(inst) and inst > 0) or np.any(f <= 0):
        raise InputError("widths must be positive", field="instrument_fwhm_nm, fwhm_nm",
                         expected="> 0 nm", found=f"instrument {instrument_fwhm_nm!r}")
    order = np.argsort(p, kind="stable")
    p, f = p[order], f[order]
    ratio = f / inst
    resolved = ratio > float(resolved_factor)
    excess = np.sqrt(np.clip(f**2 - inst**2, 0.0, None))
    excess = np.where(resolved, excess, 0.0)
    limited = not bool(resolved[-1])
    msg = ""
    if limited:
        msg = (f"width at the highest pump ({f[-1]:.4g} nm) is within {resolved_factor:g} x the "
               f"instrument FWHM ({inst:.4g} nm): narrowing below that cannot be judged")
    return LinewidthSummary(pump=p, fwhm_nm=f, ratio_to_instrument=ratio, resolved=resolved,
                            excess_fwhm_nm=excess, narrowing_ratio=float(f[0] / f[-1]),
                            instrument_limited=limited, message=msg)
