"""State-change flags: a robust change score against the control population, calibrated p-values, BH FDR."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.stats import kstest

from ..exceptions import InputError

__all__ = ["change_scores", "benjamini_hochberg", "flag_cells", "relative_to_controls"]

_MAD_TO_SIGMA = 1.4826


def _robust_center_scale(x, axis=-1):
    med = np.median(x, axis=axis, keepdims=True)
    mad = _MAD_TO_SIGMA * np.median(np.abs(x - med), axis=axis)
    return np.squeeze(med, axis=axis), mad


def _as_mask(control_mask, n):
    mask = np.asarray(control_mask)
    if mask.dtype != bool or mask.shape != (n,):
        raise InputError("invalid control mask", field="control_mask", expected=f"{n} booleans",
                         found=f"dtype {mask.dtype}, shape {mask.shape}")
    return mask


def change_scores(values, *, control_mask, errors=None) -> np.ndarray:
    """Robust standardised deviation of every cell from the control population.

    ``score_i = (x_i - median(R_i)) / s_i`` with R_i the finite control values
    (without cell i itself when it is a control) and
    ``s_i = sqrt(MADN(R_i)^2 + max(0, e_i^2 - median(e_R^2)))``: the control spread
    (1.4826 x median absolute deviation), widened when the cell's own measurement
    error exceeds the controls' typical error. NaN where ``x_i`` is not finite.
    """
    x = np.asarray(values, dtype=float).ravel()
    mask = _as_mask(control_mask, x.size)
    e = np.zeros(x.size) if errors is None else np.nan_to_num(np.asarray(errors, dtype=float).ravel(), nan=0.0)
    ref = mask & np.isfinite(x)
    if ref.sum() < 4:
        raise InputError("too few controls with a finite value", field="control_mask",
                         expected="at least 4 controls", found=f"{int(ref.sum())}")
    e2_ref = float(np.median(e[ref] ** 2))
    out = np.full(x.size, np.nan)
    xr = x[ref]
    c_all, s_all = _robust_center_scale(xr)
    ref_idx = np.flatnonzero(ref)
    for i in np.flatnonzero(np.isfinite(x)):
        if ref[i]:
            r = np.delete(xr, np.searchsorted(ref_idx, i))
            c, s = _robust_center_scale(r)
        else:
            c, s = c_all, s_all
        s = np.sqrt(s * s + max(0.0, e[i] ** 2 - e2_ref))
        out[i] = (x[i] - c) / s if s > 0 else np.copysign(np.inf, x[i] - c) if x[i] != c else 0.0
    return out


def benjamini_hochberg(p_values, *, fdr=0.05):
    """Benjamini-Hochberg (1995) step-up: (rejected, q_values); NaN p-values are not tested."""
    p = np.asarray(p_values, dtype=float).ravel()
    if not (np.isfinite(fdr) and 0 < fdr < 1):
        raise InputError("invalid false discovery rate", field="fdr", expected="a number in (0, 1)", found=repr(fdr))
    ok = np.isfinite(p)
    q = np.full(p.size, np.nan)
    m = int(ok.sum())
    if m:
        pv = p[ok]
        order = np.argsort(pv, kind="stable")
        adj = pv[order] * m / np.arange(1, m + 1)
        adj = np.minimum.accumulate(adj[::-1])[::-1]
        qq = np.empty(m)
        qq[order] = np.minimum(adj, 1.0)
        q[ok] = qq
    return (np.nan_to_num(q, nan=1.0) <= fdr) & ok, q


def _tail(score, alternative):
    if alternative == "two-sided":
        return np.abs(score)
    return score if alternative == "greater" else -score


def _gaussian_null(n_ref, n_draws, rng, alternative):
    """Null draws of the score when cell and its n_ref references are iid normal."""
    z = rng.standard_normal((n_draws, n_ref + 1))
    c, s = _robust_center_scale(z[:, 1:])
    return np.sort(_tail((z[:, 0] - c) / s, alternative))


def _permutation_p(x, mask, alternative):
    """Rank p-value of each cell among the controls (exact under exchangeability)."""
    ref = mask & np.isfinite(x)
    p = np.full(x.size, np.nan)
    for i in np.flatnonzero(np.isfinite(x)):
        pool = x[ref | (np.arange(x.size) == i)]
        c = np.median(pool)
        stat = _tail(pool - c, alternative)
        p[i] = np.count_nonzero(stat >= _tail(x[i] - c, alternative) - 1e-15 * abs(x[i] - c)) / pool.size
    return p


def flag_cells(cells, *, control_mask, feature="index_change", error_column="auto", fdr=0.05, method="auto",
               alternative="two-sided", n_draws=20000, rng=0) -> pd.DataFrame:
    """Per-cell change score, p-value, BH q-value and ``changed`` flag against the controls.

    Parameters
    ----------
    cells : pandas.DataFrame
        One row per cell with the column ``feature``.
    control_mask : array of bool
        Rows that are controls (the null population).
    feature : str
        The column scored (default the settled ``index_change`` of the cells table).
    error_column : str or None
        Column of 1-sigma measurement errors; ``"auto"`` uses ``feature + "_err"`` when present.
    fdr : float
        Benjamini-Hochberg level across all scored cells.
    method : {"auto", "permutation", "gaussian"}
        ``"permutation"``: the rank of the cell's deviation among the controls'
        (full conformal, exact under exchangeability, never below 1/(n_controls + 1)).
        ``"gaussian"``: the score's exact null distribution for normally distributed
        controls, by ``n_draws`` Monte Carlo draws with the same number of references.
        ``"auto"`` takes permutation when (n_controls + 1) * fdr >= 5, else gaussian.
    alternative : {"two-sided", "greater", "less"}
    rng : int or numpy.random.Generator
        Seeds the Monte Carlo draws.

    Returns
    -------
    pandas.DataFrame
        ``cell_id`` (when present), ``change_score, p_value, q_value, changed``, one row per
        input row in order. ``attrs["calibration"]`` holds the method, the number of
        controls, the smallest attainable p-value and the Kolmogorov-Smirnov p-value of
        the controls' own (leave-one-out) p-values against uniform: a small value says
        the null model does not fit the controls.

    Raises
    ------
    InputError
        Missing or all-NaN feature, too few controls, invalid options. Nothing is returned then.
    """
    if not isinstance(cells, pd.DataFrame):
        raise InputError("not a table", field="cells", expected="a pandas DataFrame", found=type(cells).__name__)
    if feature not in cells.columns:
        raise InputError("missing feature column", path="table 'cells'", field=feature, expected="present",
                         found="absent")
    x = pd.to_numeric(cells[feature], errors="coerce").to_numpy(dtype=float)
    if not np.isfinite(x).any():
        raise InputError("feature is NaN for every cell", path="table 'cells'", field=feature,
                         expected="finite values", found="all NaN")
    if method not in ("auto", "permutation", "gaussian"):
        raise InputError("invalid method", field="method", expected="'auto', 'permutation' or 'gaussian'",
                         found=repr(method))
    if alternative not in ("two-sided", "greater", "less"):
        raise InputError("invalid alternative", field="alternative", expected="'two-sided', 'greater' or 'less'",
                         found=repr(alternative))
    if int(n_draws) != n_draws or n_draws < 100:
        raise InputError("invalid number of draws", field="n_draws", expected="an integer >= 100",
                         found=repr(n_draws))
    if not (np.isfinite(fdr) and 0 < fdr < 1):
        raise InputError("invalid false discovery rate", field="fdr", expected="a number in (0, 1)", found=repr(fdr))
    mask = _as_mask(control_mask, x.size)
    if error_column == "auto":
        error_column = feature + "_err" if feature + "_err" in cells.columns else None
    errors = None if error_column is None else pd.to_numeric(cells[error_column], errors="coerce").to_numpy(float)
    score = change_scores(x, control_mask=mask, errors=errors)
    n_c = int((mask & np.isfinite(x)).sum())
    if method == "auto":
        method = "permutation" if (n_c + 1) * fdr >= 5 else "gaussian"
    if method == "permutation":
        p = _permutation_p(x, mask, alternative)
        p_min = 1.0 / (n_c + 1)
    else:
        gen = np.random.default_rng(rng)
        nulls = {n: _gaussian_null(n, int(n_draws), gen, alternative) for n in (n_c - 1, n_c)}
        p = np.full(x.size, np.nan)
        for i in np.flatnonzero(np.isfinite(score)):
            null = nulls[n_c - 1 if mask[i] else n_c]
            n_ge = null.size - np.searchsorted(null, _tail(score[i], alternative), side="left")
            p[i] = (1.0 + n_ge) / (null.size + 1.0)
        p_min = 1.0 / (int(n_draws) + 1.0)
    changed, q = benjamini_hochberg(p, fdr=fdr)
    ctrl_p = p[mask & np.isfinite(p)]
    ks = float(kstest(ctrl_p, "uniform").pvalue) if ctrl_p.size >= 3 else float("nan")
    out = pd.DataFrame({"change_score": score, "p_value": p, "q_value": q, "changed": changed})
    if "cell_id" in cells.columns:
        out.insert(0, "cell_id", cells["cell_id"].to_numpy(object))
    out.attrs["calibration"] = {"method": method, "feature": feature, "n_controls": n_c, "fdr": float(fdr),
                                "min_attainable_p": p_min, "controls_ks_pvalue": ks}
    return out


def relative_to_controls(cells, *, control_mask, columns) -> pd.DataFrame:
    """``{column}_vs_control``: each column as a robust z-score against the controls (see :func:`change_scores`)."""
    out = {}
    for col in columns:
        if col not in cells.columns:
            raise InputError("missing feature column", path="table 'cells'", field=col, expected="present",
                             found="absent")
        x = pd.to_numeric(cells[col], errors="coerce").to_numpy(float)
        out[f"{col}_vs_control"] = change_scores(x, control_mask=control_mask)
    return pd.DataFrame(out)
