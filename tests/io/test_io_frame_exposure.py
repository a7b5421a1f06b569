"""Sidecar key ``frame_exposure_s``: one exposure per frame (pump series)."""

import json

import numpy as np
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.io import check_sidecar, read_sidecar, read_stack


def _write(path, doc):
    path.write_text(json.dumps(doc))
    return path


def _doc(n, **extra):
    return {"lasecyto_sidecar": 1, "frame_times_s": [float(i) for i in range(n)], "exposure_s": 0.1} | extra


def test_frame_exposures_read_and_checked(tmp_path):
    sc = read_sidecar(_write(tmp_path / "a.json", _doc(3, frame_exposure_s=[0.05, 0.5, 5.0])))
    np.testing.assert_array_equal(sc.frame_exposure_s, [0.05, 0.5, 5.0])
    assert not sc.frame_exposure_s.flags.writeable
    assert read_sidecar(_write(tmp_path / "b.json", _doc(3))).frame_exposure_s is None
    tifffile.imwrite(tmp_path / "s.tif", np.zeros((4, 1, 8), np.uint16), photometric="minisblack")
    short = read_sidecar(_write(tmp_path / "d.json", _doc(4, frame_exposure_s=[0.05, 0.5, 5.0])))
    with read_stack(tmp_path / "s.tif") as st, pytest.raises(InputError, match="frame_exposure_s") as err:
        check_sidecar(short, st)
    assert "4 values" in str(err.value) and "found 3 values" in str(err.value)


@pytest.mark.parametrize("value, field", [([0.1, 0.0], "frame_exposure_s[1]"), ([0.1, "x"], "frame_exposure_s[1]"),
                                          ([], "frame_exposure_s"), (0.1, "frame_exposure_s")])
def test_bad_frame_exposures(tmp_path, value, field):
    with pytest.raises(InputError) as err:
        read_sidecar(_write(tmp_path / "c.json", _doc(2, frame_exposure_s=value)))
    assert field in str(err.value) and "c.json" in str(err.value)
