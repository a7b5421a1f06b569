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
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["mode family 0", "mode family 1"]


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
    assert len(ax.lines) == 4                                   # three cells + the perturbation line
    assert traces[0].get_color() == traces[2].get_color() != traces[1].get_color()
    assert sorted(t.get_text() for t in ax.get_legend().get_texts()) == ["control", "drug"]


def test_onsets_by_condition():
    cells = pd.DataFrame({"condition": ["drug", "drug", "control", "drug"],
                          "perturbation_s": [100.0, 100.0, 100.0, 100.0],
                          "onset_s": [130.0, 110.0, np.nan, 125.0], "onset_err_s": [5.0, 5.0, np.nan, 5.0]})
    ax = plot_onsets(cells, ax=_ax())
    (container,) = ax.containers
    x = container.lines[0].get_xdata()
    assert sorted(x) == [10.0, 25.0, 30.0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["control (0 of 1)", "drug (3 of 3)"]
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
