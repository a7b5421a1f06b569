import numpy as np
import pytest

from lasecyto.exceptions import InputError
from lasecyto.lines import estimate_baseline

TRUE_HEIGHT = 609.78  # check-values.md section 15 worked check


def _section15_spectrum():
    # check-values.md section 15: x 500-540 nm, 1001 points, baseline 100 + 2(x-520) + 0.05(x-520)^2,
    # point-sampled Lorentzians of peak 1000 @ 520.3 nm (FWHM 0.05) and 400 @ 513.9 nm (FWHM 0.1)
    x = np.linspace(500.0, 540.0, 1001)
    base = 100 + 2 * (x - 520) + 0.05 * (x - 520) ** 2

    def lorentz(x0, peak, fwhm):
        g = fwhm / 2
        return peak * g * g / ((x - x0) ** 2 + g * g)

    y = base + lorentz(520.3, 1000, 0.05) + lorentz(513.9, 400, 0.1)
    return x, y, base


@pytest.mark.parametrize("kwargs, table_height", [
    (dict(method="snip", window_px=25), 609.44),
    (dict(method="asls", lam=1e5, p=0.01), 608.27),
])
def test_section15_height(kwargs, table_height):
    x, y, base = _section15_spectrum()
    i = np.argmin(np.abs(x - 520.3))
    assert y[i] - base[i] == pytest.approx(TRUE_HEIGHT, abs=0.01)
    height = y[i] - estimate_baseline(y, **kwargs)[i]
    # check-values.md section 15: recovered height within 1 % of 609.78; table value to 0.05 %
    assert height == pytest.approx(TRUE_HEIGHT, rel=0.01)
    assert height == pytest.approx(table_height, rel=5e-4)


def test_asls_edge_error_decreases_with_lambda():
    # section 15 "test use": the edge error must decrease when lambda decreases
    x, y, base = _section15_spectrum()
    err = [np.max(np.abs(estimate_baseline(y, method="asls", lam=lam, p=0.01) - base)[:50])
           for lam in (1e7, 1e5)]
    assert err[1] < err[0]


def test_vectorised_rows_are_independent():
    rng = np.random.default_rng(3)
    block = rng.poisson(50 + 20 * np.sin(np.arange(300) / 40.0), size=(4, 300)).astype(float)
    for method in ("snip", "asls"):
        together = estimate_baseline(block, method=method)
        alone = np.array([estimate_baseline(row, method=method) for row in block])
        np.testing.assert_allclose(together, alone, rtol=1e-10, atol=1e-8)


def test_nan_negative_and_bad_arguments():
    y = np.full(200, 5.0)
    y[50:55] = np.nan
    y[100] = -8.0
    b = estimate_baseline(y)
    assert np.all(np.isfinite(b))
    with pytest.raises(InputError, match="method"):
        estimate_baseline(y, method="poly")
    with pytest.raises(InputError, match="iterations"):
        estimate_baseline(y, iterations=3)
    with pytest.raises(InputError, match="spectra_e"):
        estimate_baseline(np.zeros((2, 2, 5)))
