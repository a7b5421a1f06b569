"""One cell's panel, drawn from the session runs of the three kinds of experiment (no PNG is written)."""

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from lasecyto.report._panels import (FRAME_COLUMNS, LINE_COLUMNS, PATTERN_COLUMNS, TRACK_COLUMNS,  # noqa: E402
                                     CellData, PatternImages, draw_cell_panel)
from lasecyto.report._read import RunTables, read_record  # noqa: E402

pytestmark = pytest.mark.slow


def _panel(run_result, *, images=False):
    run = RunTables(run_result.out_dir)
    record = read_record(run_result.out_dir)
    cells = run.whole("cells")
    cell = cells.sort_values("changed", ascending=False, kind="stable").iloc[0].to_dict()
    cid = cell["cell_id"]
    data = CellData(lines=run.cell("lines", cid, LINE_COLUMNS), tracks=run.cell("tracks", cid, TRACK_COLUMNS),
                    frames=run.cell("cell_frames", cid, FRAME_COLUMNS),
                    patterns=run.cell("patterns", cid, PATTERN_COLUMNS))
    thresholds = run.whole("thresholds")
    fits = None if thresholds is None else thresholds[thresholds.cell_id == cid].reset_index(drop=True)
    pictures = None
    if images:
        from lasecyto.io import read_manifest

        pictures = PatternImages(read_manifest(record["experiment"]["manifest"]))
    try:
        fig, notes = draw_cell_panel(data, cell, kind=record["experiment"]["kind"],
                                     resonator=record["experiment"]["resonator"], fits=fits, images=pictures)
    finally:
        if pictures is not None:
            pictures.close()
    return fig, notes, cell


def _labelled(fig):
    """The panel's plots in order, left to right (the colour bar, added last, left out)."""
    return [ax for ax in fig.get_axes() if ax.get_ylabel() and ax.get_ylabel() != "line area (counts)"]


def _has_colourbar(fig):
    return any(ax.get_ylabel() == "line area (counts)" for ax in fig.get_axes())


def test_fabry_perot_panel_has_kymograph_trace_and_patterns(fp_run):
    fig, notes, cell = _panel(fp_run, images=True)
    assert notes == [] and bool(cell["changed"])
    kymo, trace = _labelled(fig)
    assert kymo.get_ylabel() == "vacuum wavelength (nm)" and trace.get_ylabel() == "index change"
    assert _has_colourbar(fig)
    lines = [ln for ln in trace.get_lines() if ln.get_label() in ("onset", "perturbation")]
    assert sorted(ln.get_label() for ln in lines) == ["onset", "perturbation"]
    onset = next(ln for ln in lines if ln.get_label() == "onset")
    assert onset.get_xdata()[0] == pytest.approx(cell["onset_s"])
    (strip,) = [ax for ax in fig.get_axes() if ax.get_images()]
    image = strip.get_images()[0].get_array()
    assert image.shape[1] > 6 * image.shape[0]                  # 8 patches side by side
    assert len(strip.texts) == 8 and strip.texts[0].get_text().startswith("0 s")


def test_bead_panel_has_diameter_and_medium_index(sphere_run):
    fig, notes, _cell = _panel(sphere_run)
    labels = [ax.get_ylabel() for ax in _labelled(fig)]
    assert labels == ["vacuum wavelength (nm)", "diameter (\u00b5m)", "medium index"]
    kymo = _labelled(fig)[0]
    families = [t.get_text() for t in kymo.get_legend().get_texts()]
    assert families and all(f.split()[0] in ("TE", "TM") or f.startswith("mode hop") for f in families)


def test_pump_panel_has_log_log_s_curves(pump_run):
    fig, notes, cell = _panel(pump_run)
    kymo, curves = _labelled(fig)
    assert kymo.get_xlabel() == "pump energy (nJ)" and kymo.get_xscale() == "log"
    assert curves.get_xscale() == "log" and curves.get_yscale() == "log"
    thresholds = sorted(ln.get_xdata()[0] for ln in curves.get_lines() if ln.get_linestyle() == ":")
    fits = pump_run.tables["thresholds"]
    want = sorted(fits[(fits.cell_id == cell["cell_id"]) & np.isfinite(fits.threshold_nj)].threshold_nj)
    np.testing.assert_allclose(thresholds, want)
