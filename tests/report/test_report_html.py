import base64
import json
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

pytest.importorskip("matplotlib")

from lasecyto import tables  # noqa: E402
from lasecyto.features import summarize_cell  # noqa: E402
from lasecyto.report import write_html_report  # noqa: E402

N_FRAMES = 40
DT_S = 15.0
PERT_S = 292.5
CELLS = [("cell-a1", "dish-1", "drug", 1.5e-3), ("cell-a2", "dish-1", "drug", 0.0),
         ("cell-b1", "dish-2", "control", 0.0), ("cell-b2", "dish-2", "control & <vehicle>", 0.0)]


def _make_tables(seed=0):
    rng = np.random.default_rng(seed)
    t = np.arange(N_FRAMES) * DT_S
    lines, frames, cells = [], [], []
    for cid, dish, cond, amp in CELLS:
        q = np.where(t >= PERT_S, amp * (1 - np.exp(-(t - PERT_S) / 30.0)), 0.0) + rng.normal(0, 1e-5, N_FRAMES)
        cf = pd.DataFrame({
            "cell_id": cid, "frame": np.arange(N_FRAMES), "time_s": t, "n_lines": 3, "n_lasing": 3,
            "total_area_counts": 3e4, "lasing": True, "fsr_nm": 2.0, "optical_length_um": 70.0,
            "optical_length_err_um": 0.01, "relative_shift": q / 1.37, "relative_shift_err": 1e-5 / 1.37,
            "delta_optical_length_um": 8 * q, "delta_optical_length_err_um": 8e-5,
            "index_change": q, "index_change_err": 1e-5})
        frames.append(cf)
        res = summarize_cell(cf, perturbation_s=PERT_S, n_tracks=3)
        cells.append({"cell_id": cid, "dish": dish, "condition": cond, "perturbation_s": PERT_S, **res})
        for f in range(N_FRAMES):
            for m in range(3):
                lines.append({
                    "cell_id": cid, "frame": f, "time_s": t[f], "line_id": m, "center_px": 100.0 + 50 * m,
                    "center_err_px": 0.01, "center_nm": 610.0 + 2.0 * m + 0.6 * q[f], "center_err_nm": 2e-4,
                    "fwhm_px": 2.0, "fwhm_nm": 0.05, "area_counts": 1e4 * (m + 1), "area_err_counts": 100.0,
                    "amplitude_counts": 3e3, "background_counts": 10.0, "snr": 100.0, "chi2_red": 1.0,
                    "lasing": True, "saturated": False, "fit_ok": True, "fit_message": "",
                    "track_id": m, "mode_family": 0})
    tracks = pd.DataFrame(lines)
    return {"lines": tables.validate(tracks.drop(columns=["track_id", "mode_family"]), "lines"),
            "tracks": tables.validate(tracks, "tracks"),
            "cell_frames": tables.validate(pd.concat(frames, ignore_index=True), "cell_frames"),
            "cells": tables.validate(pd.DataFrame(cells), "cells")}


def _run_dir(tmp_path, tabs, record):
    (tmp_path / "tables").mkdir()
    for name, df in tabs.items():
        df.to_parquet(tmp_path / "tables" / f"{name}.parquet")
    (tmp_path / "run_record.json").write_text(json.dumps(record))
    return tmp_path


_RECORD = {
    "experiment": {"name": "demo <dish> run", "synthetic": True, "description": "Two dishes, two conditions."},
    "items": [{"item": "cell-a1", "status": "ok", "error": ""},
              {"item": "cell-x9", "status": "failed", "error": "no lasing lines in any frame"}],
}

_VOID = {"meta", "img", "br", "hr", "link", "input"}


class _Checker(HTMLParser):
    """Balanced tags and the list of attribute values that could load something."""

    def __init__(self):
        super().__init__()
        self.stack, self.sources, self.tags = [], [], set()

    def handle_starttag(self, tag, attrs):
        self.tags.add(tag)
        self.sources += [v for k, v in attrs if k in ("src", "href")]
        if tag not in _VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, f"unbalanced </{tag}>"
        self.stack.pop()


def test_report_is_self_contained_html(tmp_path):
    tabs = _make_tables()
    assert bool(tabs["cells"]["changed"].iloc[0]) and not tabs["cells"]["changed"].iloc[1:].any()
    run_dir = _run_dir(tmp_path, tabs, _RECORD)
    path = write_html_report(run_dir)
    assert path == run_dir / "report.html"
    text = path.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    checker = _Checker()
    checker.feed(text)
    checker.close()
    assert checker.stack == []
    # one inline script, no external one; no URL outside the inline images and in-page links
    assert text.lower().count("<script") == 1 and "<script>" in text
    outside_images = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text).lower()
    assert not re.search(r"https?:|//[a-z]|url\(|@import|@font-face", outside_images)
    links = [s for s in checker.sources if not s.startswith("data:")]
    assert links and all(s.startswith("#") for s in links)
    ids = set(re.findall(r' id="([^"]+)"', text))
    assert {s[1:] for s in links} <= ids                                    # every in-page link has a target
    # every image is an inline PNG: traces by condition, onsets, and one panel per cell
    images = [s for s in checker.sources if s.startswith("data:")]
    assert len(images) == 2 + len(CELLS)
    for src in images:
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    # content
    assert "Synthetic data" in text
    assert "demo &lt;dish&gt; run" in text and "control &amp; &lt;vehicle&gt;" in text
    table = text[text.index('<table id="cell-table">'):]
    table = table[: table.index("</table>")]
    for i, (cid, *_rest) in enumerate(CELLS):
        assert f'<a href="#cell-{i}">{cid}</a>' in table
    assert table.count("<tr") == 1 + len(CELLS)
    assert table.count('data-flagged="1"') == 1
    assert "cell-x9" in text and "no lasing lines in any frame" in text
    # drug: 1 of 2 flagged; Wilson 95 % score interval of 1/2: 0.5 +- 1.96 sqrt(0.25/2 + 1.96^2/16) / (1 + 1.96^2/2)
    # = 0.095 - 0.905 (Wilson 1927, J. Am. Stat. Assoc. 22, 209; the formula is checked in tests/features)
    assert "<td>1</td><td>0.50</td><td>0.09 &ndash; 0.91</td>" in text
    # panels grouped by condition (sorted: no control named), the flagged cell first in its group
    groups = [g for g in re.findall(r"<summary>([^<]+)</summary>", text) if " cells, " in g]
    assert groups == ["control: 1 cells, 0 flagged", "control &amp; &lt;vehicle&gt;: 1 cells, 0 flagged",
                      "drug: 2 cells, 1 flagged"]
    panels = re.findall(r'<section class="cell" id="(cell-\d+)"', text)
    assert sorted(panels) == [f"cell-{i}" for i in range(len(CELLS))]
    assert panels.index("cell-0") < panels.index("cell-1")
    assert [p.name for p in run_dir.iterdir() if p.name.endswith(".tmp")] == []


def test_report_takes_tables_and_tolerates_a_sparse_record(tmp_path):
    tabs = _make_tables(seed=1)
    (tmp_path / "run_record.json").write_text(json.dumps({"items": []}))
    path = write_html_report(tmp_path, tables={"cells": tabs["cells"], "cell_frames": tabs["cell_frames"]},
                             title="My run")
    text = path.read_text(encoding="utf-8")
    assert "<title>My run</title>" in text and "Synthetic data" not in text
    assert "No failed items" in text
    # without lines or tracks: 2 experiment figures + one panel (the trace) per cell
    assert text.count('<img src="data:image/png;base64,') == 2 + 4
    # a second write replaces the report
    assert write_html_report(tmp_path, tables={"cells": tabs["cells"]}).read_text().count("<img") == 1


def test_report_without_any_table_or_record(tmp_path):
    text = write_html_report(tmp_path).read_text(encoding="utf-8")
    assert "No cells table" in text and "<img" not in text


def test_report_rejects_a_broken_record(tmp_path):
    from lasecyto.exceptions import InputError

    (tmp_path / "run_record.json").write_text("{not json")
    with pytest.raises(InputError, match="run_record.json"):
        write_html_report(tmp_path)
    assert not (tmp_path / "report.html").exists()


def test_tables_are_read_one_cell_at_a_time(tmp_path):
    """Row groups holding several cells, and a cell spread over two groups, give each cell's rows whole."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from lasecyto.report._read import RunTables

    frames = _make_tables()["cell_frames"]
    order = frames.sort_values(["cell_id", "frame"], kind="stable").reset_index(drop=True)
    (tmp_path / "tables").mkdir()
    # 160 rows in groups of 50: groups span cells and cells span groups
    pq.write_table(pa.Table.from_pandas(order, preserve_index=False), tmp_path / "tables" / "cell_frames.parquet",
                   row_group_size=50)
    run = RunTables(tmp_path)
    for cid, *_rest in CELLS:
        got = run.cell("cell_frames", cid, ["time_s", "index_change", "no_such_column"])
        want = order[order.cell_id == cid][["cell_id", "time_s", "index_change"]].reset_index(drop=True)
        pd.testing.assert_frame_equal(got.reset_index(drop=True), want)
    assert run.cell("cell_frames", "cell-zz", ["time_s"]) is None
    assert run.whole("cells") is None
    with pytest.raises(Exception, match="read per cell"):
        run.whole("cell_frames")


def test_pump_series_report_shows_thresholds_beside_the_cautions(pump_run):
    from lasecyto.safety import CAUTIONS

    text = write_html_report(pump_run.out_dir).read_text(encoding="utf-8")
    section = text[text.index('<section id="thresholds">'):]
    section = section[: section.index("</section>")]
    # the cautions come first in the section that shows pump energies and fluences
    assert section.index('class="caution"') < section.index("threshold fluence")
    assert "ANSI Z136.1" in section and "IEC 60825-1" in section and "laser safety officer" in section
    assert CAUTIONS.splitlines()[0].strip() in text
    n_fits = len(pump_run.tables["thresholds"])
    assert section.count("<tr>") >= n_fits
    # each cell's panel holds the kymograph against pump energy and the S-curves: one image per cell
    n_cells = len(pump_run.tables["cells"])
    assert text.count('<section class="cell"') == n_cells
    assert text.count('alt="panel of cell') == n_cells
    assert "not changed" not in text.split('<section id="cells">')[1]
