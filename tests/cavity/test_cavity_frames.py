import numpy as np
import pandas as pd
import pytest

from lasecyto import tables
from lasecyto.cavity import assign_mode_families, cell_frames
from lasecyto.exceptions import InputError
from lasecyto.tracks import link_lines

_LINES_COLS = [c.name for c in tables.SCHEMAS["lines"]]


def _rows_to_tables(frame, center_nm, err_nm, area, track_id=None, cell_id="c0", dt_s=10.0):
    frame = np.asarray(frame, dtype=np.int64)
    n = frame.size
    df = pd.DataFrame({
        "cell_id": [cell_id] * n, "frame": frame, "time_s": dt_s * frame, "line_id": np.zeros(n, int),
        "center_px": np.zeros(n), "center_err_px": np.asarray(err_nm) / 0.05, "center_nm": center_nm,
        "center_err_nm": err_nm, "fwhm_px": np.full(n, 2.5), "fwhm_nm": np.full(n, 0.12),
        "area_counts": area, "area_err_counts": np.sqrt(area), "amplitude_counts": np.asarray(area) / 3,
        "background_counts": np.full(n, 20.0), "snr": np.full(n, 100.0), "chi2_red": np.ones(n),
        "lasing": np.ones(n, bool), "saturated": np.zeros(n, bool), "fit_ok": np.ones(n, bool),
        "fit_message": [""] * n,
    })
    if track_id is not None:
        df["track_id"] = np.asarray(track_id, dtype=np.int64)
        df["mode_family"] = -1
        return tables.validate(df, "tracks")
    return tables.validate(df, "lines")


def _uniform_shift_tracks(shift_nm, *, n_frames=30, shift_from=10, late_track=False):
    # non-dispersive n = n_g = 1.395, L = 15 um, lines near 515 nm: two families (phases 0 and 0.1)
    nl = 1.395 * 15.0
    f, lam, tid, area = [], [], [], []
    t = 0
    for k, p in enumerate((1.0, 0.5)):
        for q in range(int(2e3 * nl / 532) + 1, int(2e3 * nl / 498) + 1):
            lam0 = 2e3 * nl / (q + 0.1 * k)
            first = 15 if (late_track and k == 0 and q == int(2e3 * nl / 532) + 2) else 0
            for fr in range(first, n_frames):
                f.append(fr)
                scale = 1 + shift_nm / 515.0 if fr >= shift_from else 1.0
                lam.append(lam0 * scale)
                tid.append(t)
                area.append(1e4 * p)
            t += 1
    f, lam = np.array(f), np.array(lam)
    return _rows_to_tables(f, lam, np.full(f.size, 0.002), np.array(area), track_id=tid)


def test_uniform_shift_gives_section_4_index_change():
    # check-values.md section 4 (index change -> shift, computed there): lambda = 515 nm, dn = 1e-3,
    # n_g = 1.395 -> 0.36918 nm.  A uniform 0.36918 nm shift at 515 nm with a full 15 um gap must give
    # index_change = 1e-3 within 1 %.
    tr = assign_mode_families(_uniform_shift_tracks(0.36918))
    lines = tr[_LINES_COLS]
    frames = np.arange(32)  # frames 30, 31: pump dropouts, no lines
    out = cell_frames(lines, tr, frame=frames, time_s=10.0 * frames, baseline_end_s=100.0,
                      gap_um=15.0, cell_id="c0")
    tables.validate(out, "cell_frames")
    assert len(out) == 32 and out["cell_id"].eq("c0").all()
    after = out["frame"].between(10, 29)
    assert np.allclose(out.loc[after, "relative_shift"], 0.36918 / 515.0, rtol=1e-9)
    assert np.allclose(out.loc[~after & (out["frame"] < 10), "relative_shift"], 0.0, atol=1e-12)
    assert np.allclose(out.loc[after, "index_change"], 1e-3, rtol=0.01)
    # baseline comb: n_g L = 1.395 * 15 um = 20.925 um, FSR = lambda^2 / (2 n_g L) at the family-0 mean
    base = out["frame"] < 10
    assert np.allclose(out.loc[base, "optical_length_um"], 20.925, rtol=1e-9)
    assert np.allclose(out.loc[after, "delta_optical_length_um"], 20.925 * 0.36918 / 515.0, rtol=1e-6)
    assert (out.loc[after, "index_change_err"] > 0).all()
    # dropout frames: counts zero, cavity quantities NaN
    drop = out["frame"] >= 30
    assert (out.loc[drop, "n_lines"] == 0).all() and not out.loc[drop, "lasing"].any()
    assert out.loc[drop, ["optical_length_um", "relative_shift", "index_change"]].isna().all().all()
    assert (out.loc[~drop, "n_lines"] == tr.groupby("frame").size().to_numpy()).all()
    # no gap given -> no index change
    no_gap = cell_frames(lines, tr, frame=frames, time_s=10.0 * frames, baseline_end_s=100.0, cell_id="c0")
    assert no_gap["index_change"].isna().all() and np.isfinite(no_gap["delta_optical_length_um"][:30]).all()


def test_late_track_is_tied_in():
    tr = assign_mode_families(_uniform_shift_tracks(0.2, late_track=True))
    frames = np.arange(30)
    out = cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=100.0,
                      gap_um=15.0, cell_id="c0")
    n_tracks = tr["track_id"].nunique()
    assert (out.loc[out["frame"] >= 15, "n_shift_tracks"] == n_tracks).all()
    assert (out.loc[out["frame"] < 15, "n_shift_tracks"] == n_tracks - 1).all()
    assert np.allclose(out.loc[out["frame"] >= 10, "relative_shift"], 0.2 / 515.0, rtol=1e-9)


def test_cell_frames_input_errors():
    tr = _uniform_shift_tracks(0.1)
    frames = np.arange(30)
    with pytest.raises(InputError, match="comb_index"):
        cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=100.0,
                    cell_id="c0")
    tr = assign_mode_families(tr)
    with pytest.raises(InputError, match="frames not in the acquisition"):
        cell_frames(tr[_LINES_COLS], tr, frame=frames[:20], time_s=10.0 * frames[:20],
                    baseline_end_s=100.0, cell_id="c0")
    with pytest.raises(InputError, match="gap_um"):
        cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=100.0,
                    gap_um=-1.0, cell_id="c0")


def _synthetic_cell(rng, *, gap_um=20.0, n_frames=90, dt_s=10.0, amplitude=1e-3, t_on_s=300.0,
                    tau_s=80.0, err_nm=0.005):
    """Seeded responding cell: dispersive medium, transverse ladder, gain-window births and deaths,
    pump dropouts, Gaussian centre noise of known per-line sigma."""
    rng = np.random.default_rng(rng)
    b = 0.003029                          # Cauchy n = a + b / lambda_um^2: n_g - n = 2 b / lambda^2
    a = 1.35968 + rng.normal(0, 0.003)    # ~ water + 0.035 (check-values.md section 4 dispersive trap)
    zeta = rng.uniform(0.05, 0.12)
    powers = (1.0, 0.6, 0.35, 0.2)
    t = dt_s * np.arange(n_frames)
    dn = np.where(t > t_on_s, amplitude * (1 - np.exp(-(t - t_on_s) / tau_s)), 0.0)
    dropout = rng.choice(n_frames, 2, replace=False)
    fr, lam_meas, err, area = [], [], [], []
    q_all = np.arange(80, 100)
    for j in range(n_frames):
        if j in dropout:
            continue
        for k, p in enumerate(powers):
            lam = 2 * gap_um * (a + dn[j]) / (q_all + k * zeta)  # um
            for _ in range(6):  # fixed point of 2 n(lambda) L = (q + k zeta) lambda
                lam = 2 * gap_um * (a + b / lam**2 + dn[j]) / (q_all + k * zeta)
            lam_nm = lam * 1e3
            on = (lam_nm > 600.0) & (lam_nm < 630.0)
            e = err_nm * rng.uniform(0.7, 1.5, on.sum())
            fr += [j] * int(on.sum())
            lam_meas += list(lam_nm[on] + rng.normal(0, 1, on.sum()) * e)
            err += list(e)
            area += [1e4 * p] * int(on.sum())
    lines = _rows_to_tables(fr, np.array(lam_meas), np.array(err), np.array(area), dt_s=dt_s)
    return lines, t, dn


def test_end_to_end_coverage_of_index_change():
    # |index_change - truth| < 2 sigma in ~95 % of frames (Gaussian 2-sigma: 95.4 %); 6 cells x ~88 frames
    inside, total = 0, 0
    for seed in range(6):
        lines, t, dn = _synthetic_cell(100 + seed)
        tr = assign_mode_families(link_lines(lines))
        out = cell_frames(lines, tr, frame=np.arange(t.size), time_s=t, baseline_end_s=300.0,
                          gap_um=20.0, cell_id="c0")
        ok = np.isfinite(out["index_change"].to_numpy())
        assert ok.sum() == t.size - 2  # every frame but the two dropouts
        z = (out["index_change"].to_numpy() - dn)[ok] / out["index_change_err"].to_numpy()[ok]
        inside += int(np.sum(np.abs(z) < 2))
        total += int(ok.sum())
        # the comb gives n_g L of the medium: (a + 3 b / lambda^2) L at ~615 nm, within 0.5 %
        base_len = np.nanmedian(out["optical_length_um"][t < 300])
        assert base_len == pytest.approx((1.35968 + 3 * 0.003029 / 0.615**2) * 20.0, rel=5e-3)
    assert 0.92 <= inside / total <= 0.99


def _partial_fill_tracks(dn_cell, *, n_frames=20, shift_from=10):
    # check-values.md section 4, partial fill: t = 8 um of cell (n_c = 1.37) in a 15 um gap of medium
    # n_m = 1.335 (non-dispersive): n L_eff = 1.335 x 7 + 1.37 x 8 = 20.305 um
    nl0 = 1.335 * 7.0 + 1.37 * 8.0
    f, lam, tid = [], [], []
    q_all = np.arange(int(2e3 * nl0 / 532) + 1, int(2e3 * nl0 / 498) + 1)
    for t, q in enumerate(q_all):
        for fr in range(n_frames):
            nl = nl0 + (8.0 * dn_cell if fr >= shift_from else 0.0)
            f.append(fr)
            lam.append(2e3 * nl / q)
            tid.append(t)
    f = np.array(f)
    return _rows_to_tables(f, np.array(lam), np.full(f.size, 0.001), np.full(f.size, 1e4), track_id=tid)


def test_partly_filled_gap_section_4_numbers():
    # check-values.md section 4 (computed there): n L_eff = 20.305 um; d lambda = 0.2029 nm at 515 nm per
    # delta n_c = 1e-3 (d lambda / d n_c = lambda t / (n L_eff)); the cell's index change must come back
    # as 1e-3 (within 0.5 %: the shift varies as lambda across the comb)
    nl_eff = 1.335 * 7.0 + 1.37 * 8.0
    assert nl_eff == pytest.approx(20.305, abs=1e-9)
    assert 515.0 * 8.0 * 1e-3 / nl_eff == pytest.approx(0.2029, abs=5e-5)
    tr = assign_mode_families(_partial_fill_tracks(1e-3))
    frames = np.arange(20)
    out = cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=95.0,
                      gap_um=15.0, cell_thickness_um=8.0, cell_id="c0")
    after = out["frame"] >= 10
    assert np.allclose(out.loc[~after, "optical_length_um"], 20.305, rtol=1e-9)
    assert np.allclose(out.loc[after, "index_change"], 1e-3, rtol=5e-3)
    assert np.allclose(out.loc[after, "delta_optical_length_um"], 8e-3, rtol=5e-3)
    # the same data read as a filled gap would give t / L = 8 / 15 of it
    full = cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=95.0,
                       gap_um=15.0, cell_id="c0")
    assert np.allclose(full.loc[after, "index_change"], 1e-3 * 8 / 15, rtol=5e-3)
    # thickness without a gap works (Delta(n L) / t needs no L); a cell thicker than the gap does not
    only_t = cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=95.0,
                         cell_thickness_um=8.0, cell_id="c0")
    assert np.allclose(only_t["index_change"], out["index_change"], equal_nan=True)
    assert only_t["lens_focal_length_um"].isna().all()
    with pytest.raises(InputError, match="thicker than the mirror gap"):
        cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=95.0,
                    gap_um=15.0, cell_thickness_um=16.0, cell_id="c0")


def test_ladder_phase_length_and_dispersion_per_frame():
    # exact dispersive resonances of lasecyto.synth (water + 0.035, L = 20 um, zeta = 0.08) shifted by an
    # index change of 2e-3 from frame 10: per frame the Gouy fraction, the cell-lens focal length
    # L / sin^2(pi zeta) (check-values.md section 5), the phase optical length n L and the index change
    from lasecyto.cavity import assign_mode_numbers
    from lasecyto.cavity.media import get_medium
    from lasecyto.synth import fp_mode_wavelengths

    gap, zeta, n_frames = 20.0, 0.08, 16
    rows = []
    base = fp_mode_wavelengths(gap, index_offset=0.035, zeta=zeta, window_nm=(590.0, 640.0))
    power = np.array([1.0, 0.6, 0.35, 0.2])
    for fr in range(n_frames):
        dn = 2e-3 if fr >= 10 else 0.0
        modes = fp_mode_wavelengths(gap, index_offset=0.035 + dn, zeta=zeta, window_nm=(580.0, 650.0))
        for t, (k, q) in enumerate(zip(base["k"], base["q"])):
            j = np.flatnonzero((modes["k"] == k) & (modes["q"] == q))[0]
            rows.append((fr, modes["lambda_vac_nm"][j], 1e4 * power[k], t))
    fr, lam, area, tid = (np.array(v) for v in zip(*rows))
    tr = _rows_to_tables(fr, lam, np.full(fr.size, 5e-4), area, track_id=tid)
    tr, ident = assign_mode_numbers(assign_mode_families(tr), medium="water-daimon", gap_um=gap)
    frames = np.arange(n_frames)
    out = cell_frames(tr[_LINES_COLS], tr, frame=frames, time_s=10.0 * frames, baseline_end_s=95.0,
                      gap_um=gap, cell_id="c0", identity=ident)
    assert np.allclose(out["gouy_fraction"], zeta, atol=2e-5)
    assert np.allclose(out["lens_focal_length_um"], gap / np.sin(np.pi * zeta) ** 2, rtol=1e-3)
    assert (out["gouy_fraction_err"] > 0).all() and (out["lens_focal_length_err_um"] > 0).all()
    water = get_medium("water-daimon")
    ref = out["reference_nm"].iloc[0]
    true_nl = gap * (water.n(ref) + 0.035 + np.where(frames >= 10, 2e-3, 0.0))
    assert np.allclose(out["phase_optical_length_um"], true_nl, atol=2e-5)
    # dispersion-scaled shifts: the index change comes back to 1e-4 of 2e-3 (second-order terms remain)
    assert np.allclose(out.loc[frames >= 10, "index_change"], 2e-3, rtol=1e-4)
    assert np.allclose(out.loc[frames < 10, "index_change"], 0.0, atol=1e-9)
