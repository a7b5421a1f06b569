"""Speed and precision of lasecyto.lines.fit_lines against a hand-written per-peak fit.

One command: ``python benchmarks/lines.py [--n 1000] [--seed 0]``.

Synthetic spectra with known truth (1340 px; 1-8 Lorentzian lines each with
1e3-1e6 photons and FWHM 1.5-10 px; a broad fluorescence band; Poisson noise
and 3 e read noise) are analysed by

* ``fit_lines`` (``baseline="local"``: no global baseline, a quadratic
  background fitted jointly in every window; matched-filter detection;
  neighbouring lines fitted jointly; Fisher scoring of the Poisson +
  read-noise likelihood compiled with Numba and run in threads over chunks of
  spectra; uncertainties from the Fisher matrix), and
* the hand-written baseline of a careful researcher: per spectrum, a running
  median (101 px) as background, a Poisson + read-noise noise estimate
  ``sqrt(background + read_noise**2)`` from it, ``scipy.signal.find_peaks``
  with ``height = background + 5 noise``, ``prominence = 3 noise``,
  ``distance = 3``, ``width = 1``, then one unweighted
  ``scipy.optimize.curve_fit`` of a Lorentzian plus constant per peak in a
  window of +-max(6, 5 x the find_peaks width), errors from ``pcov``.

Also printed: false lines on pure-noise spectra (fluorescence only) for both,
and the peak memory (resident set of a fresh process, and traced Python
allocations) of streaming a 20,000-frame stack through ``fit_lines`` in
blocks of 500 frames.

Both run on the same data in the same process; timings are medians of
interleaved runs, after a warm-up call that loads (or compiles once and
caches) the compiled code.  ``fit_lines`` is timed with Numba's default
thread count (the target) and single-threaded; the baseline is
single-threaded by nature.  The Cramer-Rao bound of every
true line is computed here, independently of the package, from the Fisher
information of the pixel-integrated model with a linear background.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
import tracemalloc
import warnings

import numba
import numpy as np

from scipy import ndimage, optimize, signal

from lasecyto.lines import fit_lines

N_PIX = 1340
READ_NOISE_E = 3.0
PHOTON_BINS = ((1e3, 1e4), (1e4, 1e5), (1e5, 1e6))


def _lorentz_pixels(x, c, w):
    """Pixel-integrated unit-area Lorentzian (FWHM w), written out here on purpose."""
    return (np.arctan(2 * (x + 0.5 - c) / w) - np.arctan(2 * (x - 0.5 - c) / w)) / np.pi


def make_spectra(n_spectra, rng, *, lines=True):
    """Spectra and truth table (spectrum, centre, fwhm, photons, background at the centre).

    With ``lines=False`` the spectra hold the fluorescence band and noise only.
    """
    rng = np.random.default_rng(rng)
    x = np.arange(N_PIX, dtype=float)
    amp = rng.uniform(50, 400, n_spectra)[:, None]
    mid = rng.uniform(300, 1040, n_spectra)[:, None]
    sig = rng.uniform(150, 400, n_spectra)[:, None]
    fluor = 20 + amp * np.exp(-0.5 * ((x - mid) / sig) ** 2) + 0.02 * x * rng.uniform(0, 1, (n_spectra, 1))
    mu = fluor.copy()
    truth = []
    for s in range(n_spectra if lines else 0):
        n_lines = rng.integers(1, 9)
        centres, widths = [], []
        while len(centres) < n_lines:
            c = rng.uniform(25, N_PIX - 26)
            w = np.exp(rng.uniform(np.log(1.5), np.log(10.0)))
            if all(abs(c - c2) > 3 * max(w, w2) + 4 for c2, w2 in zip(centres, widths)):
                centres.append(c)
                widths.append(w)
        for c, w in zip(centres, widths):
            photons = 10 ** rng.uniform(3, 6)
            mu[s] += photons * _lorentz_pixels(x, c, w)
            truth.append((s, c, w, photons, float(np.interp(c, x, fluor[s]))))
    data = rng.poisson(mu) + rng.normal(0.0, READ_NOISE_E, mu.shape)
    truth = np.array(truth).reshape(-1, 5)
    return data, {"spectrum": truth[:, 0].astype(int), "center_px": truth[:, 1], "fwhm_px": truth[:, 2],
                  "photons": truth[:, 3], "background_e": truth[:, 4]}


def true_bounds(truth):
    """CRLB of centre and area of each true line (window +-5 FWHM, linear background)."""
    out_c, out_a = [], []
    for c, w, a, b in zip(truth["center_px"], truth["fwhm_px"], truth["photons"], truth["background_e"]):
        half = max(6.0, 5.0 * w)
        x = np.arange(np.floor(c - half), np.ceil(c + half) + 1)
        u_hi, u_lo = 2 * (x + 0.5 - c) / w, 2 * (x - 0.5 - c) / w
        f = (np.arctan(u_hi) - np.arctan(u_lo)) / np.pi
        q_hi, q_lo = 2 / (np.pi * (1 + u_hi ** 2)), 2 / (np.pi * (1 + u_lo ** 2))
        jac = np.stack([-a * (q_hi - q_lo) / w, -a * (u_hi / 2 * q_hi - u_lo / 2 * q_lo) / w, f,
                        np.ones_like(x), x - c], axis=1)
        var = a * f + b + READ_NOISE_E ** 2
        cov = np.linalg.inv(jac.T @ (jac / var[:, None]))
        out_c.append(np.sqrt(cov[0, 0]))
        out_a.append(np.sqrt(cov[2, 2]))
    return np.array(out_c), np.array(out_a)


def handwritten(spectra):
    """find_peaks + one unweighted curve_fit (Lorentzian + constant) per peak."""
    def model(x, c, g, h, b):
        return h * g * g / ((x - c) ** 2 + g * g) + b

    rows = []
    x_all = np.arange(N_PIX, dtype=float)
    for s, y in enumerate(spectra):
        background = ndimage.median_filter(y, 101, mode="nearest")
        noise = np.sqrt(np.maximum(background, 0) + READ_NOISE_E ** 2)
        peaks, props = signal.find_peaks(y, height=background + 5 * noise, prominence=3 * noise, distance=3,
                                         width=1)
        for p, width in zip(peaks, props["widths"]):
            half = int(max(6, 5 * width))
            lo, hi = max(p - half, 0), min(p + half + 1, N_PIX)
            xw, yw = x_all[lo:hi], y[lo:hi]
            p0 = (float(p), max(width / 2, 0.5), float(y[p] - np.min(yw)), float(np.min(yw)))
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    popt, pcov = optimize.curve_fit(model, xw, yw, p0=p0, maxfev=2000)
                err = np.sqrt(np.diag(pcov))
                ok = bool(np.all(np.isfinite(err)) and lo <= popt[0] < hi)
            except (RuntimeError, ValueError):
                popt, err, ok = np.full(4, np.nan), np.full(4, np.nan), False
            rows.append((s, popt[0], err[0], 2 * abs(popt[1]), ok))
    rows = np.array(rows, dtype=float).reshape(-1, 5)
    return {"spectrum": rows[:, 0].astype(int), "center_px": rows[:, 1], "center_err_px": rows[:, 2],
            "fwhm_px": rows[:, 3], "fit_ok": rows[:, 4].astype(bool)}


def match(truth, found):
    """Index of the found line matching each true line (-1 if none), and unmatched found lines."""
    idx = np.full(truth["center_px"].size, -1)
    used = np.zeros(found["center_px"].size, dtype=bool)
    by_spec = {}
    for j, s in enumerate(found["spectrum"]):
        by_spec.setdefault(int(s), []).append(j)
    for i, (s, c, w) in enumerate(zip(truth["spectrum"], truth["center_px"], truth["fwhm_px"])):
        cand = [j for j in by_spec.get(int(s), []) if not used[j] and found["fit_ok"][j]]
        if not cand:
            continue
        d = np.abs(found["center_px"][cand] - c)
        k = int(np.argmin(d))
        if d[k] < max(1.5, 0.5 * w):
            idx[i] = cand[k]
            used[cand[k]] = True
    false = np.flatnonzero(found["fit_ok"] & ~used)
    return idx, false


def summarise(name, truth, found, crlb_c, snr_true, elapsed, n_spectra):
    idx, false = match(truth, found)
    hit = idx >= 0
    strong = snr_true >= 10
    print(f"\n{name}")
    print(f"  time {elapsed:.2f} s, {n_spectra / elapsed:,.0f} spectra/s")
    print(f"  recall: all {hit.mean():.4f}, true SNR >= 10: {hit[strong].mean():.4f} "
          f"({strong.sum()} lines); false lines (fit ok, unmatched): {false.size}")
    err = found["center_px"][idx[hit]] - truth["center_px"][hit]
    rep = found["center_err_px"][idx[hit]]
    photons = truth["photons"][hit]
    for lo, hi in PHOTON_BINS:
        sel = (photons >= lo) & (photons < hi)
        z_true = err[sel] / crlb_c[hit][sel]
        z_rep = err[sel] / rep[sel]
        # robust spread (1.4826 MAD) next to the plain standard deviation, both in units of the bound
        mad = 1.4826 * np.median(np.abs(z_true - np.median(z_true)))
        print(f"  photons {lo:.0e}-{hi:.0e}: n={sel.sum():5d}  scatter/CRLB std {np.std(z_true):6.3f} "
              f"(robust {mad:5.3f})  pull std {np.std(z_rep):6.3f}  "
              f"reported err/CRLB median {np.median(rep[sel] / crlb_c[hit][sel]):6.3f}")
    print(f"  pull (error / reported error) std over all matched lines: {np.std(err / rep):.3f}, "
          f"robust {1.4826 * np.median(np.abs(err / rep - np.median(err / rep))):.3f}")
    return idx


def false_lines_pure_noise(n_spectra, seed):
    """False lines (fit ok) per 1000 pure-noise spectra, both methods."""
    noise, _ = make_spectra(n_spectra, seed + 1, lines=False)
    fits = fit_lines(noise, read_noise_e=READ_NOISE_E, baseline="local")
    hand = handwritten(noise)
    n_fast = int(np.count_nonzero(fits.fit_ok))
    n_hand = int(np.count_nonzero(hand["fit_ok"]))
    print(f"\npure-noise spectra ({n_spectra}, fluorescence band + noise): false lines per 1000 spectra: "
          f"fit_lines {1000 * n_fast / n_spectra:.2f}, hand-written {1000 * n_hand / n_spectra:.2f} "
          f"(target <= 1)")


def streaming_memory(n_frames, seed, block=500):
    """Peak traced memory while fitting an n_frames stack block by block (data made per block)."""
    tracemalloc.start()
    n_lines = 0
    t0 = time.perf_counter()
    for start in range(0, n_frames, block):
        data, _ = make_spectra(min(block, n_frames - start), seed + 2 + start)
        n_lines += len(fit_lines(data, read_noise_e=READ_NOISE_E, baseline="local"))
        del data
    elapsed = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"streaming {n_frames} frames in blocks of {block}: {n_lines} lines in {elapsed:.1f} s (generation "
          f"included); peak memory of this process {rss:.0f} MB resident (limit 500 MB; includes Python, NumPy, "
          f"Numba and the compiled code), {peak / 2 ** 20:.1f} MB traced Python allocations")


def _timed(func, repeats):
    """Median wall time of ``repeats`` calls and the last result."""
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = func()
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1000, help="number of spectra (default 1000)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--repeats", type=int, default=3, help="timed runs of each method; medians (default 3)")
    parser.add_argument("--noise-spectra", type=int, default=2000,
                        help="pure-noise spectra for the false-line rate (default 2000)")
    parser.add_argument("--stream-frames", type=int, default=20000,
                        help="frames of the streaming memory test (default 20000; 0 skips it)")
    parser.add_argument("--stream-only", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.stream_only:  # the streaming test runs in a fresh process so that its peak memory is its own
        streaming_memory(args.stream_frames, args.seed)
        return
    data, truth = make_spectra(args.n, args.seed)
    crlb_c, crlb_a = true_bounds(truth)
    snr_true = truth["photons"] / crlb_a
    threads = numba.get_num_threads()
    print(f"{args.n} spectra x {N_PIX} px, {truth['center_px'].size} true lines, read noise {READ_NOISE_E} e")
    print(f"machine: {os.cpu_count()} logical CPUs; fit_lines runs in {threads} threads by default "
          f"(numba.get_num_threads()); the hand-written baseline is single-threaded")
    # warm-up: compiled code is loaded (or compiled, once, and cached) outside the timing
    fit_lines(data[:10], read_noise_e=READ_NOISE_E, baseline="local")
    handwritten(data[:10])

    def fast():
        return fit_lines(data, read_noise_e=READ_NOISE_E, baseline="local")

    t_default, t_single, t_hand = [], [], []
    fits = found_hand = None
    for _ in range(args.repeats):  # interleaved, so that load from other processes affects all alike
        numba.set_num_threads(threads)
        t, fits = _timed(fast, 1)
        t_default.append(t)
        numba.set_num_threads(1)
        t_single.append(_timed(fast, 1)[0])
        numba.set_num_threads(threads)
        t, found_hand = _timed(lambda: handwritten(data), 1)
        t_hand.append(t)
    t_fast, t_one, t_base = (float(np.median(t)) for t in (t_default, t_single, t_hand))
    summarise(f"lasecyto.lines.fit_lines ({threads} threads)", truth, fits.as_dict(), crlb_c, snr_true, t_fast,
              args.n)
    print(f"  single-threaded: {args.n / t_one:,.0f} spectra/s")
    summarise("find_peaks + curve_fit per peak (unweighted)", truth, found_hand, crlb_c, snr_true, t_base, args.n)
    msgs, counts = np.unique(fits.fit_message[~fits.fit_ok].astype(str), return_counts=True)
    print(f"\nfit_lines failures by reason: {dict(zip(msgs.tolist(), counts.tolist()))}")
    print(f"speed ratio fit_lines / hand-written, default threading ({threads} threads): {t_base / t_fast:.1f}x "
          f"(the target, >= 100x)")
    print(f"speed ratio fit_lines / hand-written, single-threaded: {t_base / t_one:.1f}x")
    print(f"(medians of {args.repeats} interleaved runs on the same {args.n} spectra; compilation excluded by a "
          f"warm-up call)")
    if args.noise_spectra:
        false_lines_pure_noise(args.noise_spectra, args.seed)
    if args.stream_frames:
        print()
        subprocess.run([sys.executable, __file__, "--stream-only", "--stream-frames", str(args.stream_frames),
                        "--seed", str(args.seed)], check=True)


if __name__ == "__main__":
    main()
