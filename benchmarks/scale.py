"""Scale: the whole pipeline on 1e4, 1e5 and 1e6 spectra; time per 1e5 spectra and peak memory.

One command: ``python benchmarks/scale.py [--sizes 1e4,1e5,1e6] [--frames-per-cell 1000]
[--workers 2] [--seed 7] [--no-csv]``  (use ``--sizes 1e4,3e4`` while developing: 1e6 spectra take
about an hour on two cores with today's line fitter).

Data (synthetic, stated): ``lasecyto.synth`` generates one Fabry-Perot experiment of 4
cells x ``--frames-per-cell`` frames (1340-pixel spectra, a few dozen laser lines each,
neon lamp frame), and ``synth.tile_experiment`` repeats those 4 cells to
``size / frames-per-cell`` cells.  Every cell has its own stack and sidecar path (a
symbolic link to one of the 4 generated files), so every cell is read, hashed, fitted,
tracked and written like a measured one; only the data repeat.

Each size is run as a user runs it, in a child process: ``lasecyto run MANIFEST --out
RUN --workers N --quiet --no-report``.  Printed per size:

* ``wall_s``: the child's wall time (interpreter start and imports included);
* ``run_s``: the pipeline's own time (``elapsed_s`` of the run record);
* ``cpu_s``: CPU seconds (user + system) of the child and all its worker processes
  (from ``wait4``), which other jobs on a shared machine disturb much less than wall time;
* time per 1e5 spectra from each, and its ratio to the smallest size (the baseline,
  same data, same run): the acceptance is a ratio within 1.3 up to 1e6 spectra;
* ``peak_MB``: the peak of the summed resident memory (RSS) of the child and all its
  descendants (worker processes), sampled every 50 ms; the acceptance is < 2000 MB at
  1e6.  Caveat: pages shared between processes (libraries) count once per process, so
  the sum over-states the true footprint; a peak shorter than the sampling interval
  can be missed (``main_peak_MB``, the kernel's exact peak RSS of the main process, is
  printed beside it);
* rows of the ``lines`` table and how many items failed (must be 0).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path


def _tree_rss_bytes(pid):
    """Summed RSS of ``pid`` and its descendants (psutil when installed, else /proc)."""
    try:
        import psutil
    except ImportError:
        psutil = None
    if psutil is not None:
        try:
            root = psutil.Process(pid)
            procs = [root] + root.children(recursive=True)
        except psutil.NoSuchProcess:
            return 0
        total = 0
        for p in procs:
            try:
                total += p.memory_info().rss
            except psutil.NoSuchProcess:
                pass
        return total
    children = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
            except OSError:
                continue
            ppid = int(stat.rsplit(")", 1)[1].split()[1])
            children.setdefault(ppid, []).append(int(entry.name))
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        todo += children.get(p, [])
        try:
            for line in Path(f"/proc/{p}/status").read_text().splitlines():
                if line.startswith("VmRSS:"):
                    total += int(line.split()[1]) * 1024
        except OSError:
            pass
    return total


def run_measured(cmd, *, interval_s=0.05):
    """Run ``cmd``; return (exit code, wall s, CPU s of the tree, peak tree RSS bytes, main peak RSS bytes)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    peak = [0]
    done = threading.Event()

    def sample():
        while not done.is_set():
            peak[0] = max(peak[0], _tree_rss_bytes(proc.pid))
            done.wait(interval_s)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    done.set()
    sampler.join()
    proc.returncode = os.waitstatus_to_exitcode(status)
    err = proc.stderr.read()
    proc.stderr.close()
    if proc.returncode not in (0, 3):
        sys.stderr.write(err)
    # on Linux the rusage of a reaped child includes its own reaped children (the workers)
    return proc.returncode, wall, usage.ru_utime + usage.ru_stime, peak[0], usage.ru_maxrss * 1024


def main(argv=None):
    from lasecyto.synth import tile_experiment, write_fp_experiment

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1e4,1e5,1e6", help="numbers of spectra (comma-separated)")
    ap.add_argument("--frames-per-cell", type=int, default=1000)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--no-csv", action="store_true", help="pass --no-csv to the runs (Parquet only)")
    ap.add_argument("--tmp", default=None, help="working directory (default: a temporary one)")
    args = ap.parse_args(argv)
    sizes = [int(float(s)) for s in args.sizes.split(",")]
    fpc = args.frames_per_cell
    if args.tmp is not None:
        Path(args.tmp).mkdir(parents=True, exist_ok=True)

    with tempfile.TemporaryDirectory(prefix="lasecyto-scale-", dir=args.tmp) as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        base = write_fp_experiment(tmp / "base", n_dishes=2, cells_per_dish=2, n_frames=fpc,
                                   frame_interval_s=10.0, perturbation_s=10.0 * fpc / 2,
                                   imaging_dish=False, rng=args.seed)
        print(f"generated 4 cells x {fpc} frames in {time.perf_counter() - t0:.1f} s "
              f"(synthetic; tiled to each size)")
        print(f"workers {args.workers}; CSV {'off' if args.no_csv else 'on'}; python {sys.version.split()[0]}; "
              f"{os.cpu_count()} CPUs\n")
        header = (f"{'spectra':>9} {'cells':>6} {'wall_s':>8} {'run_s':>8} {'cpu_s':>8} {'wall/1e5':>9} "
                  f"{'run/1e5':>8} {'cpu/1e5':>8} {'ratio_run':>9} {'ratio_cpu':>9} {'peak_MB':>8} "
                  f"{'main_peak_MB':>12} {'lines_rows':>10} {'failed':>6}")
        print(header)
        base_run = base_cpu = None
        for size in sizes:
            n_cells = max(1, round(size / fpc))
            n_spectra = n_cells * fpc
            manifest = tile_experiment(base, tmp / f"tiled-{size}", n_cells=n_cells)
            out = tmp / f"run-{size}"
            cmd = [sys.executable, "-m", "lasecyto", "run", str(manifest), "--out", str(out),
                   "--workers", str(args.workers), "--quiet", "--no-report"] + (["--no-csv"] if args.no_csv else [])
            code, wall, cpu, peak, main_peak = run_measured(cmd)
            if code not in (0, 3):
                print(f"{n_spectra:>9} run failed with exit status {code}")
                continue
            record = json.loads((out / "run_record.json").read_text())
            run_s = record["elapsed_s"]
            per_wall, per_run, per_cpu = (x / n_spectra * 1e5 for x in (wall, run_s, cpu))
            if base_run is None:
                base_run, base_cpu = per_run, per_cpu
            print(f"{n_spectra:>9} {n_cells:>6} {wall:>8.1f} {run_s:>8.1f} {cpu:>8.1f} {per_wall:>9.1f} "
                  f"{per_run:>8.1f} {per_cpu:>8.1f} {per_run / base_run:>9.2f} {per_cpu / base_cpu:>9.2f} "
                  f"{peak / 1e6:>8.0f} {main_peak / 1e6:>12.0f} {record['tables']['lines']['rows']:>10} "
                  f"{record['n_failed']:>6}", flush=True)
            shutil.rmtree(out, ignore_errors=True)  # free the disk space before the next size
        print("\nacceptance: ratio within 1.3 from the smallest to the largest size; peak_MB < 2000 at 1e6")


if __name__ == "__main__":
    main()
