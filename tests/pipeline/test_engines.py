"""Engines: the same tables, bit for bit, whatever the engine, the worker count and the completion order."""

import filecmp

import pandas as pd
import pytest

from lasecyto.exceptions import InputError
from lasecyto.pipeline import DaskEngine, Engine, LocalEngine, make_engine, run_experiment
from lasecyto.pipeline._engines import Outcome

TABLES = ("lines", "tracks", "cell_frames", "cells")


def _run(manifest, out, **options):
    return run_experiment(manifest, out, show_progress=False, write_report=False, **options)


def _assert_same_tables(a, b):
    assert list(a.tables) == list(b.tables)
    for name in a.tables:
        pd.testing.assert_frame_equal(a.tables[name], b.tables[name], check_exact=True)
        # the files themselves: CSV byte for byte
        assert filecmp.cmp(a.out_dir / "tables" / f"{name}.csv", b.out_dir / "tables" / f"{name}.csv",
                           shallow=False), name


@pytest.fixture(scope="module")
def serial_run(small_experiment, tmp_path_factory):
    return _run(small_experiment, tmp_path_factory.mktemp("serial"), workers=1)


class _Reversed(Engine):
    """Runs the items in reverse order in this process (completion order != manifest order)."""

    kind = "reversed"

    def run(self, func, jobs):
        for k in reversed(range(len(jobs))):
            yield Outcome(k, result=func(jobs[k]))


class _LosesOne(Engine):
    """Reports an engine failure (as a lost worker would) for the second item."""

    kind = "loses-one"

    def run(self, func, jobs):
        for k, job in enumerate(jobs):
            if k == 1:
                yield Outcome(k, error=RuntimeError("worker lost"))
            else:
                yield Outcome(k, result=func(job))


def test_serial_run_is_complete(serial_run):
    assert serial_run.record["engine"]["kind"] == "local"
    assert serial_run.record["engine"]["serial_items"] == 6
    assert set(TABLES) <= set(serial_run.tables)
    assert len(serial_run.tables["cells"]) == 6


def test_completion_order_does_not_change_the_tables(small_experiment, serial_run, tmp_path):
    rev = _run(small_experiment, tmp_path / "rev", engine=_Reversed())
    _assert_same_tables(serial_run, rev)
    assert rev.record["engine"] == {"kind": "reversed"}


def test_engine_failure_is_a_failed_item(small_experiment, serial_run, tmp_path):
    r = _run(small_experiment, tmp_path / "lost", engine=_LosesOne())
    items = {it["item"]: it for it in r.record["items"]}
    lost = [k for k, it in items.items() if it["status"] != "ok"]
    assert len(lost) == 1 and "worker lost" in items[lost[0]]["error"]
    assert r.n_failed == 1
    cells = serial_run.tables["cells"]
    expected = cells[cells["cell_id"] != lost[0]].reset_index(drop=True)
    pd.testing.assert_frame_equal(r.tables["cells"], expected, check_exact=True)


@pytest.mark.slow
def test_local_pool_and_dask_give_identical_tables(small_experiment, serial_run, tmp_path):
    # acceptance (issue 7): local engine with 1 and 2 workers and a Dask LocalCluster agree bit for bit
    pool = _run(small_experiment, tmp_path / "pool", workers=2, parallel_min_s=0)
    assert pool.record["engine"]["pool_items"] == 6 and pool.record["engine"]["pool_workers"] == 2
    _assert_same_tables(serial_run, pool)

    distributed = pytest.importorskip("distributed")
    scheduler_file = tmp_path / "scheduler.json"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp",
                                  host="127.0.0.1", dashboard_address="127.0.0.1:0",
                                  scheduler_kwargs={"scheduler_file": str(scheduler_file)}) as cluster:
        dask = _run(small_experiment, tmp_path / "dask", scheduler=cluster.scheduler_address)
        # the same cluster reached through its scheduler file
        by_file = DaskEngine(scheduler_file=scheduler_file)
        assert sorted((o.index, o.result) for o in by_file.run(abs, [-3, -4])) == [(0, 3), (1, 4)]
    assert dask.record["engine"]["kind"] == "dask"
    assert dask.record["engine"]["cluster_workers"] == 2
    _assert_same_tables(serial_run, dask)


def test_small_batches_stay_serial():
    # the rule of the local engine: serial until the estimated work left exceeds parallel_min_s
    eng = LocalEngine(2, parallel_min_s=10.0)
    assert not eng._go_parallel(0, 50, 0.0)        # nothing measured yet: run one item here first
    assert not eng._go_parallel(1, 49, 0.1)        # 49 x 0.1 s = 4.9 s of work left: serial
    assert eng._go_parallel(1, 49, 0.5)            # 49 x 0.5 s = 24.5 s: start the pool
    assert not LocalEngine(1, parallel_min_s=0)._go_parallel(0, 50, 0.0)
    assert LocalEngine(2, parallel_min_s=0)._go_parallel(0, 50, 0.0)


def test_engine_options_are_checked(tmp_path):
    with pytest.raises(InputError, match="workers"):
        LocalEngine(0)
    with pytest.raises(InputError, match="both"):
        make_engine(scheduler="tcp://127.0.0.1:8786", scheduler_file=tmp_path / "s.json")
    assert isinstance(make_engine(scheduler="tcp://127.0.0.1:8786"), DaskEngine)
    assert isinstance(make_engine(workers=3), LocalEngine)


def test_cli_workers_with_a_scheduler_is_a_usage_error(small_experiment, tmp_path, capsys):
    from lasecyto.cli import main

    code = main(["run", str(small_experiment), "--out", str(tmp_path / "run"), "--workers", "2",
                 "--scheduler", "tcp://127.0.0.1:8786"])
    assert code == 2
    assert "--workers" in capsys.readouterr().err
    assert not (tmp_path / "run").exists()


def test_missing_scheduler_file_is_a_clear_error(tmp_path):
    eng = DaskEngine(scheduler_file=tmp_path / "scheduler.json")
    with pytest.raises(InputError, match="scheduler file not found"):
        list(eng.run(len, ["x"]))


@pytest.mark.slow
def test_unreachable_scheduler_is_a_clear_error():
    pytest.importorskip("distributed")
    eng = DaskEngine(address="tcp://127.0.0.1:9", timeout_s=1.0)  # port 9 (discard): nothing listens
    with pytest.raises(InputError, match="cannot reach the Dask scheduler"):
        list(eng.run(len, ["x"]))
