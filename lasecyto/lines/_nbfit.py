"""Compiled batched line fitting: detection, starting values, grouping, Fisher scoring, blends.

One block of spectra is processed in two passes over chunks of spectra, run
in parallel threads (the kernels release the GIL): the first prepares every
spectrum (non-finite pixels bridged, optional SNIP baseline) and detects its
lines; the second fits them.  Within a spectrum, lines closer than 1.5 FWHM, or whose cores lie in
each other's fit windows, form a group (at most ``max_group`` lines) that is
fitted jointly by Levenberg-Marquardt Fisher scoring of the Poisson +
read-noise likelihood; groups whose windows reach other fitted lines are
refitted once with those lines' profiles subtracted (and added to the
variance); a single line that two lines explain much better is split.

Everything here is plain numerics on arrays; :mod:`lasecyto.lines._fit`
checks the arguments and builds the result.
"""

from __future__ import annotations

import math
from collections import namedtuple

import numpy as np
from numba import njit

from ._nbprep import VARIANCE_FLOOR_E2, detect_row, fill_row, snip_row
from ._nbshape import GAUSSIAN, INSTRUMENT, LORENTZIAN, VOIGT, gauss_edges, line_terms, lorentz_edges, voigt_fwhm

#: reasons of a failed fit, by code (0 is a good fit); a later reason wins over an earlier one
MESSAGES = ("", "did not converge", "width at bound", "non-positive area", "centre left the window",
            "singular Fisher matrix", "non-finite pixels")
_NOCONV, _BOUND, _AREA, _LEFT, _SINGULAR, _NONFINITE = 1, 2, 3, 4, 5, 6

#: the largest number of lines fitted jointly
MAX_K = 4
#: a detection whose two neighbouring pixels are both below this fraction of its peak is a spike
SPIKE_NEIGHBOUR_RATIO = 0.1
#: instrument shape: a single line is tried as a blend of two only while its width diagnostic is below this
#: many instrument FWHM (two instrument-limited lines closer than 1.5 FWHM look at most about this wide)
BLEND_MAX_STRETCH = 2.0
#: smallest component width of a Voigt (px): a component may vanish without a bound flag
VOIGT_MIN_COMPONENT_PX = 0.01
#: a Fisher matrix scaled to unit diagonal is singular when its inverse has a diagonal above this
SINGULAR_LIMIT = 1e13
#: a group is refitted with its neighbours' profiles subtracted when their summed chi-square in its
#: window reaches this (below it they cannot move a fitted centre by more than 0.1 sigma)
NEIGHBOUR_MIN_CHI2 = 0.01

FitConfig = namedtuple("FitConfig", [
    "shape", "npl", "nb", "read_noise_e", "saturation_e", "snr_min", "fwhm_guess_px", "half_fixed_px",
    "max_iterations", "min_fwhm_px", "max_fwhm_px", "w2_init_px", "w2_free", "inst_half_px", "inst_fwhm_px",
    "p_start", "p_step", "radius", "peak_frac", "step_tol_sigma", "blend_separation_fwhm", "joint_overlap",
    "max_group", "blend_dchi2", "base_mode", "snip_window"])

# per-line float fields of the workspace
(_C, _A, _W, _W2, _EC, _EA, _EW, _EW2, _AMP, _BG, _CHI2, _C0, _W0, _W20, _A0, _LEV, _HALF,
 _CLG) = range(18)
_NLF = N_LINE_FIELDS = 18
# per-line integer fields
_MSG, _SAT, _GRP, _DPIX, _SPIKE = range(5)
_NLI = N_LINE_INTS = 5
# per-group integer fields
_GFIRST, _GSIZE, _GLO, _GLEN = range(4)
# per-pixel fields
_Y, _EX, _TOT, _TOT2, _NBM, _RES, _VAR, _SCORE, _HGT, _MU, _WT, _R, _WR, _WH, _MF, _SPK = range(16)
_NWF = 16
_PMAX = MAX_K * 4 + 4  # line parameters, background
# small vectors
_G, _G2, _TRIAL, _STEP, _SCALE, _RHS, _ERRS, _THETA, _SUMS, _THETA2 = range(10)

Workspace = namedtuple("Workspace", ["lf", "li", "gi", "wf", "mask", "lt", "edges", "jr", "mats", "vecs",
                                     "free", "det", "members", "tmp_f", "tmp_i", "snap", "order", "key",
                                     "scratch", "snr", "stats"])


@njit(cache=True)
def _workspace(n):
    cap = n + 2
    return Workspace(np.full((_NLF, cap), np.nan), np.zeros((_NLI, cap), dtype=np.int64),
                     np.zeros((4, cap), dtype=np.int64), np.zeros((_NWF, n + 1)),
                     np.zeros(n + 1, dtype=np.bool_), np.zeros((4, MAX_K, n + 1)), np.zeros((6, n + 2)),
                     np.zeros((_PMAX, n + 1)), np.zeros((6, _PMAX, _PMAX)), np.zeros((10, _PMAX)),
                     np.ones(_PMAX, dtype=np.bool_), np.zeros(cap, dtype=np.int64),
                     np.zeros(MAX_K, dtype=np.int64), np.full((_NLF, MAX_K), np.nan),
                     np.zeros((_NLI, MAX_K), dtype=np.int64), np.zeros((5, cap)),
                     np.zeros(cap, dtype=np.int64), np.zeros(cap), np.zeros(2 * n + 8), np.zeros(cap),
                     np.zeros(8, dtype=np.int64))


# ----------------------------------------------------------------------------- small linear algebra

@njit(cache=True, error_model="numpy")
def _cholesky(a, p, low):
    """Cholesky factor of a[:p, :p] into low (its diagonal holds the reciprocals); False if not positive."""
    for i in range(p):
        for j in range(i + 1):
            s = a[i, j]
            for m in range(j):
                s -= low[i, m] * low[j, m]
            if i == j:
                if not (s > 0.0):
                    return False
                low[i, i] = 1.0 / math.sqrt(s)
            else:
                low[i, j] = s * low[j, j]
    return True


@njit(cache=True, error_model="numpy")
def _chol_solve(low, p, b, out):
    for i in range(p):
        s = b[i]
        for m in range(i):
            s -= low[i, m] * out[m]
        out[i] = s * low[i, i]
    for i in range(p - 1, -1, -1):
        s = out[i]
        for m in range(i + 1, p):
            s -= low[m, i] * out[m]
        out[i] = s * low[i, i]


@njit(cache=True)
def _damped_step(fm, g, lam, p, free, work, low, scale, rhs, step):
    """Levenberg-Marquardt step on the Fisher matrix scaled to unit diagonal; parameters not ``free`` stay."""
    for i in range(p):
        d = fm[i, i]
        scale[i] = 1.0 / math.sqrt(d) if d > 0.0 else 1.0
    ok = True
    for i in range(p):
        for j in range(p):
            v = fm[i, j] * scale[i] * scale[j] if (free[i] and free[j]) else 0.0
            if not math.isfinite(v):
                ok = False
            work[i, j] = v
        work[i, i] = work[i, i] + lam + 1e-12 if free[i] else 1.0
        rhs[i] = g[i] * scale[i] if free[i] else 0.0
    if ok:
        ok = _cholesky(work, p, low)
    if not ok:
        for i in range(p):
            step[i] = 0.0
        return False
    _chol_solve(low, p, rhs, step)
    for i in range(p):
        step[i] = step[i] * scale[i] if free[i] else 0.0
    return True


@njit(cache=True)
def _invert(fm, p, cov, low, scale, unit, col):
    """Covariance from a Fisher matrix (scaled to unit diagonal); returns True when singular."""
    for i in range(p):
        d = fm[i, i]
        if not (d > 0.0 and math.isfinite(d)):
            return True
        scale[i] = 1.0 / math.sqrt(d)
    for i in range(p):
        for j in range(p):
            v = fm[i, j] * scale[i] * scale[j]
            if not math.isfinite(v):
                return True
            cov[i, j] = v
    if not _cholesky(cov, p, low):
        return True
    for j in range(p):
        for i in range(p):
            unit[i] = 1.0 if i == j else 0.0
        _chol_solve(low, p, unit, col)
        for i in range(p):
            cov[i, j] = col[i]
    for i in range(p):
        if cov[i, i] > SINGULAR_LIMIT or not (cov[i, i] > 0.0):
            return True
    for i in range(p):
        for j in range(p):
            cov[i, j] *= scale[i] * scale[j]
    return False


# ----------------------------------------------------------------------------- model and likelihood

_FAST = {"reassoc", "contract"}


@njit(cache=True, error_model="numpy")
def _load_window(lo, length, k, cfg, resid, base, has_base, finite, use_nbm, ws):
    """Data, extra variance, mask and background rows of the Jacobian for one window of k lines."""
    wf = ws.wf
    nbm = wf[_NBM]
    xref = lo + (length - 1) / 2.0
    for i in range(length):
        col = lo + i
        b = base[col] if has_base else 0.0
        y = resid[col]
        ex = b
        if use_nbm:
            y -= nbm[i]
            ex += nbm[i]
        wf[_Y, i] = y
        wf[_EX, i] = ex
        ok = finite[col] and not (use_nbm and wf[_SPK, i] > 0.0)
        ws.mask[i] = ok
        wf[_MF, i] = 1.0 if ok else 0.0
    row0 = k * cfg.npl
    for m in range(cfg.nb):
        row = ws.jr[row0 + m]
        for i in range(length):
            dx = lo + i - xref
            v = 1.0
            for _ in range(m):
                v *= dx
            row[i] = v
    return xref


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _block(n, wgt, r0, r1, r2, r3, q0, q1, q2, q3, out):
    """out[p, q] = sum_i wgt_i r_p[i] q_q[i] for two sets of four rows (one fused pass, vectorises)."""
    s00 = s01 = s02 = s03 = s10 = s11 = s12 = s13 = 0.0
    s20 = s21 = s22 = s23 = s30 = s31 = s32 = s33 = 0.0
    for i in range(n):
        w = wgt[i]
        a0 = w * r0[i]
        a1 = w * r1[i]
        a2 = w * r2[i]
        a3 = w * r3[i]
        b0, b1, b2, b3 = q0[i], q1[i], q2[i], q3[i]
        s00 += a0 * b0
        s01 += a0 * b1
        s02 += a0 * b2
        s03 += a0 * b3
        s10 += a1 * b0
        s11 += a1 * b1
        s12 += a1 * b2
        s13 += a1 * b3
        s20 += a2 * b0
        s21 += a2 * b1
        s22 += a2 * b2
        s23 += a2 * b3
        s30 += a3 * b0
        s31 += a3 * b1
        s32 += a3 * b2
        s33 += a3 * b3
    out[0, 0], out[0, 1], out[0, 2], out[0, 3] = s00, s01, s02, s03
    out[1, 0], out[1, 1], out[1, 2], out[1, 3] = s10, s11, s12, s13
    out[2, 0], out[2, 1], out[2, 2], out[2, 3] = s20, s21, s22, s23
    out[3, 0], out[3, 1], out[3, 2], out[3, 3] = s30, s31, s32, s33


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _rowsums(n, wgt, r0, r1, r2, r3, out):
    """out[p] = sum_i wgt_i r_p[i] for four rows."""
    s0 = s1 = s2 = s3 = 0.0
    for i in range(n):
        w = wgt[i]
        s0 += w * r0[i]
        s1 += w * r1[i]
        s2 += w * r2[i]
        s3 += w * r3[i]
    out[0], out[1], out[2], out[3] = s0, s1, s2, s3


@njit(cache=True)
def _column_index(j, q, cfg):
    """Parameter index of column q (0 centre, 1 area, 2 width, 3 second width) of line j; -1 if none."""
    return j * cfg.npl + q if q < cfg.npl else -1


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _evaluate(theta, k, cfg, x0, n, prof, observed, ws, tot, fm, g):
    """Model of a loaded window: curvature ``fm``, score ``g`` and variance ``tot`` per pixel.

    With ``observed`` the curvature is the Gauss-Newton part of the observed
    Hessian of the shifted-Poisson likelihood (weights ``y'/m**2`` clipped to
    ``[0.5, 2] / m``), which converges in a few steps even where the model
    misfits; otherwise it is the Fisher information (weights ``1/m``).
    The curvature is assembled from 4 x 4 blocks of fused passes over the
    pixels (line-line, line-background, background-background).  Returns the
    chi-square under the noise model.
    """
    npl = cfg.npl
    nb = cfg.nb
    p = k * npl + nb
    pe = p
    ws.stats[1] += 1
    ws.stats[2] += n
    lt, jr, wf = ws.lt, ws.jr, ws.wf
    y, extra, mf = wf[_Y], wf[_EX], wf[_MF]
    mu, wt, wr, wh = wf[_MU], wf[_WT], wf[_WR], wf[_WH]
    blk = ws.mats[5]
    sums = ws.vecs[_SUMS]
    for i in range(n):
        mu[i] = 0.0
    for j in range(k):
        b = j * npl
        w = theta[b + 2] if npl > 2 else 0.0
        w2 = theta[b + 3] if npl > 3 else 0.0
        f = lt[0, j]
        line_terms(cfg.shape, x0, n, theta[b], w, w2, prof, cfg.p_start, cfg.p_step, f, lt[1, j], lt[2, j],
                   lt[3, j], ws.edges)
        a = theta[b + 1]
        for i in range(n):
            mu[i] += a * f[i]
    bg0 = k * npl
    for m in range(nb):
        coef = theta[bg0 + m]
        row = jr[bg0 + m]
        for i in range(n):
            mu[i] += coef * row[i]
    rn2 = cfg.read_noise_e * cfg.read_noise_e
    chi2 = 0.0
    for i in range(n):
        t = max(max(mu[i] + extra[i], 0.0) + rn2, VARIANCE_FLOOR_E2)
        tot[i] = t
        wti = mf[i] / t
        ri = y[i] - mu[i]
        wri = wti * ri
        wt[i] = wti
        wr[i] = wri
        chi2 += wri * ri
        wh[i] = wti * min(max(1.0 + ri * wti, 0.5), 2.0) if observed else wti
    for a in range(pe):
        g[a] = 0.0
        for b in range(pe):
            fm[a, b] = 0.0
    # background rows, padded to four with the constant row (its extra sums are not used)
    br0 = jr[bg0]
    br1 = jr[bg0 + 1] if nb > 1 else br0
    br2 = jr[bg0 + 2] if nb > 2 else br0
    br3 = jr[bg0 + 3] if nb > 3 else br0
    # line columns: d mu / d(centre, area, width, width2) = (a dc, frac, a dw, a dw2)
    for j in range(k):
        aj = theta[j * npl + 1]
        sj = (aj, 1.0, aj, aj)
        for l in range(j, k):
            al = theta[l * npl + 1]
            sl = (al, 1.0, al, al)
            _block(n, wh, lt[1, j], lt[0, j], lt[2, j], lt[3, j], lt[1, l], lt[0, l], lt[2, l], lt[3, l], blk)
            for q in range(4):
                ia = _column_index(j, q, cfg)
                if ia < 0:
                    continue
                for r in range(4):
                    ib = _column_index(l, r, cfg)
                    if ib < 0:
                        continue
                    v = blk[q, r] * sj[q] * sl[r]
                    fm[ia, ib] = v
                    fm[ib, ia] = v
        _block(n, wh, lt[1, j], lt[0, j], lt[2, j], lt[3, j], br0, br1, br2, br3, blk)
        _rowsums(n, wr, lt[1, j], lt[0, j], lt[2, j], lt[3, j], sums)
        for q in range(4):
            ia = _column_index(j, q, cfg)
            if ia < 0:
                continue
            g[ia] = sums[q] * sj[q]
            for m in range(nb):
                v = blk[q, m] * sj[q]
                fm[ia, bg0 + m] = v
                fm[bg0 + m, ia] = v
    _block(n, wh, br0, br1, br2, br3, br0, br1, br2, br3, blk)
    _rowsums(n, wr, br0, br1, br2, br3, sums)
    for m in range(nb):
        g[bg0 + m] = sums[m]
        for m2 in range(nb):
            fm[bg0 + m, bg0 + m2] = blk[m, m2]
    for a in range(p):
        if not ws.free[a]:
            g[a] = 0.0
            for b in range(pe):
                fm[a, b] = 0.0
                fm[b, a] = 0.0
            fm[a, a] = 1.0
    return chi2


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _evaluate_single(theta, shape, rn2, x0, n, observed, y, extra, mf, dxr, tot, e, u, fm, g):
    """:func:`_evaluate` for the common case of one Lorentzian or Gaussian line on a quadratic
    background, in one fused pass over the pixels (scalar accumulators; the loop vectorises).

    ``e`` holds the three 1-D edge arrays and ``u`` the same shifted by one
    edge: views made once per fit by the caller, so no view is made per
    evaluation.
    """
    e0, e1, e2 = e
    u0, u1, u2 = u
    c, a, w = theta[0], theta[1], theta[2]
    b0, b1, b2 = theta[3], theta[4], theta[5]
    inv = 1.0 / w
    if shape == LORENTZIAN:
        lorentz_edges(x0, n, c, inv, e0, e1, e2)
    else:
        gauss_edges(x0, n, c, inv, e0, e1, e2)
    ainv = a * inv
    chi2 = 0.0
    g0 = g1 = g2 = g3 = g4 = g5 = 0.0
    f00 = f01 = f02 = f03 = f04 = f05 = 0.0
    f11 = f12 = f13 = f14 = f15 = 0.0
    f22 = f23 = f24 = f25 = 0.0
    m0 = m1 = m2 = m3 = m4 = 0.0
    for i in range(n):
        fr = u0[i] - e0[i]
        j0 = (e1[i] - u1[i]) * ainv
        j2 = (e2[i] - u2[i]) * ainv
        dx = dxr[i]
        dx2 = dx * dx
        mu = a * fr + b0 + b1 * dx + b2 * dx2
        t = max(max(mu + extra[i], 0.0) + rn2, VARIANCE_FLOOR_E2)
        tot[i] = t
        wt = mf[i] / t
        r = y[i] - mu
        wr = wt * r
        chi2 += wr * r
        g0 += wr * j0
        g1 += wr * fr
        g2 += wr * j2
        g3 += wr
        g4 += wr * dx
        g5 += wr * dx2
        wh = wt * min(max(1.0 + r * wt, 0.5), 2.0) if observed else wt
        h0 = wh * j0
        h1 = wh * fr
        h2 = wh * j2
        f00 += h0 * j0
        f01 += h0 * fr
        f02 += h0 * j2
        f03 += h0
        f04 += h0 * dx
        f05 += h0 * dx2
        f11 += h1 * fr
        f12 += h1 * j2
        f13 += h1
        f14 += h1 * dx
        f15 += h1 * dx2
        f22 += h2 * j2
        f23 += h2
        f24 += h2 * dx
        f25 += h2 * dx2
        hd = wh * dx2
        m0 += wh
        m1 += wh * dx
        m2 += hd
        m3 += hd * dx
        m4 += hd * dx2
    g[0] = g0
    g[1] = g1
    g[2] = g2
    g[3] = g3
    g[4] = g4
    g[5] = g5
    fm[0, 0] = f00
    fm[0, 1] = fm[1, 0] = f01
    fm[0, 2] = fm[2, 0] = f02
    fm[0, 3] = fm[3, 0] = f03
    fm[0, 4] = fm[4, 0] = f04
    fm[0, 5] = fm[5, 0] = f05
    fm[1, 1] = f11
    fm[1, 2] = fm[2, 1] = f12
    fm[1, 3] = fm[3, 1] = f13
    fm[1, 4] = fm[4, 1] = f14
    fm[1, 5] = fm[5, 1] = f15
    fm[2, 2] = f22
    fm[2, 3] = fm[3, 2] = f23
    fm[2, 4] = fm[4, 2] = f24
    fm[2, 5] = fm[5, 2] = f25
    fm[3, 3] = m0
    fm[3, 4] = fm[4, 3] = m1
    fm[3, 5] = fm[5, 3] = fm[4, 4] = m2
    fm[4, 5] = fm[5, 4] = m3
    fm[5, 5] = m4
    return chi2


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _evaluate_pair(theta, shape, rn2, x0, n, observed, y, extra, mf, dxr, tot, e, u, fm, g):
    """:func:`_evaluate` for two Lorentzian or Gaussian lines on a quadratic background, fused like
    :func:`_evaluate_single` (parameters c1, a1, w1, c2, a2, w2, b0, b1, b2; ``e``/``u`` hold six edge arrays,
    three per line).  Written out, one scalar accumulator per entry of the curvature matrix, so that the
    pixel loop vectorises."""
    ea0, ea1, ea2, eb0, eb1, eb2 = e
    ua0, ua1, ua2, ub0, ub1, ub2 = u
    c1, a1, w1, c2, a2, w2 = theta[0], theta[1], theta[2], theta[3], theta[4], theta[5]
    b0, b1, b2 = theta[6], theta[7], theta[8]
    inv1 = 1.0 / w1
    inv2 = 1.0 / w2
    if shape == LORENTZIAN:
        lorentz_edges(x0, n, c1, inv1, ea0, ea1, ea2)
        lorentz_edges(x0, n, c2, inv2, eb0, eb1, eb2)
    else:
        gauss_edges(x0, n, c1, inv1, ea0, ea1, ea2)
        gauss_edges(x0, n, c2, inv2, eb0, eb1, eb2)
    s1 = a1 * inv1
    s2 = a2 * inv2
    chi2 = 0.0
    g0 = g1 = g2 = g3 = g4 = g5 = g6 = g7 = g8 = f00 = f01 = f02 = 0.0
    f03 = f04 = f05 = f06 = f07 = f08 = f11 = f12 = f13 = f14 = f15 = f16 = 0.0
    f17 = f18 = f22 = f23 = f24 = f25 = f26 = f27 = f28 = f33 = f34 = f35 = 0.0
    f36 = f37 = f38 = f44 = f45 = f46 = f47 = f48 = f55 = f56 = f57 = f58 = 0.0
    m0 = m1 = m2 = m3 = m4 = 0.0
    for i in range(n):
        fa = ua0[i] - ea0[i]
        fb = ub0[i] - eb0[i]
        j0 = (ea1[i] - ua1[i]) * s1
        j2 = (ea2[i] - ua2[i]) * s1
        j3 = (eb1[i] - ub1[i]) * s2
        j5 = (eb2[i] - ub2[i]) * s2
        dx = dxr[i]
        dx2 = dx * dx
        mu = a1 * fa + a2 * fb + b0 + b1 * dx + b2 * dx2
        t = max(max(mu + extra[i], 0.0) + rn2, VARIANCE_FLOOR_E2)
        tot[i] = t
        wt = mf[i] / t
        r = y[i] - mu
        wr = wt * r
        chi2 += wr * r
        wh = wt * min(max(1.0 + r * wt, 0.5), 2.0) if observed else wt
        g0 += wr * j0
        g1 += wr * fa
        g2 += wr * j2
        g3 += wr * j3
        g4 += wr * fb
        g5 += wr * j5
        g6 += wr
        g7 += wr * dx
        g8 += wr * dx2
        h0 = wh * j0
        f00 += h0 * j0
        f01 += h0 * fa
        f02 += h0 * j2
        f03 += h0 * j3
        f04 += h0 * fb
        f05 += h0 * j5
        f06 += h0
        f07 += h0 * dx
        f08 += h0 * dx2
        h1 = wh * fa
        f11 += h1 * fa
        f12 += h1 * j2
        f13 += h1 * j3
        f14 += h1 * fb
        f15 += h1 * j5
        f16 += h1
        f17 += h1 * dx
        f18 += h1 * dx2
        h2 = wh * j2
        f22 += h2 * j2
        f23 += h2 * j3
        f24 += h2 * fb
        f25 += h2 * j5
        f26 += h2
        f27 += h2 * dx
        f28 += h2 * dx2
        h3 = wh * j3
        f33 += h3 * j3
        f34 += h3 * fb
        f35 += h3 * j5
        f36 += h3
        f37 += h3 * dx
        f38 += h3 * dx2
        h4 = wh * fb
        f44 += h4 * fb
        f45 += h4 * j5
        f46 += h4
        f47 += h4 * dx
        f48 += h4 * dx2
        h5 = wh * j5
        f55 += h5 * j5
        f56 += h5
        f57 += h5 * dx
        f58 += h5 * dx2
        hd = wh * dx2
        m0 += wh
        m1 += wh * dx
        m2 += hd
        m3 += hd * dx
        m4 += hd * dx2
    g[0] = g0
    g[1] = g1
    g[2] = g2
    g[3] = g3
    g[4] = g4
    g[5] = g5
    g[6] = g6
    g[7] = g7
    g[8] = g8
    fm[0, 0] = fm[0, 0] = f00
    fm[0, 1] = fm[1, 0] = f01
    fm[0, 2] = fm[2, 0] = f02
    fm[0, 3] = fm[3, 0] = f03
    fm[0, 4] = fm[4, 0] = f04
    fm[0, 5] = fm[5, 0] = f05
    fm[0, 6] = fm[6, 0] = f06
    fm[0, 7] = fm[7, 0] = f07
    fm[0, 8] = fm[8, 0] = f08
    fm[1, 1] = fm[1, 1] = f11
    fm[1, 2] = fm[2, 1] = f12
    fm[1, 3] = fm[3, 1] = f13
    fm[1, 4] = fm[4, 1] = f14
    fm[1, 5] = fm[5, 1] = f15
    fm[1, 6] = fm[6, 1] = f16
    fm[1, 7] = fm[7, 1] = f17
    fm[1, 8] = fm[8, 1] = f18
    fm[2, 2] = fm[2, 2] = f22
    fm[2, 3] = fm[3, 2] = f23
    fm[2, 4] = fm[4, 2] = f24
    fm[2, 5] = fm[5, 2] = f25
    fm[2, 6] = fm[6, 2] = f26
    fm[2, 7] = fm[7, 2] = f27
    fm[2, 8] = fm[8, 2] = f28
    fm[3, 3] = fm[3, 3] = f33
    fm[3, 4] = fm[4, 3] = f34
    fm[3, 5] = fm[5, 3] = f35
    fm[3, 6] = fm[6, 3] = f36
    fm[3, 7] = fm[7, 3] = f37
    fm[3, 8] = fm[8, 3] = f38
    fm[4, 4] = fm[4, 4] = f44
    fm[4, 5] = fm[5, 4] = f45
    fm[4, 6] = fm[6, 4] = f46
    fm[4, 7] = fm[7, 4] = f47
    fm[4, 8] = fm[8, 4] = f48
    fm[5, 5] = fm[5, 5] = f55
    fm[5, 6] = fm[6, 5] = f56
    fm[5, 7] = fm[7, 5] = f57
    fm[5, 8] = fm[8, 5] = f58
    fm[6, 6] = m0
    fm[6, 7] = fm[7, 6] = m1
    fm[6, 8] = fm[8, 6] = fm[7, 7] = m2
    fm[7, 8] = fm[8, 7] = m3
    fm[8, 8] = m4
    return chi2


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _linear_start_pair(theta, shape, rn2, x0, n, y, extra, mf, dxr, e, u, a_mat, low, rhs, sol):
    """:func:`_linear_start` for two Lorentzian or Gaussian lines on a quadratic background, fused."""
    ea0, ea1, ea2, eb0, eb1, eb2 = e
    ua0, ub0 = u[0], u[3]
    if shape == LORENTZIAN:
        lorentz_edges(x0, n, theta[0], 1.0 / theta[2], ea0, ea1, ea2)
        lorentz_edges(x0, n, theta[3], 1.0 / theta[5], eb0, eb1, eb2)
    else:
        gauss_edges(x0, n, theta[0], 1.0 / theta[2], ea0, ea1, ea2)
        gauss_edges(x0, n, theta[3], 1.0 / theta[5], eb0, eb1, eb2)
    saa = sab = sa1 = sax = sax2 = sbb = sb1 = sbx = sbx2 = 0.0
    s11 = s1x = sxx = sx3 = sx4 = 0.0
    ra = rb = r1 = rx = rx2 = 0.0
    for i in range(n):
        wgt = mf[i] / max(y[i] + extra[i] + rn2, 1.0)
        fa = ua0[i] - ea0[i]
        fb = ub0[i] - eb0[i]
        dx = dxr[i]
        dx2 = dx * dx
        wa = wgt * fa
        wb = wgt * fb
        wy = wgt * y[i]
        saa += wa * fa
        sab += wa * fb
        sa1 += wa
        sax += wa * dx
        sax2 += wa * dx2
        sbb += wb * fb
        sb1 += wb
        sbx += wb * dx
        sbx2 += wb * dx2
        s11 += wgt
        s1x += wgt * dx
        sxx += wgt * dx2
        sx3 += wgt * dx2 * dx
        sx4 += wgt * dx2 * dx2
        ra += wy * fa
        rb += wy * fb
        r1 += wy
        rx += wy * dx
        rx2 += wy * dx2
    rows = ((saa, sab, sa1, sax, sax2), (sab, sbb, sb1, sbx, sbx2), (sa1, sb1, s11, s1x, sxx),
            (sax, sbx, s1x, sxx, sx3), (sax2, sbx2, sxx, sx3, sx4))
    for q in range(5):
        for r in range(5):
            a_mat[q, r] = rows[q][r]
        a_mat[q, q] *= 1.0 + 1e-9
    rhs[0], rhs[1], rhs[2], rhs[3], rhs[4] = ra, rb, r1, rx, rx2
    five = np.int64(5)
    if not _cholesky(a_mat, five, low):
        return
    _chol_solve(low, five, rhs, sol)
    if sol[0] > 0.0 and sol[1] > 0.0 and math.isfinite(sol[0]) and math.isfinite(sol[1]):
        theta[1] = sol[0]
        theta[4] = sol[1]
        theta[6] = sol[2]
        theta[7] = sol[3]
        theta[8] = sol[4]


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _dnll(n, rn2, tot, tot2, y, extra, mf):
    """Change of the negative log-likelihood sum(m - y' log m) from ``tot`` to ``tot2`` and the sum of ``tot``.

    Written without cancellation as sum(dm - y' log1p(dm/m)); log1p by its series
    where every |dm/m| < 0.01 (error below 1e-17 relative), exactly otherwise.
    """
    acc = 0.0
    total = 0.0
    big = 0.0
    for i in range(n):
        t = tot[i]
        dm = tot2[i] - t
        x = dm / t
        ys = y[i] + extra[i] + rn2
        series = x * (1.0 - x * (0.5 - x * (1.0 / 3.0 - x * (0.25 - x * (0.2 - x * (1.0 / 6.0 - x / 7.0))))))
        acc += mf[i] * (dm - ys * series)
        total += mf[i] * t
        big = max(big, mf[i] * abs(x))
    if big >= 0.01:
        acc = 0.0
        for i in range(n):
            if mf[i] > 0:
                t = tot[i]
                dm = tot2[i] - t
                acc += dm - (y[i] + extra[i] + rn2) * math.log1p(dm / t)
    return acc, total


@njit(cache=True, error_model="numpy")
def _linear_start(theta, k, cfg, x0, n, prof, ws):
    """Areas and background coefficients by weighted linear least squares at the starting centres and
    widths (data weights 1 / (y' + read noise^2)); a better start than the local level alone."""
    npl, nb = cfg.npl, cfg.nb
    lt, jr, wf = ws.lt, ws.jr, ws.wf
    y, extra, mf = wf[_Y], wf[_EX], wf[_MF]
    m = k + nb
    a_mat = ws.mats[3]
    low = ws.mats[4]
    rhs = ws.vecs[_RHS]
    sol = ws.vecs[_STEP]
    v = ws.vecs[_SUMS]
    for j in range(k):
        b = j * npl
        w = theta[b + 2] if npl > 2 else 0.0
        w2 = theta[b + 3] if npl > 3 else 0.0
        line_terms(cfg.shape, x0, n, theta[b], w, w2, prof, cfg.p_start, cfg.p_step, lt[0, j], lt[1, j],
                   lt[2, j], lt[3, j], ws.edges)
    for q in range(m):
        rhs[q] = 0.0
        for r in range(m):
            a_mat[q, r] = 0.0
    rn2 = cfg.read_noise_e * cfg.read_noise_e
    bg0 = k * npl
    for i in range(n):
        if mf[i] == 0.0:
            continue
        wgt = 1.0 / max(y[i] + extra[i] + rn2, 1.0)
        for j in range(k):
            v[j] = lt[0, j, i]
        for q in range(nb):
            v[k + q] = jr[bg0 + q, i]
        for q in range(m):
            wq = wgt * v[q]
            rhs[q] += wq * y[i]
            for r in range(q + 1):
                a_mat[q, r] += wq * v[r]
    for q in range(m):
        for r in range(q):
            a_mat[r, q] = a_mat[q, r]
        a_mat[q, q] *= 1.0 + 1e-9
    if not _cholesky(a_mat, m, low):
        return
    _chol_solve(low, m, rhs, sol)
    for j in range(k):
        if not (sol[j] > 0.0 and math.isfinite(sol[j])):
            return
    for j in range(k):
        theta[j * npl + 1] = sol[j]
    for q in range(nb):
        theta[bg0 + q] = sol[k + q]


@njit(cache=True, error_model="numpy", fastmath=_FAST)
def _linear_start_single(theta, shape, rn2, x0, n, y, extra, mf, dxr, e, u, a_mat, low, rhs, sol):
    """:func:`_linear_start` for one Lorentzian or Gaussian line on a quadratic background, fused."""
    e0, e1, e2 = e
    u0 = u[0]
    inv = 1.0 / theta[2]
    if shape == LORENTZIAN:
        lorentz_edges(x0, n, theta[0], inv, e0, e1, e2)
    else:
        gauss_edges(x0, n, theta[0], inv, e0, e1, e2)
    sff = sf1 = sfx = sfx2 = s11 = s1x = sxx = sx2x2 = sx3 = 0.0
    rf = r1 = rx = rx2 = 0.0
    for i in range(n):
        wgt = mf[i] / max(y[i] + extra[i] + rn2, 1.0)
        fr = u0[i] - e0[i]
        dx = dxr[i]
        dx2 = dx * dx
        wf_ = wgt * fr
        wy = wgt * y[i]
        sff += wf_ * fr
        sf1 += wf_
        sfx += wf_ * dx
        sfx2 += wf_ * dx2
        s11 += wgt
        s1x += wgt * dx
        sxx += wgt * dx2
        sx3 += wgt * dx2 * dx
        sx2x2 += wgt * dx2 * dx2
        rf += wy * fr
        r1 += wy
        rx += wy * dx
        rx2 += wy * dx2
    rows = ((sff, sf1, sfx, sfx2), (sf1, s11, s1x, sxx), (sfx, s1x, sxx, sx3), (sfx2, sxx, sx3, sx2x2))
    for q in range(4):
        for r in range(4):
            a_mat[q, r] = rows[q][r]
        a_mat[q, q] *= 1.0 + 1e-9
    rhs[0], rhs[1], rhs[2], rhs[3] = rf, r1, rx, rx2
    four = np.int64(4)  # typed, not literal: one compiled version of the callee
    if not _cholesky(a_mat, four, low):
        return
    _chol_solve(low, four, rhs, sol)
    if sol[0] > 0.0 and math.isfinite(sol[0]):
        theta[1] = sol[0]
        theta[3] = sol[1]
        theta[4] = sol[2]
        theta[5] = sol[3]


@njit(cache=True)
def _project(theta, k, cfg):
    npl = cfg.npl
    for j in range(k):
        b = j * npl
        if cfg.shape == VOIGT:
            theta[b + 2] = min(max(theta[b + 2], VOIGT_MIN_COMPONENT_PX), cfg.max_fwhm_px)
            theta[b + 3] = min(max(theta[b + 3], VOIGT_MIN_COMPONENT_PX), cfg.max_fwhm_px)
        elif cfg.shape == INSTRUMENT:
            theta[b + 2] = min(max(theta[b + 2], cfg.min_fwhm_px / cfg.inst_fwhm_px),
                               cfg.max_fwhm_px / cfg.inst_fwhm_px)
        else:
            theta[b + 2] = min(max(theta[b + 2], cfg.min_fwhm_px), cfg.max_fwhm_px)


@njit(cache=True, error_model="numpy")
def _lm(theta, k, cfg, x0, n, prof, ws):
    """Levenberg-Marquardt Fisher scoring of one loaded window; covariance into ``mats[2]``.

    Returns ``(converged, singular, chi2, n_valid)``.
    """
    mats, vecs, wf = ws.mats, ws.vecs, ws.wf
    fm, fm2, cov, work, low = mats[0], mats[1], mats[2], mats[3], mats[4]
    g, g2, trial, step, scale, rhs = vecs[_G], vecs[_G2], vecs[_TRIAL], vecs[_STEP], vecs[_SCALE], vecs[_RHS]
    tot, tot2 = wf[_TOT], wf[_TOT2]
    y, extra, mf = wf[_Y], wf[_EX], wf[_MF]
    p = k * cfg.npl + cfg.nb
    rn2 = cfg.read_noise_e * cfg.read_noise_e
    ws.stats[0] += 1
    ws.stats[3 + min(k, 4) - 1] += 1
    _project(theta, k, cfg)
    lam = 1e-3
    observed = np.bool_(True)  # typed flags, not literals: one compiled version of each callee
    expected = np.bool_(False)
    # views for the fused single-line path, made once per fit
    fused = cfg.npl == 3 and cfg.nb == 3 and (cfg.shape == LORENTZIAN or cfg.shape == GAUSSIAN)
    single = fused and k == 1
    pair = fused and k == 2
    edges = ws.edges
    e3 = (edges[0], edges[1], edges[2])
    u3 = (edges[0, 1:n + 1], edges[1, 1:n + 1], edges[2, 1:n + 1])
    e6 = (edges[0], edges[1], edges[2], edges[3], edges[4], edges[5])
    u6 = (edges[0, 1:n + 1], edges[1, 1:n + 1], edges[2, 1:n + 1], edges[3, 1:n + 1], edges[4, 1:n + 1],
          edges[5, 1:n + 1])
    dxr = ws.jr[k * cfg.npl + 1]
    if single:
        _linear_start_single(theta, cfg.shape, rn2, x0, n, y, extra, mf, dxr, e3, u3, work, low, rhs, step)
    elif pair:
        _linear_start_pair(theta, cfg.shape, rn2, x0, n, y, extra, mf, dxr, e6, u6, work, low, rhs, step)
    else:
        _linear_start(theta, k, cfg, x0, n, prof, ws)
    if pair:
        _evaluate_pair(theta, cfg.shape, rn2, x0, n, observed, y, extra, mf, dxr, tot, e6, u6, fm, g)
    elif single:
        _evaluate_single(theta, cfg.shape, rn2, x0, n, observed, y, extra, mf, dxr, tot, e3, u3, fm, g)
    else:
        _evaluate(theta, k, cfg, x0, n, prof, observed, ws, tot, fm, g)
    converged = False
    act = ws.free
    for _ in range(cfg.max_iterations):
        ws.stats[5 if k == 1 else 6] += 1
        if not _damped_step(fm, g, lam, p, act, work, low, scale, rhs, step):
            lam *= 10.0  # curvature not positive definite here: damp more
            if lam >= 1e12:
                break
            continue
        for a in range(p):
            trial[a] = theta[a] + step[a]
        _project(trial, k, cfg)
        small = True
        for a in range(p):
            if abs(trial[a] - theta[a]) * math.sqrt(max(fm[a, a], 0.0)) >= cfg.step_tol_sigma:
                small = False
                break
        if small and lam <= 1e-3:
            # an undamped step this small sits inside the quadratic region: take it and stop
            for a in range(p):
                theta[a] = trial[a]
            converged = True
            break
        if pair:
            _evaluate_pair(trial, cfg.shape, rn2, x0, n, observed, y, extra, mf, dxr, tot2, e6, u6, fm2, g2)
        elif single:
            _evaluate_single(trial, cfg.shape, rn2, x0, n, observed, y, extra, mf, dxr, tot2, e3, u3, fm2, g2)
        else:
            _evaluate(trial, k, cfg, x0, n, prof, observed, ws, tot2, fm2, g2)
        dnll, total = _dnll(n, rn2, tot, tot2, y, extra, mf)
        accept = math.isfinite(dnll) and dnll <= 1e-12 * abs(total)
        if accept:
            for a in range(p):
                theta[a] = trial[a]
                g[a] = g2[a]
                for b in range(p):
                    fm[a, b] = fm2[a, b]
            for i in range(n):
                tot[i] = tot2[i]
            lam = max(lam * 0.1, 1e-9)
        else:
            lam *= 10.0
        if (accept and small) or ((not accept) and lam > 1e8):
            converged = True
            break
        if lam >= 1e12:
            break
    if pair:
        chi2 = _evaluate_pair(theta, cfg.shape, rn2, x0, n, expected, y, extra, mf, dxr, tot, e6, u6, fm, g)
    elif single:
        chi2 = _evaluate_single(theta, cfg.shape, rn2, x0, n, expected, y, extra, mf, dxr, tot, e3, u3, fm, g)
    else:
        chi2 = _evaluate(theta, k, cfg, x0, n, prof, expected, ws, tot, fm, g)
    n_valid = 0
    for i in range(n):
        if ws.mask[i]:
            n_valid += 1
    singular = _invert(fm, p, cov, low, scale, rhs, trial)
    return converged, singular, chi2, n_valid


# ----------------------------------------------------------------------------- per spectrum

@njit(cache=True)
def _half_window(cfg, w, w2):
    if cfg.half_fixed_px > 0.0:
        return cfg.half_fixed_px
    if cfg.shape == LORENTZIAN:
        return max(6.0, 5.0 * w)
    if cfg.shape == GAUSSIAN:
        return max(4.0, 3.0 * w)
    if cfg.shape == VOIGT:
        return max(6.0, 5.0 * voigt_fwhm(w, w2))
    return cfg.inst_half_px


@njit(cache=True)
def _peak_fraction(cfg, c, w, w2, prof, ws):
    lt = ws.lt
    line_terms(cfg.shape, float(round(c)), np.int64(1), c, w, w2, prof, cfg.p_start, cfg.p_step, lt[0, 0], lt[1, 0],
               lt[2, 0], lt[3, 0], ws.edges)
    return lt[0, 0, 0]


@njit(cache=True, error_model="numpy")
def _initial_estimates(resid, finite, pix, cfg, r):
    """Sub-pixel centre, width (half-maximum crossings), peak and local level of a detection."""
    n = resid.size
    reach = int(math.ceil(cfg.max_fwhm_px)) + 2
    mid = reach
    for o in range(2 * reach + 1):
        col = pix + o - reach
        if 0 <= col < n and finite[col]:
            r[o] = resid[col]
        else:
            r[o] = -math.inf
    # local level: the lower of the two outermost pixel pairs (a neighbour line may sit on one side)
    last = 2 * reach
    side_l = 0.5 * (r[0] + r[1]) if (math.isfinite(r[0]) and math.isfinite(r[1])) else math.inf
    side_r = 0.5 * (r[last - 1] + r[last]) if (math.isfinite(r[last - 1]) and math.isfinite(r[last])) \
        else math.inf
    level = min(side_l, side_r)
    if not math.isfinite(level):
        level = 0.0
    for o in range(2 * reach + 1):
        r[o] -= level
    r0 = r[mid]
    rl = r[mid - 1] if math.isfinite(r[mid - 1]) else r0
    rr = r[mid + 1] if math.isfinite(r[mid + 1]) else r0
    curv = rl - 2.0 * r0 + rr
    shift = 0.5 * (rl - rr) / curv if curv < 0 else 0.0
    center = pix + min(max(shift, -0.5), 0.5)
    half = 0.5 * r0
    width = 0.0
    for sign in (1, -1):
        j = 0
        for m in range(reach + 1):
            if r[mid + sign * m] < half:
                j = m
                break
        if j == 0:
            j = reach
        v_in = r[mid + sign * (j - 1)]
        v_out = r[mid + sign * j]
        if not math.isfinite(v_out):
            v_out = 0.0
        den = v_in - v_out
        t = (v_in - half) / den if den > 0 else 0.5
        width += (j - 1) + min(max(t, 0.0), 1.0)
    if not (r0 > 0 and math.isfinite(width)):
        width = cfg.fwhm_guess_px
    width = min(max(width, max(cfg.min_fwhm_px, 1.0)), cfg.max_fwhm_px)
    # a single-pixel spike: both neighbours below SPIKE_NEIGHBOUR_RATIO of the peak (light through the
    # spectrometer spreads over at least ~1.2 px FWHM, which leaves its neighbours above a quarter of it)
    spike = r0 > 0 and max(rl, rr) < SPIKE_NEIGHBOUR_RATIO * r0
    return center, width, max(r0, 0.0), level, spike


@njit(cache=True)
def _set_free(k, cfg, ws, stretch_free):
    p = k * cfg.npl + cfg.nb
    for a in range(p):
        ws.free[a] = True
    if cfg.npl > 3 and not cfg.w2_free:
        for j in range(k):
            ws.free[j * cfg.npl + 3] = False
    if cfg.shape == INSTRUMENT and not stretch_free:
        for j in range(k):
            ws.free[j * cfg.npl + 2] = False  # a laser line is the instrument function itself


@njit(cache=True, error_model="numpy")
def _store(members, k, cfg, theta, lo, length, converged, singular, chi2, n_valid, raw, finite, base, has_base,
           prof, ws, lf_out, li_out):
    """Results of one fitted window into the per-line fields of ``lf_out``/``li_out``."""
    cov = ws.mats[2]
    vecs = ws.vecs
    errs = vecs[_ERRS]
    npl = cfg.npl
    p = k * npl + cfg.nb
    xref = lo + (length - 1) / 2.0
    sat = False
    nonfinite = False
    for i in range(length):
        col = lo + i
        if raw[col] >= cfg.saturation_e:
            sat = True
        if not finite[col]:
            nonfinite = True
    bad_group = singular
    for a in range(p):
        if not math.isfinite(theta[a]):
            bad_group = True
    dof = max(n_valid - p, 1)
    for j in range(k):
        m = members[j]
        b = j * npl
        c = theta[b]
        a = theta[b + 1]
        w = theta[b + 2]
        w2 = theta[b + 3] if npl > 3 else math.nan
        bad_line = False
        for q in range(4):
            errs[q] = math.nan
        for q in range(npl):
            if (q == 3 and not cfg.w2_free) or (q == 2 and cfg.shape == INSTRUMENT):
                continue
            if not singular:
                v = cov[b + q, b + q]
                errs[q] = math.sqrt(v) if v >= 0 else math.nan
            if not math.isfinite(errs[q]):
                bad_line = True
        lf_out[_CLG, m] = cov[b + 2, b + 3] if (npl > 3 and cfg.w2_free and not singular) else math.nan
        lf_out[_C, m] = c
        lf_out[_A, m] = a
        lf_out[_EC, m] = errs[0]
        lf_out[_EA, m] = errs[1]
        lf_out[_W, m] = w
        lf_out[_EW, m] = errs[2]
        lf_out[_W2, m] = w2
        lf_out[_EW2, m] = errs[3]
        if math.isfinite(c) and math.isfinite(w):
            lf_out[_AMP, m] = a * _peak_fraction(cfg, c, w, w2, prof, ws)
        else:
            lf_out[_AMP, m] = math.nan
        # background under the centre: global baseline (interpolated) plus the local polynomial
        bl = 0.0
        if has_base and math.isfinite(c):
            pos = min(max(c, 0.0), base.size - 1.000001)
            i0 = int(math.floor(pos))
            t = pos - i0
            bl = base[i0] * (1.0 - t) + base[i0 + 1] * t
        dxc = c - xref
        poly = 0.0
        for q in range(cfg.nb - 1, -1, -1):
            poly = poly * dxc + theta[k * npl + q]
        lf_out[_BG, m] = bl + poly
        lf_out[_CHI2, m] = chi2 / dof
        li_out[_SAT, m] = 1 if sat else 0
        if cfg.shape == VOIGT:
            wv = voigt_fwhm(w, w2)
            at_bound = (wv <= cfg.min_fwhm_px * (1 + 1e-6) or wv >= cfg.max_fwhm_px * (1 - 1e-6)
                        or w >= cfg.max_fwhm_px * (1 - 1e-6) or w2 >= cfg.max_fwhm_px * (1 - 1e-6))
        elif cfg.shape == INSTRUMENT:
            at_bound = False
        else:
            at_bound = w <= cfg.min_fwhm_px * (1 + 1e-6) or w >= cfg.max_fwhm_px * (1 - 1e-6)
        code = 0
        if not converged:
            code = _NOCONV
        if at_bound:
            code = _BOUND
        if a <= 0:
            code = _AREA
        if c < lo or c > lo + length - 1:
            code = _LEFT
        if bad_line or bad_group:
            code = _SINGULAR
        if nonfinite:
            code = _NONFINITE
        li_out[_MSG, m] = code


@njit(cache=True)
def _fit_window(members, k, cfg, lo, length, bg0, src_f, resid, base, has_base, finite, raw, use_nbm, prof, ws,
                lf_out, li_out):
    """Fit one window of k lines from the starting values in ``src_f`` (fields _C0, _A0, _W0, _W20)."""
    theta = ws.vecs[_THETA]
    npl = cfg.npl
    for j in range(k):
        m = members[j]
        b = j * npl
        theta[b] = src_f[_C0, m]
        theta[b + 1] = src_f[_A0, m]
        if npl > 2:
            theta[b + 2] = src_f[_W0, m]
        if npl > 3:
            theta[b + 3] = src_f[_W20, m]
    for q in range(cfg.nb):
        theta[k * npl + q] = 0.0
    theta[k * npl] = bg0
    _set_free(k, cfg, ws, np.bool_(False))
    _load_window(lo, length, k, cfg, resid, base, has_base, finite, use_nbm, ws)
    conv, sing, chi2, n_valid = _lm(theta, k, cfg, float(lo), length, prof, ws)
    _store(members, k, cfg, theta, lo, length, conv, sing, chi2, n_valid, raw, finite, base, has_base, prof, ws,
           lf_out, li_out)
    if cfg.shape == INSTRUMENT:
        _instrument_width(members, k, cfg, theta, lo, length, prof, ws, lf_out)
    return chi2


@njit(cache=True, error_model="numpy")
def _instrument_width(members, k, cfg, theta, lo, length, prof, ws, lf_out):
    """Width of instrument-shaped lines: the fit repeated from its solution with the stretch freed.

    The centre, area and their errors stay those of the fixed-shape fit; the
    width (stretch times the instrument FWHM) and its error are the maximum-
    likelihood ones, NaN when that fit does not converge.
    """
    theta2 = ws.vecs[_THETA2]
    p = k * cfg.npl + cfg.nb
    for a in range(p):
        theta2[a] = theta[a]
    _set_free(k, cfg, ws, np.bool_(True))
    conv, sing, _, _ = _lm(theta2, k, cfg, float(lo), length, prof, ws)
    cov = ws.mats[2]
    for j in range(k):
        b = j * cfg.npl + 2
        ok = conv and not sing and cov[b, b] > 0
        lf_out[_W, members[j]] = theta2[b] * cfg.inst_fwhm_px if ok else math.nan
        lf_out[_EW, members[j]] = math.sqrt(cov[b, b]) * cfg.inst_fwhm_px if ok else math.nan


@njit(cache=True, error_model="numpy")
def _neighbour_model(g, cfg, n_lines, lo, length, filled, prof, ws):
    """Fitted profiles (from ``ws.snap``) of lines outside group ``g`` reaching into its window.

    Returns True when their summed chi-square contribution under the noise
    model, sum(model^2 / var), reaches ``NEIGHBOUR_MIN_CHI2`` (below it the
    wings cannot move a centre by more than 0.1 sigma), or when a spike (a
    line fitted at the lower width bound) lies in the window: its pixels are
    then marked in ``wf[_SPK]`` and left out of the refit.
    """
    lt, snap, li = ws.lt, ws.snap, ws.li
    nbm = ws.wf[_NBM]
    spk = ws.wf[_SPK]
    for i in range(length):
        nbm[i] = 0.0
        spk[i] = 0.0
    hi = lo + length - 1
    touched = False
    spikes = False
    for m in range(n_lines):
        if li[_GRP, m] == g:
            continue
        c, w, w2, a = snap[0, m], snap[1, m], snap[2, m], snap[3, m]
        if not (math.isfinite(c) and c > lo - 2 and c < hi + 2):
            pass
        elif snap[4, m] <= cfg.min_fwhm_px * (1 + 1e-6):
            # narrower than any light through the spectrometer (a spike): its pixels are left out of the
            # window instead of being modelled
            r = int(round(c))
            for i in range(max(r - 1 - lo, 0), min(r + 2 - lo, length)):
                spk[i] = 1.0
                spikes = True
            continue
        if not (math.isfinite(c) and math.isfinite(w) and math.isfinite(a) and a > 0):
            continue
        if cfg.npl > 3 and not math.isfinite(w2):
            continue
        dist = max(max(lo - c, c - hi), 0.0)
        if dist >= _half_window(cfg, w, w2):
            continue
        touched = True
        line_terms(cfg.shape, float(lo), length, c, w, w2, prof, cfg.p_start, cfg.p_step, lt[0, 0], lt[1, 0],
                   lt[2, 0], lt[3, 0], ws.edges)
        f = lt[0, 0]
        for i in range(length):
            nbm[i] += a * f[i]
    if spikes:
        return True
    if not touched:
        return False
    rn2 = cfg.read_noise_e * cfg.read_noise_e
    chi2 = 0.0
    for i in range(length):
        v = max(max(filled[lo + i], 0.0) + rn2, VARIANCE_FLOOR_E2)
        chi2 += nbm[i] * nbm[i] / v
    return chi2 >= NEIGHBOUR_MIN_CHI2


@njit(cache=True, error_model="numpy")
def _fit_spectrum(raw, filled, finite, base, has_base, n_det, cfg, prof, ws):
    """Fit every detected line of one spectrum; per-line results stay in the workspace.

    Returns the number of lines (detections plus lines added by blend splits).
    """
    lf, li, gi, wf, det = ws.lf, ws.li, ws.gi, ws.wf, ws.det
    n = filled.size
    resid = wf[_RES]
    for i in range(n):
        resid[i] = filled[i] - (base[i] if has_base else 0.0)
    nd = n_det
    npl = cfg.npl
    # starting values
    for m in range(nd):
        c0, w0, h0, lev, spike = _initial_estimates(resid, finite, det[m], cfg, ws.scratch)
        lf[_C0, m] = c0
        lf[_LEV, m] = lev
        li[_SPIKE, m] = 1 if spike else 0
        if cfg.shape == VOIGT:
            if cfg.w2_free:
                wl0 = w0 / 1.6376
                wg0 = wl0
            else:
                wg0 = cfg.w2_init_px
                wl0 = max(w0 - wg0, 0.1 * w0, VOIGT_MIN_COMPONENT_PX)
            lf[_W0, m] = wl0
            lf[_W20, m] = wg0
        elif cfg.shape == INSTRUMENT:
            lf[_W0, m] = 1.0  # stretch of the instrument profile
            lf[_W20, m] = math.nan
        else:
            lf[_W0, m] = w0
            lf[_W20, m] = math.nan
        frac0 = _peak_fraction(cfg, c0, lf[_W0, m], lf[_W20, m], prof, ws)
        lf[_A0, m] = h0 / max(frac0, 1e-12)
        lf[_HALF, m] = _half_window(cfg, lf[_W0, m], lf[_W20, m])
        for f in (_C, _A, _W, _W2, _EC, _EA, _EW, _EW2, _AMP, _BG, _CHI2, _CLG):
            lf[f, m] = math.nan
        li[_MSG, m] = 0
        li[_SAT, m] = 0
    # groups: consecutive detections closer than blend_separation FWHM (blends) or whose cores lie in each
    # other's fit windows; at most max_group lines per group
    ng = 0
    run = 0
    for m in range(nd):
        join = False
        if m > 0:
            gap = lf[_C0, m] - lf[_C0, m - 1]
            if cfg.shape == VOIGT:
                wa = voigt_fwhm(lf[_W0, m], lf[_W20, m])
                wb = voigt_fwhm(lf[_W0, m - 1], lf[_W20, m - 1])
            elif cfg.shape == INSTRUMENT:
                wa = wb = cfg.inst_fwhm_px
            else:
                wa = lf[_W0, m]
                wb = lf[_W0, m - 1]
            near = (gap < cfg.blend_separation_fwhm * max(wa, wb)
                    or gap < cfg.joint_overlap * max(lf[_HALF, m], lf[_HALF, m - 1]))
            # a spike is never fitted jointly: it cannot be modelled and would stall its partners
            join = near and (run % cfg.max_group) != 0 and li[_SPIKE, m] == 0 and li[_SPIKE, m - 1] == 0
        if join:
            run += 1
            gi[_GSIZE, ng - 1] += 1
        else:
            run = 1
            gi[_GFIRST, ng] = m
            gi[_GSIZE, ng] = 1
            ng += 1
        li[_GRP, m] = ng - 1
    for g in range(ng):
        f0 = gi[_GFIRST, g]
        lo_v = math.inf
        hi_v = -math.inf
        for m in range(f0, f0 + gi[_GSIZE, g]):
            lo_v = min(lo_v, lf[_C0, m] - lf[_HALF, m])
            hi_v = max(hi_v, lf[_C0, m] + lf[_HALF, m])
        lo = max(int(math.floor(lo_v)), 0)
        hi = min(int(math.ceil(hi_v)), n - 1)
        gi[_GLO, g] = lo
        gi[_GLEN, g] = hi - lo + 1
    members = ws.members
    # sweep 1: every group on its own
    for g in range(ng):
        k = gi[_GSIZE, g]
        f0 = gi[_GFIRST, g]
        bg0 = math.inf
        for j in range(k):
            members[j] = f0 + j
            bg0 = min(bg0, lf[_LEV, f0 + j])
        _fit_window(members, k, cfg, gi[_GLO, g], gi[_GLEN, g], bg0, lf, resid, base, has_base, finite, raw,
                    np.bool_(False), prof, ws, lf, li)
    # sweep 2: groups reached by other lines' fit windows, refitted from their first fit with those lines'
    # profiles subtracted (and added to the variance)
    if nd >= 2 and ng >= 2:
        snap = ws.snap
        for m in range(nd):
            snap[0, m] = lf[_C, m]
            snap[1, m] = 1.0 if cfg.shape == INSTRUMENT else lf[_W, m]
            snap[2, m] = lf[_W2, m]
            snap[3, m] = lf[_A, m]
            snap[4, m] = voigt_fwhm(lf[_W, m], lf[_W2, m]) if cfg.shape == VOIGT else lf[_W, m]  # FWHM, px
        for g in range(ng):
            lo, length = gi[_GLO, g], gi[_GLEN, g]
            if not _neighbour_model(g, cfg, nd, lo, length, filled, prof, ws):
                continue
            k = gi[_GSIZE, g]
            f0 = gi[_GFIRST, g]
            bg0 = math.inf
            for j in range(k):
                m = f0 + j
                members[j] = m
                bg0 = min(bg0, lf[_LEV, m])
                # start from the first fit where it is finite
                if math.isfinite(snap[0, m]):
                    lf[_C0, m] = snap[0, m]
                if math.isfinite(snap[3, m]):
                    lf[_A0, m] = snap[3, m]
                if cfg.shape != INSTRUMENT and math.isfinite(lf[_W, m]):
                    lf[_W0, m] = lf[_W, m]
                if npl > 3 and math.isfinite(lf[_W2, m]):
                    lf[_W20, m] = lf[_W2, m]
            _fit_window(members, k, cfg, lo, length, bg0, lf, resid, base, has_base, finite, raw, np.bool_(True),
                        prof, ws, lf, li)
    return _split_blends(raw, finite, resid, base, has_base, nd, ng, cfg, prof, ws)


@njit(cache=True, error_model="numpy")
def _split_blends(raw, finite, resid, base, has_base, nd, ng, cfg, prof, ws):
    """Refit single lines that a blend of two explains much better (appended lines get new slots).

    Two lines closer than about 1.5 FWHM leave a single maximum after the
    matched filter.  A single-line fit whose reduced chi-square exceeds its
    5-sigma range is refitted as two lines; the pair replaces it when
    chi-square drops by more than ``blend_dchi2`` and both lines are sound.
    """
    lf, li, gi = ws.lf, ws.li, ws.gi
    tmp_f, tmp_i, members = ws.tmp_f, ws.tmp_i, ws.members
    n_lines = nd
    for g in range(ng):
        if gi[_GSIZE, g] != 1:
            continue
        m = gi[_GFIRST, g]
        lo, length = gi[_GLO, g], gi[_GLEN, g]
        dof = max(length - 4 - cfg.nb, 1)
        if not (li[_MSG, m] == 0 and lf[_CHI2, m] > 1 + 5 * math.sqrt(2.0 / dof)
                and lf[_A, m] / lf[_EA, m] > 2 * cfg.snr_min):
            continue
        if cfg.shape == INSTRUMENT and not (lf[_W, m] < BLEND_MAX_STRETCH * cfg.inst_fwhm_px):
            continue  # far wider than a pair of instrument-limited lines: a broad line, not a blend
        # one line, refitted without neighbour subtraction (the same footing as the pair)
        tmp_f[_C0, 0] = lf[_C, m]
        tmp_f[_A0, 0] = lf[_A, m]
        tmp_f[_W0, 0] = 1.0 if cfg.shape == INSTRUMENT else lf[_W, m]
        tmp_f[_W20, 0] = lf[_W2, m]
        members[0] = 0
        no = np.bool_(False)  # typed, not literal (one compiled version of the callee)
        chi_one = _fit_window(members, np.int64(1), cfg, lo, length, lf[_LEV, m], tmp_f, resid, base, has_base,
                              finite, raw, no, prof, ws, tmp_f, tmp_i)
        c = lf[_C, m]
        a = lf[_A, m]
        if cfg.shape == INSTRUMENT:
            wsep = cfg.inst_fwhm_px
        elif cfg.shape == VOIGT:
            wsep = voigt_fwhm(lf[_W, m], lf[_W2, m])
        else:
            wsep = lf[_W, m]
        for j in range(2):
            sign = -1.0 if j == 0 else 1.0
            tmp_f[_C0, j] = c + sign * 0.4 * wsep
            tmp_f[_A0, j] = 0.5 * a
            if cfg.shape == VOIGT:
                tmp_f[_W0, j] = max(0.7 * lf[_W, m], VOIGT_MIN_COMPONENT_PX)
                tmp_f[_W20, j] = max(0.7 * lf[_W2, m], VOIGT_MIN_COMPONENT_PX) if cfg.w2_free else lf[_W2, m]
            elif cfg.shape == INSTRUMENT:
                tmp_f[_W0, j] = 1.0
                tmp_f[_W20, j] = math.nan
            else:
                tmp_f[_W0, j] = max(0.7 * lf[_W, m], cfg.min_fwhm_px * 1.5)
                tmp_f[_W20, j] = math.nan
            members[j] = j
        chi_two = _fit_window(members, np.int64(2), cfg, lo, length, lf[_LEV, m], tmp_f, resid, base, has_base,
                              finite, raw, no, prof, ws, tmp_f, tmp_i)
        better = chi_one - chi_two > cfg.blend_dchi2
        for j in range(2):
            if tmp_i[_MSG, j] != 0 or not (tmp_f[_A, j] / tmp_f[_EA, j] > cfg.snr_min):
                better = False
        if not better:
            continue
        for f in range(_NLF):
            lf[f, m] = tmp_f[f, 0]
            lf[f, n_lines] = tmp_f[f, 1]
        for f in (_MSG, _SAT):
            li[f, m] = tmp_i[f, 0]
            li[f, n_lines] = tmp_i[f, 1]
        li[_GRP, n_lines] = li[_GRP, m]
        n_lines += 1
    return n_lines


# ----------------------------------------------------------------------------- the block

@njit(cache=True, nogil=True, error_model="numpy")
def prepare_rows(raw, s0, s1, base, cfg, kernel, filled, finite, det, n_det):
    """Pass 1 over spectra s0 .. s1 - 1: bridge non-finite pixels, SNIP baseline (mode 1), detect."""
    n = raw.shape[1]
    ws = _workspace(n)
    wf = ws.wf
    work32 = np.empty((4, n), dtype=np.float32)
    has_base = cfg.base_mode != 0
    for s in range(s0, s1):
        fill_row(raw[s], filled[s], finite[s])
        if cfg.base_mode == 1:
            snip_row(filled[s], cfg.snip_window, base[s])
        brow = base[s] if has_base else base[0]
        n_det[s] = detect_row(filled[s], brow, has_base, finite[s], cfg.read_noise_e, kernel, cfg.snr_min,
                              cfg.radius, det[s], ws.snr, wf[_HGT], cfg.peak_frac, wf[_SCORE], work32)


@njit(cache=True, nogil=True, error_model="numpy")
def fit_rows(raw, s0, s1, base, cfg, prof, filled, finite, det, n_det, offsets, out_f, out_i, n_out):
    """Pass 2 over spectra s0 .. s1 - 1: fit their detections; lines by increasing centre into the outputs.

    The lines of spectrum ``s`` go to columns ``offsets[s] .. offsets[s] + n_out[s]``
    of ``out_f`` (per-line floats) and ``out_i`` (per-line integers).
    """
    n = raw.shape[1]
    ws = _workspace(n)
    lf, li, order, key = ws.lf, ws.li, ws.order, ws.key
    has_base = cfg.base_mode != 0
    for s in range(s0, s1):
        nd = n_det[s]
        if nd == 0:
            continue
        for m in range(nd):
            ws.det[m] = det[s, m]
        brow = base[s] if has_base else base[0]
        nl = _fit_spectrum(raw[s], filled[s], finite[s], brow, has_base, nd, cfg, prof, ws)
        # order by fitted centre (NaN last), stable insertion sort
        for m in range(nl):
            c = lf[_C, m]
            key[m] = c if math.isfinite(c) else math.inf
            order[m] = m
        for m in range(1, nl):
            cur = order[m]
            q = m - 1
            while q >= 0 and key[order[q]] > key[cur]:
                order[q + 1] = order[q]
                q -= 1
            order[q + 1] = cur
        o0 = offsets[s]
        for r in range(nl):
            m = order[r]
            for f in range(_NLF):
                out_f[f, o0 + r] = lf[f, m]
            for f in range(_NLI):
                out_i[f, o0 + r] = li[f, m]
            out_i[_DPIX, o0 + r] = s
        n_out[s] = nl
