"""The generator's own bead (WGM) solver and the bead and pump-series scenarios."""

import json
import subprocess
import sys
import tomllib

import numpy as np
import pandas as pd
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.synth import wgm_resonances, write_pump_experiment, write_sphere_experiment
from lasecyto.synth._pump_scenario import steady_state_photons_synth
from lasecyto.synth._wgm import polystyrene_index_ma

L_A = np.arange(74, 80)


def _const(v):
    return lambda lam: np.full(np.shape(lam), v)


@pytest.mark.parametrize("pol, lam_ref, q_ref", [
    # check-values.md section 6 example A (D = 10 um, n_s = 1.59, n_m = 1.333): "lambda complex root"
    # column (quoted to 1e-4 nm) and Q_rad (3 digits)
    ("TE", [621.2463, 613.3273, 605.6106, 598.0885, 590.7537, 583.5992],
     [2.48e3, 2.74e3, 3.02e3, 3.33e3, 3.68e3, 4.07e3]),
    ("TM", [618.1163, 610.2620, 602.6080, 595.1468, 587.8712, 580.7742],
     [1.91e3, 2.10e3, 2.32e3, 2.56e3, 2.83e3, 3.12e3]),
])
def test_generator_wgm_solver_against_check_values(pol, lam_ref, q_ref):
    lam, q = wgm_resonances(10.0, polarization=pol, l=L_A, radial_order=1, n_bead=_const(1.59),
                            n_medium=_const(1.333))
    np.testing.assert_allclose(lam, lam_ref, rtol=0, atol=1e-4)
    np.testing.assert_allclose(q, q_ref, rtol=6e-3)


def test_generator_media_and_rate_equation():
    # check-values.md section 3c: PS microspheres (Ma et al. 2003) 1.5844 at 587.6 nm, 1.5824 at
    # 632.8 nm (quoted to 1e-4)
    np.testing.assert_allclose(polystyrene_index_ma([587.6, 632.8]), [1.5844, 1.5824], atol=1e-4)
    # check-values.md section 10 S table, beta = 0.01: S(0.1, 0.5, 1, 2, 10)
    np.testing.assert_allclose(steady_state_photons_synth([0.1, 0.5, 1.0, 2.0, 10.0], 0.01),
                               [0.1110, 0.9808, 10.00, 101.96, 901.11], rtol=5e-4)


def test_generator_rejects_bad_modes():
    with pytest.raises(InputError, match="denser"):
        wgm_resonances(10.0, polarization="TE", l=80, radial_order=1, n_bead=_const(1.30))
    with pytest.raises(InputError, match="polarization"):
        wgm_resonances(10.0, polarization="TX", l=80, radial_order=1)


def test_generator_imports_no_analysis_code():
    code = ("import sys, lasecyto.synth; "
            "bad = [m for m in sys.modules if m.startswith('lasecyto.') and m.split('.')[1] in "
            "('lines', 'tracks', 'cavity', 'features', 'calibration', 'io', 'pipeline')]; print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


@pytest.fixture(scope="module")
def beads(tmp_path_factory):
    root = tmp_path_factory.mktemp("beads")
    m = write_sphere_experiment(root / "a", n_dishes=2, cells_per_dish=2, n_frames=12, perturbation_s=40.0, rng=7)
    again = write_sphere_experiment(root / "b", n_dishes=2, cells_per_dish=2, n_frames=12, perturbation_s=40.0,
                                    rng=7)
    return m, again


def test_sphere_experiment_files_and_truth(beads):
    manifest, _ = beads
    root = manifest.parent
    man = tomllib.loads(manifest.read_text())
    assert man["experiment"]["resonator"] == "sphere" and man["experiment"]["synthetic"] is True
    assert "SYNTHETIC" in man["experiment"]["description"]
    assert man["sphere"] == {"bead_material": "ps-ma", "medium": "water-daimon", "diameter_range_um": [10.0, 20.0]}
    cells = pd.read_csv(root / "truth" / "cells.csv")
    frames = pd.read_csv(root / "truth" / "cell_frames.csv")
    modes = pd.read_csv(root / "truth" / "modes.csv")
    assert len(cells) == 4 and len(frames) == 48
    for c in man["cells"]:
        data = tifffile.imread(root / c["stack"])
        side = json.loads((root / c["sidecar"]).read_text())
        assert data.shape == (12, 1, 1340) and data.dtype == np.uint16 and len(side["frame_times_s"]) == 12
    # the truth's medium index is water (Daimon & Masumura) + offset + change, at 600 nm
    base = cells.set_index("cell_id")["medium_index_baseline"]
    f0 = frames[frames["frame"] == 0].set_index("cell_id")
    np.testing.assert_allclose(f0["medium_index"] - f0["index_change"], base[f0.index], atol=1e-12)
    # only modes of Q >= 800 lase; weak pulses show 3-4 modes; a misfire shows none
    vis = modes[modes["visible"]]
    assert vis["q_rad"].min() >= 800.0
    weak = frames[frames["weak_pulse"]]
    assert weak["n_lasing_modes"].between(3, 4).all()
    assert (frames.loc[frames["dropout"], "n_lasing_modes"] == 0).all()
    # responders: the change approaches the amplitude, controls only drift
    resp = cells[cells["responder"]]
    assert (~cells.loc[cells["condition"] == "control", "responder"]).all()
    assert set(resp["condition"]) <= {"hypertonic"}


def test_sphere_experiment_is_deterministic(beads):
    a, b = beads
    for rel in ("spectra/A-01.tif", "truth/modes.csv", "lamp/neon.tif"):
        assert (a.parent / rel).read_bytes() == (b.parent / rel).read_bytes()


def test_pump_experiment_files_and_truth(tmp_path):
    manifest = write_pump_experiment(tmp_path / "p", n_dishes=2, cells_per_dish=1, n_levels=24, rng=3)
    root = manifest.parent
    man = tomllib.loads(manifest.read_text())
    assert man["experiment"]["kind"] == "pump-series" and man["pump"]["beam"] == "gaussian"
    cells = pd.read_csv(root / "truth" / "cells.csv")
    frames = pd.read_csv(root / "truth" / "frames.csv")
    for c in man["cells"]:
        side = json.loads((root / c["sidecar"]).read_text())
        e = np.asarray(side["pump_energy_nj"])
        assert e.size == 24 and np.log10(e.max() / e.min()) >= 2.9          # three decades
        assert len(side["frame_exposure_s"]) == 24 and min(side["frame_exposure_s"]) > 0
        assert np.all(np.diff(side["frame_times_s"]) > 0)
    # exposures are longest at the lowest pump; the main line narrows towards the instrument width
    f = frames[frames["cell_id"] == cells["cell_id"][0]]
    assert f["exposure_s"].iloc[0] > f["exposure_s"].iloc[-1]
    assert f["fwhm_px_main"].iloc[0] > 1.5 * f["fwhm_px_main"].iloc[-1]
    # the rendered photons follow the rate equation of the truth's threshold and beta (3 % scatter)
    c0 = cells.iloc[0]
    s = steady_state_photons_synth(f["x_main"].to_numpy(), c0["beta"])
    ratio = f["photons_main"].to_numpy() / (s * f["exposure_s"].to_numpy())
    assert np.std(np.log(ratio)) < 0.06
