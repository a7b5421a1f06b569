"""Speed and agreement of the per-frame bead fit against a direct exact fit.

One command: ``python benchmarks/sphere.py [--frames 30] [--seed 0]``.

Synthetic frames of a polystyrene bead (Ma et al. 2003 dispersion, D = 13.2 um) in water
(Daimon & Masumura 2007) plus a medium-index offset that changes from frame to frame:
10 first-order TE/TM lines per frame between 590 and 640 nm, exact complex-root resonances
from the generator's own solver (``lasecyto.synth.wgm_resonances``), 0.5 pm Gaussian noise.
Each frame's diameter and medium index are fitted, mode identity known, by

* ``lasecyto.cavity.sphere.fit_sphere_modes`` (exact x(m) of each mode interpolated from
  exact roots, damped Gauss-Newton with forward differences), and
* the baseline a careful researcher would write: ``scipy.optimize.least_squares`` on a model
  that solves every resonance exactly at every evaluation (``resonance_wavelengths``, a
  bracketing root search per mode, self-consistent in the dispersive indices).

Both run on the same frames in the same process; printed: time per frame, the ratio, and the
largest difference between the two answers (diameter in nm, medium index) and against truth.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import optimize

from lasecyto.cavity.media import get_medium
from lasecyto.cavity.sphere import fit_sphere_modes, resonance_wavelengths
from lasecyto.synth import wgm_resonances
from lasecyto.synth._media import water_index_daimon


def _frames(n, rng):
    pols = np.array(["TE", "TM"] * 7)
    ls = np.repeat(np.arange(101, 108), 2) - (pols == "TM")
    offsets = 0.027 + 2e-3 * rng.random(n)
    lam, _ = wgm_resonances(13.2, polarization=np.tile(pols, n), l=np.tile(ls, n), radial_order=1,
                            index_offset=np.repeat(offsets, pols.size))
    lam = lam.reshape(n, pols.size)
    keep = (lam[0] > 590.0) & (lam[0] < 640.0)
    return pols[keep], ls[keep], lam[:, keep] + rng.normal(0.0, 5e-4, (n, int(keep.sum()))), offsets


def _baseline_fit(lam, err, pols, ls, ps, water):
    base = float(water.n(np.median(lam)))

    def model(p):
        medium = lambda w, d=p[1]: water.n(w) + d  # noqa: E731
        return np.array([resonance_wavelengths(p[0], ps, medium, polarization=pol, l=int(li))
                         for pol, li in zip(pols, ls)])

    sol = optimize.least_squares(lambda p: (model(p) - lam) / err, [13.0, 1.36 - base], x_scale=[1.0, 0.01])
    return sol.x[0], base + sol.x[1]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=30)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    ps, water = get_medium("ps-ma"), get_medium("water-daimon")
    pols, ls, lam, offsets = _frames(args.frames, rng)
    err = np.full(pols.size, 5e-4)
    n_true = water_index_daimon(np.median(lam, axis=1) * 1e-3) + offsets

    fit_sphere_modes(lam[0], err, polarization=pols, l=ls, radial_order=1, n_sphere=ps, n_medium_guess=water,
                     diameter_range_um=(12.0, 14.5), n_medium_bounds=(1.33, 1.41))   # builds the interpolants
    t0 = time.perf_counter()
    ours = [fit_sphere_modes(f, err, polarization=pols, l=ls, radial_order=1, n_sphere=ps, n_medium_guess=water,
                             diameter_range_um=(12.0, 14.5), n_medium_bounds=(1.33, 1.41)) for f in lam]
    t_ours = (time.perf_counter() - t0) / args.frames
    n_base = min(args.frames, 5)
    t0 = time.perf_counter()
    base = [_baseline_fit(f, err, pols, ls, ps, water) for f in lam[:n_base]]
    t_base = (time.perf_counter() - t0) / n_base

    d_ours = np.array([f.diameter_um for f in ours])
    n_ours = np.array([f.n_medium for f in ours])
    d_base = np.array([b[0] for b in base])
    n_base_v = np.array([b[1] for b in base])
    print(f"frames: {args.frames} ({pols.size} lines each, 0.5 pm noise); baseline on the first {n_base}")
    print(f"lasecyto fit_sphere_modes: {t_ours * 1e3:8.1f} ms per frame")
    print(f"direct exact least_squares: {t_base * 1e3:8.1f} ms per frame")
    print(f"speed ratio (baseline / lasecyto): {t_base / t_ours:.0f}")
    print(f"largest difference of the answers: diameter {np.max(np.abs(d_ours[:n_base] - d_base)) * 1e3:.2e} nm, "
          f"medium index {np.max(np.abs(n_ours[:n_base] - n_base_v)):.1e}")
    print(f"against truth (all frames): diameter rms {np.sqrt(np.mean((d_ours - 13.2) ** 2)) * 1e3:.3f} nm, "
          f"medium index rms {np.sqrt(np.mean((n_ours - n_true) ** 2)):.1e}; "
          f"median reported errors {np.median([f.diameter_err_um for f in ours]) * 1e3:.3f} nm, "
          f"{np.median([f.n_medium_err for f in ours]):.1e}")


if __name__ == "__main__":
    main()
