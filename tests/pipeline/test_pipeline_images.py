"""Emission images in runs: manifest fields, the pattern stage per cell, image-only cells and bad image input."""

import json
import warnings

import numpy as np
import pandas as pd
import pytest
import tifffile

from lasecyto import tables
from lasecyto.exceptions import InputError
from lasecyto.io import read_manifest
from lasecyto.pipeline import CellJob, CellResult, resolve_parameters, run_experiment
from lasecyto.pipeline._patterns import attach_patterns, cell_patterns
from lasecyto.synth._patterns import simulate_pattern_stack

N_FRAMES = 12


@pytest.fixture(scope="module")
def one_cell_stack():
    """A 12-frame 64 x 64 stack of one lasing cell (HG/LG pattern, SNR 25) and its truth."""
    stack, truth = simulate_pattern_stack(n_frames=N_FRAMES, shape=(64, 64), n_cells=1, peak_snr=25.0,
                                          change_prob=0.0, min_separation_px=10.0, rng=8)
    return stack, truth


def _write_stack(path, data, *, frame_times=None, n_frames=None, **kw):
    with warnings.catch_warnings():  # tifffile warns when asked to write zero-size pages (a bad input on purpose)
        warnings.simplefilter("ignore", UserWarning)
        tifffile.imwrite(path, data, **kw)
    doc = {}
    if frame_times is not None:
        doc["frame_times_s"] = [float(t) for t in frame_times]
    if n_frames is not None:
        doc["n_frames"] = n_frames
    if doc:
        path.with_suffix(".json").write_text(json.dumps(doc))
    return path


def _manifest(tmp_path, cells, *, images="images/f1.tif", sidecar=None, extra=""):
    text = f"""
[experiment]
name = "image-only"
resonator = "fabry-perot"
control_condition = "control"
{extra}
[[dishes]]
dish = "A"
condition = "control"
perturbation_s = 50.0

[[fields]]
field = "f1"
dish = "A"
images = "{images}"
""" + (f'sidecar = "{sidecar}"\n' if sidecar else "")
    for cid, pos in cells:
        text += f'\n[[cells]]\ncell_id = "{cid}"\ndish = "A"\nfield = "f1"\nposition_px = [{pos[0]}, {pos[1]}]\n'
    path = tmp_path / "experiment.toml"
    path.write_text(text)
    return path


def _job(tmp_path, stack_path, position, *, perturbation_s=50.0, stack=None, roi=None):
    return CellJob(cell_id="A-01", dish="A", condition="control", perturbation_s=perturbation_s, stack=stack,
                   sidecar=None, rows=None, gap_um=float("nan"), parameters=resolve_parameters(),
                   images=str(stack_path), image_field="f1", position_px=position, roi_px=roi,
                   field_cells=(("A-01", *(position if position else (0.0, 0.0))),))


def test_manifest_fields_positions_and_controls(tmp_path):
    m = read_manifest(_manifest(tmp_path, [("A-01", (20, 30)), ("A-02", (40, 12.5))]))
    assert m.control_conditions == ("control",)
    assert m.fields["f1"].images == tmp_path.resolve() / "images" / "f1.tif" and m.fields["f1"].sidecar is None
    c = m.cells[1]
    assert c.stack is None and c.sidecar is None and c.field == "f1" and c.position_px == (40.0, 12.5)


def test_manifest_image_problems_are_reported_at_once(tmp_path):
    text = """
[experiment]
name = "x"
resonator = "fabry-perot"
control_condition = "sham"

[[dishes]]
dish = "A"
condition = "control"

[[dishes]]
dish = "B"
condition = "treated"

[[fields]]
field = "f1"
dish = "A"
images = "f1.tif"

[[fields]]
field = "f1"
dish = "A"
images = "again.tif"

[[cells]]
cell_id = "A-01"
dish = "A"
field = "f1"

[[cells]]
cell_id = "A-02"
dish = "A"
field = "f9"
position_px = [1, 2]

[[cells]]
cell_id = "B-01"
dish = "B"
field = "f1"
roi_px = [10, 10, 5, 20]

[[cells]]
cell_id = "A-03"
dish = "A"
stack = "s.tif"
position_px = [1, -2]
"""
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(InputError) as info:
        read_manifest(path)
    msg = str(info.value)
    for part in ("fields[1].field: repeated field", "cells[0]: cell in a camera field without a location",
                 "cells[1].field: unknown field", "cells[2].field: field of another dish",
                 "cells[2].roi_px: bad region of interest", "cells[3].position_px: bad image position",
                 "cells[3].field: image location without a field",
                 "experiment.control_condition: not the condition of any dish"):
        assert part in msg, part
    assert "\n" not in msg


def test_pattern_stage_of_one_cell(tmp_path, one_cell_stack):
    stack, truth = one_cell_stack
    path = _write_stack(tmp_path / "f1.tif", stack, frame_times=np.arange(N_FRAMES) * 10.0,
                        photometric="minisblack")
    pos = (round(truth["row_px"].iloc[0]), round(truth["col_px"].iloc[0]))
    stage = cell_patterns(_job(tmp_path, path, pos))
    assert stage.note == "" and len(stage.regions) == N_FRAMES
    tables.validate(stage.regions, "patterns")
    assert (stage.regions["cell_id"] == "A-01").all()
    # centres in image coordinates (the window offset is added back); truth from lasecyto.synth
    err = np.hypot(stage.regions["center_row_px"].to_numpy() - truth["row_px"].to_numpy(),
                   stage.regions["center_col_px"].to_numpy() - truth["col_px"].to_numpy())
    assert np.sqrt(np.mean(err ** 2)) < 0.5
    assert (stage.frames["pattern_order"] == truth["order"].iloc[0]).all()
    assert stage.cell["pattern_dominant_order"] == truth["order"].iloc[0]
    assert stage.cell["pattern_change_count"] == 0
    # the same pattern before and after the perturbation: high correlation with the baseline pattern
    assert (stage.frames["pattern_baseline_corr"] > 0.95).all()
    # the same cell given by a region of interest instead of a position
    roi = (pos[0] - 20, pos[1] - 20, pos[0] + 20, pos[1] + 20)
    by_roi = cell_patterns(_job(tmp_path, path, None, roi=roi))
    pd.testing.assert_series_equal(by_roi.frames["pattern_order"], stage.frames["pattern_order"])


def test_bad_image_input_through_the_stage(tmp_path, one_cell_stack):
    stack, truth = one_cell_stack
    pos = (round(truth["row_px"].iloc[0]), round(truth["col_px"].iloc[0]))
    # issue 5 bad input: an RGB image where grayscale is expected
    rgb = _write_stack(tmp_path / "rgb.tif", np.zeros((4, 32, 32, 3), np.uint8), photometric="rgb")
    with pytest.raises(InputError, match="colour image where grayscale frames are expected"):
        cell_patterns(_job(tmp_path, rgb, pos))
    # an empty frame (zero-size pages)
    empty = _write_stack(tmp_path / "empty.tif", np.zeros((3, 0, 16), np.uint16), photometric="minisblack")
    with pytest.raises(InputError, match="empty or non-2-D frame"):
        cell_patterns(_job(tmp_path, empty, pos))
    # a stack whose frame count disagrees with its sidecar
    short = _write_stack(tmp_path / "short.tif", stack, frame_times=np.arange(N_FRAMES - 2) * 10.0,
                         photometric="minisblack")
    with pytest.raises(InputError, match="frame count of the stack disagrees with its sidecar"):
        cell_patterns(_job(tmp_path, short, pos))
    # a field with no lasing cell: an empty result with the reason
    noise = np.random.default_rng(3).normal(100, 3, (N_FRAMES, 64, 64)).astype(np.uint16)
    dark = _write_stack(tmp_path / "dark.tif", noise, photometric="minisblack")
    stage = cell_patterns(_job(tmp_path, dark, pos))
    assert stage.regions.empty and stage.frames["pattern_order"].eq("").all()
    assert stage.note.startswith("patterns: no lasing cell in any of the 12 frames")
    # a blank (constant) frame inside a good stack is skipped with its reason, the others are analysed
    blanked = stack.copy()
    blanked[5] = 100
    part = _write_stack(tmp_path / "blank.tif", blanked, photometric="minisblack")
    stage = cell_patterns(_job(tmp_path, part, pos))
    assert len(stage.regions) == N_FRAMES - 1 and 5 not in set(stage.regions["frame"])
    # a position outside the image
    with pytest.raises(InputError, match="cell position outside the image"):
        cell_patterns(_job(tmp_path, part, (70, 10)))


def test_images_of_a_cell_with_spectra_never_lose_the_spectra(tmp_path, one_cell_stack):
    stack, truth = one_cell_stack
    pos = (round(truth["row_px"].iloc[0]), round(truth["col_px"].iloc[0]))
    path = _write_stack(tmp_path / "f1.tif", stack, photometric="minisblack")
    frames = tables.validate(pd.DataFrame({
        "cell_id": "A-01", "frame": np.arange(N_FRAMES + 3), "time_s": np.arange(N_FRAMES + 3) * 10.0,
        "n_lines": 3, "n_lasing": 3, "total_area_counts": 1e4, "lasing": True, "fsr_nm": 6.9,
        "optical_length_um": 27.7, "optical_length_err_um": 1e-3, "relative_shift": 0.0,
        "relative_shift_err": 1e-6, "delta_optical_length_um": 0.0, "delta_optical_length_err_um": 1e-5,
        "index_change": 0.0, "index_change_err": 1e-6}), "cell_frames")
    job = _job(tmp_path, path, pos, stack="spectra.tif")
    result = attach_patterns(job, CellResult("A-01", "ok", tables={"cell_frames": frames}, cell={"cell_id": "A-01"}))
    # the image stack has 12 frames, the spectra 15: the spectra stay, the reason is in pattern_note
    assert "image stack and spectral stack differ in frame count" in result.cell["pattern_note"]
    assert result.tables["cell_frames"] is frames and "patterns" not in result.tables
    result = attach_patterns(job, CellResult("A-01", "ok", tables={"cell_frames": frames.iloc[:N_FRAMES]},
                                             cell={"cell_id": "A-01"}))
    assert result.cell["pattern_note"] == "" and len(result.tables["patterns"]) == N_FRAMES
    cf = result.tables["cell_frames"]
    assert (cf["pattern_order"] == truth["order"].iloc[0]).all() and cf["n_lines"].eq(3).all()


def test_image_only_run_with_bad_fields(tmp_path, one_cell_stack):
    # one good field, one RGB field, one field without a lasing cell: the batch keeps its good cells
    stack, truth = one_cell_stack
    (tmp_path / "images").mkdir()
    _write_stack(tmp_path / "images" / "f1.tif", stack, frame_times=np.arange(N_FRAMES) * 10.0,
                 photometric="minisblack")
    pos = (round(truth["row_px"].iloc[0]), round(truth["col_px"].iloc[0]))
    manifest = _manifest(tmp_path, [("A-01", pos)])
    text = manifest.read_text()
    text += '\n[[fields]]\nfield = "rgb"\ndish = "A"\nimages = "images/rgb.tif"\n'
    text += '\n[[fields]]\nfield = "dark"\ndish = "A"\nimages = "images/dark.tif"\n'
    text += '\n[[cells]]\ncell_id = "A-02"\ndish = "A"\nfield = "rgb"\nposition_px = [10, 10]\n'
    text += '\n[[cells]]\ncell_id = "A-03"\ndish = "A"\nfield = "dark"\nposition_px = [30, 30]\n'
    manifest.write_text(text)
    _write_stack(tmp_path / "images" / "rgb.tif", np.zeros((N_FRAMES, 32, 32, 3), np.uint8), photometric="rgb")
    noise = np.random.default_rng(4).normal(100, 3, (N_FRAMES, 64, 64)).astype(np.uint16)
    _write_stack(tmp_path / "images" / "dark.tif", noise, photometric="minisblack")
    res = run_experiment(manifest, tmp_path / "run", show_progress=False, write_report=False)
    items = {it["item"]: it for it in res.record["items"]}
    assert items["A-01"]["status"] == "ok" and items["A-03"]["status"] == "ok"
    assert items["A-02"]["status"] == "failed" and "colour image" in items["A-02"]["error"]
    cells = res.tables["cells"].set_index("cell_id")
    assert cells.loc["A-01", "quantity"] == "pattern_baseline_corr"
    assert cells.loc["A-01", "pattern_dominant_order"] == truth["order"].iloc[0]
    assert cells.loc["A-03", "n_frames_lasing"] == 0 and "no lasing cell" in cells.loc["A-03", "pattern_note"]
    assert res.record["analysis"]["changed_rule"].startswith("per-cell rule")  # one control cell only
    pat = res.tables["patterns"]
    assert set(pat["cell_id"]) == {"A-01"} and len(pat) == N_FRAMES
    cf = res.tables["cell_frames"]
    assert cf.loc[cf["cell_id"] == "A-01", "lasing"].all() and cf["index_change"].isna().all()
    assert (tmp_path / "run" / "tables" / "patterns.parquet").is_file()
