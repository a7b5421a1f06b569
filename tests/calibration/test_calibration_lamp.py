"""Lamp peaks and dispersion solution on synthetic lamp frames rendered here."""

import numpy as np
import pandas as pd
import pytest
from numpy.polynomial import polynomial as P
from scipy.special import erf

from lasecyto.calibration import (DispersionSolution, WavelengthAxis, air_to_vacuum, find_lamp_peaks,
                                  reference_lines, solve_dispersion)
from lasecyto.exceptions import CalibrationError, CalibrationWarning, InputError

# Ne I lines of check-values.md section 1a (NIST ASD export Oct 2015, observed air wavelengths, nm)
# with NIST relative intensities, plus Ne 597.46273 (int. 5000) given in the text of that section.
NE_I = np.array([
    (533.07775, 6000), (534.10938, 10000), (540.05616, 20000), (585.24878, 20000),
    (588.18950, 10000), (594.48340, 5000), (597.46273, 5000), (597.55343, 6000),
    (602.99968, 10000), (607.43376, 10000), (609.61630, 3000), (614.30627, 10000),
    (616.35937, 10000), (621.72812, 10000), (626.64952, 10000), (630.47893, 1000),
    (633.44276, 10000), (638.29914, 10000), (640.22480, 20000), (650.65277, 15000),
    (653.28824, 1000), (659.89528, 10000), (667.82766, 5000), (671.70430, 700),
    (692.94672, 100000), (702.40500, 34000), (703.24128, 85000), (717.39380, 77000),
    (724.51665, 77000),
])
# check-values.md section 1b, NIST ASD column
HG_I = np.array([(546.0750, 6000), (576.9610, 1000), (579.0670, 900), (580.3782, 400)])

TRUE_NM = (582.0, 0.050, -2e-6)
N_PIXELS = 1340
FWHM_PX = 2.5
READ_NOISE_E = 3.0
SIGMA_PX = FWHM_PX / (2.0 * np.sqrt(2.0 * np.log(2.0)))


def pixel_of(wavelength_nm, coef):
    """Invert a monotonic pixel -> nm polynomial by Newton steps."""
    lam = np.asarray(wavelength_nm, dtype=float)
    x = (lam - coef[0]) / coef[1]
    for _ in range(50):
        x = x - (P.polyval(x, coef) - lam) / P.polyval(x, P.polyder(coef))
    return x


def render(lines, coef, *, rng, n_pixels=N_PIXELS, peak_range_e=(2e3, 4e4), background_e=5.0):
    """Pixel-integrated Gaussian lines (FWHM 2.5 px), Poisson noise and 3 e read noise.

    Peak heights run from 2e3 to 4e4 e with log NIST intensity.  Returns the frame (e per
    pixel) and the true pixel centre and wavelength of each rendered line.
    """
    lam = P.polyval(np.arange(n_pixels), coef)
    inside = (lines[:, 0] > lam.min()) & (lines[:, 0] < lam.max())
    lam_line, intensity = lines[inside, 0], lines[inside, 1]
    centre = pixel_of(lam_line, coef)
    log_i = np.log(intensity)
    span = np.ptp(log_i) if log_i.size > 1 and np.ptp(log_i) > 0 else 1.0
    peak = peak_range_e[0] + (peak_range_e[1] - peak_range_e[0]) * (log_i - log_i.min()) / span
    area = peak * SIGMA_PX * np.sqrt(2.0 * np.pi)
    p = np.arange(n_pixels, dtype=float)[:, None]
    frac = 0.5 * (erf((p + 0.5 - centre) / (SIGMA_PX * np.sqrt(2.0)))
                  - erf((p - 0.5 - centre) / (SIGMA_PX * np.sqrt(2.0))))
    mean_e = background_e + (frac * area).sum(axis=1)
    frame = rng.poisson(mean_e) + rng.normal(0.0, READ_NOISE_E, n_pixels)
    return frame, centre, lam_line


def nominal(coef, offset_nm, scale):
    """A nominal axis off by offset_nm and by a relative scale of the dispersion."""
    g = np.array(coef, dtype=float) * (1.0 + scale)
    g[0] = coef[0] + offset_nm
    return g


@pytest.fixture(scope="module")
def ne_frame():
    return render(NE_I, TRUE_NM, rng=np.random.default_rng(20240611))


@pytest.fixture(scope="module")
def ne_solution(ne_frame):
    frame, _, _ = ne_frame
    ref = reference_lines("Ne I")
    return solve_dispersion(frame, ref["wavelength_air_nm"].to_numpy(),
                            guess_nm=nominal(TRUE_NM, 0.4, 0.003), read_noise_e=READ_NOISE_E)


def test_ne_lamp_recovers_nist_wavelengths(ne_frame, ne_solution):
    _, centre, lam_line = ne_frame
    sol = ne_solution
    assert isinstance(sol, DispersionSolution)
    assert sol.degree == 3 and len(sol.coefficients_nm) == 4
    # Acceptance (check-values.md section 1, "Test use"): residual RMS < 0.002 nm against the NIST
    # air wavelengths (section 1a) of the lines used; tolerance 0.002 nm.
    used = sol.lines[sol.lines["used"]]
    resid = used["reference_air_nm"].to_numpy() - P.polyval(used["pixel"].to_numpy(), sol.coefficients_nm)
    assert np.sqrt(np.mean(resid ** 2)) < 0.002
    assert sol.rms_nm < 0.002
    assert sol.n_used == len(used) >= 12
    # The recovered polynomial at the true line centres against the NIST values (section 1a),
    # all rendered lines except the blended pair; tolerance 0.002 nm RMS.
    single = (lam_line < 597.4) | (lam_line > 597.6)
    err = P.polyval(centre[single], sol.coefficients_nm) - lam_line[single]
    assert np.sqrt(np.mean(err ** 2)) < 0.002
    # Recovered axis against the true one over all pixels; tolerance 0.002 nm.
    px = np.arange(N_PIXELS)
    assert np.max(np.abs(P.polyval(px, sol.coefficients_nm) - P.polyval(px, TRUE_NM))) < 0.002


def test_ne_blend_is_excluded(ne_solution):
    # check-values.md section 1a: Ne 597.46273 + 597.55343 (0.091 nm) is a blend at this resolution
    lines = ne_solution.lines
    near = lines["reference_air_nm"].between(597.4, 597.6)
    assert near.sum() == 1
    assert not lines.loc[near, "used"].any()
    assert (lines.loc[near, "reason"] == "blend").all()
    assert (lines.loc[lines["used"], "reason"] == "").all()


def test_lines_table_and_report(ne_solution):
    lines = ne_solution.lines
    assert list(lines.columns) == ["pixel", "pixel_err", "reference_air_nm", "fitted_air_nm",
                                   "residual_nm", "used", "reason"]
    assert isinstance(lines.index, pd.RangeIndex)
    assert np.all(np.diff(lines["pixel"].to_numpy()) > 0)
    m = lines["reference_air_nm"].notna()
    np.testing.assert_allclose(lines.loc[m, "residual_nm"],
                               lines.loc[m, "reference_air_nm"] - lines.loc[m, "fitted_air_nm"])
    text = ne_solution.report()
    assert len(text.splitlines()) >= len(lines) + 3
    assert "597.55343" in text and "blend" in text and "rms" in text


def test_axis_is_air_polynomial(ne_solution):
    axis = ne_solution.axis()
    assert isinstance(axis, WavelengthAxis)
    assert axis.medium == "air"
    assert axis.polynomial_nm == ne_solution.coefficients_nm
    px = np.array([0.0, 500.5, 1339.0])
    np.testing.assert_allclose(axis.vacuum_nm(px),
                               air_to_vacuum(P.polyval(px, ne_solution.coefficients_nm)), atol=1e-12)


def test_deterministic(ne_frame, ne_solution):
    frame, _, _ = ne_frame
    again = solve_dispersion(frame, reference_lines("Ne I")["wavelength_air_nm"].to_numpy(),
                             guess_nm=nominal(TRUE_NM, 0.4, 0.003), read_noise_e=READ_NOISE_E)
    assert again.coefficients_nm == ne_solution.coefficients_nm
    pd.testing.assert_frame_equal(again.lines, ne_solution.lines)


@pytest.mark.parametrize("seed, offset_nm, scale", [(1, -1.0, -0.005), (2, 1.0, 0.005), (3, 0.7, -0.004)])
def test_ne_lamp_with_other_guesses_and_intensities(seed, offset_nm, scale):
    # Guess errors at the limits of the documented range; reference intensities given.
    frame, _, _ = render(NE_I, TRUE_NM, rng=np.random.default_rng(seed))
    ref = reference_lines("Ne I")
    sol = solve_dispersion(frame, ref["wavelength_air_nm"].to_numpy(),
                           guess_nm=nominal(TRUE_NM, offset_nm, scale), read_noise_e=READ_NOISE_E,
                           reference_intensity=ref["relative_intensity"].to_numpy())
    px = np.arange(N_PIXELS)
    # tolerance 0.002 nm, as the acceptance above
    assert sol.rms_nm < 0.002
    assert np.max(np.abs(P.polyval(px, sol.coefficients_nm) - P.polyval(px, TRUE_NM))) < 0.002


def test_reversed_dispersion():
    # A detector read out from the red end: negative dispersion.
    true = (P.polyval(N_PIXELS - 1, TRUE_NM), -0.050 - 2 * TRUE_NM[2] * (N_PIXELS - 1), TRUE_NM[2])
    frame, _, _ = render(NE_I, true, rng=np.random.default_rng(7))
    sol = solve_dispersion(frame, NE_I[:, 0], guess_nm=nominal(true, -0.3, 0.002), read_noise_e=READ_NOISE_E)
    px = np.arange(N_PIXELS)
    assert np.max(np.abs(P.polyval(px, sol.coefficients_nm) - P.polyval(px, true))) < 0.002


def test_hg_plus_ne_lamp():
    # A window at 530-593 nm holding Ne I (section 1a) and Hg I (section 1b, NIST ASD column) lines.
    true = (530.0, 0.050, -2e-6)
    frame, centre, lam_line = render(np.vstack([NE_I, HG_I]), true, rng=np.random.default_rng(11))
    ref = reference_lines("Ne I + Hg I")
    sol = solve_dispersion(frame, ref["wavelength_air_nm"].to_numpy(), guess_nm=nominal(true, 0.4, 0.003),
                           read_noise_e=READ_NOISE_E)
    used_refs = sol.lines.loc[sol.lines["used"], "reference_air_nm"].to_numpy()
    assert {546.0750, 576.9610, 579.0670} <= set(used_refs.tolist())
    # check-values.md sections 1a/1b: RMS against NIST air wavelengths < 0.002 nm
    assert sol.rms_nm < 0.002
    err = P.polyval(centre, sol.coefficients_nm) - lam_line
    assert np.sqrt(np.mean(err ** 2)) < 0.002
    # axis within 0.002 nm between the outermost lines (the ends are extrapolated from 9 lines)
    px = np.arange(int(centre.min()), int(centre.max()) + 1)
    assert np.max(np.abs(P.polyval(px, sol.coefficients_nm) - P.polyval(px, true))) < 0.002


def test_too_few_lines_is_a_calibration_error():
    # 655.0-668.4 nm holds only Ne 659.89528 and 667.82766
    true = (655.0, 0.010)
    frame, _, lam_line = render(NE_I, true, rng=np.random.default_rng(3))
    assert lam_line.size == 2
    with pytest.raises(CalibrationError) as err:
        solve_dispersion(frame, NE_I[:, 0], guess_nm=(655.2, 0.010), read_noise_e=READ_NOISE_E)
    msg = str(err.value)
    assert "found 2" in msg and "at least 5" in msg and "655.200-668.590 nm" in msg
    with pytest.raises(CalibrationError, match="at least 3"):
        solve_dispersion(frame, NE_I[:, 0], guess_nm=(655.2, 0.010), degree=1, read_noise_e=READ_NOISE_E)


def test_poor_solution_warns():
    # A curved axis fitted with a straight line: residuals of ~0.4 px, above 0.1 px.
    true = (582.0, 0.050, -2e-7)
    frame, _, _ = render(NE_I, true, rng=np.random.default_rng(5))
    with pytest.warns(CalibrationWarning, match="above 0.1 px"):
        sol = solve_dispersion(frame, NE_I[:, 0], guess_nm=nominal(true[:2], 0.4, 0.003), degree=1,
                               read_noise_e=READ_NOISE_E)
    assert sol.degree == 1 and sol.rms_nm > 0.005


def test_peak_centres_and_errors_are_honest():
    # 30 seeded frames of 40 isolated lines, 300-2e4 e peak: fitted centres scatter as their errors say.
    n_pixels, sigma = 2000, SIGMA_PX
    p = np.arange(n_pixels, dtype=float)[:, None]
    pulls, fwhm, amp_ratio = [], [], []
    for seed in range(30):
        rng = np.random.default_rng(seed)
        centre = np.arange(30.0, n_pixels - 30, 49) + rng.uniform(-0.5, 0.5, 40)
        peak = np.geomspace(300.0, 2e4, centre.size)
        frac = 0.5 * (erf((p + 0.5 - centre) / (sigma * np.sqrt(2.0)))
                      - erf((p - 0.5 - centre) / (sigma * np.sqrt(2.0))))
        mean_e = 20.0 + (frac * peak * sigma * np.sqrt(2.0 * np.pi)).sum(axis=1)
        frame = rng.poisson(mean_e) + rng.normal(0.0, READ_NOISE_E, n_pixels)
        peaks = find_lamp_peaks(frame, read_noise_e=READ_NOISE_E, snr_min=10.0, fwhm_guess_px=FWHM_PX)
        assert list(peaks.columns) == ["pixel", "pixel_err", "amplitude_e", "fwhm_px", "snr"]
        assert len(peaks) == centre.size
        pulls.append((peaks["pixel"].to_numpy() - centre) / peaks["pixel_err"].to_numpy())
        fwhm.append(peaks["fwhm_px"].to_numpy())
        amp_ratio.append(peaks["amplitude_e"].to_numpy() / peak)
    pulls = np.concatenate(pulls)
    # 1200 pulls: mean within 0.1 and standard deviation within 10 % of 1 (statistical spread ~2-4 %)
    assert abs(pulls.mean()) < 0.1
    assert 0.9 < pulls.std() < 1.1
    assert abs(np.mean(np.concatenate(fwhm)) / FWHM_PX - 1.0) < 0.01
    assert abs(np.mean(np.concatenate(amp_ratio)) - 1.0) < 0.01


def test_faint_lines_below_threshold_are_not_reported():
    rng = np.random.default_rng(4)
    p = np.arange(400, dtype=float)
    frac = 0.5 * (erf((p + 0.5 - 200.3) / (SIGMA_PX * np.sqrt(2.0)))
                  - erf((p - 0.5 - 200.3) / (SIGMA_PX * np.sqrt(2.0))))
    frame = rng.poisson(50.0 + 40.0 * frac) + rng.normal(0.0, READ_NOISE_E, p.size)  # SNR ~ 2
    assert len(find_lamp_peaks(frame, read_noise_e=READ_NOISE_E, snr_min=10.0)) == 0


@pytest.mark.parametrize("spectrum", [np.zeros((3, 100)), np.array([1.0, np.nan] * 20), np.ones(4)])
def test_bad_spectrum_is_an_input_error(spectrum):
    with pytest.raises(InputError, match="spectrum_e"):
        find_lamp_peaks(spectrum)


def test_bad_options_are_input_errors(ne_frame):
    frame, _, _ = ne_frame
    with pytest.raises(InputError, match="guess_nm"):
        solve_dispersion(frame, NE_I[:, 0], guess_nm=(582.0,))
    with pytest.raises(InputError, match="degree"):
        solve_dispersion(frame, NE_I[:, 0], guess_nm=TRUE_NM, degree=0)
    with pytest.raises(InputError, match="reference_intensity"):
        solve_dispersion(frame, NE_I[:, 0], guess_nm=TRUE_NM, reference_intensity=[1.0, 2.0])
