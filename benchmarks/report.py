"""Writing time, page size and peak memory of the HTML report, small run against a tiled large one.

One command: ``python benchmarks/report.py [--cells 240] [--seed 2026] [--keep DIR]``.

Data: the demo experiment (lasecyto.synth, 24 cells x 90 frames with camera
images, synthetic) and the same experiment tiled to ``--cells`` cells
(``synth.tile_experiment``: every cell repeats one of the 24, through its own
file).  Both are run once without a report (``workers=1``); then the report
of each is written in a fresh child process (``lasecyto report``), so that the
peak resident memory of the child is the report's alone.

Printed per run: cells, seconds, seconds per cell, page size and size per
cell, peak memory of the child; and the ratios of the large run to the demo
run (the baseline) per cell: the writing time and the page size should grow
linearly with the cells (ratio near 1; the large run is drawn at a lower
resolution, so its size per cell is smaller) and the memory should not grow
with them (the per-cell tables are read one cell at a time).
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _run(manifest, out):
    from lasecyto.pipeline import run_experiment

    run_experiment(manifest, out, workers=1, show_progress=False, write_report=False, csv=False)


def _report(run_dir):
    # VmHWM (Linux) is the peak of this process image; ru_maxrss would carry the parent's peak over exec
    code = ("import sys, time\n"
            "from lasecyto.report import write_html_report\n"
            "t = time.perf_counter()\n"
            "write_html_report(sys.argv[1])\n"
            "hwm = [ln.split()[1] for ln in open('/proc/self/status') if ln.startswith('VmHWM')][0]\n"
            "print(time.perf_counter() - t, hwm)\n")
    out = subprocess.run([sys.executable, "-c", code, str(run_dir)], check=True, capture_output=True, text=True)
    seconds, rss_kb = out.stdout.split()
    return float(seconds), (Path(run_dir) / "report.html").stat().st_size, int(rss_kb) / 1024


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=240, help="cells of the tiled run (default 240)")
    ap.add_argument("--seed", type=int, default=2026, help="seed of the demo experiment")
    ap.add_argument("--keep", type=Path, help="work in this directory and keep it")
    args = ap.parse_args(argv)
    from lasecyto.synth import tile_experiment, write_fp_experiment

    with tempfile.TemporaryDirectory() as tmp:
        root = args.keep or Path(tmp)
        root.mkdir(parents=True, exist_ok=True)
        manifest = write_fp_experiment(root / "experiment", rng=args.seed)
        tiled = tile_experiment(manifest, root / "tiled", n_cells=args.cells)
        rows = []
        for name, m in (("demo", manifest), (f"tiled x{args.cells}", tiled)):
            out = root / f"run-{name.split()[0]}"
            t0 = time.perf_counter()
            _run(m, out)
            run_s = time.perf_counter() - t0
            seconds, size, rss = _report(out)
            import pandas as pd

            n = len(pd.read_parquet(out / "tables" / "cells.parquet", columns=["cell_id"]))
            rows.append((name, n, run_s, seconds, size, rss))
        print(f"{'run':<14}{'cells':>6}{'run s':>9}{'report s':>10}{'s/cell':>8}{'page MB':>9}{'kB/cell':>9}"
              f"{'peak MB':>9}")
        for name, n, run_s, seconds, size, rss in rows:
            print(f"{name:<14}{n:>6}{run_s:>9.1f}{seconds:>10.1f}{seconds / n:>8.3f}{size / 1e6:>9.2f}"
                  f"{size / n / 1e3:>9.1f}{rss:>9.0f}")
        (_, n0, _, s0, b0, m0), (_, n1, _, s1, b1, m1) = rows
        print(f"ratios large/demo: time per cell {(s1 / n1) / (s0 / n0):.2f}, page size per cell "
              f"{(b1 / n1) / (b0 / n0):.2f}, peak memory {m1 / m0:.2f}")


if __name__ == "__main__":
    main()
