"""A batch of 50 items with 3 corrupt ones: 47 complete, the 3 are reported with their reasons."""

import json

import pytest

from lasecyto.cli import main
from lasecyto.synth import tile_experiment, write_fp_experiment


@pytest.fixture(scope="module")
def batch_of_50(tmp_path_factory):
    """50 cells (copies of 4 generated 8-frame cells), three of them made corrupt."""
    root = tmp_path_factory.mktemp("batch50")
    base = write_fp_experiment(root / "base", n_dishes=2, cells_per_dish=2, n_frames=8,
                               perturbation_s=40.0, imaging_dish=False, rng=50)
    manifest = tile_experiment(base, root / "tiled", n_cells=50, files="copy")
    spectra = manifest.parent / "spectra"
    bad = {}
    # a truncated TIFF
    data = (spectra / "t07.tif").read_bytes()
    (spectra / "t07.tif").write_bytes(data[: len(data) // 2])
    bad["B-02~7"] = ("t07.tif", "truncated")
    # a sidecar with one frame time too few
    meta = json.loads((spectra / "t23.json").read_text())
    meta["frame_times_s"] = meta["frame_times_s"][:-1]
    (spectra / "t23.json").write_text(json.dumps(meta))
    bad["B-02~23"] = ("t23.json", "frame_times_s")
    # a stack that is gone
    (spectra / "t41.tif").unlink()
    bad["A-02~41"] = ("t41.tif", "not found")
    return manifest, bad


@pytest.mark.slow
def test_three_corrupt_items_of_fifty(batch_of_50, tmp_path, capsys):
    # acceptance (issue 7): 47 complete; the run record and the exit status report the 3 with reasons
    manifest, bad = batch_of_50
    out = tmp_path / "run"
    code = main(["run", str(manifest), "--out", str(out), "--no-report"])
    assert code == 3
    record = json.loads((out / "run_record.json").read_text())
    cells = [it for it in record["items"] if it["item"] != "lamp"]
    assert len(cells) == 50
    failed = {it["item"]: it["error"] for it in cells if it["status"] != "ok"}
    assert set(failed) == set(bad)
    assert record["n_failed"] == 3
    for item, (needle, what) in bad.items():
        assert needle in failed[item] and what in failed[item], failed[item]
        assert "expected" in failed[item] and "found" in failed[item]
    assert record["tables"]["cells"]["rows"] == 47
    summary = capsys.readouterr().out
    assert "3 item(s) failed" in summary
    for item in bad:
        assert item in summary
