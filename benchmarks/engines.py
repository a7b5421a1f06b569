"""When does the local process pool pay?  Serial against a spawned pool on the same batches.

One command: ``python benchmarks/engines.py [--workers 2] [--items 2,4,8,16,32,64] [--seed 5]``.

Data: one small generated experiment (lasecyto.synth, 4 cells x 40 frames,
synthetic), tiled to batches of N items (``synth.tile_experiment``: every
item reuses one of the generated stacks through its own symbolic link).  Each
batch is run in this process three ways, same data, same run:

* ``serial``   the baseline: ``workers=1``;
* ``pool``     a spawn process pool of ``--workers`` from the start (``parallel_min_s=0``);
* ``auto``     the default local engine (serial until the estimated work left
  exceeds ``PARALLEL_MIN_S``, then the pool).

Printed per batch: serial seconds (the serial work W), pool and auto seconds
and their ratios to serial, and whether the tables of the three runs are
identical.  The break-even W, where the pool first beats serial, is the
measured basis of ``PARALLEL_MIN_S``.  The pool's start-up cost (spawning
interpreters that import numpy, SciPy, pandas and lasecyto) is measured too.
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import multiprocessing
import tempfile
import time
from pathlib import Path

import pandas as pd


def _probe(_):
    import lasecyto.pipeline  # noqa: F401  (what a worker imports before its first item)

    return 0


def spawn_cost(workers):
    t0 = time.perf_counter()
    with cf.ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn")) as pool:
        list(pool.map(_probe, range(workers)))
    return time.perf_counter() - t0


def _timed(manifest, out, **options):
    from lasecyto.pipeline import run_experiment

    t0 = time.perf_counter()
    result = run_experiment(manifest, out, show_progress=False, write_report=False, **options)
    return time.perf_counter() - t0, result


def main(argv=None):
    from lasecyto.pipeline import PARALLEL_MIN_S
    from lasecyto.synth import tile_experiment, write_fp_experiment

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--items", default="2,4,8,16,32,64", help="batch sizes (comma-separated)")
    ap.add_argument("--seed", type=int, default=5)
    args = ap.parse_args(argv)
    sizes = [int(s) for s in args.items.split(",")]

    with tempfile.TemporaryDirectory(prefix="lasecyto-engines-") as tmp:
        tmp = Path(tmp)
        base = write_fp_experiment(tmp / "base", n_dishes=2, cells_per_dish=2, n_frames=40,
                                   perturbation_s=150.0, imaging_dish=False, rng=args.seed)
        print(f"pool start-up (spawn, import lasecyto.pipeline): "
              f"{spawn_cost(1):.2f} s for 1 worker, {spawn_cost(args.workers):.2f} s for {args.workers}")
        print(f"default PARALLEL_MIN_S = {PARALLEL_MIN_S:g} s\n")
        print(f"{'items':>6} {'serial_s':>9} {'pool_s':>8} {'pool/serial':>12} {'auto_s':>8} "
              f"{'auto/serial':>12} {'auto used':>14} {'identical':>10}")
        break_even = None
        for n in sizes:
            m = tile_experiment(base, tmp / f"tiled-{n}", n_cells=n)
            t_serial, r_serial = _timed(m, tmp / f"run-serial-{n}", workers=1)
            t_pool, r_pool = _timed(m, tmp / f"run-pool-{n}", workers=args.workers, parallel_min_s=0)
            t_auto, r_auto = _timed(m, tmp / f"run-auto-{n}", workers=args.workers)
            same = True
            for name in r_serial.tables:
                for other in (r_pool, r_auto):
                    try:
                        pd.testing.assert_frame_equal(r_serial.tables[name], other.tables[name], check_exact=True)
                    except AssertionError:
                        same = False
            eng = r_auto.record["engine"]
            used = f"{eng['serial_items']}s+{eng['pool_items']}p"
            print(f"{n:>6} {t_serial:>9.2f} {t_pool:>8.2f} {t_pool / t_serial:>12.2f} {t_auto:>8.2f} "
                  f"{t_auto / t_serial:>12.2f} {used:>14} {str(same):>10}")
            if break_even is None and t_pool < t_serial:
                break_even = t_serial
        print()
        if break_even is None:
            print("the pool never beat serial at these sizes")
        else:
            print(f"break-even: the pool first beat serial at about {break_even:.1f} s of serial work")


if __name__ == "__main__":
    main()
