"""The written synthetic experiment: files, formats, truth consistency and determinism."""

import hashlib
import json
import tomllib

import numpy as np
import pandas as pd
import pytest
import tifffile

from lasecyto.synth import write_fp_experiment
from lasecyto.synth._media import _air_to_vacuum_nm, _water_group_index
from lasecyto.synth._render import _eval_polynomial
from lasecyto.synth._scenario import SCENARIO
from lasecyto.exceptions import InputError


@pytest.fixture(scope="module")
def experiment(tmp_path_factory):
    manifest = write_fp_experiment(tmp_path_factory.mktemp("fp") / "exp", rng=0)
    root = manifest.parent
    return {
        "manifest_path": manifest,
        "root": root,
        "manifest": tomllib.loads(manifest.read_text(encoding="utf-8")),
        "cells": pd.read_csv(root / "truth" / "cells.csv"),
        "frames": pd.read_csv(root / "truth" / "cell_frames.csv"),
        "modes": pd.read_csv(root / "truth" / "modes.csv"),
    }


def test_manifest_and_files(experiment):
    man, root = experiment["manifest"], experiment["root"]
    assert experiment["manifest_path"].name == "experiment.toml"
    ex = man["experiment"]
    assert ex["resonator"] == "fabry-perot" and ex["gap_um"] == 20.0 and ex["synthetic"] is True
    assert "synthetic" in ex["description"].lower()
    assert man["lamp"] == {"stack": "lamp/neon.tif", "sidecar": "lamp/neon.json", "reference": "Ne I"}
    assert [(d["dish"], d["condition"]) for d in man["dishes"]] == [
        ("A", "control"), ("B", "control"), ("C", "hypertonic"), ("D", "hypertonic")]
    assert all(d["perturbation_s"] == 300.0 for d in man["dishes"])
    cells = man["cells"]
    assert len(cells) == 24 and len({c["cell_id"] for c in cells}) == 24
    for c in cells:
        data = tifffile.imread(root / c["stack"])
        side = json.loads((root / c["sidecar"]).read_text())
        assert data.dtype == np.uint16
        assert side["lasecyto_sidecar"] == 1 and side["exposure_s"] > 0
        t = np.asarray(side["frame_times_s"])
        assert t.shape == (90,) and np.all(np.diff(t) > 0) and t[1] == 10.0
        assert side["camera"]["read_noise_e"] == 3.0 and side["camera"]["offset_counts"] == 100.0
        assert "wavelength" not in side  # axes come from the lamp
        if c["dish"] == "D":
            assert c["stack"] == "spectra/D-imaging.tif"
            assert data.ndim == 3 and data.shape[0] == 90 and data.shape[2] == 1340
            start, stop = c["rows"]
            assert stop - start == 8 and stop <= data.shape[1]
        else:
            assert data.shape == (90, 1, 1340) and "rows" not in c
    bands = sorted(c["rows"] for c in cells if c["dish"] == "D")
    assert all(b[1] < n[0] for b, n in zip(bands, bands[1:]))  # gaps between bands
    lamp = tifffile.imread(root / "lamp" / "neon.tif")
    assert lamp.shape == (5, 1, 1340) and lamp.dtype == np.uint16
    guess = json.loads((root / "lamp" / "neon.json").read_text())["wavelength_guess"]
    assert guess["medium"] == "air" and len(guess["polynomial_nm"]) == 2
    truth_lamp = json.loads((root / "truth" / "lamp.json").read_text())
    # the nominal axis is a straight line within ~1.3 nm of the true (curved) axis
    px = np.arange(1340.0)
    true_nm = np.polynomial.polynomial.polyval(px, truth_lamp["polynomial_air_nm"])
    guess_nm = np.polynomial.polynomial.polyval(px, guess["polynomial_nm"])
    err = guess_nm - true_nm
    assert 0.2 < np.abs(err).max() < 1.5
    assert truth_lamp["fwhm_px"] == 2.5 and len(truth_lamp["lines_air_nm"]) >= 12
    assert (root / "truth" / "README.md").read_text().strip()


def test_truth_cells_design(experiment):
    cells = experiment["cells"]
    assert list(cells.columns[:14]) == [
        "cell_id", "dish", "condition", "treated", "responder", "perturbation_s", "index_change",
        "response_tau_s", "onset_s", "gap_um", "index_offset", "zeta", "n_frames", "line_fwhm_px"]
    assert cells["treated"].dtype == bool and cells["responder"].dtype == bool
    assert np.array_equal(cells["treated"], cells["condition"] == "hypertonic")
    assert not (cells["responder"] & ~cells["treated"]).any()
    n_treated = int(cells["treated"].sum())
    assert int(cells["responder"].sum()) == round(0.8 * n_treated)
    resp = cells[cells["responder"]]
    non = cells[~cells["responder"]]
    assert resp["index_change"].between(1e-3, 3e-3).all()
    assert resp["response_tau_s"].between(60, 150).all()
    assert resp["onset_s"].between(300, 320).all()
    assert (non["index_change"] == 0).all() and non["onset_s"].isna().all()
    assert cells["zeta"].between(0.05, 0.12).all() and (cells["gap_um"] == 20.0).all()
    assert (abs(cells["index_offset"] - 0.035) < 0.015).all()


def test_truth_frames_and_modes(experiment):
    cells, frames, modes = experiment["cells"], experiment["frames"], experiment["modes"]
    assert len(frames) == 24 * 90
    # dropouts ~2 % of frames (pump misfires); no line is rendered in them
    assert 0.003 < frames["dropout"].mean() < 0.06
    merged = modes.merge(frames[["cell_id", "frame", "dropout"]], on=["cell_id", "frame"])
    assert not merged.loc[merged["dropout"], "visible"].any()
    assert (merged.loc[~merged["visible"], "photons"] == 0).all()
    # lasing threshold: every rendered line carries >= 8 % of its cell's N0
    m = modes[modes["visible"]].merge(cells[["cell_id", "peak_photons"]], on="cell_id")
    assert (m["photons"] >= 0.08 * m["peak_photons"] * (1 - 1e-12)).all()
    per_frame = modes[modes["visible"]].groupby(["cell_id", "frame"]).size()
    assert 10 <= per_frame.median() <= 40
    assert set(modes["family"]) == {0, 1, 2, 3}
    # modes enter and leave: some (cell, family, q) are visible in only part of the non-dropout frames
    ok = merged[~merged["dropout"]].groupby(["cell_id", "family", "q"])["visible"].mean()
    assert ((ok > 0) & (ok < 1)).any()
    # control cells only drift (~1e-5), responders reach their amplitude
    last = frames[frames["frame"] == 89].set_index("cell_id")["index_change"]
    ctrl = cells.loc[~cells["responder"], "cell_id"]
    assert last[ctrl].abs().max() < 1e-4
    for _, c in cells[cells["responder"]].iterrows():
        final = c["index_change"] * (1 - np.exp(-(890.0 - c["onset_s"]) / c["response_tau_s"]))
        assert abs(last[c["cell_id"]] - final) < 1e-4
    f0 = frames[frames["frame"] == 0]
    assert (f0["index_change"] == 0).all()
    before = frames[frames["time_s"] <= 300.0]
    assert (before["response"] == 0).all()


def test_responder_lines_shift_by_lambda_dn_over_ng(experiment):
    cells, frames, modes = experiment["cells"], experiment["frames"], experiment["modes"]
    cid = cells.loc[cells["responder"], "cell_id"].iloc[0]
    offset = cells.set_index("cell_id").loc[cid, "index_offset"]
    dn = frames[(frames["cell_id"] == cid) & (frames["frame"] == 89)]["index_change"].iloc[0]
    mc = modes[(modes["cell_id"] == cid) & (modes["family"] == 0)]
    a = mc[mc["frame"] == 0].set_index("q")["center_vacuum_nm"]
    b = mc[mc["frame"] == 89].set_index("q")["center_vacuum_nm"]
    common = a.index.intersection(b.index)
    assert len(common) >= 5
    lam0 = a[common].to_numpy()
    shift = b[common].to_numpy() - lam0
    n_g = _water_group_index(lam0 * 1e-3) + offset
    # check-values.md section 4: at fixed q, d lambda = lambda dn / n_g (first order; 1 % tolerance)
    np.testing.assert_allclose(shift, lam0 * dn / n_g, rtol=1e-2)
    assert np.all(shift > 0.3)  # ~0.9 nm for A = 2e-3: many pixels


def _background_e(cell, poly):
    px_vac = _air_to_vacuum_nm(_eval_polynomial(poly, np.arange(1340)))
    return cell["background_peak_photons"] * np.exp(-4 * np.log(2) * (
        (px_vac - cell["gain_center_nm"] - SCENARIO["background_shift_nm"])
        / SCENARIO["background_fwhm_nm"]) ** 2)


@pytest.mark.parametrize("cid", ["A-02", "C-01"])
def test_stack_matches_truth_model(experiment, cid):
    # Rebuild each frame's expected photoelectrons from the truth tables alone and compare
    # with the stack: normalised residuals must have mean ~0 and variance ~1 (Poisson + read noise).
    root, cells, frames, modes = (experiment[k] for k in ("root", "cells", "frames", "modes"))
    poly = json.loads((root / "truth" / "lamp.json").read_text())["polynomial_air_nm"]
    c = cells.set_index("cell_id").loc[cid]
    bg = _background_e(c, poly)
    fr = frames[frames["cell_id"] == cid].set_index("frame")
    data = tifffile.imread(root / "spectra" / f"{cid}.tif").astype(float) - 100.0
    edges = np.arange(1341) - 0.5
    resid = []
    for frame in range(0, 90, 9):
        rows = modes[(modes["cell_id"] == cid) & (modes["frame"] == frame) & modes["visible"]]
        model = bg * fr.loc[frame, "pump_factor"] * np.exp(-fr.loc[frame, "time_s"] / c["bleach_tau_s"])
        for p, n_ph in zip(rows["center_px"], rows["photons"]):
            model = model + n_ph * np.diff(np.arctan((edges - p) / (0.5 * c["line_fwhm_px"]))) / np.pi
        resid.append((data[frame, 0] - model) / np.sqrt(model + 9.0 + 1 / 12))
    r = np.concatenate(resid)
    # 13400 pixels: sd of the variance estimate ~1.2 %; tolerance 5 %
    assert abs(r.mean()) < 0.05
    assert abs(r.var() - 1) < 0.05


def test_imaging_band_holds_the_cell_photons(experiment):
    root, cells, frames, modes = (experiment[k] for k in ("root", "cells", "frames", "modes"))
    man = experiment["manifest"]
    data = tifffile.imread(root / "spectra" / "D-imaging.tif").astype(float) - 100.0
    rows = {c["cell_id"]: c["rows"] for c in man["cells"] if c["dish"] == "D"}
    poly = json.loads((root / "truth" / "lamp.json").read_text())["polynomial_air_nm"]
    for cid in ("D-01", "D-04"):
        c = cells.set_index("cell_id").loc[cid]
        bg = _background_e(c, poly).sum()
        fr = frames[frames["cell_id"] == cid].set_index("frame")
        for frame in (0, 45, 89):
            scale = fr.loc[frame, "pump_factor"] * np.exp(-fr.loc[frame, "time_s"] / c["bleach_tau_s"])
            lines = modes[(modes["cell_id"] == cid) & (modes["frame"] == frame)]["photons"].sum()
            start, stop = rows[cid]
            total = data[frame, start:stop].sum()
            # sum of the band's rows = the cell's photons (lines + fluorescence); 2 % tolerance
            assert abs(total / (lines + bg * scale) - 1) < 0.02


def test_same_seed_same_bytes(tmp_path):
    kw = dict(n_dishes=2, cells_per_dish=2, n_frames=12, rng=5)
    m1 = write_fp_experiment(tmp_path / "a", **kw)
    m2 = write_fp_experiment(tmp_path / "b", **kw)
    m3 = write_fp_experiment(tmp_path / "c", **{**kw, "rng": 6})

    def digest(p):
        return hashlib.sha256(p.read_bytes()).hexdigest()

    for rel in ("spectra/A-01.tif", "spectra/B-imaging.tif", "lamp/neon.tif", "truth/modes.csv",
                "experiment.toml", "images/A-field.ome.tif"):
        assert digest(m1.parent / rel) == digest(m2.parent / rel)
    assert digest(m1.parent / "spectra/A-01.tif") != digest(m3.parent / "spectra/A-01.tif")
    man = tomllib.loads(m1.read_text())
    assert [d["condition"] for d in man["dishes"]] == ["control", "hypertonic"]
    assert tifffile.imread(m1.parent / "spectra/B-imaging.tif").shape[:1] == (12,)


def test_generator_accepts_a_generator_and_no_imaging(tmp_path):
    m = write_fp_experiment(tmp_path / "g", n_dishes=2, cells_per_dish=1, n_frames=3,
                            imaging_dish=False, rng=np.random.default_rng(3))
    man = tomllib.loads(m.read_text())
    assert [c["stack"] for c in man["cells"]] == ["spectra/A-01.tif", "spectra/B-01.tif"]
    assert tifffile.imread(m.parent / "spectra/B-01.tif").shape == (3, 1, 1340)


def test_bad_design_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="n_frames"):
        write_fp_experiment(tmp_path / "x", n_frames=1)
    with pytest.raises(InputError, match="frame_interval_s"):
        write_fp_experiment(tmp_path / "x", frame_interval_s=0.0)


def test_camera_images_beside_the_spectra(tmp_path):
    from lasecyto.io import read_manifest

    a = write_fp_experiment(tmp_path / "a", n_dishes=2, cells_per_dish=3, n_frames=12, perturbation_s=40.0,
                            imaging_dish=False, images=True, rng=5)
    b = write_fp_experiment(tmp_path / "b", n_dishes=2, cells_per_dish=3, n_frames=12, perturbation_s=40.0,
                            imaging_dish=False, images=False, rng=5)
    # the spectra do not depend on the images
    for f in sorted((a.parent / "spectra").iterdir()):
        assert f.read_bytes() == (b.parent / "spectra" / f.name).read_bytes()
    assert not (b.parent / "images").exists()
    m = read_manifest(a)
    assert m.control_conditions == ("control",) and set(m.fields) == {"A-field", "B-field"}
    truth = pd.read_csv(a.parent / "truth" / "patterns.csv")
    frames = pd.read_csv(a.parent / "truth" / "cell_frames.csv")
    assert len(truth) == 6 * 12
    # one pump pulse for the spectrum and the image: a pump dropout is dark in both
    j = truth.merge(frames[["cell_id", "frame", "dropout"]], on=["cell_id", "frame"])
    assert (j["lasing"] == ~j["dropout"]).all()
    for cell in m.cells:
        stack = tifffile.imread(m.fields[cell.field].images)
        assert stack.shape == (12, 64, 160) and stack.dtype == np.uint16
        t0 = truth[(truth["cell_id"] == cell.cell_id) & (truth["frame"] == 0)].iloc[0]
        # the manifest position is the rounded true position at the first frame
        assert cell.position_px == (round(t0["row_px"]), round(t0["col_px"]))
        r, c = int(round(t0["row_px"])), int(round(t0["col_px"]))
        patch = stack[0, r - 12:r + 13, c - 12:c + 13].astype(float)
        assert patch.max() - 100.0 > 10 * np.sqrt(20.0 + 9.0)  # the pattern stands far above the noise
    cells = pd.read_csv(a.parent / "truth" / "cells.csv")
    changed = cells["pattern_change_s"].notna()
    assert (cells.loc[changed, "responder"]).all()  # only responders change order, after their onset
    assert (cells.loc[changed, "pattern_change_s"] >= cells.loc[changed, "onset_s"] + 30.0).all()
