"""Normalised Hermite-Gaussian and Laguerre-Gaussian intensity profiles.

Formulas of Kogelnik & Li 1966 (Appl. Opt. 5, 1550), normalised so that the
intensity integrates to 1 over the plane; ``w`` is the 1/e^2 intensity radius
of the fundamental mode.  Image coordinates: ``x`` along columns, ``y`` along
rows; an orientation turns the mode's first axis from +x towards +y.
"""

from __future__ import annotations

import math

import numpy as np
from ..exceptions import InputError

__all__ = ["MODE_ORDERS", "hg_intensity", "lg_intensity", "mode_intensity", "parse_order", "order_symmetry_deg"]

#: Orders with distinct intensity patterns.  HG_nm is HG_mn turned by 90 deg and the
#: petal superpositions of LG_0l equal turned HG modes (LG_01 petal = HG10, LG_02 petal = HG11),
#: so each pattern is named once: HG with m >= n, LG for the ring (donut) modes.
MODE_ORDERS = ("HG00", "HG10", "HG11", "HG20", "HG21", "LG01", "LG02", "LG10")


def parse_order(order):
    """Split ``"HGmn"`` / ``"LGpl"`` into ``(family, i, j)``.

    Raises
    ------
    InputError
        When ``order`` is not two letters HG/LG followed by two digits.
    """
    if not (isinstance(order, str) and len(order) == 4 and order[:2] in ("HG", "LG") and order[2:].isdigit()):
        raise InputError("bad mode order", field="order", expected="'HGmn' or 'LGpl' (e.g. 'HG10', 'LG01')",
                         found=repr(order))
    return order[:2], int(order[2]), int(order[3])


def order_symmetry_deg(order):
    """Turn (deg) that maps the order's intensity onto itself: 180, 90, or 0 when it is round."""
    family, i, j = parse_order(order)
    if family == "LG":
        return 0.0
    if i == 0 and j == 0:
        return 0.0
    return 90.0 if i == j else 180.0


def hg_intensity(x, y, m, n, *, w):
    """HG_mn intensity, integral 1: ``2/(pi w^2) / (2^(m+n) m! n!) H_m^2 H_n^2 exp(-2 r^2/w^2)``.

    Parameters
    ----------
    x, y : array_like
        Coordinates from the beam axis along the mode's own axes.
    m, n : int
        Orders along x and y.
    w : float
        Beam radius.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    s = math.sqrt(2.0) / w
    norm = 2.0 / (math.pi * w * w) / (2.0 ** (m + n) * math.factorial(m) * math.factorial(n))
    out = np.exp(-2.0 * (x * x + y * y) / (w * w))
    out *= norm
    for order, t in ((m, x), (n, y)):
        if order > 0:
            h = _hermite(order, s * t)
            out *= h * h
    return out


def _hermite(n, t):
    """Physicists' Hermite polynomial H_n(t), n >= 1, by its three-term recurrence
    (H_1 = 2t, H_k+1 = 2t H_k - 2k H_k-1); for the low orders used here it is several
    times faster than a general special-function evaluation and equal to rounding."""
    prev, cur = np.ones_like(t), 2.0 * t
    for k in range(1, n):
        prev, cur = cur, 2.0 * t * cur - 2.0 * k * prev
    return cur


def _genlaguerre(p, a, u):
    """Generalised Laguerre polynomial L_p^a(u), p >= 1, by its three-term recurrence
    ((k+1) L_k+1 = (2k+1+a-u) L_k - (k+a) L_k-1)."""
    prev, cur = np.ones_like(u), 1.0 + a - u
    for k in range(1, p):
        prev, cur = cur, ((2 * k + 1 + a - u) * cur - (k + a) * prev) / (k + 1)
    return cur


def lg_intensity(r, p, l, *, w, phi=None):
    """LG_pl intensity, integral 1: ``2 p!/(pi (p+|l|)! w^2) u^|l| [L_p^|l|(u)]^2 e^-u``, ``u = 2 r^2/w^2``.

    With ``phi`` given, the standing-wave petal pattern ``x 2 cos^2(l phi)`` is returned.
    """
    r = np.asarray(r, dtype=float)
    la = abs(int(l))
    u = 2.0 * r * r / (w * w)
    norm = 2.0 * math.factorial(p) / (math.pi * math.factorial(p + la) * w * w)
    out = np.exp(-u)
    out *= norm
    if la:
        out *= u ** la
    if p > 0:
        lag = _genlaguerre(p, la, u)
        out *= lag * lag
    if phi is not None:
        out = out * 2.0 * np.cos(la * np.asarray(phi, dtype=float)) ** 2
    return out


def mode_intensity(order, x, y, *, w, orientation_rad=0.0):
    """Normalised intensity of ``order`` at image offsets ``x`` (columns), ``y`` (rows) from its centre."""
    family, i, j = parse_order(order)
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    if family == "LG":
        return lg_intensity(np.hypot(x, y), i, j, w=w)
    c, s = math.cos(orientation_rad), math.sin(orientation_rad)
    return hg_intensity(x * c + y * s, -x * s + y * c, i, j, w=w)
