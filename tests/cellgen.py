"""Generator of cell_frames-like tables with known truth, shared by the feature and classifier tests.

Response and drift ranges come from the synthetic scenario of lasecyto.synth (its SCENARIO constants);
the per-frame measurement noise (1-3e-6 in index) is what the pipeline reaches on that scenario.
"""

import numpy as np
import pandas as pd

from lasecyto.features import cell_features
from lasecyto.synth._scenario import SCENARIO


def make_cell_frames(cell_id, *, rng, responder, n_frames=60, dt_s=10.0, perturbation_s=200.0,
                     dish_length_um=27.66, bleach_tau_s=5000.0):
    """One cell's cell_frames table and its truth (onset_s, amplitude, tau_s)."""
    sc = SCENARIO
    t = np.arange(n_frames) * dt_s
    drift = np.concatenate([[0.0], np.cumsum(sc["drift_rms"] / np.sqrt(n_frames - 1)
                                             * rng.standard_normal(n_frames - 1))])
    amp, tau, lag = rng.uniform(*sc["response_amplitude"]), rng.uniform(*sc["response_tau_s"]), \
        rng.uniform(*sc["response_lag_s"])
    onset = perturbation_s + lag
    resp = amp * (1 - np.exp(-np.clip(t - onset, 0, None) / tau)) if responder else np.zeros(n_frames)
    sd = rng.uniform(1e-6, 3e-6)
    dn = drift + resp + sd * rng.standard_normal(n_frames)
    dn -= dn[t < perturbation_s].mean()
    lasing = rng.random(n_frames) >= sc["dropout_probability"]
    nan = np.where(lasing, 1.0, np.nan)
    rs = 0.7 * dn + 0.3 * sd * rng.standard_normal(n_frames)
    area = 1e5 * np.exp(-t / bleach_tau_s) * np.exp(sc["pump_sigma"] * rng.standard_normal(n_frames))
    opl = dish_length_um + 20.0 * dn + 1e-3 * rng.standard_normal(n_frames)
    table = pd.DataFrame({
        "cell_id": [cell_id] * n_frames, "frame": np.arange(n_frames), "time_s": t,
        "n_lines": np.where(lasing, 12, 0), "n_lasing": np.where(lasing, 10, 0),
        "total_area_counts": area * nan, "lasing": lasing, "fsr_nm": 6.86 * nan,
        "optical_length_um": opl * nan, "optical_length_err_um": 2e-3 * nan,
        "relative_shift": rs * nan, "relative_shift_err": 0.7 * sd * nan,
        "delta_optical_length_um": 20.0 * dn * nan, "delta_optical_length_err_um": 20.0 * sd * nan,
        "index_change": dn * nan, "index_change_err": sd * nan,
    })
    truth = {"responder": bool(responder), "onset_s": onset if responder else np.nan,
             "amplitude": amp if responder else 0.0, "tau_s": tau if responder else np.nan}
    return table, truth


def make_experiment(*, n_dishes, cells_per_dish, rng, responder_fraction=SCENARIO["responder_fraction"],
                    n_frames=60):
    """A cells table with cell_features of every cell: half the dishes control, half treated."""
    gen = np.random.default_rng(rng)
    rows = []
    for d in range(n_dishes):
        treated = d >= n_dishes // 2
        dish_length = 27.66 + 0.3 * gen.standard_normal()    # dish-to-dish gap variation
        dish_bleach = gen.uniform(*SCENARIO["bleach_tau_s"])  # dye batch of the dish
        for j in range(cells_per_dish):
            responder = bool(treated and gen.random() < responder_fraction)
            cf, truth = make_cell_frames(f"{d:02d}-{j:02d}", rng=gen, responder=responder, n_frames=n_frames,
                                         dish_length_um=dish_length, bleach_tau_s=dish_bleach)
            feats = cell_features(cf, perturbation_s=200.0)
            rows.append({"cell_id": f"{d:02d}-{j:02d}", "dish": f"D{d:02d}",
                         "condition": "treated" if treated else "control", **truth, **feats})
    return pd.DataFrame(rows)


def make_run_cells(*, n_dishes, cells_per_dish, rng, n_frames=60, perturbation_s=200.0):
    """A cells table as a run gathers it before its population steps (summarize_cell + cell_features per cell).

    Half the dishes are "control", half "treated"; truth columns ``responder`` and ``onset_true_s`` are added.
    """
    from lasecyto import tables
    from lasecyto.features import summarize_cell

    gen = np.random.default_rng(rng)
    rows = []
    for d in range(n_dishes):
        treated = d >= n_dishes // 2
        dish_length = 27.66 + 0.3 * gen.standard_normal()
        dish_bleach = gen.uniform(*SCENARIO["bleach_tau_s"])
        for j in range(cells_per_dish):
            responder = bool(treated and gen.random() < SCENARIO["responder_fraction"])
            cid = f"{d:02d}-{j:02d}"
            cf, truth = make_cell_frames(cid, rng=gen, responder=responder, n_frames=n_frames,
                                         perturbation_s=perturbation_s, dish_length_um=dish_length,
                                         bleach_tau_s=dish_bleach)
            summary = summarize_cell(cf, perturbation_s=perturbation_s)
            feats = cell_features(cf, perturbation_s=perturbation_s)
            rows.append({"cell_id": cid, "dish": f"D{d:02d}", "condition": "treated" if treated else "control",
                         "perturbation_s": perturbation_s, **summary, **feats, "responder": responder,
                         "onset_true_s": truth["onset_s"]})
    return tables.validate(pd.DataFrame(rows), "cells")
