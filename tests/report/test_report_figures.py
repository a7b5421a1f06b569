import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

matplotlib = pytest.importorskip("matplotlib")
from matplotlib.figure import Figure  # noqa: E402

from lasecyto.report import plot_kymograph, plot_onsets, plot_trace, plot_traces_by_condition  # noqa: E402


def _lines(cell_id="c1", n_frames=12, n_modes=4):
    rows = []
    for f in range(n_frames):
        for m in range(n_modes):
            rows.append({"cell_id": cell_id, "frame": f, "time_s": 5.0 * f, "line_id": m,
                         "center_nm": 600.0 + 2.1 * m + 1e-3 * f, "area_counts": 1000.0 * (m + 1),
                         "fit_ok": not (f == 3 and m == 0), "track_id": m, "mode_family": m % 2})
    return pd.DataFrame(rows)


def _frames(cell_ids, n=30):
    rows = []
    for k, cid in enumerate(cell_ids):
        for f in range(n):
            rows.append({"cell_id": cid, "frame": f, "time_s": 10.0 * f, "lasing": f != 7,
                         "index_change": 1e-4 * k * (f > 10), "index_change_err": 1e-5})
    return pd.DataFrame(rows)


def _ax():
    return Figure().add_subplot()


def test_kymograph_draws_points_tracks_and_labels():
    lines = _lines()
    ax = plot_kymograph(lines, ax=_ax(), tracks=lines)
    (scatter,) = ax.collections
    assert scatter.get_offsets().shape == (12 * 4 - 1, 2)      # the failed fit is left out
    assert len(ax.lines) == 4                                   # one line per track
    colours = {tuple(line.get_color()) for line in ax.lines}
    assert len(colours) == 2                                    # one colour per mode family
    assert ax.get_xlabel() == "time (s)" and "nm" in ax.get_ylabel()
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["family 0", "family 1"]


def test_kymograph_without_tracks():
    ax = plot_kymograph(_lines(), ax=_ax())
    assert len(ax.collections) == 1 and not ax.lines


def test_trace_draws_band_and_markers():
    frames = _frames(["a", "b"])
    ax = plot_trace(frames[frames.cell_id == "b"], ax=_ax(), onset_s=105.0, perturbation_s=100.0, label="b")
    assert len(ax.collections) == 1                             # the 1-sigma band
    trace, pert, onset = ax.lines
    assert len(trace.get_xdata()) == 29                         # the non-lasing frame is left out
    assert pert.get_xdata()[0] == 100.0 and onset.get_xdata()[0] == 105.0
    assert ax.get_ylabel() == "index change"


def test_traces_by_condition_one_colour_per_condition():
    frames = _frames(["a", "b", "c"])
    cells = pd.DataFrame({"cell_id": ["a", "b", "c"], "condition": ["drug", "control", "drug"],
                          "perturbation_s": [100.0, 100.0, 100.0]})
    ax = plot_traces_by_condition(frames, cells, ax=_ax())
    traces = ax.lines[:3]
    assert len(ax.lines) == 6                       # three cells, two condition medians, the perturbation
    assert traces[0].get_color() == traces[2].get_color() != traces[1].get_color()
    medians = ax.lines[3:5]
    assert {m.get_color() for m in medians} == {traces[0].get_color(), traces[1].get_color()}
    assert medians[0].get_marker() != medians[1].get_marker()   # told apart without colour too
    assert medians[0].get_linestyle() != medians[1].get_linestyle()
    drug = medians[[m.get_color() for m in medians].index(traces[0].get_color())]
    b = frames[frames.cell_id == "b"]                            # drug: cells a (all zero) and c
    c = frames[frames.cell_id == "c"]
    y_a0 = 0.0 * c["index_change"].to_numpy()
    expected = np.median(np.vstack([y_a0, c["index_change"].to_numpy()]), axis=0)[c["lasing"].to_numpy()]
    np.testing.assert_allclose(drug.get_ydata(), expected)
    assert len(b) == 30
    assert sorted(t.get_text() for t in ax.get_legend().get_texts()) == [
        "control (median of 1 cell)", "drug (median of 2 cells)"]


def test_onsets_by_condition():
    cells = pd.DataFrame({"condition": ["drug", "drug", "control", "drug"],
                          "perturbation_s": [100.0, 100.0, 100.0, 100.0],
                          "onset_s": [130.0, 110.0, np.nan, 125.0], "onset_err_s": [5.0, 5.0, np.nan, 5.0]})
    ax = plot_onsets(cells, ax=_ax())
    (container,) = ax.containers
    x = container.lines[0].get_xdata()
    assert sorted(x) == [10.0, 25.0, 30.0]
    # tick labels from the bottom up: the first condition (control) is the top row
    assert [t.get_text() for t in ax.get_yticklabels()] == ["drug (3 of 3)", "control (0 of 1)"]
    empty = plot_onsets(cells.assign(onset_s=np.nan), ax=_ax())
    assert any(t.get_text() == "no onsets" for t in empty.texts)


def test_figures_use_no_pyplot_state():
    code = ("import sys, pandas as pd\n"
            "from matplotlib.figure import Figure\n"
            "from lasecyto.report import plot_trace\n"
            "ax = Figure().add_subplot()\n"
            "plot_trace(pd.DataFrame({'time_s': [0.0, 1.0], 'index_change': [0.0, 1.0]}), ax=ax)\n"
            "assert 'matplotlib.pyplot' not in sys.modules\n")
    subprocess.run([sys.executable, "-c", code], check=True)


def test_missing_matplotlib_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)     # makes `import matplotlib` fail
    with pytest.raises(ImportError, match=r"lasecyto\[report\]"):
        plot_onsets(pd.DataFrame({"condition": [], "perturbation_s": [], "onset_s": []}), ax=None)


def test_kymograph_marks_hops_and_names_bead_families():
    lines = _lines(n_modes=2).assign(polarization=lambda d: np.where(d.mode_family == 0, "TE", "TM"),
                                     radial_order=1, hop=lambda d: (d.frame == 6) & (d.track_id == 1))
    ax = plot_kymograph(lines, ax=_ax(), tracks=lines)
    hop_line = [ln for ln in ax.lines if ln.get_label().startswith("mode hop")]
    assert len(hop_line) == 1 and list(hop_line[0].get_xdata()) == [30.0]
    assert hop_line[0].get_label() == "mode hop (1)"
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["TE 1", "TM 1", "mode hop (1)"]


def test_threshold_curve_draws_points_fit_and_threshold():
    from lasecyto.report import plot_threshold_curves

    fits = pd.DataFrame({"track_id": [3], "center_nm": [612.5], "threshold_nj": [2.0], "threshold_err_nj": [0.1],
                         "beta": [0.01], "slope_counts_per_s_per_nj": [50.0], "pump_min_nj": [0.2],
                         "pump_max_nj": [20.0], "fit_ok": [True]})
    pump = np.geomspace(0.2, 20.0, 15)
    points = pd.DataFrame({"track_id": 3, "pump_energy_nj": pump, "output_counts_per_s": 10.0 * pump})
    ax = plot_threshold_curves(points, fits, ax=_ax())
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    dots, curve, threshold = ax.lines
    assert len(dots.get_xdata()) == 15
    assert threshold.get_xdata()[0] == 2.0
    x, y = curve.get_xdata(), curve.get_ydata()
    # far above threshold the S-curve is the straight line slope x (P - P_th) (rate-equation steady state)
    assert abs(y[-1] / (50.0 * (x[-1] - 2.0)) - 1) < 0.02
    assert "2 \u00b1 0.1 nJ" in ax.get_legend().get_texts()[0].get_text()
