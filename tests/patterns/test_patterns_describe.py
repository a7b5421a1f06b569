"""Mode fit, model-free descriptors, mixed and irregular patterns (in-test synthetic patches)."""

import numpy as np
import pytest
from scipy import ndimage

from lasecyto.patterns import (MODE_ORDERS, count_lobes, fit_mode, mode_intensity, moment_descriptors,
                               radial_profile)

YY, XX = np.mgrid[-15:16, -15:16].astype(float)


def _noisy(img, rng, peak=650.0):
    """Scale to ``peak`` counts and add shot + read noise (peak SNR about 25)."""
    s = peak * img / img.max()
    return s + rng.normal(0.0, np.sqrt(29.0 + s))


def _region(img):
    return ndimage.gaussian_filter(img, 1.0) > 60.0


@pytest.mark.parametrize("order,lobes", [("HG00", 1), ("HG10", 2), ("HG11", 4), ("HG20", 3), ("HG21", 6),
                                         ("LG01", 1), ("LG02", 1), ("LG10", 2)])
def test_each_order_is_recovered(order, lobes):
    rng = np.random.default_rng(list(MODE_ORDERS).index(order))
    img = _noisy(mode_intensity(order, XX - 0.3, YY + 0.4, w=4.8, orientation_rad=0.5), rng)
    fit = fit_mode(img, region=_region(img))
    assert fit.fit_ok and fit.order == order and fit.status == "ok"
    # centre 15.4, 14.7 in patch pixels within 0.2 px; waist within 5 %
    assert abs(fit.center_col_px - 15.3) < 0.2 and abs(fit.center_row_px - 14.6) < 0.2
    assert fit.waist_px == pytest.approx(4.8, rel=0.05)
    if order.startswith("HG") and order != "HG00":
        period = 90.0 if order[2] == order[3] else 180.0
        d = (fit.orientation_deg - np.degrees(0.5)) % period
        assert min(d, period - d) < 3.0
    assert 0 < fit.confidence <= 1
    assert count_lobes(img) == lobes


def test_mixture_is_mixed_and_speckle_irregular():
    rng = np.random.default_rng(3)
    a = mode_intensity("HG00", XX, YY, w=5.0)
    b = mode_intensity("HG20", XX, YY, w=5.0, orientation_rad=1.0)
    img = _noisy(a / a.max() + b / b.max(), rng)
    fit = fit_mode(img, region=_region(img))
    assert fit.status == "mixed" and {fit.order, fit.second_order} == {"HG00", "HG20"}
    speckle = ndimage.gaussian_filter(rng.exponential(1.0, XX.shape) * (np.hypot(XX, YY) < 9), 1.0)
    img = _noisy(speckle, rng)
    assert fit_mode(img, region=_region(img)).status == "irregular"


def test_moments_and_radial_profile():
    img = mode_intensity("HG10", XX, YY, w=4.0, orientation_rad=np.radians(30))
    m = moment_descriptors(img)
    # HG10: <x^2> = 3 w^2 / 4 along its axis, w^2 / 4 across (Gaussian moments of H1^2 exp)
    assert m["sigma_major_px"] == pytest.approx(np.sqrt(3) * 2.0, rel=1e-3)
    assert m["sigma_minor_px"] == pytest.approx(2.0, rel=1e-3)
    assert m["moment_orientation_deg"] == pytest.approx(30.0, abs=0.1)
    r, prof = radial_profile(mode_intensity("LG01", XX, YY, w=6.0), (15.0, 15.0), bin_px=0.5)
    # ring maximum at w / sqrt(2) = 4.24 px (check-values.md section 5), within one 0.5 px bin
    assert abs(r[np.nanargmax(prof)] - 6.0 / np.sqrt(2)) <= 0.5


def test_failed_fit_is_a_record():
    fit = fit_mode(np.zeros((31, 31)))
    assert not fit.fit_ok and fit.status == "failed" and fit.message


@pytest.mark.parametrize("kind", ["disk", "pixel", "ramp", "edge"])
def test_non_mode_patterns_are_irregular_records(kind):
    rng = np.random.default_rng(11)
    shapes = {"disk": 600.0 * (np.hypot(XX, YY) < 14), "pixel": np.where((XX == 0) & (YY == 0), 900.0, 0.0),
              "ramp": 20 * XX + 300, "edge": np.where(XX > 10, 500.0, 0.0)}
    fit = fit_mode(shapes[kind] + rng.normal(0, 25, XX.shape))
    assert fit.status == "irregular" and np.isfinite(fit.waist_px)
