"""summarize_cell judging a named series (the bead diameter of a sphere cell)."""

import numpy as np
import pandas as pd
import pytest

from lasecyto.exceptions import InputError
from lasecyto.features import summarize_cell


def _frames(diameter_change, *, err=5e-5):
    n = diameter_change.size
    return pd.DataFrame({
        "cell_id": ["b1"] * n, "frame": np.arange(n), "time_s": 10.0 * np.arange(n),
        "n_lines": np.full(n, 10), "n_lasing": np.full(n, 10), "total_area_counts": np.full(n, 1e5),
        "lasing": np.ones(n, bool), "fsr_nm": np.nan, "optical_length_um": np.nan, "optical_length_err_um": np.nan,
        "relative_shift": np.zeros(n), "relative_shift_err": np.full(n, 1e-6),
        "delta_optical_length_um": np.nan, "delta_optical_length_err_um": np.nan,
        "index_change": np.zeros(n), "index_change_err": np.full(n, 1e-5),
        "diameter_change_um": diameter_change, "diameter_change_err_um": np.full(n, err)})


def test_a_swelling_bead_is_judged_on_its_diameter():
    # in-test truth: the diameter grows by 20 nm at 300 s (frame 30), noise 5e-5 um (seeded)
    rng = np.random.default_rng(3)
    d = np.where(np.arange(60) >= 30, 0.020, 0.0) + rng.normal(0.0, 5e-5, 60)
    res = summarize_cell(_frames(d), perturbation_s=295.0, quantity="diameter_change_um",
                         quantity_err="diameter_change_err_um", min_change=0.005)
    assert res["quantity"] == "diameter_change_um" and res["changed"]
    assert res["index_change"] == pytest.approx(0.020, abs=1e-4)      # the change, in um
    assert res["onset_s"] == pytest.approx(295.0)
    # below the smallest flagged change: significant but not large enough
    small = summarize_cell(_frames(d / 10), perturbation_s=295.0, quantity="diameter_change_um",
                           quantity_err="diameter_change_err_um", min_change=0.005)
    assert abs(small["change_z"]) > 5 and not small["changed"]
    # the index series of the same cell is unchanged: the automatic choice sees nothing
    assert not summarize_cell(_frames(d), perturbation_s=295.0)["changed"]


def test_a_named_series_needs_its_columns_and_threshold():
    with pytest.raises(InputError, match="named series"):
        summarize_cell(_frames(np.zeros(20)), perturbation_s=95.0, quantity="diameter_change_um")
    with pytest.raises(InputError, match="named series"):
        summarize_cell(_frames(np.zeros(20)), perturbation_s=95.0, quantity="volume_change", min_change=1.0)
