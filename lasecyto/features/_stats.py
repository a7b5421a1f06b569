"""Robust scatter and binomial intervals on plain arrays."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = ["robust_std", "wilson_interval"]

# 1 / Phi^-1(3/4): makes the median absolute deviation a consistent estimator of
# the standard deviation of a normal distribution.
_MAD_TO_SIGMA = 1.4826


def robust_std(x) -> float:
    """Standard deviation estimated from the median absolute deviation.

    Parameters
    ----------
    x : array_like
        Values; non-finite entries are ignored.

    Returns
    -------
    float
        ``1.4826 * median(|x - median(x)|)`` over the finite values, NaN when
        fewer than 3 finite values remain.
    """
    a = np.asarray(x, dtype=float).ravel()
    a = a[np.isfinite(a)]
    if a.size < 3:
        return float("nan")
    return float(_MAD_TO_SIGMA * np.median(np.abs(a - np.median(a))))


def wilson_interval(k, n, *, z=1.959963984540054) -> tuple[float, float]:
    """Wilson score interval of a binomial proportion ``k / n``.

    Parameters
    ----------
    k, n : int
        Successes and trials, ``0 <= k <= n``.
    z : float, optional
        Normal quantile; the default gives a two-sided 95 % interval.

    Returns
    -------
    (low, high) : tuple of float
        The interval; ``(nan, nan)`` when ``n == 0``.
    """
    k = int(k)
    n = int(n)
    if n < 0 or k < 0 or k > n:
        raise InputError("invalid binomial counts", field="k, n",
                         expected="0 <= k <= n", found=f"k={k}, n={n}")
    if not np.isfinite(z) or z <= 0:
        raise InputError("invalid normal quantile", field="z", expected="a positive number",
                         found=repr(z))
    if n == 0:
        return float("nan"), float("nan")
    p = k / n
    z2 = z * z
    centre = (p + z2 / (2 * n)) / (1 + z2 / n)
    half = z / (1 + z2 / n) * np.sqrt(p * (1 - p) / n + z2 / (4 * n * n))
    return float(max(0.0, centre - half)), float(min(1.0, centre + half))
