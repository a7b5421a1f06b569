"""Onset of a one-sided change in a time series."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError

__all__ = ["onset_time"]


def onset_time(time_s, values, *, start_s, baseline_mean, noise, direction, k_sigma=5.0,
               n_consecutive=3) -> tuple[float, float]:
    """Time at which a series leaves its baseline in one direction.

    The onset frame is the first frame at or after ``start_s`` that begins a
    run of ``n_consecutive`` finite values all satisfying
    ``direction * (value - baseline_mean) > k_sigma * noise``.  This is a
    one-sided threshold test in the spirit of Page's CUSUM with a decision
    interval of ``k_sigma`` noise units, made robust to single outliers by
    asking for a run.  Non-finite values are dropped before the search, so a
    run is counted over the frames that were observed.

    Parameters
    ----------
    time_s : array_like, shape (n,)
        Frame times in seconds (any order; sorted stably here).
    values : array_like, shape (n,)
        The series.
    start_s : float
        Earliest time at which an onset frame may lie.
    baseline_mean : float
        Level of the series before the change.
    noise : float
        Frame-to-frame scatter (1 sigma) of the series at baseline, > 0.
    direction : {+1, -1}
        Sign of the change looked for.
    k_sigma : float, optional
        Threshold in noise units.
    n_consecutive : int, optional
        Length of the run of exceedances, >= 1.

    Returns
    -------
    (onset_s, onset_err_s) : tuple of float
        ``onset_s`` is half-way between the onset frame and the observed frame
        before it (the change began in that interval) and ``onset_err_s`` is
        half that interval.  When the onset frame is the first observed frame
        the interval is unknown: ``onset_s`` is its time and ``onset_err_s``
        NaN.  ``(nan, nan)`` when no onset is found.
    """
    t = np.asarray(time_s, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    if t.shape != v.shape:
        raise InputError("time and value arrays differ in length", field="values",
                         expected=f"{t.size} values", found=f"{v.size} values")
    if direction not in (1, -1):
        raise InputError("invalid direction", field="direction", expected="+1 or -1",
                         found=repr(direction))
    if not (np.isfinite(noise) and noise > 0):
        raise InputError("invalid noise level", field="noise", expected="a positive finite number",
                         found=repr(noise))
    if not np.isfinite(baseline_mean):
        raise InputError("invalid baseline level", field="baseline_mean", expected="a finite number",
                         found=repr(baseline_mean))
    if not (np.isfinite(k_sigma) and k_sigma >= 0):
        raise InputError("invalid threshold", field="k_sigma", expected="a number >= 0",
                         found=repr(k_sigma))
    if int(n_consecutive) != n_consecutive or n_consecutive < 1:
        raise InputError("invalid run length", field="n_consecutive", expected="an integer >= 1",
                         found=repr(n_consecutive))
    n_run = int(n_consecutive)

    keep = np.isfinite(t) & np.isfinite(v)
    t, v = t[keep], v[keep]
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    if t.size < n_run:
        return float("nan"), float("nan")

    above = (direction * (v - baseline_mean) > k_sigma * noise).astype(np.int64)
    # run_ok[i]: frames i .. i + n_run - 1 all exceed the threshold
    csum = np.concatenate(([0], np.cumsum(above)))
    run_ok = (csum[n_run:] - csum[:-n_run]) == n_run
    candidates = np.flatnonzero(run_ok & (t[: run_ok.size] >= start_s))
    if candidates.size == 0:
        return float("nan"), float("nan")
    i = int(candidates[0])
    if i == 0:
        return float(t[0]), float("nan")
    half = 0.5 * (t[i] - t[i - 1])
    return float(t[i - 1] + half), float(half)
