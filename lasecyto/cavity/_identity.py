"""Mode identity of a Fabry-Perot cell laser: transverse orders, Gouy fraction and mode numbers q.

The fundamental transverse family resonates where 2 n(lambda) L = q lambda
(q integer; mirror reflection phases and the Gouy phase of the fundamental
taken as zero or a whole number of cycles: a constant phase cannot be told
from a shift of q).  The comb spacing gives the group optical length n_g L,
not n L, so the "naive" mode numbers (1/lambda) / spacing are not integers
with dispersion: for the dispersive example of check-values section 4 they
come out 1.34 too high.  :func:`fit_mode_numbers` therefore assigns q with a
dispersion model, the gap medium of :mod:`lasecyto.cavity.media` with a
constant index offset (a cell is "medium plus a constant"):

``medium`` and ``gap_um``
    L known, offset fitted: every candidate q0 gives per-line offsets
    (q0 + m) lambda / (2 L) - n_m(lambda); a wrong q0 leaves a residual
    linear in lambda of lambda / (2 L) per step, which the fit sees.
``medium`` alone
    offset fixed (``index_offset``, default 0: the gap holds the medium
    itself), L fitted per candidate q0.
no medium
    the naive numbers, shifted to the nearest integers as a whole (the
    mirror phase as a free offset); exact only for a non-dispersive gap.  A
    :class:`~lasecyto.exceptions.FitWarning` is issued when the naive numbers
    are further than 0.2 from integers.

Higher transverse orders k of the same q sit k zeta spacings above it
(check-values section 5); their q is round(u - k zeta) with u the continuous
mode coordinate of the fundamental's model.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .. import tables
from ..exceptions import FitWarning, InputError
from ._comb import _track_wavenumbers

__all__ = ["ModeNumberFit", "ModeIdentity", "fit_mode_numbers", "transverse_orders", "assign_mode_numbers"]

_FRACTION_WARN = 0.2        # naive mode numbers further than this from integers -> FitWarning
_OFFSET_RANGE = 0.3         # |n_gap - n_medium| searched when the gap is given
_LENGTH_SEARCH = 6          # candidates either side of the estimate when L is fitted
_AMBIGUOUS = 25.0           # runner-up minus best chi-square (in units of the best reduced chi-square)
_ZETA_TOL = 0.02            # cycles: family offsets must sit this close to multiples of zeta
_MAX_ORDER = 6


@dataclass(frozen=True)
class ModeNumberFit:
    """Result of :func:`fit_mode_numbers` (arrays in input order).

    Attributes
    ----------
    mode_numbers : ndarray of int
        Longitudinal mode number q of every line.
    q_reference : int
        q of comb index 0.
    method : str
        ``"medium+gap"``, ``"medium"`` or ``"naive"``.
    absolute : bool
        True when q comes from a dispersion model (not the naive numbers).
    medium : object or None
        The gap medium (a :class:`lasecyto.cavity.media.Medium`).
    gap_um, gap_err_um : float
        Mirror gap L: the given value (error 0) or the fitted one; NaN for ``"naive"``.
    index_offset, index_offset_err : float
        Gap index minus medium index (fitted with ``"medium+gap"``, fixed otherwise); NaN for ``"naive"``.
    reference_nm : float
        Weighted mean wavelength of the lines.
    phase_optical_length_um, phase_optical_length_err_um : float
        n L at ``reference_nm`` = L (n_medium(reference) + offset); NaN for ``"naive"``.
    spacing_per_um : float
        Comb spacing 1 / (2 n_g L) from the lines.
    naive_numbers : ndarray of float
        (1 / lambda) / spacing.
    naive_fraction : float
        Largest distance of a naive number from an integer.
    delta_chi2 : float
        Chi-square of the runner-up q assignment minus the best, in units of the best
        reduced chi-square (inf when unique by construction; NaN for ``"naive"``).
    """

    mode_numbers: np.ndarray
    q_reference: int
    method: str
    absolute: bool
    medium: object
    gap_um: float
    gap_err_um: float
    index_offset: float
    index_offset_err: float
    reference_nm: float
    phase_optical_length_um: float
    phase_optical_length_err_um: float
    spacing_per_um: float
    naive_numbers: np.ndarray
    naive_fraction: float
    delta_chi2: float

    def gap_index(self, wavelength_nm):
        """Model index of the gap, n_medium(lambda) + offset (NaN for ``"naive"``)."""
        if self.medium is None:
            return np.full(np.shape(wavelength_nm), np.nan)
        return self.medium.n(wavelength_nm) + self.index_offset

    def gap_group_index(self, wavelength_nm):
        """Model group index of the gap (NaN for ``"naive"``)."""
        if self.medium is None:
            return np.full(np.shape(wavelength_nm), np.nan)
        return self.medium.group_index(wavelength_nm) + self.index_offset

    def optical_length_um(self, wavelength_nm):
        """Model phase optical length n(lambda) L (NaN for ``"naive"``)."""
        return self.gap_um * self.gap_index(wavelength_nm)


@dataclass(frozen=True)
class ModeIdentity:
    """Mode identity of one cell (result of :func:`assign_mode_numbers`).

    Attributes
    ----------
    numbers : ModeNumberFit or None
        The mode-number fit of the fundamental family (None without tracks).
    fundamental_family : int
        ``mode_family`` of the fundamental transverse family (-1 without tracks).
    transverse_orders : dict
        ``mode_family`` -> transverse order k (-1 when the family fits no ladder).
    gouy_fraction, gouy_fraction_err : float
        Ladder spacing over the comb spacing and its error (NaN with one family).
    note : str
        Why something could not be assigned (empty when all went well).
    """

    numbers: ModeNumberFit | None
    fundamental_family: int
    transverse_orders: dict = field(default_factory=dict)
    gouy_fraction: float = math.nan
    gouy_fraction_err: float = math.nan
    note: str = ""


def _wls(x, y, w):
    """Weighted straight line y = b + a x; returns a, b, cov(a, b) (unscaled), chi2."""
    sw = np.sqrt(w)
    design = np.column_stack([x, np.ones_like(x)]) * sw[:, None]
    coef, *_ = np.linalg.lstsq(design, y * sw, rcond=None)
    cov = np.linalg.pinv(design.T @ design)
    r = (y - coef[0] * x - coef[1]) * sw
    return float(coef[0]), float(coef[1]), cov, float(r @ r)


def _wmean(y, w):
    sw = w.sum()
    m = float((w * y).sum() / sw)
    return m, float(((y - m) ** 2 * w).sum()), 1.0 / sw


def _scan(candidates, evaluate):
    """Best and runner-up chi-square over integer candidates; ``evaluate(q0)`` -> (chi2, value, var)."""
    res = [(evaluate(int(q0)), int(q0)) for q0 in candidates]
    res.sort(key=lambda r: (r[0][0], abs(r[1])))
    return res[0], (res[1] if len(res) > 1 else None)


def fit_mode_numbers(wavelength_nm, comb_index, *, wavelength_err_nm=None, medium=None, gap_um=None,
                     index_offset=None, offset_range=_OFFSET_RANGE):
    """Longitudinal mode numbers of one comb family (the fundamental), with a dispersion model.

    Parameters
    ----------
    wavelength_nm : array of float
        Vacuum wavelengths of the family's lines (at least 2 with distinct ``comb_index``).
    comb_index : array of int
        Order of each line within the family (q = q_reference + comb_index).
    wavelength_err_nm : array of float, optional
        1-sigma errors (weights); equal weights without them.
    medium : Medium or str, optional
        Dispersion of the gap content (:func:`lasecyto.cavity.media.get_medium` name or object).
    gap_um : float, optional
        Mirror gap L; with ``medium`` the index offset is fitted.
    index_offset : float, optional
        Gap index minus medium index when L is fitted (default 0).
    offset_range : float
        With ``gap_um``: the fitted index offset is searched within +- this.

    Returns
    -------
    ModeNumberFit

    Warns
    -----
    FitWarning
        Without a medium, when the naive mode numbers are further than 0.2
        from integers (dispersion or a mirror phase: the numbers may be off
        by one or more); with a medium, when the best assignment is not
        clearly better than the runner-up, or the fitted offset sits at the
        edge of the range searched.
    """
    lam = np.asarray(wavelength_nm, dtype=float)
    m = np.asarray(comb_index)
    if lam.ndim != 1 or m.shape != lam.shape:
        raise InputError("wavelengths and comb indices must be 1-D and of equal length", field="comb_index",
                         expected=f"{lam.size} values", found=f"shape {m.shape}")
    if not np.all(np.isfinite(lam) & (lam > 0)):
        raise InputError("wavelengths must be positive and finite", field="wavelength_nm",
                         expected="> 0 nm", found=f"{lam[~(np.isfinite(lam) & (lam > 0))][:3].tolist()}")
    if not np.all(np.asarray(m, dtype=float) == np.round(np.asarray(m, dtype=float))):
        raise InputError("comb indices must be integers", field="comb_index", expected="integers",
                         found=f"{m[:3].tolist()}")
    m = m.astype(np.int64)
    if np.unique(m).size < 2:
        raise InputError("too few comb orders for mode numbers", field="comb_index",
                         expected="at least 2 distinct orders", found=f"{np.unique(m).size}")
    sigma = 1e3 / lam
    if wavelength_err_nm is None:
        err = np.ones_like(lam)
        known_errors = False
    else:
        err = np.asarray(wavelength_err_nm, dtype=float)
        if err.shape != lam.shape or not np.all(np.isfinite(err) & (err > 0)):
            raise InputError("errors must be positive, one per line", field="wavelength_err_nm",
                             expected=f"{lam.size} values > 0", found=f"{err.size} values")
        known_errors = True
    sig_err = err * 1e3 / lam**2
    w = 1.0 / sig_err**2
    s, b, _, _ = _wls(m.astype(float), sigma, w)
    if not s > 0:
        raise InputError("wavelengths do not decrease with comb index", field="comb_index",
                         expected="1/lambda increasing with the index", found=f"spacing {s:.3g} 1/um")
    naive = sigma / s
    naive_fraction = float(np.max(np.abs(naive - np.rint(naive))))
    reference_nm = float(np.sum(w * lam) / w.sum())
    nan = float("nan")

    if isinstance(medium, str):
        from .media import get_medium
        medium = get_medium(medium)
    if gap_um is not None and not (np.isfinite(gap_um) and gap_um > 0):
        raise InputError("gap must be a positive length", field="gap_um", expected="> 0 um or None",
                         found=repr(gap_um))
    if medium is None:
        q_ref = int(np.rint(np.sum(w * (naive - m)) / w.sum()))
        if naive_fraction > _FRACTION_WARN:
            warnings.warn(f"naive mode numbers (1/lambda)/spacing are not integers (fraction up to "
                          f"{naive_fraction:.2f}): dispersion or a mirror phase; the spacing gives n_g L, "
                          "not n L, and the mode numbers may be off by one or more; give the gap medium "
                          "(and the gap) for a dispersion model", FitWarning, stacklevel=2)
        return ModeNumberFit(mode_numbers=q_ref + m, q_reference=q_ref, method="naive", absolute=False,
                             medium=None, gap_um=nan, gap_err_um=nan, index_offset=nan, index_offset_err=nan,
                             reference_nm=reference_nm, phase_optical_length_um=nan,
                             phase_optical_length_err_um=nan, spacing_per_um=float(s), naive_numbers=naive,
                             naive_fraction=naive_fraction, delta_chi2=nan)

    n_m = medium.n(lam)
    dof = lam.size - 1
    if gap_um is not None:
        method = "medium+gap"
        L = float(gap_um)
        center = int(np.rint(np.sum(w * (2 * L * n_m * sigma - m)) / w.sum()))
        if not (np.isfinite(offset_range) and offset_range > 0):
            raise InputError("offset range must be positive", field="offset_range", expected="> 0",
                             found=repr(offset_range))
        half = int(np.ceil(2 * L * sigma.max() * offset_range)) + 2

        def evaluate(q0):
            order = q0 + m
            y = order / (2 * L * sigma) - n_m                       # per-line index offset
            wy = 1.0 / (order * sig_err / (2 * L * sigma**2)) ** 2
            if np.any(order <= 0):
                return np.inf, nan, nan
            mean, chi2, var = _wmean(y, wy)
            return chi2, mean, var
    else:
        method = "medium"
        off = 0.0 if index_offset is None else float(index_offset)
        if not np.isfinite(off):
            raise InputError("index offset must be finite", field="index_offset", expected="a number",
                             found=repr(index_offset))
        n_gap = n_m + off
        if np.any(n_gap <= 1.0):
            raise InputError("gap index below 1", field="index_offset", expected="medium index + offset > 1",
                             found=f"{float(n_gap.min()):.4f}")
        n_g = medium.group_index(reference_nm) + off
        L_est = 1.0 / (2.0 * s * n_g)
        center = int(np.rint(np.sum(w * (2 * L_est * n_gap * sigma - m)) / w.sum()))
        half = _LENGTH_SEARCH

        def evaluate(q0):
            order = q0 + m
            if np.any(order <= 0):
                return np.inf, nan, nan
            y = order / (2 * n_gap * sigma)                         # per-line gap length, um
            wy = 1.0 / (order * sig_err / (2 * n_gap * sigma**2)) ** 2
            mean, chi2, var = _wmean(y, wy)
            return chi2, mean, var

    (best, q_ref), runner = _scan(range(center - half, center + half + 1), evaluate)
    chi2, value, var = best
    chi2_red = chi2 / dof if dof > 0 else 0.0
    scale = max(chi2_red, 1.0) if known_errors else max(chi2_red, 1e-300)
    delta = float((runner[0][0] - chi2) / scale) if runner is not None and dof > 0 else float("inf")
    if dof == 0 or runner is None:
        delta = nan
    value_err = float(np.sqrt(var * (max(chi2_red, 1.0) if known_errors else (chi2_red if dof > 0 else nan))))
    if method == "medium+gap":
        offset, offset_err, gap, gap_err = value, value_err, L, 0.0
        if abs(q_ref - center) >= half:
            warnings.warn(f"index offset of the gap fitted at the edge of the range searched "
                          f"(+-{offset_range:g}): check the medium and gap_um", FitWarning, stacklevel=2)
    else:
        offset, offset_err, gap, gap_err = off, 0.0, value, value_err
    if not (delta >= _AMBIGUOUS):
        warnings.warn(f"mode numbers are ambiguous: the runner-up assignment (q of comb index 0 = "
                      f"{runner[1] if runner else 'none'}) fits nearly as well as q = {q_ref} "
                      f"(delta chi-square {delta:.3g} < {_AMBIGUOUS:g}); more lines or a better medium "
                      "model are needed", FitWarning, stacklevel=2)
    n_ref = float(medium.n(reference_nm)) + offset
    nl = gap * n_ref
    nl_err = float(np.hypot(gap * offset_err, gap_err * n_ref))
    return ModeNumberFit(mode_numbers=q_ref + m, q_reference=int(q_ref), method=method, absolute=True,
                         medium=medium, gap_um=float(gap), gap_err_um=float(gap_err), index_offset=float(offset),
                         index_offset_err=float(offset_err), reference_nm=reference_nm,
                         phase_optical_length_um=float(nl), phase_optical_length_err_um=nl_err,
                         spacing_per_um=float(s), naive_numbers=naive, naive_fraction=naive_fraction,
                         delta_chi2=delta)


def transverse_orders(phase, *, weights=None, phase_err=None, tol=_ZETA_TOL, max_order=_MAX_ORDER):
    """Transverse orders and Gouy fraction from the comb phases of the families.

    Parameters
    ----------
    phase : array of float
        Phase of every family in cycles (position / comb spacing, modulo 1).
    weights : array of float, optional
        Family powers; break ties of the fundamental.
    phase_err : array of float, optional
        1-sigma phase errors (cycles) for the error of zeta.
    tol : float
        Largest mismatch (cycles) between a family's offset from the
        fundamental and k zeta.
    max_order : int
        Highest transverse order considered.

    Returns
    -------
    orders : ndarray of int
        Transverse order k of every family (0: the fundamental; -1: fits no ladder).
    zeta, zeta_err : float
        Gouy fraction (0 < zeta <= 1/2) and its error; NaN with one family.

    Notes
    -----
    The fundamental is the family after the widest gap of the phases on the
    circle: higher orders of the same q sit at larger wavenumber, k zeta
    spacings up, and the ladder is assumed not to wrap past the next q
    (highest order x zeta < 1).  Among the zeta = offset / k that explain the
    most families, the one with the lowest highest order is taken.
    """
    phase = np.mod(np.asarray(phase, dtype=float), 1.0)
    n = phase.size
    if not (np.isfinite(tol) and 0 < tol < 0.5):
        raise InputError("ladder tolerance out of range", field="tol", expected="0 < tol < 0.5", found=repr(tol))
    if int(max_order) != max_order or max_order < 1:
        raise InputError("highest transverse order must be a positive integer", field="max_order",
                         expected="integer >= 1", found=repr(max_order))
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    orders = np.full(n, -1, dtype=np.int64)
    if n == 0:
        return orders, math.nan, math.nan
    order = np.lexsort((-w, phase))
    ps = phase[order]
    gap_after = np.diff(np.r_[ps, ps[0] + 1.0])
    widest = np.flatnonzero(np.isclose(gap_after, gap_after.max(), rtol=0, atol=1e-9))
    starts = [order[(i + 1) % n] for i in widest]
    fund = min(starts, key=lambda j: (-w[j], j))
    orders[fund] = 0
    if n == 1:
        return orders, math.nan, math.nan
    others = np.array([j for j in range(n) if j != fund])
    off = np.mod(phase[others] - phase[fund], 1.0)
    best = None
    for j in range(others.size):
        for k in range(1, max_order + 1):
            z = off[j] / k
            if not (0 < z <= 0.5):
                continue
            kk = np.rint(off / z).astype(np.int64)
            fits = (kk >= 1) & (kk <= max_order) & (np.abs(off - kk * z) <= tol)
            key = (int(fits.sum()), -int(kk[fits].max()) if fits.any() else 0, z)
            if best is None or key > best[0]:
                best = (key, z, kk, fits)
    if best is None or best[0][0] == 0:
        return orders, math.nan, math.nan
    _, z, kk, fits = best
    k_fit, o_fit = kk[fits].astype(float), off[fits]
    if phase_err is None:
        var = np.ones(o_fit.size)
    else:
        pe = np.asarray(phase_err, dtype=float)
        var = pe[others][fits] ** 2 + pe[fund] ** 2
    wk = k_fit**2 / var
    zeta = float(np.sum(k_fit * o_fit / var) / wk.sum())
    zeta_err = float(np.sqrt(1.0 / wk.sum())) if phase_err is not None else math.nan
    if phase_err is not None and o_fit.size > 1:
        chi2 = float(np.sum((o_fit - k_fit * zeta) ** 2 / var))
        zeta_err *= math.sqrt(max(1.0, chi2 / (o_fit.size - 1)))
    orders[others[fits]] = kk[fits]
    return orders, zeta, zeta_err


def assign_mode_numbers(tracks, *, medium=None, gap_um=None, index_offset=None, offset_range=_OFFSET_RANGE,
                        ladder_tolerance=_ZETA_TOL, max_transverse_order=_MAX_ORDER):
    """Transverse orders and longitudinal mode numbers of one cell's tracks.

    Parameters
    ----------
    tracks : pandas.DataFrame
        A ``tracks`` table of one cell after :func:`lasecyto.cavity.assign_mode_families`
        (needs ``comb_index``).
    medium, gap_um, index_offset, offset_range
        Dispersion model of the gap, as for :func:`fit_mode_numbers`.
    ladder_tolerance, max_transverse_order
        As ``tol`` and ``max_order`` of :func:`transverse_orders`.

    Returns
    -------
    tracks : pandas.DataFrame
        The table with ``transverse_order`` and ``mode_number`` filled (-1 where unknown).
    identity : ModeIdentity

    Notes
    -----
    Each track's drift-free wavenumber (see :func:`assign_mode_families`)
    enters a joint weighted fit sigma = b_family + s x comb_index; the family
    phases b_family / s (mod 1) give the transverse orders and the Gouy
    fraction (:func:`transverse_orders`); the fundamental family's tracks
    give the mode numbers (:func:`fit_mode_numbers`); a track of order k gets
    q = round(u - k zeta), u being its continuous mode coordinate
    (2 n(lambda) L / lambda with a medium, else the naive number shifted as
    the fundamental's).  Warnings of :func:`fit_mode_numbers` pass through.
    """
    tr = tables.validate(tracks, "tracks")
    if len(tr) and "comb_index" not in tr.columns:
        raise InputError("tracks lack mode families", field="comb_index",
                         expected="a column from cavity.assign_mode_families", found="absent")
    if len(pd.unique(tr["cell_id"])) > 1:
        raise InputError("tracks of more than one cell", field="cell_id", expected="one cell",
                         found=f"{len(pd.unique(tr['cell_id']))} cells")
    tr["transverse_order"] = np.full(len(tr), -1, dtype=np.int64)
    tr["mode_number"] = np.full(len(tr), -1, dtype=np.int64)
    if len(tr) == 0:
        return tables.validate(tr, "tracks"), ModeIdentity(None, -1, note="no tracks")
    ids, inv, sigma_t, sigma_err_t, power_t = _track_wavenumbers(tr)
    fam_t = tr["mode_family"].to_numpy(np.int64)[np.unique(inv, return_index=True)[1]]
    idx_t = tr["comb_index"].to_numpy(np.int64)[np.unique(inv, return_index=True)[1]]
    fams = np.unique(fam_t)
    if np.unique(np.column_stack([fam_t, idx_t]), axis=0).shape[0] < 2 or fams.size == 0:
        return tables.validate(tr, "tracks"), ModeIdentity(None, -1, note="fewer than 2 comb orders")
    # joint fit sigma = b_family + s * comb_index
    w = 1.0 / sigma_err_t**2
    design = np.zeros((ids.size, 1 + fams.size))
    design[:, 0] = idx_t
    design[np.arange(ids.size), 1 + np.searchsorted(fams, fam_t)] = 1.0
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(design * sw[:, None], sigma_t * sw, rcond=None)
    cov = np.linalg.pinv((design * sw[:, None]).T @ (design * sw[:, None]))
    resid = (sigma_t - design @ coef) * sw
    dof = ids.size - design.shape[1]
    birge = max(1.0, float(resid @ resid) / dof) if dof > 0 else 1.0
    s = float(coef[0])
    if not s > 0:
        return tables.validate(tr, "tracks"), ModeIdentity(None, -1, note="comb spacing not positive")
    b = coef[1:]
    b_err = np.sqrt(np.diag(cov)[1:] * birge)
    fam_power = np.array([power_t[fam_t == f].sum() for f in fams])
    k_fam, zeta, zeta_err = transverse_orders(b / s, weights=fam_power, phase_err=b_err / s,
                                              tol=ladder_tolerance, max_order=max_transverse_order)
    fund = int(fams[np.flatnonzero(k_fam == 0)[0]])
    orders = {int(f): int(k) for f, k in zip(fams, k_fam)}
    sel = fam_t == fund
    notes = []
    if np.unique(idx_t[sel]).size < 2:
        numbers = None
        notes.append("the fundamental family has fewer than 2 comb orders: no mode numbers")
    else:
        numbers = fit_mode_numbers(1e3 / sigma_t[sel], idx_t[sel], wavelength_err_nm=sigma_err_t[sel] * 1e3
                                   / sigma_t[sel] ** 2, medium=medium, gap_um=gap_um, index_offset=index_offset,
                                   offset_range=offset_range)
    k_t = np.array([orders[int(f)] for f in fam_t])
    q_t = np.full(ids.size, -1, dtype=np.int64)
    if numbers is not None:
        z = zeta if np.isfinite(zeta) else 0.0
        if numbers.absolute:
            u = 2.0 * numbers.gap_um * numbers.gap_index(1e3 / sigma_t) * sigma_t
        else:
            b_fund = b[np.searchsorted(fams, fund)]
            u = numbers.q_reference + (sigma_t - b_fund) / s
        known = k_t >= 0
        q_t[known] = np.rint(u[known] - k_t[known] * z).astype(np.int64)
        q_t[sel] = numbers.q_reference + idx_t[sel]
    tr["transverse_order"] = k_t[inv]
    tr["mode_number"] = q_t[inv]
    ident = ModeIdentity(numbers=numbers, fundamental_family=fund, transverse_orders=orders,
                         gouy_fraction=float(zeta), gouy_fraction_err=float(zeta_err), note="; ".join(notes))
    return tables.validate(tr, "tracks"), ident
