"""A batch with bad items: the good cells complete, the bad ones are recorded with their reason."""

import json
import shutil
import tomllib

import pytest
import tifffile

from lasecyto.cli import main
from lasecyto.pipeline import run_experiment


@pytest.fixture()
def broken_experiment(small_experiment, tmp_path):
    src = small_experiment.parent
    dst = tmp_path / "broken"
    shutil.copytree(src, dst)
    manifest = dst / small_experiment.name
    text = manifest.read_text()
    cells = tomllib.loads(text)["cells"]
    assert len(cells) >= 5
    bad = {}

    # 1. a truncated TIFF
    c = cells[0]
    path = dst / c["stack"]
    data = path.read_bytes()
    path.write_bytes(data[: int(len(data) * 0.6)])
    bad[c["cell_id"]] = path.name

    # 2. a sidecar with fewer frame times than frames
    c = cells[1]
    side = dst / c.get("sidecar", c["stack"].rsplit(".", 1)[0] + ".json")
    meta = json.loads(side.read_text())
    meta["frame_times_s"] = meta["frame_times_s"][:-1]
    side.write_text(json.dumps(meta))
    bad[c["cell_id"]] = "frame_times_s"

    # 3. the manifest names a missing file
    c = cells[2]
    text = text.replace(f'"{c["stack"]}"', '"spectra/no-such-cell.tif"')
    bad[c["cell_id"]] = "no-such-cell.tif"

    # 4. a CSV stack with a non-numeric cell
    c = cells[3]
    stack = tifffile.imread(dst / c["stack"])
    counts = stack.reshape(-1, stack.shape[-1])
    header = "frame," + ",".join(f"px{i}" for i in range(counts.shape[1]))
    rows = [f"{i}," + ",".join(str(int(v)) for v in row) for i, row in enumerate(counts)]
    fields = rows[5].split(",")
    fields[100] = "abc"
    rows[5] = ",".join(fields)
    csv_path = dst / "spectra" / "bad_cell.csv"
    csv_path.write_text("\n".join([header] + rows) + "\n")
    sidecar_old = c.get("sidecar", c["stack"].rsplit(".", 1)[0] + ".json")
    text = text.replace(f'"{c["stack"]}"', '"spectra/bad_cell.csv"')
    if "sidecar" not in c:
        shutil.copy(dst / sidecar_old, dst / "spectra" / "bad_cell.json")
    bad[c["cell_id"]] = "bad_cell.csv"

    manifest.write_text(text)
    return manifest, bad


def test_bad_items_are_recorded_and_the_rest_complete(broken_experiment, tmp_path):
    manifest, bad = broken_experiment
    result = run_experiment(manifest, tmp_path / "run", show_progress=False, write_report=False)
    items = {it["item"]: it for it in result.record["items"]}
    failed = {k for k, it in items.items() if it["status"] != "ok"}
    assert failed == set(bad)
    for cell_id, needle in bad.items():
        msg = items[cell_id]["error"]
        assert "\n" not in msg
        assert needle in msg, msg
        assert "expected" in msg and "found" in msg, msg
    good = set(items) - failed - {"lamp"}
    assert set(result.tables["cells"]["cell_id"]) == good
    record = json.loads((tmp_path / "run" / "run_record.json").read_text())
    assert record["n_failed"] == len(bad)


def test_cli_exit_status_reports_failures(broken_experiment, tmp_path, capsys):
    manifest, bad = broken_experiment
    code = main(["run", str(manifest), "--out", str(tmp_path / "run"), "--quiet", "--no-report"])
    assert code == 3


def test_cli_bad_manifest_is_one_line_error(tmp_path, capsys):
    bad = tmp_path / "experiment.toml"
    bad.write_text('[experiment]\nresonator = "ring"\n[[cells]]\ncell_id = "x"\n')
    code = main(["run", str(bad), "--out", str(tmp_path / "run"), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 1
    assert err.count("\n") == 0
    assert "experiment.toml" in err
