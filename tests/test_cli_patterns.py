"""``lasecyto patterns``: the pattern stage on one stack, and its bad inputs."""

import json
import warnings

import numpy as np
import pytest
import tifffile

from lasecyto.cli import main
from lasecyto.io import read_table
from lasecyto.synth._patterns import write_pattern_stack


@pytest.fixture(scope="module")
def stack_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("patterns_cli") / "field.ome.tif"
    truth = write_pattern_stack(path, n_frames=15, shape=(96, 96), n_cells=2, peak_snr=25.0, change_prob=0.0,
                                min_separation_px=40.0, rng=12)
    return path, truth


def test_patterns_command_writes_the_table(stack_path, tmp_path, capsys):
    path, truth = stack_path
    assert main(["patterns", str(path), "--out", str(tmp_path / "pat")]) == 0
    out = capsys.readouterr().out
    assert "15 frames with lasing regions, 30 regions, 2 tracks" in out
    table = read_table(tmp_path / "pat.parquet", name="patterns")
    assert len(table) == 30 and set(table["track_id"]) == {0, 1}
    # OME-TIFF metadata read: pixel size 0.5 um from the generator, sidecar frame times
    assert np.allclose(table["waist_um"], 0.5 * table["waist_px"])
    assert set(table["mode_order"]) == set(truth["order"])
    assert (table["cell_id"] == "").all()


def test_patterns_command_bad_inputs(stack_path, tmp_path, capsys):
    path, _ = stack_path
    # an RGB image where grayscale is expected: exit 1, a one-line message, nothing written
    rgb = tmp_path / "rgb.tif"
    tifffile.imwrite(rgb, np.zeros((3, 16, 16, 3), np.uint8), photometric="rgb")
    assert main(["patterns", str(rgb), "--out", str(tmp_path / "a")]) == 1
    assert "colour image where grayscale frames are expected" in capsys.readouterr().err
    # a stack whose frame count disagrees with its sidecar
    side = tmp_path / "side.json"
    side.write_text(json.dumps({"frame_times_s": [0.0, 1.0, 2.0]}))
    assert main(["patterns", str(path), "--sidecar", str(side), "--out", str(tmp_path / "b")]) == 1
    assert "frame count of the stack disagrees with its sidecar" in capsys.readouterr().err
    # an empty frame
    empty = tmp_path / "empty.tif"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        tifffile.imwrite(empty, np.zeros((2, 0, 8), np.uint16), photometric="minisblack")
    assert main(["patterns", str(empty), "--out", str(tmp_path / "c")]) == 1
    assert "empty or non-2-D frame" in capsys.readouterr().err
    assert not any(tmp_path.glob("[abc].*"))
    # a field with no lasing cell: an empty table and the reason
    noise = np.random.default_rng(2).normal(100, 3, (5, 48, 48)).astype(np.uint16)
    dark = tmp_path / "dark.tif"
    tifffile.imwrite(dark, noise, photometric="minisblack")
    assert main(["patterns", str(dark), "--out", str(tmp_path / "d")]) == 0
    assert "no lasing cell in any of the 5 frames" in capsys.readouterr().err
    assert read_table(tmp_path / "d.csv", name="patterns").empty
