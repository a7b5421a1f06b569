"""Slowly varying background (fluorescence) under the laser lines."""

from __future__ import annotations

import numpy as np
from scipy import linalg, sparse

from ..exceptions import InputError
from ._nbprep import snip_block

__all__ = ["estimate_baseline"]

BASELINE_METHODS = ("snip", "asls")


def as_block(spectra_e, field="spectra_e"):
    """Return ``(block, was_1d)`` with ``block`` a float64 (S, N) array."""
    arr = np.asarray(spectra_e, dtype=float)
    if arr.ndim not in (1, 2) or arr.shape[-1] < 3:
        raise InputError("spectra must be a 1-D spectrum or a 2-D block (spectrum, pixel)",
                         field=field, expected="shape (N,) or (S, N) with N >= 3",
                         found=f"shape {arr.shape}")
    return (arr[None, :], True) if arr.ndim == 1 else (arr, False)


def fill_nonfinite(block):
    """Replace NaN/inf pixels by linear interpolation between finite neighbours.

    Returns the filled copy and the finite mask.  A row with no finite pixel
    becomes zeros.
    """
    finite = np.isfinite(block)
    if finite.all():
        return block.copy(), finite
    s, n = block.shape
    idx = np.broadcast_to(np.arange(n), (s, n))
    left = np.maximum.accumulate(np.where(finite, idx, -1), axis=1)
    right = np.minimum.accumulate(np.where(finite, idx, n)[:, ::-1], axis=1)[:, ::-1]
    has_left, has_right = left >= 0, right < n
    rows = np.arange(s)[:, None]
    safe_vals = np.where(finite, block, 0.0)
    v_left = safe_vals[rows, np.clip(left, 0, n - 1)]
    v_right = safe_vals[rows, np.clip(right, 0, n - 1)]
    span = np.maximum(right - left, 1)
    t = np.where(has_left & has_right, (idx - left) / span, 0.0)
    interp = np.where(has_left & has_right, v_left + t * (v_right - v_left),
                      np.where(has_left, v_left, np.where(has_right, v_right, 0.0)))
    return np.where(finite, block, interp), finite


def _snip(block, window_px):
    # Compiled, one spectrum per thread (see _nbprep.snip_row): odd reflection at the edges so that
    # every pixel sees all clipping windows, LLS transform (Ryan et al. 1988) with a shift by the
    # minimum for spectra with negative pixels.
    out = np.empty_like(block)
    snip_block(np.ascontiguousarray(block, dtype=float), int(window_px), out)
    return out


def _penalty_bands(n):
    """Upper bands of D^T D for the second-difference matrix D of n points."""
    diff2 = sparse.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(n - 2, n))
    pen = (diff2.T @ diff2).tocsr()
    d0 = pen.diagonal(0)
    d1 = np.concatenate([[0.0], pen.diagonal(1)])  # d1[j] couples j - 1 and j
    d2 = np.concatenate([[0.0, 0.0], pen.diagonal(2)])
    return d0, d1, d2


def _asls(block, lam, p, iterations):
    # Eilers & Boelens (2005): minimise sum w (y - z)^2 + lam sum (second difference of z)^2,
    # w = p above the baseline and 1 - p below.  All spectra are stacked into one banded
    # system (the blocks do not couple) and solved with one symmetric banded Cholesky.
    s, n = block.shape
    d0, d1, d2 = _penalty_bands(n)
    bands = np.zeros((3, s * n))
    bands[0] = np.tile(lam * d2, s)
    bands[1] = np.tile(lam * d1, s)
    y = block.ravel()
    w = np.ones(s * n)
    z = y
    for _ in range(iterations):
        ab = bands.copy()
        ab[2] = lam * np.tile(d0, s) + w
        z = linalg.solveh_banded(ab, w * y, check_finite=False)
        w = np.where(y > z, p, 1.0 - p)
    return z.reshape(s, n)


def estimate_baseline(spectra_e, *, method="snip", window_px=30, iterations=None, lam=1e5, p=0.01):
    """Estimate the slowly varying background of each spectrum.

    Parameters
    ----------
    spectra_e : array_like, shape (N,) or (S, N)
        Spectra in photoelectrons; each row is treated independently.  NaN or
        inf pixels are bridged by linear interpolation.
    method : {"snip", "asls"}
        ``"snip"``: statistics-sensitive non-linear iterative peak clipping
        (Ryan et al. 1988) on the LLS-transformed spectrum, clipping with half
        windows 1, 2, ..., ``window_px``.  ``"asls"``: asymmetric least squares
        smoothing (Eilers & Boelens 2005).
    window_px : int
        SNIP: largest clipping half window, about 1-2 times the half width of the
        widest peak to remove.
    iterations : int, optional
        AsLS: number of reweighting iterations (default 15).  Not used by SNIP.
    lam, p : float
        AsLS: smoothness penalty and asymmetry (weight of points above the baseline).

    Returns
    -------
    numpy.ndarray
        Baseline with the shape of ``spectra_e``.
    """
    block, was_1d = as_block(spectra_e)
    if method not in BASELINE_METHODS:
        raise InputError("unknown baseline method", field="method",
                         expected=" or ".join(repr(m) for m in BASELINE_METHODS), found=repr(method))
    filled, _ = fill_nonfinite(block)
    if method == "snip":
        if iterations is not None:
            raise InputError("iterations applies to method='asls' only", field="iterations",
                             expected="None with method='snip'", found=repr(iterations))
        if int(window_px) != window_px or window_px < 1:
            raise InputError("SNIP window must be a positive integer", field="window_px",
                             expected="integer >= 1", found=repr(window_px))
        out = _snip(filled, int(window_px))
    else:
        iterations = 15 if iterations is None else iterations
        if int(iterations) != iterations or iterations < 1:
            raise InputError("AsLS needs at least one iteration", field="iterations",
                             expected="integer >= 1", found=repr(iterations))
        if not lam > 0:
            raise InputError("AsLS penalty must be positive", field="lam", expected="> 0", found=repr(lam))
        if not 0 < p < 1:
            raise InputError("AsLS asymmetry must lie in (0, 1)", field="p", expected="0 < p < 1",
                             found=repr(p))
        out = _asls(filled, float(lam), float(p), int(iterations))
    return out[0] if was_1d else out
