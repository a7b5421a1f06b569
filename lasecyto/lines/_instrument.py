"""The instrument function as a line shape: an empirical, oversampled, pixel-integrated profile.

A laser line narrower than the spectrometer's resolution is recorded as the
instrument function itself.  Sampling that function at many sub-pixel phases
(lamp lines fall at random positions relative to the pixel grid) gives the
pixel-integrated profile ``P(d)``: the fraction of a line centred at ``c`` that
pixel ``i`` collects, as a function of ``d = i - c``.  ``P`` is stored as a
uniform cubic B-spline (Eilers & Marx 1996 P-spline fit of the samples) and
normalised so that the pixels collect the whole line (``sum_i P(i - c) = 1``
for every ``c``); its centre is its centroid (``sum_i (i - c) P(i - c) = 0``),
the point a symmetric fit would report.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from ..exceptions import InputError
from ._nbshape import bspline_profile

__all__ = ["InstrumentProfile", "instrument_profile_from_samples"]

#: knot spacing of the profile spline, pixels (oversampling 4)
DEFAULT_STEP_PX = 0.25


def _bspline_basis(d, start, step, n_coef):
    """Design matrix (len(d), n_coef) of uniform cubic B-splines with knots start + k step."""
    t = (np.asarray(d, dtype=float) - start) / step
    i = np.floor(t).astype(np.int64)
    u = t - i
    om = 1.0 - u
    w = np.stack([om ** 3 / 6.0, (3 * u ** 3 - 6 * u ** 2 + 4) / 6.0,
                  (-3 * u ** 3 + 3 * u ** 2 + 3 * u + 1) / 6.0, u ** 3 / 6.0], axis=1)
    basis = np.zeros((t.size, n_coef))
    rows = np.arange(t.size)
    for m in range(4):
        k = i - 1 + m
        ok = (k >= 0) & (k < n_coef)
        basis[rows[ok], k[ok]] = w[ok, m]
    return basis


@dataclass(frozen=True, eq=False)
class InstrumentProfile:
    """Pixel-integrated instrument profile ``P(d)``, ``d`` = pixel centre minus line centre (px).

    Attributes
    ----------
    coefficients : numpy.ndarray
        Cubic B-spline coefficients (read-only); knot ``k`` at ``start_px + k * step_px``.
    start_px, step_px : float
        First knot and knot spacing.
    fwhm_px : float
        Full width at half maximum of ``P`` (pixel-integrated, so slightly wider
        than the optical instrument function).
    half_width_px : float
        ``P`` is zero beyond ``+-half_width_px``.
    n_lines : int
        Number of lines the profile was built from (0 when built otherwise).
    """

    coefficients: np.ndarray
    start_px: float
    step_px: float
    fwhm_px: float
    half_width_px: float
    n_lines: int = 0

    def __post_init__(self):
        coef = np.array(self.coefficients, dtype=float, copy=True)
        if coef.ndim != 1 or coef.size < 8 or not np.all(np.isfinite(coef)):
            raise InputError("instrument profile coefficients must be a finite 1-D array",
                             field="instrument.coefficients", expected="at least 8 finite values",
                             found=f"shape {coef.shape}")
        if not (math.isfinite(self.step_px) and self.step_px > 0):
            raise InputError("bad knot spacing", field="instrument.step_px", expected="> 0",
                             found=repr(self.step_px))
        coef.setflags(write=False)
        object.__setattr__(self, "coefficients", coef)
        for name in ("start_px", "step_px", "fwhm_px", "half_width_px"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def values(self, offset_px):
        """``P`` and ``dP/dd`` at the offsets ``offset_px`` (arrays of the same shape)."""
        d = np.asarray(offset_px, dtype=float)
        flat = d.ravel()
        val = np.empty(flat.size)
        der = np.empty(flat.size)
        for j, x in enumerate(flat):
            val[j], der[j] = bspline_profile(float(x), self.coefficients, self.start_px, self.step_px)
        return val.reshape(d.shape), der.reshape(d.shape)

    def as_dict(self):
        """Plain values (for a run record)."""
        return {"coefficients": self.coefficients.tolist(), "start_px": self.start_px, "step_px": self.step_px,
                "fwhm_px": self.fwhm_px, "half_width_px": self.half_width_px, "n_lines": self.n_lines}


def _fwhm(coef, start, step, half):
    d = np.linspace(-half, half, int(round(2 * half / 0.005)) + 1)
    val = np.array([bspline_profile(float(x), coef, start, step)[0] for x in d])
    top = int(np.argmax(val))
    level = 0.5 * val[top]
    above = np.flatnonzero(val >= level)
    lo, hi = above[0], above[-1]

    def cross(i_out, i_in):
        v0, v1 = val[i_out], val[i_in]
        return d[i_out] + (level - v0) / (v1 - v0) * (d[i_in] - d[i_out])

    left = cross(lo - 1, lo) if lo > 0 else d[0]
    right = cross(hi + 1, hi) if hi < d.size - 1 else d[-1]
    return float(right - left)


def instrument_profile_from_samples(offset_px, value, weight=None, *, half_width_px, step_px=DEFAULT_STEP_PX,
                                    smoothing=None, n_lines=0):
    """Fit the pixel-integrated profile to samples ``(d, P(d))`` by a penalised B-spline.

    Minimises ``sum w (value - P(d))^2 + smoothing * mean(w) * sum (second
    difference of the coefficients)^2`` (Eilers & Marx 1996, Statist. Sci. 11,
    89) with coefficients forced to zero at both ends, then normalises: the profile is re-centred on its centroid and
    scaled so that the pixels of any placement collect the whole line.

    Parameters
    ----------
    offset_px : array
        Pixel centre minus line centre of every sample.
    value : array
        Fraction of the line in that pixel (background removed, divided by the line's area).
    weight : array, optional
        Inverse variance of every value (default 1).
    half_width_px : float
        Support of the profile; samples farther out are ignored.
    step_px : float
        Knot spacing (default 0.25 px: oversampling 4).
    smoothing : float, optional
        Weight of the roughness penalty relative to the data (in units of the
        mean weight); default: chosen by generalised cross-validation.
    n_lines : int
        Recorded in the result.

    Returns
    -------
    InstrumentProfile
    """
    d = np.asarray(offset_px, dtype=float).ravel()
    v = np.asarray(value, dtype=float).ravel()
    w = np.ones_like(d) if weight is None else np.asarray(weight, dtype=float).ravel()
    if not (d.size == v.size == w.size):
        raise InputError("samples of unequal length", field="value", expected=f"{d.size} values",
                         found=f"{v.size} values and {w.size} weights")
    if not (math.isfinite(half_width_px) and half_width_px >= 2):
        raise InputError("profile support too small", field="half_width_px", expected=">= 2 px",
                         found=repr(half_width_px))
    keep = np.isfinite(d) & np.isfinite(v) & np.isfinite(w) & (w > 0) & (np.abs(d) <= half_width_px)
    d, v, w = d[keep], v[keep], w[keep]
    n_coef = int(math.ceil(2 * half_width_px / step_px)) + 1
    start = -half_width_px + 0.0
    if d.size < n_coef:
        raise InputError("too few samples for the instrument profile", field="offset_px",
                         expected=f"at least {n_coef} samples within +-{half_width_px:g} px",
                         found=f"{d.size} samples")
    basis = _bspline_basis(d, start, step_px, n_coef)
    # the profile vanishes at the ends of its support: drop the two outer coefficients on each side
    inner = np.arange(2, n_coef - 2)
    b_in = basis[:, inner]
    wb = b_in * w[:, None]
    data = b_in.T @ wb
    rhs = wb.T @ v
    diff = np.diff(np.eye(inner.size), 2, axis=0)
    penalty = float(np.mean(w)) * (diff.T @ diff)

    def solve(lam):
        return linalg.solve(data + lam * penalty, rhs, assume_a="pos")

    if smoothing is None:
        # generalised cross-validation over a grid of penalties (Eilers & Marx 1996, section 8)
        best = None
        for lam in 10.0 ** np.arange(-5.0, 2.01, 0.5):
            a_inv = linalg.inv(data + lam * penalty)
            resid = v - b_in @ (a_inv @ rhs)
            trace = float(np.sum(a_inv * data))
            gcv = d.size * float(np.sum(w * resid * resid)) / max(d.size - trace, 1.0) ** 2
            if best is None or gcv < best[0]:
                best = (gcv, lam)
        smoothing = best[1]
    coef = np.zeros(n_coef)
    coef[inner] = solve(float(smoothing))
    # normalise: centroid at 0, and the pixels collect the whole line (sum over integer shifts = 1)
    grid = np.arange(-math.ceil(half_width_px) - 2, math.ceil(half_width_px) + 3, dtype=float)
    phases = np.linspace(-0.5, 0.5, 21)[:-1]
    for _ in range(3):
        sums, moments = [], []
        for ph in phases:
            p = np.array([bspline_profile(float(x), coef, start, step_px)[0] for x in grid + ph])
            sums.append(p.sum())
            moments.append(np.sum((grid + ph) * p))
        total = float(np.mean(sums))
        shift = float(np.mean(moments)) / total
        coef = coef / total
        start -= shift
    half = half_width_px + abs(start + half_width_px) + 2 * step_px
    return InstrumentProfile(coefficients=coef, start_px=start, step_px=step_px,
                             fwhm_px=_fwhm(coef, start, step_px, half), half_width_px=half, n_lines=int(n_lines))
