"""Exact penalised change points (PELT, squared-error cost) and the onset they give."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..exceptions import InputError
from ._stats import robust_std

__all__ = ["ChangePoints", "pelt", "change_points", "changepoint_onset", "difference_noise"]


def _prefix(y):
    return (np.concatenate(([0.0], np.cumsum(y))), np.concatenate(([0.0], np.cumsum(y * y))))


def _cost(cs, cs2, a, b):
    """Squared-error cost of segments y[a:b] about their own mean (a, b arrays or ints)."""
    s = cs[b] - cs[a]
    return (cs2[b] - cs2[a]) - s * s / (b - a)


def pelt(values, *, penalty, min_size=2) -> np.ndarray:
    """Exact minimiser of sum of segment costs + penalty * (number of changes).

    The cost of a segment is its sum of squared deviations from its mean
    (piecewise-constant mean, Gaussian noise of known variance). Candidate
    pruning follows Killick, Fearnhead & Eckley (2012, J. Am. Stat. Assoc.
    107, 1590): a last-change candidate tau is dropped at time t when
    F(tau) + C(tau, t) > F(t); with a minimum segment length the test is made
    when t itself becomes admissible, which keeps the search exact.

    Parameters
    ----------
    values : array_like, shape (n,)
        Finite series.
    penalty : float
        Cost of one change, in squared units of ``values``, > 0.
    min_size : int, optional
        Shortest segment, >= 1.

    Returns
    -------
    ndarray of int
        Interior breakpoints b (a new segment starts at ``values[b]``), increasing;
        empty when there is no change.
    """
    y = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(y)):
        raise InputError("series holds non-finite values", field="values", expected="finite values",
                         found=f"{int((~np.isfinite(y)).sum())} non-finite")
    if not (np.isfinite(penalty) and penalty > 0):
        raise InputError("invalid penalty", field="penalty", expected="a positive number", found=repr(penalty))
    if int(min_size) != min_size or min_size < 1:
        raise InputError("invalid minimum segment length", field="min_size", expected="an integer >= 1",
                         found=repr(min_size))
    k = int(min_size)
    n = y.size
    if n < 2 * k:
        return np.zeros(0, dtype=np.int64)
    y = y - np.median(y)  # conditioning only: costs are shift-invariant
    cs, cs2 = _prefix(y)
    f = np.full(n + 1, np.inf)
    f[0] = -float(penalty)
    last = np.zeros(n + 1, dtype=np.int64)
    cands = np.zeros(1, dtype=np.int64)
    for t in range(k, n + 1):
        new = t - k
        if new >= k:
            # new becomes admissible now: prune candidates it beats for every later t
            keep = f[cands] + _cost(cs, cs2, cands, new) <= f[new]
            cands = np.append(cands[keep], new)
        vals = f[cands] + _cost(cs, cs2, cands, t) + penalty
        i = int(np.argmin(vals))  # first minimum: the earliest last change wins ties
        f[t] = vals[i]
        last[t] = cands[i]
    bkps = []
    t = n
    while last[t] > 0:
        t = int(last[t])
        bkps.append(t)
    return np.asarray(bkps[::-1], dtype=np.int64)


def difference_noise(values) -> float:
    """Frame-to-frame noise (1 sigma) from the median absolute deviation of first differences / sqrt(2).

    Insensitive to level changes and slow drifts; NaN for fewer than 4 finite values.
    """
    y = np.asarray(values, dtype=float).ravel()
    y = y[np.isfinite(y)]
    if y.size < 4:
        return float("nan")
    return robust_std(np.diff(y)) / math.sqrt(2.0)


@dataclass(frozen=True)
class ChangePoints:
    """Result of :func:`change_points`.

    Attributes
    ----------
    breakpoints : ndarray of int
        Interior breakpoints into the series given.
    segment_means : ndarray
        Mean of each of the ``len(breakpoints) + 1`` segments.
    noise : float
        The 1-sigma noise used to scale the penalty.
    penalty : float
        The penalty used, ``penalty_factor * noise**2 * ln(n)``.
    """

    breakpoints: np.ndarray
    segment_means: np.ndarray
    noise: float
    penalty: float


def change_points(values, *, noise=None, penalty_factor=6.0, min_size=3) -> ChangePoints:
    """Change points of a piecewise-constant series, penalty scaled to its noise.

    Parameters
    ----------
    values : array_like, shape (n,)
        Finite series.
    noise : float, optional
        Known 1-sigma noise; default :func:`difference_noise` of the series.
    penalty_factor : float, optional
        The penalty is ``penalty_factor * noise**2 * ln(n)`` (BIC-like values are
        2-6; the default 6 keeps false changes on pure noise rare).
    min_size : int, optional
        Shortest segment.
    """
    y = np.asarray(values, dtype=float).ravel()
    if y.size < 2 * int(min_size) or y.size < 4:
        raise InputError("too few values for change-point detection", field="values",
                         expected=f"at least {max(4, 2 * int(min_size))} finite values",
                         found=f"{y.size} values")
    sigma = difference_noise(y) if noise is None else float(noise)
    if not (np.isfinite(sigma) and sigma > 0):
        raise InputError("noise level is zero or undefined", field="noise", expected="a positive number",
                         found=repr(sigma))
    if not (np.isfinite(penalty_factor) and penalty_factor > 0):
        raise InputError("invalid penalty factor", field="penalty_factor", expected="a positive number",
                         found=repr(penalty_factor))
    pen = float(penalty_factor) * sigma * sigma * math.log(y.size)
    bk = pelt(y, penalty=pen, min_size=min_size)
    edges = np.concatenate(([0], bk, [y.size]))
    means = np.array([y[a:b].mean() for a, b in zip(edges[:-1], edges[1:])])
    return ChangePoints(breakpoints=bk, segment_means=means, noise=sigma, penalty=pen)


def _location_sd(y, a, c, b, min_size, sigma):
    """Posterior standard deviation (frames) of a single change in y[a:c], flat prior."""
    taus = np.arange(a + min_size, c - min_size + 1)
    if taus.size < 2:
        return 0.0
    cs, cs2 = _prefix(y - np.median(y[a:c]))
    cost = _cost(cs, cs2, a, taus) + _cost(cs, cs2, taus, c)
    logp = -(cost - cost.min()) / (2.0 * sigma * sigma)
    w = np.exp(logp)
    w /= w.sum()
    mean = float(np.sum(w * taus))
    return float(math.sqrt(max(0.0, np.sum(w * (taus - mean) ** 2))))


def changepoint_onset(time_s, values, *, start_s, noise=None, penalty_factor=6.0, min_size=1,
                      min_step_sigma=5.0, n_persist=3, direction=0) -> dict:
    """Onset of a response as the first significant change point at or after ``start_s``.

    Non-finite values are dropped. The onset is the first breakpoint b with
    ``time_s[b] >= start_s`` whose step (mean after minus mean before) exceeds
    ``min_step_sigma`` noise units (and has the sign of ``direction`` when it is
    +1 or -1), and after which the level persists: the median of the
    ``n_persist`` values from b on also differs by that much, in the same
    direction, from the median of the ``n_persist`` values before b (a lone
    outlier is not an onset). A gradual response is a staircase of change
    points: the onset moves back to the first of the run of same-direction
    breakpoints at or after ``start_s`` that leads to b (with the default
    ``min_size=1`` a gradual response is then located at its first frame). ``onset_s`` is half-way between
    the frame before b and frame b.
    ``onset_err_s`` combines the posterior spread of the change location
    (profile likelihood of one change between the neighbouring breakpoints) with
    the frame interval (uniform, interval / sqrt(12)).

    Returns
    -------
    dict
        ``onset_s, onset_err_s, onset_step`` (NaN when there is no onset),
        ``n_changepoints`` (all breakpoints found), ``noise``, ``penalty``.
    """
    t = np.asarray(time_s, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    if t.shape != v.shape:
        raise InputError("time and value arrays differ in length", field="values",
                         expected=f"{t.size} values", found=f"{v.size} values")
    if direction not in (-1, 0, 1):
        raise InputError("invalid direction", field="direction", expected="-1, 0 or +1", found=repr(direction))
    keep = np.isfinite(t) & np.isfinite(v)
    t, v = t[keep], v[keep]
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    cp = change_points(v, noise=noise, penalty_factor=penalty_factor, min_size=min_size)
    out = {"onset_s": float("nan"), "onset_err_s": float("nan"), "onset_step": float("nan"),
           "n_changepoints": int(cp.breakpoints.size), "noise": cp.noise, "penalty": cp.penalty}
    edges = np.concatenate(([0], cp.breakpoints, [v.size]))
    for j, b in enumerate(cp.breakpoints):
        if t[b] < start_s:
            continue
        step = float(cp.segment_means[j + 1] - cp.segment_means[j])
        if abs(step) < min_step_sigma * cp.noise or (direction and np.sign(step) != direction):
            continue
        w = max(1, int(n_persist))
        held = float(np.median(v[b:b + w])) - float(np.median(v[max(0, b - w):b]))
        if np.sign(held) != np.sign(step) or abs(held) < min_step_sigma * cp.noise:
            continue
        # a gradual response is a staircase of change points: its onset is the first step of the
        # run of same-direction steps (at or after start_s) that leads to the significant one
        while j > 0 and t[cp.breakpoints[j - 1]] >= start_s and \
                np.sign(cp.segment_means[j] - cp.segment_means[j - 1]) == np.sign(step):
            j -= 1
        b = int(cp.breakpoints[j])
        sd_frames = _location_sd(v, int(edges[j]), int(edges[j + 2]), int(b), int(min_size), cp.noise)
        dt = float(t[b] - t[b - 1])
        out["onset_s"] = float(t[b - 1] + 0.5 * dt)
        out["onset_err_s"] = float(math.sqrt((sd_frames * dt) ** 2 + dt * dt / 12.0))
        out["onset_step"] = step
        break
    return out
