"""The lines stage with a measured camera model: dark frames and photon-transfer gain from the sidecar or CLI."""

import json

import numpy as np
import pandas as pd
import pytest
import tifffile

from lasecyto.cli import main
from lasecyto.exceptions import InputError
from lasecyto.lines import line_profile_pixels
from lasecyto.pipeline._lines_only import fit_stack
from lasecyto.synth import camera_frames

GAIN, READ_E, N_PIX = 2.0, 3.0, 400


def _write_stack(path, frames):
    tifffile.imwrite(path, frames, photometric="minisblack")
    return path


def _scene(tmp_path, n_frames=40, rng=0):
    rng = np.random.default_rng(rng)
    offset = 100.0 + rng.normal(0.0, 8.0, (1, N_PIX))  # a fixed pattern the sidecar's scalar cannot describe
    x = np.arange(N_PIX)
    fluor = 30.0 + 400.0 * np.exp(-0.5 * ((x - 200) / 120.0) ** 2)
    lines = 3e4 * line_profile_pixels(x, 150.3, 2.5) + 1e4 * line_profile_pixels(x, 260.8, 3.0)
    data = camera_frames((fluor + lines)[None, :], n_frames=n_frames, offset_counts=offset, gain_counts_per_e=GAIN,
                         read_noise_e=READ_E, rng=rng)
    dark = camera_frames(np.zeros((1, N_PIX)), n_frames=50, offset_counts=offset, gain_counts_per_e=GAIN,
                         read_noise_e=READ_E, rng=rng)
    flat_level = 50.0 + 15000.0 * np.exp(-0.5 * ((x - 200) / 150.0) ** 2)
    flat = camera_frames(flat_level[None, :], n_frames=30, offset_counts=offset, gain_counts_per_e=GAIN,
                         read_noise_e=READ_E, rng=rng)
    (tmp_path / "calib").mkdir(exist_ok=True)
    _write_stack(tmp_path / "calib" / "dark.tif", dark)
    _write_stack(tmp_path / "calib" / "flat.tif", flat)
    stack = _write_stack(tmp_path / "cell.tif", data)
    return stack


def _sidecar(tmp_path, camera, n_frames=40):
    doc = {"lasecyto_sidecar": 1, "frame_times_s": [float(i) for i in range(n_frames)], "exposure_s": 0.01,
           "camera": camera, "wavelength": {"values_nm": list(np.linspace(600, 620, N_PIX)), "medium": "vacuum"}}
    path = tmp_path / "cell.json"
    path.write_text(json.dumps(doc))
    return path


def test_dark_and_flat_frames_from_the_sidecar(tmp_path):
    stack = _scene(tmp_path)
    _sidecar(tmp_path, {"dark_stack": "calib/dark.tif", "flat_stack": "calib/flat.tif",
                        "gain_counts_per_e": "photon-transfer"})
    table = fit_stack(stack)
    assert (table.groupby("frame").size() == 2).all() and table["fit_ok"].all()
    # areas in counts: photoelectrons x the measured gain (truth 3e4 e x 2 counts/e; within 4 %)
    first = table[table["line_id"] == 0]
    assert first["area_counts"].median() == pytest.approx(3e4 * GAIN, rel=0.04)
    # the pulls of the centre are unit-wide only with the measured noise model (read noise, gain)
    pull = (first["center_px"] - 150.3) / first["center_err_px"]
    assert 0.6 < np.std(pull) < 1.5


def test_gain_from_the_data_and_cli_options(tmp_path):
    stack = _scene(tmp_path, n_frames=60, rng=1)
    _sidecar(tmp_path, {"gain_counts_per_e": "photon-transfer", "saturation_counts": 65535}, n_frames=60)
    table = fit_stack(stack, camera={"dark_stack": tmp_path / "calib" / "dark.tif"})
    first = table[table["line_id"] == 0]
    assert first["area_counts"].median() == pytest.approx(3e4 * GAIN, rel=0.08)
    out = tmp_path / "out" / "lines"
    assert main(["lines", str(stack), "--dark", str(tmp_path / "calib" / "dark.tif"), "--flat",
                 str(tmp_path / "calib" / "flat.tif"), "--out", str(out)]) == 0
    written = pd.read_csv(out.with_suffix(".csv"))
    assert len(written) == 120 and {"cosmic_ray", "contrast"} <= set(written.columns)


def test_mismatched_dark_frames(tmp_path):
    stack = _scene(tmp_path)
    _write_stack(tmp_path / "calib" / "small.tif", camera_frames(np.zeros((1, 100)), n_frames=5, rng=3))
    _sidecar(tmp_path, {"dark_stack": "calib/small.tif"})
    with pytest.raises(InputError, match="dark frames do not match"):
        fit_stack(stack)
    _sidecar(tmp_path, {"dark_stack": "calib/none.tif"})
    with pytest.raises(InputError, match="dark stack not found|not found"):
        fit_stack(stack)
