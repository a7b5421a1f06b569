"""Compiled per-spectrum preparation: bridging non-finite pixels, SNIP baseline, matched-filter detection."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

#: variance floor (e^2): keeps a pixel with (nearly) zero or negative model finite-weighted
VARIANCE_FLOOR_E2 = 0.5


@njit(cache=True, error_model="numpy")
def fill_row(y, filled, finite):
    """Copy ``y`` into ``filled``, bridging non-finite pixels linearly; returns the count of them.

    Pixels beyond the last finite one take its value; a row without a finite
    pixel becomes zeros.  ``finite`` receives the mask of finite pixels.
    """
    n = y.size
    bad = 0
    for i in range(n):
        v = y[i]
        ok = (v - v) == 0.0  # False for NaN and +-inf; branch-free so the loop vectorises
        finite[i] = ok
        filled[i] = v
        bad += 0 if ok else 1
    if bad == 0:
        return 0
    last = -1
    for i in range(n):
        if finite[i]:
            v = filled[i]
            if last < i - 1:  # bridge the gap (last, i)
                for j in range(last + 1, i):
                    if last < 0:
                        filled[j] = v
                    else:
                        t = (j - last) / (i - last)
                        filled[j] = filled[last] + t * (v - filled[last])
            last = i
    fill = filled[last] if last >= 0 else 0.0
    for j in range(last + 1, n):
        filled[j] = fill
    return bad


@njit(cache=True)
def snip_row(y, window, out):
    """SNIP baseline of one spectrum (Ryan et al. 1988) on the LLS-transformed values.

    Clipping half windows 1 .. ``window``; the spectrum is extended by odd
    reflection so that the edges see every window; a spectrum with negative
    values is shifted by its minimum first (the LLS transform needs y >= -1).
    """
    n = y.size
    m = min(window, n - 1)
    shift = 0.0
    for i in range(n):
        shift = min(shift, y[i])
    v = np.empty(n + 2 * m)
    for j in range(n + 2 * m):
        i = j - m
        if i < 0:
            val = 2.0 * y[0] - y[-i]
        elif i >= n:
            val = 2.0 * y[n - 1] - y[2 * (n - 1) - i]
        else:
            val = y[i]
        val = max(val, shift) - shift
        v[j] = math.log(math.log(math.sqrt(val + 1.0) + 1.0) + 1.0)
    tmp = np.empty(n + 2 * m)
    for p in range(1, m + 1):
        for j in range(p, n + 2 * m - p):
            tmp[j] = min(v[j], 0.5 * (v[j - p] + v[j + p]))
        for j in range(p, n + 2 * m - p):
            v[j] = tmp[j]
    for i in range(n):
        e = math.exp(math.exp(v[i + m]) - 1.0) - 1.0
        out[i] = e * e - 1.0 + shift


@njit(cache=True, parallel=True)
def snip_block(block, window, out):
    for s in prange(block.shape[0]):
        snip_row(block[s], window, out[s])


@njit(cache=True)
def _reflect(i, n):
    # scipy.ndimage mode "reflect": (d c b a | a b c d | d c b a)
    while i < 0 or i >= n:
        if i < 0:
            i = -i - 1
        else:
            i = 2 * n - i - 1
    return i


@njit(cache=True, error_model="numpy", fastmath={"contract"})
def detect_row(filled, base, has_base, finite, read_noise_e, kernel, snr_min, radius, pix, snr_out, height_out,
               peak_frac, score, work32):
    """Matched-filter detection in one spectrum; writes peak pixels into ``pix`` and returns their count.

    ``resid`` = spectrum - baseline and ``var`` = max(spectrum, 0) + read noise^2
    (zero at non-finite pixels) are correlated with the zero-mean kernel and its
    square (edges reflected); the SNR is their ratio and a line is a strict
    local maximum of it within ``radius`` pixels (ties go to the leftmost) at or
    above ``snr_min``.  The correlations run in single precision (relative
    error ~1e-7, far below the noise; twice the SIMD width).  ``height_out``
    receives the filter's estimate of the peak pixel value above background at
    every pixel, ``snr_out`` the SNR of each detection; ``work32`` is float32
    scratch of shape (4, >= n).
    """
    n = filled.size
    nk = kernel.size
    h = nk // 2
    rn2 = read_noise_e * read_noise_e
    norm = 0.0
    for j in range(nk):
        norm += kernel[j] * kernel[j]
    resid, var, area, avar = work32[0], work32[1], work32[2], work32[3]
    for i in range(n):
        ok = finite[i]
        b = base[i] if has_base else 0.0
        resid[i] = np.float32(filled[i] - b) if ok else np.float32(0.0)
        var[i] = np.float32(max(max(filled[i], 0.0) + rn2, VARIANCE_FLOOR_E2)) if ok else np.float32(0.0)
    lo = min(h, n)
    hi = max(n - h, lo)
    m = hi - lo
    # interior: plain unit-stride loops on views (no negative-index wraparound, so they vectorise)
    a_in = area[lo:hi]
    v_in = avar[lo:hi]
    # the kernel is symmetric: taps h - j and h + j share a weight
    kh = np.float32(kernel[h])
    kh2 = np.float32(kernel[h] * kernel[h])
    r_h = resid[h:h + m]
    q_h = var[h:h + m]
    for i in range(m):
        a_in[i] = kh * r_h[i]
        v_in[i] = kh2 * q_h[i]
    for j in range(1, h + 1):
        kj = np.float32(kernel[h + j])
        k2 = np.float32(kernel[h + j] * kernel[h + j])
        r_lo = resid[h - j:h - j + m]
        r_hi = resid[h + j:h + j + m]
        q_lo = var[h - j:h - j + m]
        q_hi = var[h + j:h + j + m]
        for i in range(m):
            a_in[i] += kj * (r_lo[i] + r_hi[i])
            v_in[i] += k2 * (q_lo[i] + q_hi[i])
    for i in range(n):
        if lo <= i < hi:
            continue
        a = 0.0
        av = 0.0
        for j in range(nk):
            r = _reflect(i + j - h, n)
            a += kernel[j] * resid[r]
            av += kernel[j] * kernel[j] * var[r]
        area[i] = a
        avar[i] = av
    inv_norm = 1.0 / norm
    for i in range(n):
        a = area[i] * inv_norm
        av = avar[i] * inv_norm * inv_norm
        score[i] = a / math.sqrt(av) if (av > 0.0 and finite[i]) else 0.0
        height_out[i] = a * peak_frac
    count = 0
    for i in range(n):
        sc = score[i]
        if not (sc >= snr_min and finite[i]):
            continue
        ok = True
        for k in range(1, radius + 1):
            if i - k >= 0 and not (sc > score[i - k]):
                ok = False
                break
            if i + k < n and not (sc >= score[i + k]):
                ok = False
                break
        if ok:
            pix[count] = i
            snr_out[count] = sc
            count += 1
    return count
