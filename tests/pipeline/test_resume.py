"""Durability and resume: per-item results, keys, kill at random points and resume without loss."""

import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
import tifffile

from lasecyto.exceptions import InputError
from lasecyto.pipeline import CellJob, run_experiment
from lasecyto.pipeline._store import FileHashes, item_key, run_lock

TABLES = ("lines", "tracks", "cell_frames", "cells")


def _run(manifest, out, **options):
    return run_experiment(manifest, out, show_progress=False, write_report=False, **options)


def _assert_same(a, b):
    for name in TABLES:
        pd.testing.assert_frame_equal(a.tables[name], b.tables[name], check_exact=True)


@pytest.fixture(scope="module")
def tiny_experiment(tmp_path_factory):
    """4 cells (A-01, A-02, B-01, B-02) of 16 frames: enough for the batch machinery."""
    from lasecyto.synth import write_fp_experiment

    return write_fp_experiment(tmp_path_factory.mktemp("tiny") / "experiment", n_dishes=2, cells_per_dish=2,
                               n_frames=16, perturbation_s=80.0, imaging_dish=False, rng=16)


@pytest.fixture()
def experiment(tiny_experiment, tmp_path):
    """A private copy of the tiny experiment (these tests change files)."""
    dst = tmp_path / "experiment"
    shutil.copytree(tiny_experiment.parent, dst)
    return dst / tiny_experiment.name


@pytest.fixture(scope="module")
def tiny_reference(tiny_experiment, tmp_path_factory):
    return _run(tiny_experiment, tmp_path_factory.mktemp("tiny_reference"))


@pytest.fixture(scope="module")
def reference(small_experiment, tmp_path_factory):
    return _run(small_experiment, tmp_path_factory.mktemp("reference"))


def _statuses(result):
    return {it["item"]: ("resumed" if it.get("resumed") else it["status"]) for it in result.record["items"]}


def test_resume_keeps_finished_items(experiment, tiny_reference, tmp_path):
    first = _run(experiment, tmp_path / "run")
    again = _run(experiment, tmp_path / "run", resume=True)
    assert again.record["n_resumed"] == 4
    assert again.record["engine"]["serial_items"] == 0
    _assert_same(tiny_reference, again)
    _assert_same(first, again)
    fresh = _run(experiment, tmp_path / "run")  # without --resume every item runs again
    assert fresh.record["n_resumed"] == 0


def test_resume_recomputes_a_changed_input(experiment, tiny_reference, tmp_path):
    _run(experiment, tmp_path / "run")
    stack = experiment.parent / "spectra" / "A-02.tif"
    data = tifffile.imread(stack)
    data[0, 0, 0] += 1  # one count in one pixel of the first frame
    tifffile.imwrite(stack, data, photometric="minisblack")
    again = _run(experiment, tmp_path / "run", resume=True)
    st = _statuses(again)
    assert st.pop("A-02") == "ok" and st.pop("lamp") == "ok"
    assert set(st.values()) == {"resumed"}
    cells = again.tables["cells"]
    assert list(cells["cell_id"]) == list(tiny_reference.tables["cells"]["cell_id"])


def test_resume_recomputes_everything_when_a_parameter_changes(experiment, tmp_path):
    _run(experiment, tmp_path / "run")
    text = experiment.read_text()
    experiment.write_text(text + "\n[parameters.tracks]\nmax_gap_frames = 4\n")
    again = _run(experiment, tmp_path / "run", resume=True)
    assert again.record["n_resumed"] == 0
    assert again.record["parameters"]["tracks"]["max_gap_frames"] == 4


def test_resume_retries_failed_items(experiment, tiny_reference, tmp_path):
    side = experiment.parent / "spectra" / "B-01.json"
    good = side.read_text()
    meta = json.loads(good)
    meta["frame_times_s"] = meta["frame_times_s"][:-1]
    side.write_text(json.dumps(meta))
    first = _run(experiment, tmp_path / "run")
    assert _statuses(first)["B-01"] == "failed" and first.n_failed == 1
    side.write_text(good)
    again = _run(experiment, tmp_path / "run", resume=True)
    st = _statuses(again)
    assert st["B-01"] == "ok" and again.n_failed == 0
    assert sum(v == "resumed" for v in st.values()) == 3
    _assert_same(tiny_reference, again)


def test_item_key_follows_what_the_item_depends_on(tiny_experiment, tmp_path):
    root = tiny_experiment.parent
    stack = tmp_path / "a.tif"
    shutil.copy(root / "spectra" / "A-01.tif", stack)
    side = str(root / "spectra" / "A-01.json")
    params = {"lines": {"snr_min": 5.0}}
    base = dict(cell_id="A-01", dish="A", condition="control", perturbation_s=150.0, stack=str(stack),
                sidecar=side, rows=None, gap_um=20.0, parameters=params)
    key = item_key(CellJob(**base), file_hash=FileHashes())
    assert key == item_key(CellJob(**base), file_hash=FileHashes())  # deterministic
    assert key != item_key(CellJob(**{**base, "parameters": {"lines": {"snr_min": 6.0}}}), file_hash=FileHashes())
    assert key != item_key(CellJob(**{**base, "perturbation_s": np.nan}), file_hash=FileHashes())
    assert key != item_key(CellJob(**{**base, "rows": (0, 1)}), file_hash=FileHashes())
    with open(stack, "ab") as fh:  # the file's content, not its name, enters the key
        fh.write(b"\0")
    assert key != item_key(CellJob(**base), file_hash=FileHashes())


def test_foreign_items_directory_is_never_removed(tiny_experiment, tmp_path):
    (tmp_path / "run" / "items").mkdir(parents=True)
    (tmp_path / "run" / "items" / "mine.txt").write_text("keep")
    with pytest.raises(InputError, match="did not write"):
        _run(tiny_experiment, tmp_path / "run")
    assert (tmp_path / "run" / "items" / "mine.txt").read_text() == "keep"


def test_run_lock(tmp_path):
    with run_lock(tmp_path):
        with pytest.raises(InputError, match="in use by another run"):
            with run_lock(tmp_path):
                pass
    # a lock left by a process that has ended is taken over
    ended = subprocess.Popen([sys.executable, "-c", "pass"])
    ended.wait()
    (tmp_path / ".lasecyto-run.lock").write_text(json.dumps({"pid": ended.pid, "host": os.uname().nodename}))
    with run_lock(tmp_path) as path:
        assert json.loads(path.read_text())["pid"] == os.getpid()
    assert not path.exists()


_CHILD = ("import sys\n"
          "from lasecyto.pipeline import run_experiment\n"
          "r = run_experiment(sys.argv[1], sys.argv[2], show_progress=False, write_report=False, resume=True)\n"
          "sys.exit(3 if r.n_failed else 0)\n")


def _finished_items(run_dir):
    return len(list((run_dir / "items").glob("*/item.json"))) if (run_dir / "items").is_dir() else 0


def kill_and_resume(manifest, run_dir, *, rng, kills):
    """Start the run in a child process, SIGKILL it at seeded random points, ``kills`` times.

    Each kill waits for a random number of further items to finish (0 up to all of
    them, which lands in the final assembly) and then a random fraction of a
    second, so kills fall before, inside and between item writes.  Returns the
    number of runs that were killed (a run that ends first is not counted).
    """
    killed = 0
    for _ in range(kills):
        before = _finished_items(run_dir)
        n_left = 6 - min(before, 6)
        target = before + int(rng.integers(0, n_left + 1))
        delay = float(rng.uniform(0.0, 0.3))
        proc = subprocess.Popen([sys.executable, "-c", _CHILD, str(manifest), str(run_dir)],
                                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 120
        while proc.poll() is None and _finished_items(run_dir) < target and time.monotonic() < deadline:
            time.sleep(0.005)
        time.sleep(delay)
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            killed += 1
        proc.wait()
    return killed


@pytest.mark.slow
def test_kill_at_random_points_and_resume(small_experiment, reference, tmp_path):
    # acceptance (issue 7): kill the run with SIGKILL at seeded random points, resume:
    # identical tables, no duplicated and no missing rows
    rng = np.random.default_rng(20260)
    run_dir = tmp_path / "run"
    killed = kill_and_resume(small_experiment, run_dir, rng=rng, kills=3)
    assert killed >= 1
    # Ctrl-C (SIGINT) on the command line: exit status 130 and a hint to resume
    before = _finished_items(run_dir)
    proc = subprocess.Popen([sys.executable, "-m", "lasecyto", "run", str(small_experiment), "--out", str(run_dir),
                             "--resume", "--quiet", "--no-report"], stderr=subprocess.PIPE, text=True)
    while proc.poll() is None and _finished_items(run_dir) <= before:
        time.sleep(0.005)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode in (0, 130)  # 0: the run had finished before the signal arrived
    if proc.returncode == 130:
        assert "--resume" in err
    final = _run(small_experiment, run_dir, resume=True)
    assert final.n_failed == 0
    _assert_same(reference, final)
    lines = final.tables["lines"]
    assert not lines.duplicated(["cell_id", "frame", "line_id"]).any()
    assert not final.tables["cell_frames"].duplicated(["cell_id", "frame"]).any()
    assert list(final.tables["cells"]["cell_id"]) == list(reference.tables["cells"]["cell_id"])
    assert not (run_dir / ".lasecyto-run.lock").exists()
    assert not list(run_dir.rglob(".*.tmp"))  # no temporary files of interrupted writes remain
