"""The synthetic "bead threshold ramp": a pump-energy series per cell with known threshold and beta.

Everything here is invented for testing and demonstration (it is not measured data).
Dye-doped polystyrene beads sit in cells of two dishes that differ in their dye loading
("stain-low", "stain-high"; higher loading, lower threshold).  Each cell is recorded over
a ramp of pump pulse energies spanning three decades around its threshold (one frame per
energy; the sidecar holds the measured energy of every frame and the frame's exposure,
longer at low pump so that the weak emission below threshold is measured).  Every mode
follows the steady state of the single-mode rate equations (its own threshold, one beta
per cell): S(x) = [(x - 1) + sqrt((x - 1)^2 + 4 beta x)] / (2 beta) with x = E / E_th.  The
line is a Lorentzian whose width narrows from the cold-cavity width towards the
instrument width as the photon number grows (intrinsic FWHM = cold width / (1 + S), a
simple model), over dye fluorescence that clamps above threshold (N ~ S / (1 + S)).
Resonances come from :mod:`._wgm`; spectrometer, camera and lamp are those of the other
scenarios.
"""

from __future__ import annotations

import pathlib

import numpy as np

from ..exceptions import InputError
from ._experiment import _camera, _toml_table, _write_json, _write_tiff
from ._media import _air_to_vacuum_nm, _vacuum_to_air_nm
from ._render import _eval_polynomial, _gaussian_band, _lorentzian_pixel_photons, _wavelength_to_pixel
from ._scenario import DETECTOR, _noisy_stack, _simulate_lamp
from ._scenario import _validate as _validate_design
from ._sphere_scenario import (SPHERE_SCENARIO, _cell_modes, _detector_window_vacuum_nm, _finish, _lamp_files,
                               _sphere_table)
from ._wgm import wgm_resonances

__all__ = ["steady_state_photons_synth", "write_pump_experiment"]

PUMP_SCENARIO = {
    "conditions": ("stain-low", "stain-high"),
    "threshold_nj": {"stain-low": (30.0, 60.0), "stain-high": (10.0, 25.0)},
    "beta": (0.005, 0.05),                 # log-uniform per cell
    "n_levels": 40,
    "span": (0.1, 100.0),                  # pump range around the nominal threshold (3 decades)
    "nominal_error": (0.7, 1.4),           # the ramp is centred on a rough threshold estimate
    "energy_jitter": 0.03,                 # measured energy differs from the set point
    "output_scatter": 0.03,                # lognormal frame-to-frame output scatter per mode
    "diameter_um": (12.0, 15.0),
    "cytoplasm_offset": 0.028,
    "cytoplasm_offset_sd": 0.004,
    "gain_center_nm": 612.0,
    "gain_center_jitter_nm": 4.0,
    "gain_fwhm_nm": 22.0,
    "family_factor": {("TE", 1): 1.0, ("TM", 1): 0.8},
    "max_threshold_factor": 8.0,           # modes whose threshold is above this x E_th are left out
    "instrument_fwhm_px": 2.4,             # Lorentzian instrument function
    "cold_q": 4000.0,                      # loaded cold-cavity Q: cold width lambda / Q
    "target_peak_e": 25000.0,              # exposure chosen to bring the main line peak near this
    "top_area_e": 1.2e5,                   # main-mode area at the highest pump, shortest exposure
    "exposures_s": (0.05, 0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0),
    "background_fraction": 0.05,           # fluorescence peak per pixel / main line peak at threshold
    "background_fwhm_nm": 40.0,
    "readout_s": 0.5,
    "pump_wavelength_nm": 470.0,
    "pulse_s": 5e-9,
    "beam": "gaussian",
    "spot_diameter_um": 30.0,              # Gaussian 1/e^2 diameter
}


def steady_state_photons_synth(x, beta):
    """Steady-state photon number of the single-mode rate equations (generator's own copy).

    S = [(x - 1) + sqrt((x - 1)^2 + 4 beta x)] / (2 beta), evaluated below threshold in
    the form 2 x / [(1 - x) + sqrt((x - 1)^2 + 4 beta x)] that does not cancel.
    """
    x = np.asarray(x, dtype=float)
    root = np.sqrt((x - 1.0) ** 2 + 4.0 * beta * x)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x >= 1.0, ((x - 1.0) + root) / (2.0 * beta), 2.0 * x / ((1.0 - x) + root))


def _validate(n_dishes, cells_per_dish, n_levels):
    if not (isinstance(n_levels, (int, np.integer)) and n_levels >= 8):
        raise InputError("too few pump levels", field="n_levels", expected="integer >= 8", found=n_levels)
    _validate_design(n_dishes, cells_per_dish, n_levels, 1.0, 0.0)   # dishes and cells as elsewhere


def _simulate_cell(cell, n_levels, rng):
    sc, det = PUMP_SCENARIO, DETECTOR
    n_pix, poly = det["n_pixels"], det["polynomial_air_nm"]
    window = _detector_window_vacuum_nm()
    pol, ell, order = _cell_modes(cell["diameter_um"], cell["index_offset"], False, window)
    lam, q_rad = wgm_resonances(cell["diameter_um"], polarization=pol, l=ell, radial_order=order,
                                index_offset=cell["index_offset"])
    gain = _gaussian_band(lam, cell["gain_center_nm"], sc["gain_fwhm_nm"])
    fam = np.array([sc["family_factor"][(p, int(n))] for p, n in zip(pol, order)])
    strength = gain * fam
    main = int(np.argmax(strength))
    e_th = cell["threshold_nj"] * strength[main] / strength          # each mode's own threshold
    keep = e_th <= sc["max_threshold_factor"] * cell["threshold_nj"]
    pol, ell, order, lam, q_rad, e_th = pol[keep], ell[keep], order[keep], lam[keep], q_rad[keep], e_th[keep]
    main = int(np.argmin(e_th))

    lo, hi = sc["span"]
    nominal = cell["threshold_nj"] * rng.uniform(*sc["nominal_error"])
    set_points = nominal * np.geomspace(lo, hi, n_levels)
    energy = set_points * np.exp(sc["energy_jitter"] * rng.standard_normal(n_levels))
    x = energy[:, None] / e_th[None, :]
    s = steady_state_photons_synth(x, cell["beta"])
    s_top = steady_state_photons_synth(energy.max() / e_th[main], cell["beta"])
    rate = sc["top_area_e"] / (s_top * sc["exposures_s"][0])         # photoelectrons per s per photon

    center_px = _wavelength_to_pixel(poly, _vacuum_to_air_nm(lam))
    disp = np.gradient(_air_to_vacuum_nm(_eval_polynomial(poly, np.arange(n_pix))))
    disp_at = np.interp(center_px, np.arange(n_pix), disp)
    cold_nm = lam / sc["cold_q"]
    fwhm_px = sc["instrument_fwhm_px"] + (cold_nm[None, :] / (1.0 + s)) / disp_at[None, :]
    # exposure: the longest on the ladder that keeps the main line's brightest pixel near the target
    peak_frac = 2.0 / (np.pi * fwhm_px[:, main])                      # Lorentzian peak per unit area, 1 px
    exposures = np.asarray(sc["exposures_s"])
    per_s = rate * s[:, main] * peak_frac
    fit_exp = exposures[None, :] * per_s[:, None] <= sc["target_peak_e"]
    exp_idx = np.where(fit_exp.any(axis=1), fit_exp.shape[1] - 1 - np.argmax(fit_exp[:, ::-1], axis=1), 0)
    exposure = exposures[exp_idx]
    scatter = np.exp(sc["output_scatter"] * rng.standard_normal(s.shape))
    photons = rate * exposure[:, None] * s * scatter

    spectrum = np.zeros((n_levels, n_pix))
    for k in range(lam.size):
        spectrum += _lorentzian_pixel_photons(np.full(n_levels, center_px[k]), fwhm_px[:, k], photons[:, k], n_pix)
    # dye fluorescence, clamped above threshold: N ~ S / (1 + S), 1 at the main mode's threshold
    s_main_th = steady_state_photons_synth(1.0, cell["beta"])
    n_rel = (s[:, main] / (1.0 + s[:, main])) / (s_main_th / (1.0 + s_main_th))
    bg_peak = sc["background_fraction"] * rate * s_main_th * 2.0 / (np.pi * sc["instrument_fwhm_px"])
    px_vac = _air_to_vacuum_nm(_eval_polynomial(poly, np.arange(n_pix)))
    bg = np.exp(-4.0 * np.log(2.0) * ((px_vac - cell["gain_center_nm"] + 10.0) / sc["background_fwhm_nm"]) ** 2)
    spectrum += (bg_peak * exposure * n_rel)[:, None] * bg[None, :]

    times = np.concatenate([[0.0], np.cumsum(exposure[:-1] + sc["readout_s"])])
    frames = {"cell_id": [cell["cell_id"]] * n_levels, "frame": np.arange(n_levels), "time_s": times,
              "pump_energy_nj": energy, "exposure_s": exposure, "x_main": energy / e_th[main],
              "photons_main": photons[:, main], "fwhm_px_main": fwhm_px[:, main]}
    modes = {"cell_id": [cell["cell_id"]] * lam.size, "polarization": pol, "l": ell, "radial_order": order,
             "center_vacuum_nm": lam, "q_rad": q_rad, "threshold_nj": e_th, "beta": [cell["beta"]] * lam.size,
             "main": np.arange(lam.size) == main}
    truth = {"main_center_nm": float(lam[main]), "main_polarization": str(pol[main]), "main_l": int(ell[main])}
    return spectrum, frames, modes, truth


def _simulate(*, n_dishes, cells_per_dish, n_levels, rng):
    _validate(n_dishes, cells_per_dish, n_levels)
    sc = PUMP_SCENARIO
    gen = np.random.default_rng(rng)
    design_rng, lamp_rng, cells_rng = gen.spawn(3)
    names = [chr(ord("A") + i) for i in range(n_dishes)]
    dishes = [{"dish": d, "condition": sc["conditions"][i % 2]} for i, d in enumerate(names)]
    cells = []
    for dish in dishes:
        for j in range(cells_per_dish):
            u = design_rng.uniform
            cells.append({
                "cell_id": f"{dish['dish']}-{j + 1:02d}", "dish": dish["dish"], "condition": dish["condition"],
                "threshold_nj": u(*sc["threshold_nj"][dish["condition"]]),
                "beta": float(np.exp(u(np.log(sc["beta"][0]), np.log(sc["beta"][1])))),
                "diameter_um": u(*sc["diameter_um"]),
                "index_offset": sc["cytoplasm_offset"] + sc["cytoplasm_offset_sd"] * design_rng.standard_normal(),
                "gain_center_nm": sc["gain_center_nm"] + u(-1.0, 1.0) * sc["gain_center_jitter_nm"],
            })
    stacks, frame_parts, mode_parts = [], [], []
    for cell, crng in zip(cells, cells_rng.spawn(len(cells))):
        spec, fr, md, truth = _simulate_cell(cell, n_levels, crng)
        cell.update(truth)
        stacks.append({"cell_id": cell["cell_id"], "data": _noisy_stack(spec[:, None, :], crng), "frames": fr})
        frame_parts.append(fr)
        mode_parts.append(md)

    def _concat(parts):
        return {key: np.concatenate([np.asarray(p[key]) for p in parts]) for key in parts[0]}

    keys = ("cell_id", "dish", "condition", "threshold_nj", "beta", "diameter_um", "main_center_nm",
            "main_polarization", "main_l", "gain_center_nm")
    return {"dishes": dishes, "cells": cells, "stacks": stacks, "lamp": _simulate_lamp(lamp_rng),
            "truth_cells": {k: [c[k] for c in cells] for k in keys},
            "truth_frames": _concat(frame_parts), "truth_modes": _concat(mode_parts)}


_DESCRIPTION = (
    "SYNTHETIC data generated by lasecyto.synth, not a measurement. Invented 'bead threshold ramp': "
    "dye-doped polystyrene beads inside cells of two dishes with different dye loading are pumped "
    "with pulse energies spanning three decades around threshold, one frame per energy, longer "
    "exposures at low pump. Every mode follows the single-mode rate equations with its own threshold "
    "and the cell's spontaneous-emission factor beta. Ground truth is in truth/."
)

_README = (
    "# Ground truth of a synthetic lasecyto pump series\n\n"
    "Written by lasecyto.synth with the stacks they describe; synthetic, not measured; the analysis "
    "never reads this directory. `cells.csv`: per cell the threshold pulse energy of the main mode "
    "(nJ), beta, bead diameter, and the main mode's wavelength, polarization and l. `modes.csv`: every "
    "mode rendered, with its own threshold (the main mode's threshold times the ratio of gain x "
    "family factor) and radiation-limited Q. `frames.csv`: per cell and frame the measured pump "
    "energy, the exposure, the normalized pump x of the main mode, its expected photoelectrons and "
    "its rendered FWHM in pixels. Pump safety: the pump settings of this invented scenario are not "
    "advice; see lasecyto.safety.CAUTIONS.\n"
)


def write_pump_experiment(out_dir, *, n_dishes=2, cells_per_dish=3, n_levels=40, rng=0):
    """Write a synthetic pump-threshold series of bead lasers with its ground truth.

    The scenario is invented ("bead threshold ramp", synthetic data): per cell one frame
    per pump pulse energy over three decades (0.1-100 x a rough threshold estimate), the
    energy of every frame and the frame's exposure in the sidecar (``pump_energy_nj``,
    ``frame_exposure_s``), modes following the single-mode rate equations (threshold of
    10-60 nJ, beta 0.005-0.05), line widths narrowing from the cold-cavity width to the
    instrument width.  The manifest marks the experiment as a pump series and gives the
    pump spot for fluences.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Directory to write (created if needed; files of the same names are replaced).
    n_dishes, cells_per_dish : int
        Design size; dishes alternate between "stain-low" and "stain-high".
    n_levels : int
        Pump energies per cell (>= 8).
    rng : int or numpy.random.Generator
        Seeds every random draw; the same seed writes identical files.

    Returns
    -------
    pathlib.Path
        Path of the manifest ``experiment.toml``.
    """
    sim = _simulate(n_dishes=n_dishes, cells_per_dish=cells_per_dish, n_levels=n_levels, rng=rng)
    sc = PUMP_SCENARIO
    out = pathlib.Path(out_dir)
    for sub in ("spectra", "lamp", "truth"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    for stack in sim["stacks"]:
        rel = f"spectra/{stack['cell_id']}.tif"
        fr = stack["frames"]
        _write_tiff(out / rel, stack["data"])
        _write_json((out / rel).with_suffix(".json"), {
            "lasecyto_sidecar": 1,
            "frame_times_s": [float(t) for t in fr["time_s"]],
            "exposure_s": float(np.median(fr["exposure_s"])),
            "frame_exposure_s": [float(e) for e in fr["exposure_s"]],
            "pump_energy_nj": [float(e) for e in fr["pump_energy_nj"]],
            "camera": _camera()})
    _lamp_files(out, sim["lamp"])
    seed_note = f" Generated with rng={int(rng)}." if isinstance(rng, (int, np.integer)) else ""
    sphere = dict(SPHERE_SCENARIO, diameter_range_um=(10.0, 17.0))
    parts = [
        "# Synthetic experiment written by lasecyto.synth (not measured data).\n",
        _toml_table("[experiment]", [("name", "synthetic-bead-threshold-ramp"), ("resonator", "sphere"),
                                     ("kind", "pump-series"), ("synthetic", True),
                                     ("description", _DESCRIPTION + seed_note)]),
        _sphere_table(sphere),
        _toml_table("[pump]", [("wavelength_nm", sc["pump_wavelength_nm"]), ("pulse_s", sc["pulse_s"]),
                               ("beam", sc["beam"]), ("spot_diameter_um", sc["spot_diameter_um"]),
                               ("instrument_fwhm_nm", round(sc["instrument_fwhm_px"] * 0.05, 4))]),
        _toml_table("[lamp]", [("stack", "lamp/neon.tif"), ("sidecar", "lamp/neon.json"), ("reference", "Ne I")]),
    ]
    for dish in sim["dishes"]:
        parts.append(_toml_table("[[dishes]]", [("dish", dish["dish"]), ("condition", dish["condition"])]))
    return _finish(out, parts, sim["cells"], {"cells.csv": sim["truth_cells"], "frames.csv": sim["truth_frames"],
                                              "modes.csv": sim["truth_modes"]}, _README)
