"""Emission-pattern benchmark: a streamed 2,000-frame 256 x 256 stack generated on disk.

Run: ``python benchmarks/patterns.py`` (options: ``--frames``, ``--cells``, ``--no-tracemalloc``).

Prints frames per second of ``lasecyto.patterns.analyze_patterns`` reading the
OME-TIFF lazily through ``lasecyto.io._images.read_image_stack``, the peak
traced Python/numpy memory (tracemalloc, second pass) and the process's peak
resident set size, beside the memory the whole stack would take if loaded,
and the accuracy against the generator's truth (segmentation F1, centre RMS
error, mode-order accuracy with its confusion matrix, change detection).
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.optimize import linear_sum_assignment

from lasecyto.io._images import read_image_stack
from lasecyto.patterns import MODE_ORDERS, analyze_patterns
from lasecyto.synth._patterns import write_pattern_stack


def _rss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


def _score(truth, regions):
    pairs, n_det, n_true = [], len(regions), int(truth["lasing"].sum())
    by_frame = dict(tuple(regions.groupby("frame")))
    for f, t in truth[truth["lasing"]].groupby("frame"):
        r = by_frame.get(f)
        if r is None:
            continue
        d = np.hypot(r["centroid_row_px"].to_numpy()[:, None] - t["row_px"].to_numpy()[None],
                     r["centroid_col_px"].to_numpy()[:, None] - t["col_px"].to_numpy()[None])
        i, j = linear_sum_assignment(d)
        ok = d[i, j] < 5.0
        pairs += list(zip(r.index[i[ok]], t.index[j[ok]]))
    r = regions.loc[[p[0] for p in pairs]].reset_index(drop=True)
    t = truth.loc[[p[1] for p in pairs]].reset_index(drop=True)
    f1 = 2 * len(pairs) / (n_det + n_true)
    rms = float(np.sqrt(np.mean((r["center_row_px"] - t["row_px"]) ** 2 + (r["center_col_px"] - t["col_px"]) ** 2)))
    acc = float((r["mode_order"] == t["order"]).mean())
    cm = pd.crosstab(t["order"].rename("true"), r["mode_order"].rename("found")).reindex(
        index=list(MODE_ORDERS), columns=list(MODE_ORDERS), fill_value=0)
    found = r.assign(cell=t["cell"].to_numpy(), tframe=t["frame"].to_numpy())
    changes = truth[truth["changed"]]
    ev = found[found["pattern_change"]]
    hit = sum(bool(((ev["cell"] == c.cell) & ((ev["tframe"] - c.frame).abs() <= 1)).any())
              for c in changes.itertuples())
    false = sum(not bool(((changes["cell"] == e.cell) & ((changes["frame"] - e.tframe).abs() <= 1)).any())
                for e in ev.itertuples())
    return f1, rms, acc, cm, hit, len(changes), false, len(found)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=2000)
    ap.add_argument("--cells", type=int, default=6)
    ap.add_argument("--block", type=int, default=32)
    ap.add_argument("--no-tracemalloc", action="store_true")
    args = ap.parse_args(argv)
    shape = (256, 256)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.ome.tif"
        t0 = time.perf_counter()
        truth = write_pattern_stack(path, n_frames=args.frames, shape=shape, n_cells=args.cells, peak_snr=20.0,
                                    change_prob=0.03, dropout_prob=0.01, touching_px=22.0, rng=20240501)
        t_gen = time.perf_counter() - t0
        whole_mb = args.frames * shape[0] * shape[1] * 2 / 2 ** 20
        print(f"stack: {args.frames} frames {shape[0]}x{shape[1]} uint16, {args.cells} cells, "
              f"{whole_mb:.0f} MB on disk; generated in {t_gen:.1f} s")
        rss_before = _rss_mb()
        with read_image_stack(path) as st:
            t0 = time.perf_counter()
            res = analyze_patterns(st, block_frames=args.block)
            dt = time.perf_counter() - t0
        print(f"analysis: {args.frames / dt:.1f} frames/s ({dt:.1f} s, {len(res.regions)} regions); "
              f"peak RSS {_rss_mb():.0f} MB (before analysis {rss_before:.0f} MB; whole stack {whole_mb:.0f} MB)")
        if not args.no_tracemalloc:
            with read_image_stack(path) as st:
                tracemalloc.start()
                analyze_patterns(st, block_frames=args.block)
                _, peak = tracemalloc.get_traced_memory()
                tracemalloc.stop()
            print(f"tracemalloc peak during analysis: {peak / 2 ** 20:.1f} MB")
    f1, rms, acc, cm, hit, n_ch, false, n_found = _score(truth, res.regions)
    print(f"segmentation F1 {f1:.4f}; centre error {rms:.3f} px RMS; mode-order accuracy {100 * acc:.2f} %")
    print(f"order changes detected within 1 frame: {hit}/{n_ch}; false change events: {false}/{n_found} "
          f"({100 * false / max(n_found, 1):.2f} %)")
    print("confusion matrix (rows true, columns found):")
    print(cm.to_string())
    return 0


if __name__ == "__main__":
    sys.exit(main())
