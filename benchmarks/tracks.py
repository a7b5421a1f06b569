"""Identity accuracy of lasecyto's mode linking against plain nearest-neighbour linking.

One command: ``python benchmarks/tracks.py [--runs 10] [--frames 200] [--seed 0]``.

Data: ``lasecyto.synth.mode_trajectories`` (synthetic truth): a drifting comb
of four transverse families of one cell laser whose Gouy fraction swings
around 1/3, so that the third-order family of mode q crosses the fundamental
of mode q + 1 many times at up to 0.25 nm per frame; births and deaths at the
gain-window edges, dropouts of 1-3 frames, misfired frames, mode hops of one
free spectral range (6.8 nm) and lines blended where they cross.

Linkers, on the same detections in the same process:

* lasecyto: ``lasecyto.tracks.link_lines`` (frame-to-frame assignment with
  the comb's common step and each segment's velocity, gap closing by a second
  assignment over segments, intensity and width in the cost, hop flags),
  gate 0.15 nm, gaps up to 3 frames, every track kept;
* nearest neighbour (the baseline): for every frame, all (track, line) pairs
  within the gate of the track's last position are taken greedily by
  increasing distance; a track is continued for up to 3 missing frames; no
  motion prediction, no global assignment, no intensity or width.  Run with
  the same 0.15 nm gate and with a wide 0.40 nm gate (larger than the fastest
  true move, so that it can follow every line).

Scores (``lasecyto.tracks.identity_scores``): frame-to-frame identity accuracy
(among lines with a true or found predecessor, the share whose predecessor is
right) and identity switches (links joining two different true modes) per 1000
links.  True links across more than 4 frames are not counted (no linker with a
3-frame gap can make them).  Also the hop flags against the true hops.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from lasecyto.synth import TRAJECTORY_SCENARIO, mode_trajectories
from lasecyto.tracks import identity_scores, link_lines

MAX_STEP_NM = 0.15
WIDE_STEP_NM = 0.40
MAX_GAP = 3


def nearest_neighbour(frame, position, *, max_step, max_gap):
    """Greedy nearest-neighbour linking with memory (the baseline), written out here on purpose."""
    order = np.lexsort((position, frame))
    track = np.full(frame.size, -1, dtype=np.int64)
    last_f, last_p = [], []
    fs = frame[order]
    starts = np.flatnonzero(np.r_[True, fs[1:] != fs[:-1]])
    for a, b in zip(starts, np.r_[starts[1:], order.size]):
        f, det = fs[a], order[a:b]
        pairs = []
        for t in range(len(last_f)):
            if f - last_f[t] > max_gap + 1:
                continue
            dist = np.abs(position[det] - last_p[t])
            pairs += [(dist[j], t, j) for j in np.flatnonzero(dist <= max_step)]
        pairs.sort()
        used_t, used_j = set(), set()
        for _, t, j in pairs:
            if t in used_t or j in used_j:
                continue
            used_t.add(t)
            used_j.add(j)
            track[det[j]] = t
            last_f[t], last_p[t] = f, position[det[j]]
        for j in range(det.size):
            if j not in used_j:
                track[det[j]] = len(last_f)
                last_f.append(f)
                last_p.append(position[det[j]])
    return track


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=10, help="independent synthetic cells (default 10)")
    ap.add_argument("--frames", type=int, default=200, help="frames per cell (default 200)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the first cell (default 0)")
    args = ap.parse_args(argv)
    spacing = 1.0 / (2.0 * TRAJECTORY_SCENARIO["group_optical_length_um"])   # FSR as a wavenumber, 1/um

    names = ("lasecyto", f"nearest neighbour, gate {MAX_STEP_NM} nm", f"nearest neighbour, gate {WIDE_STEP_NM} nm")
    frames, truths, founds = [], {n: [] for n in names}, {n: [] for n in names}
    seconds = dict.fromkeys(names, 0.0)
    hops_true = hops_found = hops_hit = 0
    n_lines = n_blended = 0
    offset = 0
    for run in range(args.runs):
        lines = mode_trajectories(n_frames=args.frames, rng=args.seed + run, cell_id=f"cell-{run}")
        n_lines += len(lines)
        n_blended += int(lines["blended"].sum())
        t0 = time.perf_counter()
        tracks = link_lines(lines, max_step_nm=MAX_STEP_NM, max_gap_frames=MAX_GAP, min_length_frames=1,
                            hop_spacing_per_um=spacing)
        seconds[names[0]] += time.perf_counter() - t0
        f = tracks["frame"].to_numpy(np.int64)
        p = tracks["center_nm"].to_numpy(float)
        truth = tracks["true_mode"].to_numpy(np.int64)
        results = [tracks["track_id"].to_numpy(np.int64)]
        for step in (MAX_STEP_NM, WIDE_STEP_NM):
            t0 = time.perf_counter()
            results.append(nearest_neighbour(f, p, max_step=step, max_gap=MAX_GAP))
            seconds[names[len(results) - 1]] += time.perf_counter() - t0
        for name, found in zip(names, results):
            truths[name].append(truth)
            founds[name].append(np.where(found >= 0, found + offset, -1))
        frames.append(f + 0)
        offset += 10 * len(lines)
        hop, true_hop = tracks["hop"].to_numpy(bool), tracks["true_hop"].to_numpy(bool)
        hops_true += int(true_hop.sum())
        hops_found += int(hop.sum())
        hops_hit += int((hop & true_hop).sum())

    # runs are scored as one data set: frames repeat across runs, identities never do
    f_all = np.concatenate([fr + 10_000 * k for k, fr in enumerate(frames)])
    print(f"{args.runs} synthetic cells x {args.frames} frames: {n_lines} lines, {n_blended} blended at "
          f"crossings, {hops_true} true hops")
    print(f"{'linker':<34} {'accuracy':>9} {'switches/1000':>14} {'missed':>7} {'links':>7} {'seconds':>8}")
    scores = {}
    for name in names:
        truth = np.concatenate([t + 100_000 * k for k, t in enumerate(truths[name])])
        s = identity_scores(f_all, truth, np.concatenate(founds[name]), max_gap=MAX_GAP)
        scores[name] = s
        print(f"{name:<34} {s.accuracy:>9.4%} {s.switches_per_1000_links:>14.2f} {s.n_missed:>7d} "
              f"{s.n_links:>7d} {seconds[name]:>8.2f}")
    ours = scores[names[0]]
    print("\nratios, nearest neighbour / lasecyto (same data, same run):")
    for name in names[1:]:
        s = scores[name]
        err = (1 - s.accuracy) / max(1 - ours.accuracy, 1.0 / max(ours.n_links, 1))
        sw = s.n_switches / max(ours.n_switches, 1)
        print(f"  {name:<32} identity errors x{err:.1f}   switches x{sw:.1f} "
              f"({s.n_switches} vs {ours.n_switches})   time x{seconds[name] / seconds[names[0]]:.2f}")
    print(f"\nhop flags: {hops_hit} of {hops_true} true hops flagged, {hops_found - hops_hit} false flags")
    ok = ours.accuracy >= 0.995 and ours.switches_per_1000_links < 1.0
    print(f"acceptance (accuracy >= 99.5 %, switches < 1 per 1000 links): {'met' if ok else 'NOT met'}")


if __name__ == "__main__":
    main()
