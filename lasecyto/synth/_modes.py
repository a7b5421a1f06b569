"""Resonances of the synthetic Fabry-Perot cell laser (dispersive gap medium)."""

from __future__ import annotations

import numpy as np

from ..exceptions import InputError
from ._media import _water_dn_dlambda_per_um, water_index_daimon

__all__ = ["fp_mode_wavelengths"]


def _mode_roots(mode_number, gap_um, index_offset, *, tol=1e-14, max_iter=60):
    """Vacuum wavelengths (nm) solving 2 n(lambda) L = m lambda, vectorised Newton.

    The gap medium is n(lambda) = n_water(lambda) + index_offset.  ``mode_number``
    (m = q + k zeta) and ``index_offset`` broadcast against each other.  The residual
    2 n L - m lambda decreases strictly with lambda (normal dispersion), so Newton's
    method from the non-dispersive estimate converges monotonically in a few steps.
    """
    m = np.asarray(mode_number, dtype=float)
    dn = np.asarray(index_offset, dtype=float)
    m, dn = np.broadcast_arrays(m, dn)
    gap_nm = float(gap_um) * 1e3
    lam = 2.0 * (water_index_daimon(0.615) + dn) * gap_nm / m
    for _ in range(max_iter):
        lam_um = lam * 1e-3
        f = 2.0 * (water_index_daimon(lam_um) + dn) * gap_nm - m * lam
        df = 2.0 * gap_nm * _water_dn_dlambda_per_um(lam_um) * 1e-3 - m
        step = f / df
        lam = lam - step
        if np.all(np.abs(step) <= tol * np.abs(lam)):
            break
    return lam


def fp_mode_wavelengths(gap_um, *, index_offset, zeta, orders=range(4), window_nm=(570.0, 670.0)):
    """Longitudinal and transverse resonances of a planar Fabry-Perot gap filled with cytoplasm.

    Solves 2 n_c(lambda) L = (q + k zeta) lambda exactly (Newton iteration) for vacuum
    wavelengths, with n_c(lambda) = n_water(lambda) + index_offset (water from
    Daimon & Masumura 2007, 20 degC).  Mirror reflection phases are ignored.  Higher
    transverse orders k of the same q lie at shorter wavelength.

    Parameters
    ----------
    gap_um : float
        Mirror spacing L in micrometres.
    index_offset : float
        Cytoplasm index minus water index (wavelength independent).
    zeta : float
        Gouy fraction of the transverse ladder, 0 <= zeta < 1.
    orders : iterable of int
        Transverse orders k to include.
    window_nm : (float, float)
        Vacuum wavelength window; only resonances inside it are returned.

    Returns
    -------
    dict of ndarray
        ``k`` (int), ``q`` (int) and ``lambda_vac_nm`` (float), sorted by k then q.
    """
    gap_um = float(gap_um)
    if not np.isfinite(gap_um) or gap_um <= 0:
        raise InputError("mirror gap must be positive", field="gap_um", expected="> 0", found=gap_um)
    zeta = float(zeta)
    if not 0.0 <= zeta < 1.0:
        raise InputError("Gouy fraction out of range", field="zeta", expected="0 <= zeta < 1", found=zeta)
    orders = [int(k) for k in orders]
    if any(k < 0 for k in orders):
        raise InputError("transverse orders must be >= 0", field="orders", expected="k >= 0",
                         found=orders)
    lo, hi = (float(w) for w in window_nm)
    if not 100.0 < lo < hi < 3000.0:
        raise InputError("wavelength window must be increasing, within 100-3000 nm",
                         field="window_nm", expected="(low, high) nm", found=(lo, hi))
    offset = float(index_offset)
    gap_nm = gap_um * 1e3
    m_min = 2.0 * (water_index_daimon(hi * 1e-3) + offset) * gap_nm / hi
    m_max = 2.0 * (water_index_daimon(lo * 1e-3) + offset) * gap_nm / lo
    ks, qs = [], []
    for k in sorted(set(orders)):
        q = np.arange(int(np.floor(m_min - k * zeta)), int(np.ceil(m_max - k * zeta)) + 1)
        q = q[q >= 1]
        ks.append(np.full(q.size, k, dtype=np.int64))
        qs.append(q.astype(np.int64))
    k_all = np.concatenate(ks) if ks else np.zeros(0, dtype=np.int64)
    q_all = np.concatenate(qs) if qs else np.zeros(0, dtype=np.int64)
    lam = _mode_roots(q_all + k_all * zeta, gap_um, offset) if q_all.size else np.zeros(0)
    keep = (lam >= lo) & (lam <= hi)
    return {"k": k_all[keep], "q": q_all[keep], "lambda_vac_nm": lam[keep]}
