"""Sidecar JSON: parsing, validation and agreement with the stack."""

import json
import math

import numpy as np
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.io import CameraModel, check_sidecar, default_sidecar_path, read_sidecar, read_stack


def _write(path, doc):
    path.write_text(json.dumps(doc, indent=2))
    return path


def _base(n=5):
    return {"lasecyto_sidecar": 1, "frame_times_s": [10.0 * i for i in range(n)], "exposure_s": 0.005}


def _stack(tmp_path, n_frames=5, n_pixels=16):
    path = tmp_path / "cell.tif"
    tifffile.imwrite(path, np.zeros((n_frames, 1, n_pixels), np.uint16), photometric="minisblack")
    return read_stack(path)


def test_full_sidecar(tmp_path):
    doc = _base(4) | {
        "pump_energy_nj": 12.0,
        "camera": {"offset_counts": 100.0, "gain_counts_per_e": 2.0, "read_noise_e": 3.0,
                   "saturation_counts": 65535, "model": "any text"},
        "wavelength": {"polynomial_nm": [600.0, 0.02, 1e-7], "medium": "air"},
        "wavelength_guess": {"values_nm": [600.0 + 0.02 * k for k in range(16)], "medium": "vacuum"},
        "operator": "ignored",
    }
    sc = read_sidecar(_write(tmp_path / "cell.json", doc))
    np.testing.assert_array_equal(sc.frame_times_s, [0, 10, 20, 30])
    assert not sc.frame_times_s.flags.writeable
    assert sc.exposure_s == 0.005
    np.testing.assert_array_equal(sc.pump_energy_nj, [12.0] * 4)
    assert sc.camera == CameraModel(100.0, 2.0, 3.0, 65535.0)
    assert sc.wavelength.polynomial_nm == (600.0, 0.02, 1e-7) and sc.wavelength.medium == "air"
    assert sc.wavelength_guess.n_pixels == 16
    with _stack(tmp_path, 4, 16) as st:
        check_sidecar(sc, st)


def test_defaults(tmp_path):
    sc = read_sidecar(_write(tmp_path / "a.json", _base(3)))
    assert sc.camera == CameraModel()
    assert math.isinf(sc.camera.saturation_counts)
    assert sc.pump_energy_nj is None and sc.wavelength is None and sc.wavelength_guess is None
    assert default_sidecar_path(tmp_path / "spectra" / "A-01.tif") == tmp_path / "spectra" / "A-01.json"


def test_fewer_frame_times_than_frames(tmp_path):
    sc = read_sidecar(_write(tmp_path / "cell.json", _base(4)))
    with _stack(tmp_path, 5) as st, pytest.raises(InputError) as err:
        check_sidecar(sc, st)
    text = str(err.value)
    assert "\n" not in text and "cell.json" in text and "frame_times_s" in text
    assert "expected 5 values (one per frame of cell.tif)" in text and "found 4 values" in text


def test_pump_and_axis_lengths_checked(tmp_path):
    sc = read_sidecar(_write(tmp_path / "p.json", _base(5) | {"pump_energy_nj": [1.0, 2.0]}))
    with _stack(tmp_path, 5) as st, pytest.raises(InputError, match="pump_energy_nj"):
        check_sidecar(sc, st)
    doc = _base(5) | {"wavelength": {"values_nm": [600.0 + k for k in range(10)], "medium": "vacuum"}}
    sc = read_sidecar(_write(tmp_path / "w.json", doc))
    with _stack(tmp_path, 5, 16) as st, pytest.raises(InputError) as err:
        check_sidecar(sc, st)
    assert "wavelength.values_nm" in str(err.value) and "16 values" in str(err.value)


def test_json_syntax_error_gives_line_and_column(tmp_path):
    path = tmp_path / "bad.json"
    path.write_text('{\n  "frame_times_s": [0, 1],\n  "exposure_s": 0.01,,\n}\n')
    with pytest.raises(InputError) as err:
        read_sidecar(path)
    assert "bad.json" in str(err.value) and "line 3, column" in str(err.value)


@pytest.mark.parametrize("change, field", [
    ({"frame_times_s": [0.0, 2.0, 2.0]}, "frame_times_s[2]"),
    ({"frame_times_s": [0.0, "1"]}, "frame_times_s[1]"),
    ({"frame_times_s": []}, "frame_times_s"),
    ({"exposure_s": 0.0}, "exposure_s"),
    ({"exposure_s": True}, "exposure_s"),
    ({"camera": {"gain_counts_per_e": 0}}, "camera.gain_counts_per_e"),
    ({"camera": {"read_noise_e": -1.0}}, "camera.read_noise_e"),
    ({"camera": {"offset_counts": "100"}}, "camera.offset_counts"),
    ({"pump_energy_nj": -1.0}, "pump_energy_nj"),
    ({"wavelength": {"polynomial_nm": [600.0, 0.1], "medium": "glass"}}, "wavelength.medium"),
    ({"wavelength_guess": {"medium": "air"}}, "wavelength_guess"),
    ({"lasecyto_sidecar": 2}, "lasecyto_sidecar"),
])
def test_bad_values_name_the_field(tmp_path, change, field):
    path = _write(tmp_path / "s.json", _base(3) | change)
    with pytest.raises(InputError) as err:
        read_sidecar(path)
    assert err.value.field == field
    assert str(err.value).startswith(str(path))
    assert err.value.expected is not None and err.value.found is not None


def test_missing_required_key(tmp_path):
    doc = _base(3)
    del doc["exposure_s"]
    with pytest.raises(InputError, match="exposure_s"):
        read_sidecar(_write(tmp_path / "s.json", doc))
    with pytest.raises(InputError, match="not found"):
        read_sidecar(tmp_path / "absent.json")


def test_camera_frames_named_in_the_sidecar(tmp_path):
    # dark and flat stacks are paths relative to the sidecar; "photon-transfer" asks for the measured gain
    doc = _base(3) | {"camera": {"dark_stack": "calib/dark.tif", "flat_stack": "calib/flat.tif",
                                 "gain_counts_per_e": "photon-transfer", "saturation_counts": 65535}}
    sc = read_sidecar(_write(tmp_path / "cell.json", doc))
    assert sc.camera.dark_stack == (tmp_path / "calib" / "dark.tif").resolve()
    assert sc.camera.flat_stack == (tmp_path / "calib" / "flat.tif").resolve()
    assert not sc.camera.gain_from_data
    doc = _base(3) | {"camera": {"gain_counts_per_e": "photon-transfer"}}
    assert read_sidecar(_write(tmp_path / "data.json", doc)).camera.gain_from_data


@pytest.mark.parametrize("camera, field", [
    ({"dark_stack": 3}, "camera.dark_stack"),
    ({"flat_stack": ""}, "camera.flat_stack"),
    ({"gain_counts_per_e": "measure it"}, "camera.gain_counts_per_e"),
    ({"flat_stack": "f.tif", "gain_counts_per_e": 2.0}, "camera.gain_counts_per_e"),
])
def test_bad_camera_frames_entries(tmp_path, camera, field):
    with pytest.raises(InputError) as err:
        read_sidecar(_write(tmp_path / "s.json", _base(3) | {"camera": camera}))
    assert err.value.field == field
