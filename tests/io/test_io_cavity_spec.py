"""Manifest tables [sphere] and [pump] and experiment.kind: validation, all problems at once."""

import pytest

from lasecyto.exceptions import InputError
from lasecyto.io import read_manifest

BASE = """
[experiment]
name = "beads"
resonator = "sphere"
{experiment_extra}

{tables}

[[dishes]]
dish = "A"
condition = "control"

[[cells]]
cell_id = "A-01"
dish = "A"
stack = "spectra/A-01.tif"
"""

SPHERE = """
[sphere]
bead_material = "ps-ma"
medium = "water-daimon"
diameter_range_um = [10.0, 16.0]
"""


def _read(tmp_path, tables, experiment_extra=""):
    path = tmp_path / "experiment.toml"
    path.write_text(BASE.format(tables=tables, experiment_extra=experiment_extra))
    return read_manifest(path)


def test_sphere_table_read(tmp_path):
    m = _read(tmp_path, SPHERE)
    assert m.resonator == "sphere" and m.kind == "time-lapse" and m.pump is None
    assert m.sphere == {"bead_material": "ps-ma", "bead_index": None, "medium": "water-daimon",
                        "temperature_c": None, "diameter_range_um": (10.0, 16.0),
                        "medium_index_range": (1.33, 1.41)}
    m = _read(tmp_path, """
[sphere]
bead_index = 1.59
medium = "Water-IAPWS"
temperature_c = 37.0
diameter_range_um = [8, 12]
medium_index_range = [1.34, 1.38]
""")
    assert m.sphere["bead_index"] == 1.59 and m.sphere["medium"] == "water-iapws"
    assert m.sphere["temperature_c"] == 37.0 and m.sphere["medium_index_range"] == (1.34, 1.38)


def test_every_sphere_problem_at_once(tmp_path):
    with pytest.raises(InputError) as err:
        _read(tmp_path, """
[sphere]
bead_material = "polystyrene"
medium = "water-daimon"
temperature_c = 25.0
medium_index_range = [1.40, 1.35]
colour = "red"
""")
    msg = str(err.value)
    assert "\n" not in msg and "experiment.toml" in msg and "5 problems" in msg
    assert "sphere.bead_material: unknown dispersion (expected one of water-iapws" in msg
    assert "sphere.diameter_range_um: missing" in msg
    assert "sphere.medium_index_range: bad range" in msg
    assert "sphere.temperature_c: only medium 'water-iapws' takes a temperature" in msg
    assert "sphere.colour: unknown key" in msg


def test_medium_outside_its_formula(tmp_path):
    # the density correlation of water-iapws covers 0-40 degC (Tanaka et al. 2001)
    with pytest.raises(InputError, match=r"sphere.temperature_c: .*0-40 degC.*found \[60.0\]"):
        _read(tmp_path, SPHERE.replace('medium = "water-daimon"', 'medium = "water-iapws"\ntemperature_c = 60.0'))


def test_sphere_resonator_needs_the_table(tmp_path):
    with pytest.raises(InputError, match=r"sphere: missing table"):
        _read(tmp_path, "")
    with pytest.raises(InputError, match="exactly one of bead_material or bead_index"):
        _read(tmp_path, SPHERE.replace('bead_material = "ps-ma"', 'bead_material = "ps-ma"\nbead_index = 1.59'))
    with pytest.raises(InputError, match="reaches the bead index"):
        _read(tmp_path, SPHERE.replace('bead_material = "ps-ma"', 'bead_index = 1.39'))


def test_pump_series(tmp_path):
    pump = """
[pump]
wavelength_nm = 470.0
pulse_s = 5e-9
beam = "gaussian"
spot_diameter_um = 20.0
instrument_fwhm_nm = 0.12
"""
    m = _read(tmp_path, SPHERE + pump, 'kind = "pump-series"')
    assert m.kind == "pump-series"
    assert m.pump == {"wavelength_nm": 470.0, "pulse_s": 5e-9, "spot_diameter_um": 20.0,
                      "instrument_fwhm_nm": 0.12, "beam": "gaussian"}
    with pytest.raises(InputError, match="pump: missing table"):
        _read(tmp_path, SPHERE, 'kind = "pump-series"')
    with pytest.raises(InputError) as err:
        _read(tmp_path, SPHERE + pump.replace('"gaussian"', '"donut"').replace("5e-9", "0.0"),
              'kind = "pump-series"')
    assert "pump.beam: unknown beam profile" in str(err.value) and "pump.pulse_s: bad number" in str(err.value)
    with pytest.raises(InputError, match="experiment.kind: unknown experiment kind"):
        _read(tmp_path, SPHERE, 'kind = "ramp"')
