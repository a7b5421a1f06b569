"""Progress: a callback for library users, a bar on standard error only when asked or on a terminal; loggers."""

import subprocess
import sys

import pytest

from lasecyto.cli import main
from lasecyto.pipeline import ItemProgress, run_experiment


def test_progress_callback_sees_every_item(small_experiment, tmp_path, capsys):
    seen = []
    run_experiment(small_experiment, tmp_path / "run", show_progress=None, write_report=False,
                   progress=seen.append)
    assert all(isinstance(p, ItemProgress) for p in seen)
    assert [p.done for p in seen] == [1, 2, 3, 4, 5, 6]
    assert {p.total for p in seen} == {6}
    assert {p.status for p in seen} == {"ok"}
    assert [p.item for p in seen] == ["A-01", "A-02", "A-03", "B-01", "B-02", "B-03"]
    assert all(p.seconds > 0 for p in seen)
    assert all(b.elapsed_s >= a.elapsed_s for a, b in zip(seen, seen[1:]))
    # standard error is not a terminal here: no bar, no output at all
    assert capsys.readouterr().err == ""

    seen.clear()
    run_experiment(small_experiment, tmp_path / "run", show_progress=False, write_report=False,
                   resume=True, progress=seen.append)
    assert [p.status for p in seen] == ["resumed"] * 6


def test_bar_on_request(small_experiment, tmp_path, capsys):
    run_experiment(small_experiment, tmp_path / "run", show_progress=True, write_report=False)
    err = capsys.readouterr().err
    assert "6/6" in err and "item/s" in err  # items done, rate (and time left) on standard error


def test_quiet_prints_nothing(small_experiment, tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["run", str(small_experiment), "--out", str(out), "--quiet", "--no-report", "--no-csv"]) == 0
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err == ""
    # --no-csv: Parquet only
    written = {p.name for p in (out / "tables").iterdir()}
    assert {"cell_frames.parquet", "cells.parquet", "lines.parquet", "tracks.parquet"} <= written
    assert not [name for name in written if not name.endswith(".parquet")]


@pytest.mark.slow
def test_no_logging_handler_is_installed_at_import():
    # every module of the package is imported in a fresh interpreter; none may install a handler
    code = (
        "import importlib, logging, pkgutil, lasecyto\n"
        "for m in pkgutil.walk_packages(lasecyto.__path__, 'lasecyto.'):\n"
        "    if not m.name.endswith('__main__'):\n"
        "        importlib.import_module(m.name)\n"
        "loggers = [logging.getLogger()] + [logging.getLogger(n) for n in logging.root.manager.loggerDict\n"
        "                                  if n.startswith('lasecyto')]\n"
        "bad = [(l.name, l.handlers) for l in loggers if l.handlers]\n"
        "assert not bad, bad\n"
        "assert logging.getLogger('lasecyto.pipeline').handlers == []\n"
        "print(len(loggers))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert int(out.stdout) >= 3  # root, lasecyto.pipeline and its engine and store loggers
