"""State-change flags: robust change score against controls, calibrated p-values, Benjamini-Hochberg."""

import numpy as np
import pandas as pd
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import benjamini_hochberg, flag_cells, relative_to_controls, wilson_interval

from cellgen import make_experiment



@pytest.fixture(scope="module")
def big_experiment():
    """2 dishes x 110 cells: 110 controls, 110 treated of which ~80 % respond."""
    return make_experiment(n_dishes=2, cells_per_dish=110, rng=1)


def _rates(cells, flags):
    ctrl = (cells["condition"] == "control").to_numpy()
    resp = cells["responder"].to_numpy(bool)
    nonresp = ~ctrl & ~resp
    ch = flags["changed"].to_numpy(bool)
    return ctrl, resp, nonresp, ch


@pytest.mark.parametrize("method", ["permutation", "gaussian"])
def test_flags_on_generated_experiment(big_experiment, method):
    cells = big_experiment
    ctrl = (cells["condition"] == "control").to_numpy()
    flags = flag_cells(cells, control_mask=ctrl, feature="dn_change", fdr=0.05, method=method, rng=3)
    assert flags.attrs["calibration"]["method"] == method
    ctrl, resp, nonresp, ch = _rates(cells, flags)
    n_c = int(ctrl.sum())
    # Acceptance: controls flagged at most fdr + sampling error (2 binomial standard errors at n_controls)
    assert ch[ctrl].mean() <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / n_c)
    # >= 90 % of responders flagged at 5 % FDR
    assert ch[resp].mean() >= 0.90
    # non-responding treated cells not flagged above the control rate (upper 95 % Wilson bound of controls)
    assert ch[nonresp].mean() <= wilson_interval(int(ch[ctrl].sum()), n_c)[1]
    assert flags["cell_id"].tolist() == cells["cell_id"].tolist()
    assert np.all((flags["q_value"] >= flags["p_value"]) | flags["p_value"].isna())


def test_small_control_population_uses_calibrated_reference(big_experiment):
    # 12 controls (as in the default experiment): a rank p-value cannot go below 1/13, so "auto" takes the
    # Monte Carlo reference of the robust score; it must still flag responders and not the controls
    cells = big_experiment
    ctrl_idx = np.flatnonzero((cells["condition"] == "control").to_numpy())[:12]
    keep = np.zeros(len(cells), bool)
    keep[ctrl_idx] = True
    keep |= (cells["condition"] != "control").to_numpy()
    sub = cells[keep].reset_index(drop=True)
    flags = flag_cells(sub, control_mask=(sub["condition"] == "control").to_numpy(), feature="dn_change", rng=0)
    cal = flags.attrs["calibration"]
    assert cal["method"] == "gaussian" and cal["n_controls"] == 12
    assert cal["controls_ks_pvalue"] > 0.01          # the null model fits the controls
    _, resp, nonresp, ch = _rates(sub, flags)
    assert ch[resp].mean() >= 0.90
    assert ch[nonresp].mean() <= 0.10


def test_null_p_values_are_calibrated():
    # Monte Carlo check of the reference: controls and null "treated" cells from one normal population give
    # uniform p-values (KS) and, under the global null, BH flags nothing in most experiments
    rng = np.random.default_rng(11)
    n_any = 0
    pvals = []
    for _ in range(40):
        x = rng.standard_normal(36)
        cells = pd.DataFrame({"index_change": x})
        mask = np.arange(36) < 12
        f = flag_cells(cells, control_mask=mask, method="gaussian", n_draws=4000, rng=rng)
        n_any += bool(f["changed"].any())
        pvals.append(f["p_value"].to_numpy()[~mask])
    from scipy.stats import kstest

    assert kstest(np.concatenate(pvals), "uniform").pvalue > 0.001
    assert n_any / 40 <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / 40)


def test_benjamini_hochberg_against_definition():
    rng = np.random.default_rng(4)
    p = np.concatenate([rng.uniform(0, 0.01, 10), rng.uniform(0, 1, 40), [np.nan]])
    rej, q = benjamini_hochberg(p, fdr=0.1)
    ok = np.isfinite(p)
    m = ok.sum()
    ps = np.sort(p[ok])
    k = max([i + 1 for i in range(m) if ps[i] <= (i + 1) / m * 0.1], default=0)
    assert rej.sum() == k and not rej[-1] and np.isnan(q[-1])
    assert np.all(rej[ok] == (p[ok] <= (ps[k - 1] if k else -1)))


def test_relative_to_controls():
    cells = pd.DataFrame({"a": [0.0, 1.0, -1.0, 0.5, -0.5, 10.0]})
    z = relative_to_controls(cells, control_mask=np.array([1, 1, 1, 1, 1, 0], bool), columns=["a"])
    assert z["a_vs_control"].iloc[-1] > 5


def test_bad_inputs_give_clear_errors():
    cells = pd.DataFrame({"index_change": [np.nan] * 6, "cell_id": list("abcdef")})
    mask = np.array([1, 1, 1, 1, 0, 0], bool)
    with pytest.raises(InputError, match="index_change: feature is NaN for every cell"):
        flag_cells(cells, control_mask=mask)
    with pytest.raises(InputError, match="missing feature column"):
        flag_cells(cells, control_mask=mask, feature="nope")
    cells["index_change"] = np.arange(6.0)
    with pytest.raises(InputError, match="too few controls"):
        flag_cells(cells, control_mask=np.array([1, 1, 0, 0, 0, 0], bool))
    with pytest.raises(InputError, match="control_mask"):
        flag_cells(cells, control_mask=[1, 0])
    with pytest.raises(InputError, match="fdr"):
        flag_cells(cells, control_mask=mask, fdr=1.5)
