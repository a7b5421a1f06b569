"""Manifest keys of the cavity model: gap medium and the cell's thickness in the gap."""

import math

import pytest

from lasecyto.exceptions import InputError
from lasecyto.io import read_manifest

BASE = """
[experiment]
name = "partly filled"
resonator = "fabry-perot"
gap_um = 15.0
{extra}

[[dishes]]
dish = "A"
condition = "control"

[[cells]]
cell_id = "A-01"
dish = "A"
stack = "a1.tif"
{cell_extra}

[[cells]]
cell_id = "A-02"
dish = "A"
stack = "a2.tif"
"""


def _write(tmp_path, extra="", cell_extra=""):
    path = tmp_path / "exp.toml"
    path.write_text(BASE.format(extra=extra, cell_extra=cell_extra))
    return path


def test_medium_and_thickness_per_experiment_and_per_cell(tmp_path):
    m = read_manifest(_write(tmp_path, 'medium = "water-iapws"\ncell_thickness_um = 8.0',
                             "cell_thickness_um = 6.5"))
    assert m.medium == "water-iapws" and m.cell_thickness_um == 8.0
    assert [c.cell_thickness_um for c in m.cells] == [6.5, 8.0]
    plain = read_manifest(_write(tmp_path))
    assert plain.medium == "" and math.isnan(plain.cell_thickness_um)
    assert all(math.isnan(c.cell_thickness_um) for c in plain.cells)


@pytest.mark.parametrize("extra, cell_extra, field, found", [
    ("cell_thickness_um = 20.0", "", "experiment.cell_thickness_um: cell thicker than the mirror gap", "20.0"),
    ("", "cell_thickness_um = -2.0", "cells[0].cell_thickness_um: bad number", "-2.0"),
    ("", "cell_thickness_um = 16.0", "cells[0].cell_thickness_um: cell thicker", "16.0"),
    ("medium = 3", "", "experiment.medium: not a non-empty string", "3"),
])
def test_bad_cavity_keys(tmp_path, extra, cell_extra, field, found):
    path = _write(tmp_path, extra, cell_extra)
    with pytest.raises(InputError) as info:
        read_manifest(path)
    msg = str(info.value)
    assert msg.startswith(str(path)) and field in msg and f"found {found}" in msg
