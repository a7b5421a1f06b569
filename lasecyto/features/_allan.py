"""Allan deviation (overlapping and non-overlapping) of a uniformly sampled series."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError

__all__ = ["AllanDeviation", "allan_deviation", "allan_slope"]


@dataclass(frozen=True)
class AllanDeviation:
    """Allan deviation at a set of averaging times.

    Attributes
    ----------
    m : ndarray of int
        Averaging factors (tau = m * tau0_s).
    tau_s : ndarray
        Averaging times, seconds.
    adev : ndarray
        Allan deviation, in the units of the series.
    n_terms : ndarray of int
        Second differences averaged at each tau.
    overlapping : bool
        Which estimator was used.
    """

    m: np.ndarray
    tau_s: np.ndarray
    adev: np.ndarray
    n_terms: np.ndarray
    overlapping: bool


def _octave_factors(n):
    top = max(1, (n - 1) // 2)
    m = 2 ** np.arange(int(np.floor(np.log2(top))) + 1)
    return m.astype(np.int64)


def allan_deviation(values, *, tau0_s=1.0, m=None, overlapping=True) -> AllanDeviation:
    """Allan deviation of a series of averages ("frequency" data) y_i.

    With phase x_k = tau0 * sum_{i<k} y_i (N = M + 1 points), the overlapping
    estimator is ``sigma^2(m tau0) = sum_{i}(x_{i+2m} - 2 x_{i+m} + x_i)^2 /
    (2 (N - 2m) (m tau0)^2)``; the non-overlapping one is half the mean squared
    difference of consecutive non-overlapping m-averages (IEEE Std 1139;
    Riley, NIST SP 1065, 2008).

    Parameters
    ----------
    values : array_like, shape (M,)
        The series, uniformly sampled, all finite (close gaps before calling).
    tau0_s : float, optional
        Sample spacing in seconds.
    m : array_like of int, optional
        Averaging factors; default octaves 1, 2, 4, ... up to (M - 1) // 2.
        Factors with no complete second difference are dropped.
    overlapping : bool, optional
        Overlapping estimator (default) or the classical non-overlapping one.

    Returns
    -------
    AllanDeviation
    """
    y = np.asarray(values, dtype=float)
    if y.ndim != 1:
        raise InputError("series must be one-dimensional", field="values", expected="shape (M,)",
                         found=f"shape {y.shape}")
    if y.size < 3:
        raise InputError("too few samples for an Allan deviation", field="values",
                         expected="at least 3 values", found=f"{y.size} values")
    if not np.all(np.isfinite(y)):
        raise InputError("series holds non-finite values", field="values", expected="finite values",
                         found=f"{int((~np.isfinite(y)).sum())} non-finite")
    if not (np.isfinite(tau0_s) and tau0_s > 0):
        raise InputError("invalid sample spacing", field="tau0_s", expected="a positive number",
                         found=repr(tau0_s))
    n_y = y.size
    if m is None:
        ms = _octave_factors(n_y)
    else:
        ms = np.asarray(m).ravel()
        if ms.size == 0 or np.any(ms != np.round(ms)) or np.any(ms < 1):
            raise InputError("invalid averaging factors", field="m", expected="integers >= 1",
                             found=repr(m))
        ms = np.unique(ms.astype(np.int64))
    ms = ms[2 * ms <= n_y] if overlapping else ms[n_y // np.maximum(ms, 1) >= 2]
    # phase in units of tau0 (x_0 = 0); the tau0 factor cancels in the ratio
    x = np.concatenate(([0.0], np.cumsum(y - y.mean())))
    adev, n_terms = [], []
    for mm in ms:
        mm = int(mm)
        if overlapping:
            d2 = x[2 * mm:] - 2.0 * x[mm:x.size - mm] + x[: x.size - 2 * mm]
            var = float(np.sum(d2 * d2)) / (2.0 * d2.size * mm * mm)
            n_terms.append(d2.size)
        else:
            k = n_y // mm
            avg = y[: k * mm].reshape(k, mm).mean(axis=1)
            d = np.diff(avg)
            var = float(np.mean(d * d)) / 2.0
            n_terms.append(d.size)
        adev.append(np.sqrt(var))
    return AllanDeviation(m=ms.astype(np.int64), tau_s=ms * float(tau0_s), adev=np.asarray(adev, dtype=float),
                          n_terms=np.asarray(n_terms, dtype=np.int64), overlapping=bool(overlapping))


def allan_slope(result: AllanDeviation, *, min_terms=10) -> float:
    """Log-log slope of sigma(tau), least squares over taus with at least ``min_terms`` terms.

    White frequency noise gives -1/2, random walk +1/2, linear drift +1.
    """
    keep = (result.n_terms >= min_terms) & (result.adev > 0)
    if keep.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(result.tau_s[keep]), np.log(result.adev[keep]), 1)[0])
