"""The synthetic "hypertonic shift assay": cell parameters, physics and rendered stacks.

Everything here is invented for testing and demonstration (it is not measured data).
Cells stained with a red laser dye fill the 20 um gap of a planar Fabry-Perot of two
DBR mirrors.  Each frame is one pump pulse.  At ``perturbation_s`` the medium is
exchanged: a sham exchange in "control" dishes, a hypertonic medium in "hypertonic"
dishes, where most cells respond by a rising cytoplasm index.  This module computes
arrays and truth columns only; :mod:`._experiment` writes the files.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.special import erf

from ..exceptions import InputError
from ._media import _air_to_vacuum_nm, _vacuum_to_air_nm, _water_group_index, water_index_daimon
from ._modes import _mode_roots, fp_mode_wavelengths
from ._neon import neon_lines_air_nm, neon_relative_intensities
from ._patterns import PATTERN_ORDERS, iter_pattern_frames
from ._render import (
    _detector_counts,
    _eval_polynomial,
    _gaussian_band,
    _gaussian_pixel_photons,
    _lines_spectrum,
    _to_uint16,
    _wavelength_to_pixel,
)

# Detector and camera (shared by every stack of the experiment).
DETECTOR = {
    "n_pixels": 1340,
    "polynomial_air_nm": (582.0, 0.050, -2.0e-6),
    "offset_counts": 100.0,
    "gain_counts_per_e": 1.0,
    "read_noise_e": 3.0,
    "saturation_counts": 65535,
}

# Physics and design constants of the scenario.
SCENARIO = {
    "gap_um": 20.0,
    "cytoplasm_offset": 0.035,        # cytoplasm index above water
    "cytoplasm_offset_sd": 0.003,     # cell-to-cell spread of that offset
    "responder_fraction": 0.8,
    "response_amplitude": (1e-3, 3e-3),
    "response_tau_s": (60.0, 150.0),
    "response_lag_s": (0.0, 20.0),
    "drift_rms": 1e-5,                # index-equivalent random walk over the run
    "zeta": (0.05, 0.12),
    "orders": (0, 1, 2, 3),
    "family_factor": (1.0, 0.6, 0.35, 0.2),
    "gain_center_nm": 615.0,
    "gain_center_jitter_nm": 3.0,
    "gain_fwhm_nm": 24.0,
    "peak_photons": (1e4, 5e4),       # N0: fundamental line at the gain peak
    "threshold_fraction": 0.08,       # lines below threshold_fraction * N0 do not lase
    "pump_sigma": 0.05,               # lognormal pulse-to-pulse fluctuation
    "bleach_tau_s": (3000.0, 8000.0),
    "line_fwhm_px": (2.0, 3.0),
    "background_peak_photons": (20.0, 60.0),
    "background_fwhm_nm": 40.0,
    "background_shift_nm": -10.0,     # fluorescence peak relative to the gain centre
    "dropout_probability": 0.02,
    "exposure_s": 0.01,
    "pump_energy_nj": 12.0,
    "band_rows": 8,                   # imaging spectrometer: rows per cell
    "band_gap_rows": 4,               # rows between bands and at both edges
}

# Camera images of the emission patterns: one stack per dish, cells on a grid (one pump pulse per frame
# and cell, the same pulse as the cell's spectrum, so pump dropouts are dark in both).
IMAGES = {
    "grid_spacing_px": 48,            # cells sit on a grid of this pitch ...
    "grid_columns": 3,
    "margin_px": 32,                  # ... this far from the field's edges
    "position_jitter_px": 3.0,        # uniform offset of each cell from its grid node
    "pixel_size_um": 0.5,
    "waist_px": (4.0, 5.5),
    "peak_snr": 30.0,                 # peak signal over noise of a fresh, fully pumped pattern
    "pattern_change_fraction": 0.6,   # responders whose transverse order changes after their onset ...
    "pattern_change_delay_s": (30.0, 90.0),  # ... this long after it
    "drift_px_per_frame": (0.02, -0.015),    # common stage drift (rows, cols), back and forth ...
    "max_drift_px": 3.0,              # ... within this amplitude
    "jitter_px": 0.03,                # per-cell wander per frame, pulled back by
    "restoring": 0.05,                # this fraction of the offset each frame
    "rotation_deg_per_frame": 0.1,    # slow turn of the HG axes
    "background_e": 20.0,
}

LAMP = {
    "n_frames": 5,
    "fwhm_px": 2.5,
    "photons_per_intensity": 2.0,     # photons per unit of NIST relative intensity
    "photon_range": (2e3, 4e4),
    "exposure_s": 0.2,
    "guess_c0_offset_nm": 0.4,        # nominal axis: best straight line, off by +0.4 nm ...
    "guess_c1_factor": 1.003,         # ... and +0.3 % in dispersion
}


def _dish_names(n_dishes):
    return [chr(ord("A") + i) for i in range(n_dishes)]


def _validate(n_dishes, cells_per_dish, n_frames, frame_interval_s, perturbation_s):
    if not (isinstance(n_dishes, (int, np.integer)) and 1 <= n_dishes <= 26):
        raise InputError("number of dishes out of range", field="n_dishes", expected="integer 1-26",
                         found=n_dishes)
    if not (isinstance(cells_per_dish, (int, np.integer)) and 1 <= cells_per_dish <= 99):
        raise InputError("number of cells per dish out of range", field="cells_per_dish",
                         expected="integer 1-99", found=cells_per_dish)
    if not (isinstance(n_frames, (int, np.integer)) and n_frames >= 2):
        raise InputError("too few frames", field="n_frames", expected="integer >= 2", found=n_frames)
    if not (np.isfinite(frame_interval_s) and frame_interval_s > 0):
        raise InputError("frame interval must be positive", field="frame_interval_s",
                         expected="> 0 s", found=frame_interval_s)
    if not (np.isfinite(perturbation_s) and perturbation_s >= 0):
        raise InputError("perturbation time must be finite and >= 0", field="perturbation_s",
                         expected=">= 0 s", found=perturbation_s)


def _draw_design(names, cells_per_dish, perturbation_s, rng):
    """Per-dish conditions and per-cell parameters, in a fixed draw order."""
    sc = SCENARIO
    n_dishes = len(names)
    conditions = ["control" if i < n_dishes // 2 else "hypertonic" for i in range(n_dishes)]
    dishes = [{"dish": d, "condition": c, "perturbation_s": float(perturbation_s)}
              for d, c in zip(names, conditions)]
    cells = []
    for dish in dishes:
        for j in range(cells_per_dish):
            u = rng.uniform
            cell = {
                "cell_id": f"{dish['dish']}-{j + 1:02d}",
                "dish": dish["dish"],
                "condition": dish["condition"],
                "treated": dish["condition"] == "hypertonic",
                "perturbation_s": float(perturbation_s),
                "index_offset": sc["cytoplasm_offset"] + sc["cytoplasm_offset_sd"] * rng.standard_normal(),
                "zeta": u(*sc["zeta"]),
                "line_fwhm_px": u(*sc["line_fwhm_px"]),
                "gain_center_nm": sc["gain_center_nm"] + u(-1.0, 1.0) * sc["gain_center_jitter_nm"],
                "peak_photons": u(*sc["peak_photons"]),
                "bleach_tau_s": u(*sc["bleach_tau_s"]),
                "background_peak_photons": u(*sc["background_peak_photons"]),
                "amplitude": u(*sc["response_amplitude"]),
                "tau_s": u(*sc["response_tau_s"]),
                "lag_s": u(*sc["response_lag_s"]),
            }
            cells.append(cell)
    treated = [i for i, c in enumerate(cells) if c["treated"]]
    n_resp = int(round(sc["responder_fraction"] * len(treated)))
    chosen = set(int(i) for i in rng.permutation(np.array(treated, dtype=int))[:n_resp]) if treated else set()
    for i, cell in enumerate(cells):
        resp = i in chosen
        cell["responder"] = resp
        cell["index_change"] = cell["amplitude"] if resp else 0.0
        cell["response_tau_s"] = cell["tau_s"] if resp else float("nan")
        cell["onset_s"] = cell["perturbation_s"] + cell["lag_s"] if resp else float("nan")
    return dishes, cells


def _pump_and_dropouts(n_frames, rng):
    sc = SCENARIO
    s = sc["pump_sigma"]
    pump = np.exp(s * rng.standard_normal(n_frames) - 0.5 * s * s)
    dropout = rng.random(n_frames) < sc["dropout_probability"]
    return pump, dropout


def _simulate_cell(cell, times_s, pump, dropout, rng):
    """Expected photoelectron spectrum (T, N) of one cell and its truth rows."""
    sc, det = SCENARIO, DETECTOR
    n_pix = det["n_pixels"]
    poly = det["polynomial_air_nm"]
    n_frames = times_s.size

    # Cytoplasm index change: slow random walk plus (responders) the saturating response.
    step_sd = sc["drift_rms"] / np.sqrt(max(n_frames - 1, 1))
    drift = np.concatenate([[0.0], np.cumsum(step_sd * rng.standard_normal(n_frames - 1))])
    if cell["responder"]:
        dt = np.clip(times_s - cell["onset_s"], 0.0, None)
        response = cell["amplitude"] * (1.0 - np.exp(-dt / cell["tau_s"]))
    else:
        response = np.zeros(n_frames)
    index_change = drift + response

    # Mode set: every (k, q) that can reach the detector, then exact roots per frame.
    edges_vac = _air_to_vacuum_nm(_eval_polynomial(poly, np.array([-0.5, n_pix - 0.5])))
    modes = fp_mode_wavelengths(sc["gap_um"], index_offset=cell["index_offset"], zeta=cell["zeta"],
                                orders=sc["orders"], window_nm=(edges_vac[0] - 4.0, edges_vac[1] + 4.0))
    k, q = modes["k"], modes["q"]
    lam_vac = _mode_roots((q + k * cell["zeta"])[None, :], sc["gap_um"],
                          cell["index_offset"] + index_change[:, None])
    center_px = _wavelength_to_pixel(poly, _vacuum_to_air_nm(lam_vac))
    on_det = (center_px >= -0.5) & (center_px <= n_pix - 0.5)

    gain = _gaussian_band(lam_vac, cell["gain_center_nm"], sc["gain_fwhm_nm"])
    bleach = np.exp(-times_s / cell["bleach_tau_s"])
    fam = np.asarray(sc["family_factor"])[k]
    expected = cell["peak_photons"] * gain * fam[None, :] * (pump * bleach)[:, None]
    lasing = (expected >= sc["threshold_fraction"] * cell["peak_photons"]) & on_det & ~dropout[:, None]
    photons = np.where(lasing, expected, 0.0)

    spectrum = _lines_spectrum(center_px, photons, lasing, cell["line_fwhm_px"], n_pix)

    # Broad dye fluorescence under the lines, scaled by pump energy and bleaching.
    px_vac = _air_to_vacuum_nm(_eval_polynomial(poly, np.arange(n_pix)))
    bg_center = cell["gain_center_nm"] + sc["background_shift_nm"]
    bg = cell["background_peak_photons"] * _gaussian_band(px_vac, bg_center, sc["background_fwhm_nm"])
    spectrum += (pump * bleach)[:, None] * bg[None, :]

    frames = {
        "cell_id": [cell["cell_id"]] * n_frames,
        "frame": np.arange(n_frames),
        "time_s": times_s,
        "index_change": index_change,
        "response": response,
        "dropout": dropout.copy(),
        "pump_factor": pump.copy(),
    }
    fr, md = np.nonzero(on_det)
    mode_rows = {
        "cell_id": [cell["cell_id"]] * fr.size,
        "frame": fr,
        "time_s": times_s[fr],
        "family": k[md],
        "q": q[md],
        "center_vacuum_nm": lam_vac[fr, md],
        "photons": photons[fr, md],
        "visible": lasing[fr, md],
        "center_px": center_px[fr, md],
    }
    return spectrum, frames, mode_rows


def _band_weights(n_rows_band, rng):
    """Smooth spatial profile across a band of rows (Gaussian, pixel-integrated, sums to 1)."""
    centre = 0.5 * (n_rows_band - 1) + rng.uniform(-0.5, 0.5)
    sigma = rng.uniform(1.4, 2.0)
    edges = np.arange(n_rows_band + 1) - 0.5
    cdf = 0.5 * erf((edges - centre) / (sigma * np.sqrt(2.0)))
    w = np.diff(cdf)
    return w / w.sum()


def _noisy_stack(expected_e, rng):
    det = DETECTOR
    counts = _detector_counts(expected_e, offset_counts=det["offset_counts"],
                              gain_counts_per_e=det["gain_counts_per_e"],
                              read_noise_e=det["read_noise_e"], rng=rng)
    return _to_uint16(counts, saturation_counts=det["saturation_counts"])


def _simulate_lamp(rng):
    """Neon lamp stack (F, 1, N) through the true air polynomial, and its truth."""
    det = DETECTOR
    poly = det["polynomial_air_nm"]
    n_pix = det["n_pixels"]
    lines = neon_lines_air_nm()
    inten = neon_relative_intensities()
    px = _wavelength_to_pixel(poly, lines)
    keep = (px >= 0) & (px <= n_pix - 1)
    lines, inten = lines[keep], inten[keep]
    photons = np.clip(LAMP["photons_per_intensity"] * inten, *LAMP["photon_range"])
    centres = _wavelength_to_pixel(poly, lines)
    expected = _gaussian_pixel_photons(centres, LAMP["fwhm_px"], photons, n_pix).sum(axis=0)
    stack = _noisy_stack(np.broadcast_to(expected, (LAMP["n_frames"], 1, n_pix)), rng)
    # Nominal axis of a spectrometer program: the straight line closest to the true axis,
    # deliberately off by +0.4 nm in offset and +0.3 % in dispersion (up to ~1.2 nm in all).
    p_all = np.arange(n_pix, dtype=float)
    slope, intercept = np.polyfit(p_all, np.polynomial.polynomial.polyval(p_all, poly), 1)
    guess = [float(intercept + LAMP["guess_c0_offset_nm"]), float(slope * LAMP["guess_c1_factor"])]
    return {"stack": stack, "lines_air_nm": lines, "line_photons": photons, "guess": guess}


def _field_grid(n_cells):
    """Grid nodes (row, col) of a field of ``n_cells`` and the field's shape."""
    im = IMAGES
    n_cols = min(n_cells, im["grid_columns"])
    n_rows = -(-n_cells // n_cols)
    k = np.arange(n_cells)
    nodes = np.column_stack([im["margin_px"] + (k // n_cols) * im["grid_spacing_px"],
                             im["margin_px"] + (k % n_cols) * im["grid_spacing_px"]]).astype(float)
    shape = (2 * im["margin_px"] + (n_rows - 1) * im["grid_spacing_px"],
             2 * im["margin_px"] + (n_cols - 1) * im["grid_spacing_px"])
    return nodes, shape


def _triangle_wave(x, amplitude):
    """Triangle wave of slope 1 through 0 bounded by +-amplitude (a drift that goes back and forth)."""
    a = float(amplitude)
    return a - np.abs(np.mod(np.asarray(x, dtype=float) + a, 4 * a) - 2 * a)


def _simulate_field(dcells, times_s, truth_frames, rng, *, change_fraction=None):
    """Emission-pattern camera stack (T, rows, cols) of one dish and its truth rows.

    ``truth_frames`` maps each cell id to its per-frame ``dropout`` and ``pump_factor``;
    a responder switches order with probability ``change_fraction`` (default
    ``IMAGES["pattern_change_fraction"]``).
    """
    im, det = IMAGES, DETECTOR
    n_frames, n = times_s.size, len(dcells)
    nodes, shape = _field_grid(n)
    start = nodes + rng.uniform(-im["position_jitter_px"], im["position_jitter_px"], nodes.shape)
    waists = rng.uniform(*im["waist_px"], n)
    angles = rng.uniform(0.0, 180.0, n)
    orders = [PATTERN_ORDERS[int(i)] for i in rng.integers(len(PATTERN_ORDERS), size=n)]
    later, change_s = [], []
    for cell, first in zip(dcells, orders):
        fraction = im["pattern_change_fraction"] if change_fraction is None else change_fraction
        changes = cell["responder"] and rng.random() < fraction
        other = [o for o in PATTERN_ORDERS if o != first]
        later.append(other[int(rng.integers(len(other)))] if changes else first)
        change_s.append(cell["onset_s"] + rng.uniform(*im["pattern_change_delay_s"]) if changes else np.nan)
    v0 = im["background_e"] + det["read_noise_e"] ** 2
    s2 = im["peak_snr"] ** 2
    peak0 = (s2 + np.sqrt(s2 * s2 + 4.0 * s2 * v0)) / 2.0  # S / sqrt(S + v0) = peak_snr
    drift = _triangle_wave(np.arange(n_frames)[:, None] * np.asarray(im["drift_px_per_frame"])[None, :],
                           im["max_drift_px"])
    wander = np.zeros((n_frames, n, 2))
    for f in range(1, n_frames):
        wander[f] = (1.0 - im["restoring"]) * wander[f - 1] + rng.normal(0.0, im["jitter_px"], (n, 2))
    rows = {k: [] for k in ("cell_id", "frame", "time_s", "cell", "row_px", "col_px", "order", "waist_px",
                            "orientation_deg", "lasing", "changed", "peak_e")}
    for c, cell in enumerate(dcells):
        tf = truth_frames[cell["cell_id"]]
        bleach = np.exp(-times_s / cell["bleach_tau_s"])
        order_f = np.where(times_s >= change_s[c], later[c], orders[c]) if np.isfinite(change_s[c]) \
            else np.full(n_frames, orders[c], dtype=object)
        lasing = ~tf["dropout"]
        prev, changed = None, np.zeros(n_frames, bool)
        for f in range(n_frames):
            if lasing[f]:
                changed[f] = prev is not None and order_f[f] != prev
                prev = order_f[f]
        pos = start[c][None, :] + drift + wander[:, c]
        rows["cell_id"] += [cell["cell_id"]] * n_frames
        rows["frame"] += list(range(n_frames))
        rows["time_s"] += list(times_s)
        rows["cell"] += [c] * n_frames
        rows["row_px"] += list(pos[:, 0])
        rows["col_px"] += list(pos[:, 1])
        rows["order"] += list(order_f)
        rows["waist_px"] += [waists[c]] * n_frames
        rows["orientation_deg"] += list((angles[c] + im["rotation_deg_per_frame"] * np.arange(n_frames)) % 180.0)
        rows["lasing"] += list(lasing)
        rows["changed"] += list(changed)
        rows["peak_e"] += list(peak0 * tf["pump_factor"] * bleach)
    truth = pd.DataFrame(rows).sort_values(["frame", "cell"], kind="stable").reset_index(drop=True)
    camera = {"background_e": im["background_e"], "read_noise_e": det["read_noise_e"],
              "offset_counts": det["offset_counts"], "gain_counts_per_e": det["gain_counts_per_e"],
              "saturation_counts": det["saturation_counts"]}
    stack = np.stack(list(iter_pattern_frames(truth, shape=shape, rng=rng, **camera)))
    cells_truth = [{"cell_id": cell["cell_id"], "image_row_px": float(start[c, 0]),
                    "image_col_px": float(start[c, 1]), "pattern_order_start": orders[c],
                    "pattern_order_end": later[c], "pattern_change_s": float(change_s[c])}
                   for c, cell in enumerate(dcells)]
    return stack, truth, cells_truth


def _simulate_pattern_experiment(*, n_dishes, cells_per_dish, n_frames, frame_interval_s, perturbation_s,
                                 rng):
    """Camera stacks only (no spectra): every responder's pattern changes order after its onset."""
    _validate(n_dishes, cells_per_dish, n_frames, frame_interval_s, perturbation_s)
    gen = np.random.default_rng(rng)
    design_rng, *dish_rngs = gen.spawn(1 + n_dishes)
    dishes, cells = _draw_design(_dish_names(n_dishes), cells_per_dish, perturbation_s, design_rng)
    times = np.arange(n_frames) * float(frame_interval_s)
    fields = []
    for dish, drng in zip(dishes, dish_rngs):
        dcells = [c for c in cells if c["dish"] == dish["dish"]]
        pump_rng, field_rng = drng.spawn(2)
        frames = {}
        for c in dcells:
            pump, dropout = _pump_and_dropouts(n_frames, pump_rng)
            frames[c["cell_id"]] = {"dropout": dropout, "pump_factor": pump}
        stack, ftruth, ctruth = _simulate_field(dcells, times, frames, field_rng, change_fraction=1.0)
        fields.append({"field": f"{dish['dish']}-field", "dish": dish["dish"], "stack": stack, "truth": ftruth,
                       "cells": ctruth})
    cols = ["cell_id", "dish", "condition", "treated", "responder", "perturbation_s", "onset_s"]
    truth_cells = {c: [cell[c] for cell in cells] for c in cols}
    return {"dishes": dishes, "cells": cells, "times_s": times, "fields": fields, "truth_cells": truth_cells}


def _simulate_experiment(*, n_dishes, cells_per_dish, n_frames, frame_interval_s, perturbation_s,
                         imaging_dish, rng, images=False):
    """All stacks and truth of one synthetic experiment (no file I/O)."""
    _validate(n_dishes, cells_per_dish, n_frames, frame_interval_s, perturbation_s)
    gen = np.random.default_rng(rng)
    design_rng, lamp_rng, *dish_rngs = gen.spawn(2 + n_dishes)
    names = _dish_names(n_dishes)
    dishes, cells = _draw_design(names, cells_per_dish, perturbation_s, design_rng)
    times = np.arange(n_frames) * float(frame_interval_s)
    imaging_name = names[-1] if imaging_dish else None
    band, gap = SCENARIO["band_rows"], SCENARIO["band_gap_rows"]

    stacks, frame_parts, mode_parts = [], [], []
    for dish, drng in zip(dishes, dish_rngs):
        dcells = [c for c in cells if c["dish"] == dish["dish"]]
        shared_rng, *cell_rngs = drng.spawn(1 + len(dcells))
        if dish["dish"] == imaging_name:
            # One pump pulse and one exposure per frame for the whole field.
            pump, dropout = _pump_and_dropouts(n_frames, shared_rng)
            n_rows = gap + len(dcells) * (band + gap)
            expected = np.zeros((n_frames, n_rows, DETECTOR["n_pixels"]))
            rows = []
            for j, (cell, crng) in enumerate(zip(dcells, cell_rngs)):
                spec, fr, md = _simulate_cell(cell, times, pump, dropout, crng)
                start = gap + j * (band + gap)
                w = _band_weights(band, crng)
                expected[:, start:start + band, :] = w[None, :, None] * spec[:, None, :]
                rows.append([start, start + band])
                frame_parts.append(fr)
                mode_parts.append(md)
            stacks.append({"name": f"{dish['dish']}-imaging", "cells": [c["cell_id"] for c in dcells],
                           "rows": rows, "data": _noisy_stack(expected, shared_rng)})
        else:
            for cell, crng in zip(dcells, cell_rngs):
                pump, dropout = _pump_and_dropouts(n_frames, crng)
                spec, fr, md = _simulate_cell(cell, times, pump, dropout, crng)
                stacks.append({"name": cell["cell_id"], "cells": [cell["cell_id"]], "rows": [None],
                               "data": _noisy_stack(spec[:, None, :], crng)})
                frame_parts.append(fr)
                mode_parts.append(md)

    fields = []
    if images:
        # drawn after (and independently of) the spectra: the same seed gives the same spectra with or without
        image_rng = gen.spawn(1)[0]
        by_cell = {p["cell_id"][0]: p for p in frame_parts}
        for dish, frng in zip(dishes, image_rng.spawn(n_dishes)):
            dcells = [c for c in cells if c["dish"] == dish["dish"]]
            stack, ftruth, ctruth = _simulate_field(dcells, times, by_cell, frng)
            fields.append({"field": f"{dish['dish']}-field", "dish": dish["dish"], "stack": stack,
                           "truth": ftruth, "cells": ctruth})

    lam_ref = SCENARIO["gain_center_nm"] * 1e-3
    cell_cols = ["cell_id", "dish", "condition", "treated", "responder", "perturbation_s",
                 "index_change", "response_tau_s", "onset_s"]
    truth_cells = {c: [cell[c] for cell in cells] for c in cell_cols}
    truth_cells["gap_um"] = [SCENARIO["gap_um"]] * len(cells)
    truth_cells["index_offset"] = [cell["index_offset"] for cell in cells]
    truth_cells["zeta"] = [cell["zeta"] for cell in cells]
    truth_cells["n_frames"] = [int(n_frames)] * len(cells)
    for extra in ("line_fwhm_px", "gain_center_nm", "peak_photons", "bleach_tau_s",
                  "background_peak_photons"):
        truth_cells[extra] = [cell[extra] for cell in cells]
    truth_cells["group_index_615nm"] = [float(_water_group_index(lam_ref)) + cell["index_offset"]
                                        for cell in cells]
    truth_cells["index_615nm"] = [float(water_index_daimon(lam_ref)) + cell["index_offset"]
                                  for cell in cells]

    def _concat(parts):
        return {key: np.concatenate([np.asarray(p[key]) for p in parts]) for key in parts[0]}

    return {
        "dishes": dishes,
        "cells": cells,
        "times_s": times,
        "stacks": stacks,
        "lamp": _simulate_lamp(lamp_rng),
        "truth_cells": truth_cells,
        "truth_cell_frames": _concat(frame_parts),
        "truth_modes": _concat(mode_parts),
        "fields": fields,
    }
