"""Threshold of the main modes of one cell from a pump series (lasecyto.cavity.pump_series).

Truth in the test: the closed-form steady state of the single-mode rate equations
(check-values.md section 10) with 3 % lognormal scatter, seeded.
"""

import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.cavity.pump_series import fit_pump_series
from lasecyto.cavity.threshold import fit_threshold, steady_state_photons
from lasecyto.exceptions import InputError


def _tracks(pump_nj, exposure_s, modes, rng):
    rows = []
    for tid, (lam, e_th, beta, scale) in enumerate(modes):
        s = steady_state_photons(pump_nj / e_th, beta)
        area = scale * s * exposure_s * np.exp(rng.normal(0.0, 0.03, pump_nj.size))
        width = 0.12 + 0.15 / (1.0 + s)
        for f in range(pump_nj.size):
            rows.append(dict(cell_id="c1", frame=f, time_s=float(f), line_id=tid, center_px=100.0 * tid,
                             center_err_px=0.01, center_nm=lam, center_err_nm=5e-4, fwhm_px=width[f] / 0.05,
                             fwhm_nm=width[f], area_counts=area[f], area_err_counts=0.01 * area[f] + 5.0,
                             amplitude_counts=area[f] / 3, background_counts=10.0, snr=100.0, chi2_red=1.0,
                             lasing=True, saturated=False, fit_ok=True, fit_message="", track_id=tid,
                             mode_family=-1))
    return tables.validate(pd.DataFrame(rows), "tracks")


def test_main_modes_threshold_beta_and_width():
    rng = np.random.default_rng(42)
    pump = np.geomspace(2.0, 2000.0, 36)                 # three decades around 20 nJ
    exposure = np.where(pump < 20.0, 10.0, 0.1)          # longer exposures below threshold
    modes = [(612.0, 20.0, 0.02, 50.0), (606.0, 28.0, 0.02, 40.0), (618.0, 45.0, 0.02, 30.0)]
    out = fit_pump_series(_tracks(pump, exposure, modes, rng), frame=np.arange(pump.size), pump_nj=pump,
                          exposure_s=exposure, cell_id="c1", max_modes=2, fluence_per_nj=1.4e-4,
                          instrument_fwhm_nm=0.12)
    assert list(out["center_nm"]) == [612.0, 606.0]          # ranked by output at the highest pumps
    main = out.iloc[0]
    # issue 4 / check-values.md section 10 test use: threshold within 2 %, beta within 20 %
    assert main["fit_ok"], main["fit_message"]
    assert abs(main["threshold_nj"] / 20.0 - 1) < 0.02 and abs(main["beta"] / 0.02 - 1) < 0.20
    assert abs(main["threshold_nj"] - 20.0) < 4 * main["threshold_err_nj"]
    assert main["threshold_fluence_j_cm2"] == pytest.approx(main["threshold_nj"] * 1.4e-4)
    assert main["max_fluence_j_cm2"] == pytest.approx(2000.0 * 1.4e-4)
    # the straight line above threshold is biased low (check-values.md section 10: -2 % at beta 0.01,
    # -18 % at 0.1; the model gives -3.9 % at 0.02)
    assert main["linear_bias"] == pytest.approx(-0.039, abs=0.01)
    assert main["narrowing_ratio"] > 1.5 and main["instrument_limited"]


def test_one_pump_energy_is_refused():
    rng = np.random.default_rng(1)
    pump = np.full(10, 25.0)
    tracks = _tracks(pump, np.ones(10), [(612.0, 20.0, 0.02, 50.0)], rng)
    with pytest.raises(InputError, match=r"pump_energy_nj.*several pump energies.*found 1 distinct value\)"):
        fit_pump_series(tracks, frame=np.arange(10), pump_nj=pump, exposure_s=np.ones(10), cell_id="c1")
    with pytest.raises(InputError, match="exposure_s"):
        fit_pump_series(tracks, frame=np.arange(10), pump_nj=np.arange(1.0, 11.0), exposure_s=np.zeros(10),
                        cell_id="c1")


def test_birge_scaling_of_given_errors():
    # errors given too small by 10x: absolute_sigma keeps them, the Birge ratio scales them up
    rng = np.random.default_rng(7)
    pump = np.geomspace(0.1, 100.0, 40)
    out = 5.0 * steady_state_photons(pump, 0.01) * np.exp(rng.normal(0.0, 0.05, pump.size))
    small = 0.005 * out
    a = fit_threshold(pump, out, output_err=small)
    b = fit_threshold(pump, out, output_err=small, absolute_sigma=False)
    assert a.threshold == pytest.approx(b.threshold)
    ratio = np.sqrt(a.chi2 / a.dof)
    assert ratio > 5 and b.threshold_err == pytest.approx(a.threshold_err * ratio, rel=1e-6)
