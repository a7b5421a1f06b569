"""Descriptors of one emission pattern: HG/LG order fit and model-free shape numbers.

All functions work on a background-subtracted patch (rows, cols) cut around
one region; positions are in patch pixels (pixel centres are integers).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize

from ..exceptions import InputError
from ._modes import MODE_ORDERS, mode_intensity, order_symmetry_deg, parse_order

__all__ = ["ModeFit", "fit_mode", "moment_descriptors", "count_lobes", "radial_profile", "extract_patch"]


def extract_patch(image, center_rc, half_px, *, fill=np.nan):
    """Cut a ``(2 half + 1)`` square around the rounded ``center_rc`` of ``image``.

    Returns ``(patch, origin_rc)``; pixels beyond the image edge are ``fill``.
    """
    h = int(half_px)
    r0, c0 = int(round(center_rc[0])) - h, int(round(center_rc[1])) - h
    out = np.full((2 * h + 1, 2 * h + 1), fill, dtype=float)
    ra, rb = max(r0, 0), min(r0 + 2 * h + 1, image.shape[0])
    ca, cb = max(c0, 0), min(c0 + 2 * h + 1, image.shape[1])
    if ra < rb and ca < cb:
        out[ra - r0:rb - r0, ca - c0:cb - c0] = image[ra:rb, ca:cb]
    return out, (r0, c0)


def moment_descriptors(patch, *, mask=None):
    """Intensity moments of a pattern.

    Returns a dict: ``centroid_row_px``, ``centroid_col_px``, ``r2_px2``
    (mean squared radius), ``sigma_major_px``, ``sigma_minor_px`` (square roots
    of the eigenvalues of the second-moment matrix), ``moment_orientation_deg``
    (major axis from +col towards +row, in [0, 180)), ``eccentricity``.
    Negative values and pixels outside ``mask`` (or NaN) weigh zero.
    """
    p = np.asarray(patch, dtype=float)
    wgt = np.where(np.isfinite(p), np.clip(p, 0, None), 0.0)
    if mask is not None:
        wgt = np.where(mask, wgt, 0.0)
    total = wgt.sum()
    nan = float("nan")
    if total <= 0:
        return {"centroid_row_px": nan, "centroid_col_px": nan, "r2_px2": nan, "sigma_major_px": nan,
                "sigma_minor_px": nan, "moment_orientation_deg": nan, "eccentricity": nan}
    rr, cc = np.indices(p.shape, dtype=float)
    r0 = (wgt * rr).sum() / total
    c0 = (wgt * cc).sum() / total
    dr, dc = rr - r0, cc - c0
    mrr = (wgt * dr * dr).sum() / total
    mcc = (wgt * dc * dc).sum() / total
    mrc = (wgt * dr * dc).sum() / total
    tr, det = mrr + mcc, mrr * mcc - mrc * mrc
    disc = math.sqrt(max(tr * tr / 4 - det, 0.0))
    lam1, lam2 = tr / 2 + disc, max(tr / 2 - disc, 0.0)
    angle = 0.5 * math.degrees(math.atan2(2 * mrc, mcc - mrr)) % 180.0
    ecc = math.sqrt(1 - lam2 / lam1) if lam1 > 0 else 0.0
    return {"centroid_row_px": r0, "centroid_col_px": c0, "r2_px2": tr, "sigma_major_px": math.sqrt(lam1),
            "sigma_minor_px": math.sqrt(lam2), "moment_orientation_deg": angle, "eccentricity": ecc}


def count_lobes(patch, *, mask=None, smooth_px=0.0, rel_threshold=0.15, min_area_px=3):
    """Number of bright lobes: connected parts above ``rel_threshold`` x the (smoothed) maximum.

    A ring counts as one lobe, so LG01 gives 1, LG10 gives 2 (spot and ring),
    HG10 2, HG20 3, HG11 4, HG21 6.
    """
    p = np.where(np.isfinite(patch), patch, 0.0)
    if mask is not None:
        p = np.where(mask, p, 0.0)
    s = ndimage.gaussian_filter(p, smooth_px) if smooth_px > 0 else p
    top = s.max()
    if top <= 0:
        return 0
    lab, n = ndimage.label(s > rel_threshold * top)
    if n == 0:
        return 0
    area = np.bincount(lab.ravel())[1:]
    return int((area >= min_area_px).sum())


def radial_profile(patch, center_rc, *, bin_px=1.0, max_radius_px=None):
    """Azimuthal mean of a pattern in rings of width ``bin_px`` around ``center_rc``.

    Returns ``(radius_px, mean_counts)``: ring mid radii and the mean of the
    finite pixels in each ring (NaN for an empty ring).
    """
    p = np.asarray(patch, dtype=float)
    rr, cc = np.indices(p.shape, dtype=float)
    rad = np.hypot(rr - center_rc[0], cc - center_rc[1])
    rmax = max_radius_px if max_radius_px is not None else min(p.shape) / 2.0
    nb = max(int(math.ceil(rmax / bin_px)), 1)
    idx = np.floor(rad / bin_px).astype(int)
    ok = np.isfinite(p) & (idx < nb)
    sums = np.bincount(idx[ok], weights=p[ok], minlength=nb)
    counts = np.bincount(idx[ok], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    return (np.arange(nb) + 0.5) * bin_px, mean


@dataclass(frozen=True)
class ModeFit:
    """Best transverse order of one pattern.

    ``status`` is ``"ok"`` (one order explains the pattern), ``"mixed"`` (two
    orders together explain it clearly better than any one), ``"irregular"``
    (neither does) or ``"failed"`` (``fit_ok`` False, see ``message``).
    ``explained`` is the fraction of the pattern's variance over the region
    explained by the best order; ``confidence`` is ``1 - RSS_best / RSS_second``
    (0: the two best orders fit equally, near 1: the second fits far worse).
    ``amplitude_counts`` is the fitted peak signal.  Centre in patch pixels; ``orientation_deg`` is NaN for
    round patterns.
    """

    order: str
    status: str
    confidence: float
    center_row_px: float
    center_col_px: float
    waist_px: float
    orientation_deg: float
    amplitude_counts: float
    offset_counts: float
    explained: float
    second_order: str
    second_explained: float
    mixture_explained: float
    mixture_fraction: float
    fit_ok: bool
    message: str


def _failed(message):
    nan = float("nan")
    return ModeFit("", "failed", nan, nan, nan, nan, nan, nan, nan, nan, "", nan, nan, nan, False, message)


def _linear(models, data):
    """Least-squares amplitude and offset of each model row against ``data``; returns (amp, off, rss)."""
    mm = models.mean(axis=1, keepdims=True)
    dm = data.mean()
    mc = models - mm
    dc = data - dm
    var = (mc * mc).sum(axis=1)
    cov = mc @ dc
    with np.errstate(invalid="ignore", divide="ignore"):
        amp = np.where(var > 0, cov / var, 0.0)
    off = dm - amp * mm[:, 0]
    rss = (dc * dc).sum() - amp * cov
    return amp, off, rss


def _model(order, pars, rr, cc, round_):
    r0, c0, logw = pars[0], pars[1], pars[2]
    th = 0.0 if round_ else pars[3]
    w = math.exp(min(max(logw, -3.0), 8.0))  # keep a runaway step finite; such fits are rejected later
    return mode_intensity(order, cc - c0, rr - r0, w=w, orientation_rad=th)


def _fit_mixture(first, second, rv, cv, dv, in_reg, tss_reg):
    """Joint fit of two orders about one centre with non-negative amplitudes; (explained, power fraction)."""
    def unpack(pars):
        r0, c0 = pars[0], pars[1]
        p1 = [r0, c0, pars[2]] + ([] if first["round"] else [pars[3]])
        p2 = [r0, c0, pars[4]] + ([] if second["round"] else [pars[5]])
        return (_model(first["order"], p1, rv, cv, first["round"]),
                _model(second["order"], p2, rv, cv, second["round"]))

    def solve(pars):
        m1, m2 = unpack(pars)
        design = np.column_stack([m1, m2, np.ones_like(dv)])
        coef, *_ = np.linalg.lstsq(design, dv, rcond=None)
        coef[:2] = np.clip(coef[:2], 0, None)
        return design, coef

    def resid(pars):
        design, coef = solve(pars)
        return dv - design @ coef

    a, b = first["pars"], second["pars"]
    x0 = np.array([(a[0] + b[0]) / 2, (a[1] + b[1]) / 2, a[2], a[3] if len(a) > 3 else 0.0, b[2],
                   b[3] if len(b) > 3 else 0.0])
    try:
        x = optimize.least_squares(resid, x0, method="lm", ftol=1e-6, xtol=1e-6, max_nfev=300).x
    except (ValueError, OverflowError, np.linalg.LinAlgError):
        x = x0
    design, coef = solve(x)
    res = dv - design @ coef
    expl = 1.0 - float((res[in_reg] ** 2).sum()) / tss_reg
    power = np.array([coef[0] * design[:, 0].sum(), coef[1] * design[:, 1].sum()])
    frac = float(power.min() / power.sum()) if power.sum() > 0 else 0.0
    return expl, frac


def fit_mode(patch, *, mask=None, region=None, orders=MODE_ORDERS, min_explained=0.9, mixed_gain=0.05,
             min_mixture_fraction=0.2, n_angles=8, refine=2):
    """Project a pattern onto HG/LG intensities and fit centre, waist and orientation of the best order.

    Each order is first scored on a grid of orientations (``n_angles`` over
    its symmetry period) at the centroid and at the waist its second moment
    implies (``<r^2> = w^2 (N + 1) / 2`` with N = m + n or 2p + |l|); the
    ``refine`` best orders are then fitted by least squares (centre, waist,
    orientation; amplitude and offset solved linearly at every step).

    Parameters
    ----------
    patch : array (rows, cols)
        Background-subtracted counts; NaN pixels are left out.
    mask : array of bool, optional
        Pixels to fit (e.g. excluding neighbouring cells); all finite pixels by default.
    region : array of bool, optional
        The region's own pixels, over which moments and ``explained`` are computed.
    orders : sequence of str
        Candidate orders.
    min_explained : float
        An order (or a two-order mixture) must explain at least this fraction.
    mixed_gain, min_mixture_fraction : float
        "mixed" needs the best non-negative mixture of the two best orders to
        explain ``mixed_gain`` more than the best order alone, with each order
        carrying at least ``min_mixture_fraction`` of the power.

    Returns
    -------
    ModeFit
    """
    p = np.asarray(patch, dtype=float)
    if p.ndim != 2 or p.size == 0:
        raise InputError("bad patch", field="patch", expected="a non-empty 2-D array", found=f"shape {p.shape}")
    if not orders:
        raise InputError("no candidate orders", field="orders", expected="at least one order", found="none")
    for o in orders:
        parse_order(o)
    valid = np.isfinite(p) if mask is None else (np.asarray(mask, bool) & np.isfinite(p))
    reg = valid if region is None else (np.asarray(region, bool) & valid)
    if valid.sum() < 16 or reg.sum() < 4:
        return _failed(f"too few pixels to fit ({int(valid.sum())} valid, {int(reg.sum())} in the region)")
    mom = moment_descriptors(p, mask=reg)
    if not np.isfinite(mom["r2_px2"]) or mom["r2_px2"] <= 0:
        return _failed("no positive signal in the region")
    rr, cc = np.indices(p.shape, dtype=float)
    rv, cv, dv = rr[valid], cc[valid], p[valid]
    in_reg = reg[valid]
    tss_reg = float(((dv[in_reg] - dv[in_reg].mean()) ** 2).sum())
    if tss_reg <= 0:
        return _failed("flat region")
    r0, c0 = mom["centroid_row_px"], mom["centroid_col_px"]

    coarse = []
    for o in orders:
        fam, i, j = parse_order(o)
        big_n = i + j if fam == "HG" else 2 * i + abs(j)
        w0 = math.sqrt(2.0 * mom["r2_px2"] / (big_n + 1))
        period = order_symmetry_deg(o)
        angles = [0.0] if period == 0 else list(np.arange(n_angles) * math.radians(period) / n_angles)
        a = np.asarray(angles)[:, None]
        dx, dy = cv[None, :] - c0, rv[None, :] - r0
        best = None
        for scale in (0.92, 1.08):
            models = mode_intensity(o, dx * np.cos(a) + dy * np.sin(a), -dx * np.sin(a) + dy * np.cos(a),
                                    w=w0 * scale)
            _, _, rss = _linear(models, dv)
            k = int(np.argmin(rss))
            if best is None or rss[k] < best[0]:
                best = (float(rss[k]), w0 * scale, angles[k])
        coarse.append((best[0], o, best[1], best[2]))
    coarse.sort(key=lambda t: (t[0], t[1]))

    fits = []
    for rss0, o, w0, a0 in coarse[:max(1, refine)]:
        round_ = order_symmetry_deg(o) == 0
        x0 = np.array([r0, c0, math.log(w0)] + ([] if round_ else [a0]))

        def resid(pars, o=o, round_=round_):
            m = _model(o, pars, rv, cv, round_)[None, :]
            amp, off, _ = _linear(m, dv)
            return dv - amp[0] * m[0] - off[0]

        try:
            sol = optimize.least_squares(resid, x0, method="lm", x_scale=np.array([1.0, 1.0, 0.1, 0.1])[:x0.size],
                                         ftol=1e-6, xtol=1e-6, max_nfev=200)
            pars = sol.x
            ok = bool(np.all(np.isfinite(pars)))
        except (ValueError, OverflowError, np.linalg.LinAlgError, FloatingPointError):
            pars, ok = x0, False
        m = _model(o, pars, rv, cv, round_)
        amp, off, _ = _linear(m[None, :], dv)
        if not ok or amp[0] <= 0 or not (-3.0 < pars[2] < math.log(4 * max(p.shape))):
            pars = x0
            m = _model(o, pars, rv, cv, round_)
            amp, off, _ = _linear(m[None, :], dv)
        res = dv - amp[0] * m - off[0]
        rss_reg = float((res[in_reg] ** 2).sum())
        fits.append({"order": o, "pars": pars, "model": m * amp[0], "amp": float(amp[0]), "off": float(off[0]),
                     "rss": float((res ** 2).sum()), "explained": 1.0 - rss_reg / tss_reg, "round": round_})
    fits.sort(key=lambda f: (f["rss"], f["order"]))
    best = fits[0]
    if best["amp"] <= 0:
        return _failed("no order with a positive amplitude fits the pattern")
    second = fits[1] if len(fits) > 1 else None
    conf = 1.0 - best["rss"] / second["rss"] if second is not None and second["rss"] > 0 else 1.0
    mix_expl, mix_frac = float("nan"), float("nan")
    status = "ok" if best["explained"] >= min_explained else "irregular"
    if second is not None and second["amp"] > 0 and best["explained"] < min_explained + mixed_gain:
        mix_expl, mix_frac = _fit_mixture(best, second, rv, cv, dv, in_reg, tss_reg)
        if (mix_expl >= min_explained and mix_expl - best["explained"] >= mixed_gain
                and mix_frac >= min_mixture_fraction):
            status = "mixed"
    pars = best["pars"]
    period = order_symmetry_deg(best["order"])
    orient = float("nan") if best["round"] else math.degrees(pars[3]) % period
    return ModeFit(order=best["order"], status=status, confidence=float(conf), center_row_px=float(pars[0]),
                   center_col_px=float(pars[1]), waist_px=float(math.exp(pars[2])), orientation_deg=orient,
                   amplitude_counts=float(best["model"].max()), offset_counts=best["off"], explained=float(best["explained"]),
                   second_order=second["order"] if second is not None else "",
                   second_explained=float(second["explained"]) if second is not None else float("nan"),
                   mixture_explained=mix_expl, mixture_fraction=mix_frac, fit_ok=True, message="")
