"""Experiment manifest: parsing, collected problems, path resolution, missing files."""

import math

import pytest

from lasecyto.exceptions import InputError
from lasecyto.io import missing_files, read_manifest

GOOD = """
[experiment]
name = "demo"
resonator = "fabry-perot"
gap_um = 20.0
synthetic = true
description = "two dishes"

[lamp]
stack = "lamp/neon.tif"
reference = "Ne I"

[parameters]
lines = { snr_min = 6.0 }

[[dishes]]
dish = "A"
condition = "control"

[[dishes]]
dish = "B"
condition = "hypertonic"
perturbation_s = 300.0

[[cells]]
cell_id = "A-01"
dish = "A"
stack = "spectra/A-01.tif"

[[cells]]
cell_id = "B-01"
dish = "B"
stack = "spectra/img.tif"
sidecar = "meta/img.json"
rows = [0, 8]
"""


def _manifest(tmp_path, text):
    path = tmp_path / "experiment.toml"
    path.write_text(text)
    return path


def test_good_manifest(tmp_path):
    m = read_manifest(_manifest(tmp_path, GOOD))
    root = tmp_path.resolve()
    assert m.root == root and m.name == "demo" and m.resonator == "fabry-perot"
    assert m.gap_um == 20.0 and m.synthetic is True and m.description == "two dishes"
    assert m.lamp.stack == root / "lamp" / "neon.tif" and m.lamp.sidecar == root / "lamp" / "neon.json"
    assert m.lamp.reference == "Ne I"
    assert m.parameters == {"lines": {"snr_min": 6.0}}
    assert list(m.dishes) == ["A", "B"] and math.isnan(m.dishes["A"].perturbation_s)
    a, b = m.cells
    assert (a.cell_id, a.condition, a.rows, a.stack) == ("A-01", "control", None, root / "spectra" / "A-01.tif")
    assert a.sidecar == root / "spectra" / "A-01.json" and math.isnan(a.perturbation_s)
    assert (b.condition, b.perturbation_s, b.rows) == ("hypertonic", 300.0, (0, 8))
    assert b.sidecar == root / "meta" / "img.json"


def test_gap_absent_is_nan(tmp_path):
    m = read_manifest(_manifest(tmp_path, GOOD.replace("gap_um = 20.0\n", "")))
    assert math.isnan(m.gap_um)


def test_missing_files_listed(tmp_path):
    m = read_manifest(_manifest(tmp_path, GOOD))
    (tmp_path / "spectra").mkdir()
    (tmp_path / "spectra" / "A-01.tif").write_bytes(b"")
    (tmp_path / "spectra" / "A-01.json").write_text("{}")
    root = tmp_path.resolve()
    assert missing_files(m) == [
        ("lamp", root / "lamp" / "neon.tif"),
        ("lamp", root / "lamp" / "neon.json"),
        ("B-01", root / "spectra" / "img.tif"),
        ("B-01", root / "meta" / "img.json"),
    ]


def test_two_problems_reported_at_once(tmp_path):
    text = GOOD.replace('resonator = "fabry-perot"', 'resonator = "ring"').replace('dish = "B"\nstack', 'dish = "Z"\nstack')
    with pytest.raises(InputError) as err:
        read_manifest(_manifest(tmp_path, text))
    msg = str(err.value)
    assert "\n" not in msg and "experiment.toml" in msg and "2 problems" in msg
    assert "experiment.resonator: unsupported resonator (expected 'fabry-perot' or 'sphere', found 'ring')" in msg
    assert "cells[1].dish: unknown dish (expected one of ['A', 'B'], found 'Z')" in msg
    assert msg.count("; ") == 1


@pytest.mark.parametrize("old, new, field", [
    ('gap_um = 20.0', 'gap_um = -1.0', "experiment.gap_um"),
    ('name = "demo"\n', '', "experiment.name"),
    ('rows = [0, 8]', 'rows = [8, 8]', "cells[1].rows"),
    ('rows = [0, 8]', 'rows = [0, 8, 9]', "cells[1].rows"),
    ('cell_id = "B-01"', 'cell_id = "A-01"', "cells[1].cell_id"),
    ('dish = "B"\ncondition', 'dish = "A"\ncondition', "dishes[1].dish"),
    ('condition = "control"\n', '', "dishes[0].condition"),
    ('stack = "spectra/A-01.tif"\n', '', "cells[0].stack"),
    ('stack = "lamp/neon.tif"\n', '', "lamp.stack"),
])
def test_each_structural_problem(tmp_path, old, new, field):
    assert old in GOOD
    with pytest.raises(InputError) as err:
        read_manifest(_manifest(tmp_path, GOOD.replace(old, new, 1)))
    assert f"{field}: " in str(err.value)


def test_no_experiment_and_no_cells(tmp_path):
    with pytest.raises(InputError) as err:
        read_manifest(_manifest(tmp_path, 'title = "x"\n'))
    msg = str(err.value)
    assert "2 problems" in msg and "experiment: missing table" in msg and "cells: no cells" in msg


def test_toml_syntax_error(tmp_path):
    with pytest.raises(InputError, match="invalid TOML") as err:
        read_manifest(_manifest(tmp_path, "[experiment\nname = 1\n"))
    assert "experiment.toml" in str(err.value) and "line 1" in str(err.value)
