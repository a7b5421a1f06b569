"""End to end: pump-threshold series through 'lasecyto run', against the generator's truth."""

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from lasecyto.pipeline import run_experiment
from lasecyto.safety import CAUTIONS, pulse_dose


@pytest.mark.slow
def test_threshold_and_beta_of_the_main_modes(pump_run, pump_experiment):
    # issue 4 acceptance on the rendered stacks (3 decades of pump): threshold within 2 %, beta within 20 %
    truth = pd.read_csv(pump_experiment.parent / "truth" / "cells.csv")
    thr = pump_run.tables["thresholds"]
    main = thr.groupby("cell_id").head(1).merge(truth, on="cell_id", suffixes=("", "_true"))
    assert len(main) == len(truth) == 4 and main["fit_ok"].all()
    assert (main["center_nm"] - main["main_center_nm"]).abs().max() < 0.01     # the right mode
    assert ((main["threshold_nj"] / main["threshold_nj_true"] - 1).abs() < 0.02).all()
    assert ((main["beta"] / main["beta_true"] - 1).abs() < 0.20).all()
    assert ((main["pump_max_nj"] / main["pump_min_nj"]) >= 900).all()
    # the cells table carries the main mode's numbers
    cells = pump_run.tables["cells"].set_index("cell_id")
    np.testing.assert_allclose(cells.loc[main["cell_id"], "threshold_nj"], main["threshold_nj"])
    assert all("pump series" in n for n in cells["note"])
    # line narrowing against the instrument function: broad below threshold, instrument-limited above
    assert (main["narrowing_ratio"] > 1.5).all() and main["instrument_limited"].all()


@pytest.mark.slow
def test_fluence_and_cautions_go_together(pump_run, pump_experiment):
    thr = pump_run.tables["thresholds"]
    # Gaussian 30 um 1/e^2 diameter: the fluence of the safety module (check-values section 11 formulas)
    per_nj = pulse_dose(1e-9, pulse_s=5e-9, beam="gaussian", diameter_um=30.0, wavelength_nm=470.0).fluence_j_cm2
    np.testing.assert_allclose(thr["threshold_fluence_j_cm2"], thr["threshold_nj"] * per_nj)
    frames = pump_run.tables["cell_frames"]
    np.testing.assert_allclose(frames["pump_fluence_j_cm2"], frames["pump_energy_nj"] * per_nj)
    record = json.loads((pump_run.out_dir / "run_record.json").read_text())
    assert record["pump_safety"] == CAUTIONS and record["experiment"]["kind"] == "pump-series"
    assert (pump_run.out_dir / "pump_safety.txt").read_text() == CAUTIONS + "\n"
    assert (thr["max_fluence_skin_mpe_ratio"] > 0).all()


@pytest.mark.slow
def test_a_pump_series_with_one_energy_fails_clearly(pump_experiment, tmp_path):
    dst = tmp_path / "one"
    shutil.copytree(pump_experiment.parent, dst)
    side = dst / "spectra" / "A-01.json"
    doc = json.loads(side.read_text())
    doc["pump_energy_nj"] = 12.0
    side.write_text(json.dumps(doc))
    res = run_experiment(dst / "experiment.toml", tmp_path / "run", show_progress=False, write_report=False)
    items = {it["item"]: it for it in res.record["items"]}
    assert items["A-01"]["status"] == "failed"
    assert "A-01.json: pump_energy_nj: a pump series needs several positive pump energies" in items["A-01"]["error"]
    assert "found 1 distinct value" in items["A-01"]["error"]
    assert all(items[c]["status"] == "ok" for c in ("A-02", "B-01", "B-02"))   # the others complete
    assert res.n_failed == 1
