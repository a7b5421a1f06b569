"""End to end: bead (sphere WGM) time-lapses through 'lasecyto run', against the generator's truth."""

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.io import read_table
from lasecyto.pipeline import run_experiment


@pytest.fixture(scope="module")
def merged(sphere_run, sphere_experiment):
    truth = pd.read_csv(sphere_experiment.parent / "truth" / "cell_frames.csv")
    frames = sphere_run.tables["cell_frames"]
    return frames.merge(truth, on=["cell_id", "frame"], suffixes=("", "_true"))


@pytest.mark.slow
def test_diameter_and_medium_index_in_95_percent_of_frames(merged):
    # issue 4 acceptance: on noisy generated spectra, diameter within 10 nm and medium index within
    # 5e-4 in >= 95 % of frames; counted over every lasing frame (a frame without a value fails)
    las = merged[merged["lasing"]]
    d_ok = (las["diameter_um"] - las["diameter_um_true"]).abs() < 0.010
    n_ok = (las["medium_index"] - las["medium_index_true"]).abs() < 5e-4
    assert len(las) >= 170
    assert (d_ok & n_ok).mean() >= 0.95
    assert n_ok.mean() >= 0.99
    # also when only 3-4 lines are visible (weak pulses): the medium index in every such frame
    weak = las[las["weak_pulse"]]
    assert len(weak) >= 10 and (weak["sphere_lines"] <= 4).all()
    assert ((weak["medium_index"] - weak["medium_index_true"]).abs() < 5e-4).mean() >= 0.95
    # the uncertainties are not too small: 2 sigma covers >= 90 % of the errors
    pull = (las["medium_index"] - las["medium_index_true"]) / las["medium_index_err"]
    assert (pull.abs() < 2).mean() >= 0.9


@pytest.mark.slow
def test_mode_identity_in_the_tracks(sphere_run, sphere_experiment):
    modes = pd.read_csv(sphere_experiment.parent / "truth" / "modes.csv")
    tracks = sphere_run.tables["tracks"]
    assert set(tracks["polarization"]) <= {"TE", "TM", ""}
    ident = tracks[tracks["mode_number"] >= 1]
    assert len(ident) >= 0.97 * len(tracks)
    m = ident.merge(modes[modes["visible"]], on=["cell_id", "frame"])
    m = m[(m["center_nm"] - m["center_vacuum_nm"]).abs() < 0.02]      # the resonance of each line
    same = ((m["polarization_x"] == m["polarization_y"]) & (m["mode_number"] == m["l"])
            & (m["radial_order_x"] == m["radial_order_y"]))
    assert same.mean() >= 0.99
    assert (ident["radial_order"] == 2).any()              # second-order modes are identified too


@pytest.mark.slow
def test_verdicts_and_cells(sphere_run, sphere_experiment, merged):
    truth = pd.read_csv(sphere_experiment.parent / "truth" / "cells.csv")
    cells = sphere_run.tables["cells"].merge(truth, on="cell_id", suffixes=("", "_true"))
    assert sphere_run.n_failed == 0
    assert (cells["changed"] == cells["responder"]).all()
    resp = cells[cells["responder"]]
    # the settled change against the true index change over the same windows (the verdict rule)
    for r in resp.itertuples():
        f = merged[(merged["cell_id"] == r.cell_id) & merged["lasing"]]
        post = f[f["time_s"] >= r.perturbation_s]
        settled = post.iloc[-max(5, int(np.ceil(0.25 * len(post)))):]
        expected = settled["index_change_true"].mean() - f[f["time_s"] < r.perturbation_s]["index_change_true"].mean()
        assert abs(r.index_change - expected) < 3e-5 + 3 * r.index_change_err
    assert (resp["onset_s"] - resp["onset_s_true"]).abs().max() <= 30.0
    np.testing.assert_allclose(cells["baseline_diameter_um"], cells["diameter_um"], atol=0.01)
    assert cells["diameter_change_um"].abs().max() < 0.01
    for name, t in sphere_run.tables.items():
        tables.validate(t, name)
    record = json.loads((sphere_run.out_dir / "run_record.json").read_text())
    assert record["experiment"]["resonator"] == "sphere" and record["experiment"]["sphere"]["bead_material"] == "ps-ma"
    read_table(sphere_run.out_dir / "tables" / "cell_frames.csv", name="cell_frames")


def _copy_experiment(src, dst, edit):
    shutil.copytree(src.parent, dst)
    manifest = dst / "experiment.toml"
    manifest.write_text(edit(manifest.read_text()))
    return manifest


@pytest.mark.slow
def test_bad_inputs_give_clear_messages(sphere_experiment, small_experiment, tmp_path):
    # a medium asked for outside its formula's validity range: every cell fails with the reason
    one_cell = lambda text: text.split("[[cells]]")[0] + "[[cells]]" + text.split("[[cells]]")[1]  # noqa: E731
    m = _copy_experiment(sphere_experiment, tmp_path / "far", lambda t: one_cell(t) + (
        "\n[parameters]\nsphere = { reference_nm = 1200.0 }\n"))
    res = run_experiment(m, tmp_path / "far-run", show_progress=False, write_report=False)
    item = [it for it in res.record["items"] if it["item"] != "lamp"][0]
    assert item["status"] == "failed"
    assert "sphere.medium" in item["error"] and "validity range of medium 'water-daimon'" in item["error"]
    assert "1200" in item["error"] and "extrapolate" not in item["error"]
    # lines that fit no sphere (a Fabry-Perot cell called a bead): no numbers, the reason in the note
    m = _copy_experiment(small_experiment, tmp_path / "fp", lambda t: one_cell(t).replace(
        'resonator = "fabry-perot"', 'resonator = "sphere"').replace(
        "[lamp]", "[sphere]\nbead_material = \"ps-ma\"\ndiameter_range_um = [10.0, 16.0]\n\n[lamp]"))
    res = run_experiment(m, tmp_path / "fp-run", show_progress=False, write_report=False)
    cell = res.tables["cells"].iloc[0]
    assert "no mode identity" in cell["note"] and ("fit no sphere" in cell["note"] or "ambiguous" in cell["note"])
    frames = res.tables["cell_frames"]
    assert frames["diameter_um"].isna().all() and frames["medium_index"].isna().all()
