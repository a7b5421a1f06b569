"""The run carries mode identity and cavity-model inputs from the manifest."""

import shutil

import numpy as np
import pytest

from lasecyto.pipeline import run_experiment


def _copy_with(small_experiment, tmp_path, edit):
    dst = tmp_path / "exp"
    shutil.copytree(small_experiment.parent, dst)
    manifest = dst / small_experiment.name
    manifest.write_text(edit(manifest.read_text()))
    return manifest


def test_unknown_gap_medium_fails_every_cell_with_a_clear_reason(small_experiment, tmp_path):
    manifest = _copy_with(small_experiment, tmp_path,
                          lambda t: t.replace('medium = "water-daimon"', 'medium = "honey"'))
    res = run_experiment(manifest, tmp_path / "run", show_progress=False, write_report=False)
    cells = [it for it in res.record["items"] if it["item"] != "lamp"]
    assert cells and all(it["status"] == "failed" for it in cells)
    err = cells[0]["error"]
    assert "experiment.medium" in err and "honey" in err and "water-daimon" in err


@pytest.mark.slow
def test_cell_thickness_and_mode_columns(small_experiment, tmp_path):
    # the first cell is declared 10 um thick in the 20 um gap: its index change is Delta(n L) / 10 um
    def edit(text):
        head, sep, rest = text.partition("[[cells]]")
        cell, sep2, others = rest.partition("[[cells]]")
        return head + sep + cell.rstrip("\n") + "\ncell_thickness_um = 10.0\n\n" + sep2 + others

    manifest = _copy_with(small_experiment, tmp_path, edit)
    res = run_experiment(manifest, tmp_path / "run", show_progress=False, write_report=False)
    assert res.record["n_failed"] == 0
    cf = res.tables["cell_frames"]
    first = cf["cell_id"] == cf["cell_id"].iloc[0]
    ok = np.isfinite(cf["index_change"])
    ratio = (cf["delta_optical_length_um"] / cf["index_change"])[ok]
    assert np.allclose(ratio[first[ok]], 10.0) and np.allclose(ratio[~first[ok]], 20.0)
    tr = res.tables["tracks"]
    assert (tr["mode_number"] > 0).all() and (tr["transverse_order"] >= 0).all()
    assert tr["hop"].dtype == bool
    assert np.isfinite(cf["gouy_fraction"]).mean() > 0.9
    assert np.isfinite(cf["phase_optical_length_um"]).mean() > 0.9


def test_track_stage_keeps_tracks_when_the_medium_does_not_cover_the_lines():
    # lines at 590-640 nm, a user medium valid only below 550 nm: tracks survive, the note says why
    from lasecyto.cavity.media import Cauchy
    from lasecyto.pipeline import DEFAULT_PARAMETERS
    from lasecyto.pipeline._track_stage import track_cell
    from lasecyto.synth import mode_trajectories

    lines = mode_trajectories(n_frames=80, n_hops=0, rng=2)
    res = track_cell(lines, DEFAULT_PARAMETERS, medium=Cauchy(A=1.33, valid_nm=(400.0, 550.0)), gap_um=20.0)
    assert len(res.tracks) > 0 and (res.tracks["mode_number"] == -1).all()
    assert any("no mode identity" in w and "validity range" in w for w in res.warnings)
