"""``lasecyto run`` and ``lasecyto demo``: the whole pipeline over an experiment."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from ._common import EXIT_OK, EXIT_PARTIAL, EXIT_USAGE


def _positive_int(text):
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, found {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, found {text!r}")
    return value


#: demo scenarios: name -> (generator in lasecyto.synth, what it is)
_SCENARIOS = {
    "fabry-perot": ("write_fp_experiment", "a hypertonic shift assay of cell lasers in a Fabry-Perot gap"),
    "sphere": ("write_sphere_experiment", "a medium-shift assay of dye-doped bead lasers inside cells"),
    "pump": ("write_pump_experiment", "a pump-threshold series of bead lasers"),
}


def _add_run_options(p, workers=1):
    p.add_argument("--workers", type=_positive_int, default=None, metavar="N",
                   help=f"local worker processes (default {workers}; each opens its own files; a pool is "
                        "started only when the batch is large enough to pay for it)")
    p.set_defaults(default_workers=workers)
    p.add_argument("--recipe", default=None, metavar="NAME|FILE",
                   help="recipe of stage parameters: a TOML file or a built-in name such as "
                        "fabry_perot_timelapse; wins over the manifest's [experiment] recipe; the "
                        "manifest's [parameters] override it")
    p.add_argument("--resume", action="store_true",
                   help="keep the finished items of an earlier run in the same directory whose inputs, "
                        "parameters and package version are unchanged; recompute the others")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run the items on a Dask distributed cluster at ADDRESS "
                            "(e.g. tcp://10.0.0.5:8786; needs lasecyto[dask])")
    where.add_argument("--scheduler-file", type=Path, default=None, metavar="FILE",
                       help="run the items on the Dask cluster described by FILE (written by the scheduler)")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    p.add_argument("--no-report", action="store_true", help="do not write report.html")
    p.add_argument("--no-csv", action="store_true",
                   help="write the tables as Parquet only (for very large runs: the CSV of the lines "
                        "table is several GB and slow to write)")


def register(sub):
    run = sub.add_parser("run", help="run the whole pipeline over an experiment manifest",
                         description="Run calibration, line fitting, tracking, cavity inversion and "
                                     "verdicts for every cell of an experiment manifest; write tables "
                                     "(Parquet and CSV), a run record and an HTML report to --out.")
    run.add_argument("manifest", type=Path, help="experiment manifest (TOML)")
    run.add_argument("--out", type=Path, required=True, metavar="DIR", help="run directory")
    _add_run_options(run)
    run.set_defaults(handler=handle_run)

    demo = sub.add_parser("demo", help="generate the synthetic demo experiment and run it",
                          description="Generate the built-in synthetic demo experiment (a hypertonic "
                                      "shift assay of cell lasers in a Fabry-Perot gap), run the whole "
                                      "pipeline on it and print a per-condition summary.")
    demo.add_argument("--out", type=Path, default=Path("demo-output"), metavar="DIR",
                      help="output directory (default: demo-output)")
    demo.add_argument("--seed", type=int, default=2026, help="seed of the generator (default 2026)")
    demo.add_argument("--scenario", choices=tuple(_SCENARIOS), default="fabry-perot",
                      help="fabry-perot (default): cells in a mirror gap, hypertonic shift; sphere: dye-doped "
                           "beads in cells, medium shift; pump: a pump-threshold series of bead lasers")
    _add_run_options(demo, workers=min(2, os.cpu_count() or 1))
    demo.set_defaults(handler=handle_demo)


def _summary(result, out=None):
    out = sys.stdout if out is None else out  # resolved at call time (the stream may be replaced)
    cells = result.tables["cells"]
    names = ", ".join(n for n in result.tables if n in ("lines", "tracks", "cell_frames", "patterns", "cells"))
    print(f"\ntables:     {result.out_dir / 'tables'}  ({names}; .parquet and .csv)", file=out)
    print(f"run record: {result.out_dir / 'run_record.json'}", file=out)
    if result.report is not None:
        print(f"report:     {result.report}", file=out)
    if len(cells) and result.record["experiment"].get("kind", "time-lapse") == "time-lapse":
        print("\nflagged cells by condition:", file=out)
        g = cells.groupby("condition", sort=True)
        width = max(len(str(c)) for c in g.groups)
        for cond, part in g:
            n, k = len(part), int(part["changed"].sum())
            med = part.loc[part["changed"], "index_change"].median()
            extra = f"   median change of flagged cells {med:+.2e}" if k and med == med else ""
            print(f"  {cond:<{width}}  {k:>3} of {n:>3} changed{extra}", file=out)
        _analysis_summary(result.record.get("analysis") or {}, cells, out)
    failed = [it for it in result.record["items"] if it["status"] != "ok"]
    n_resumed = result.record.get("n_resumed", 0)
    if n_resumed:
        print(f"\n{n_resumed} item(s) kept from the earlier run in this directory (--resume)", file=out)
    if failed:
        print(f"\n{len(failed)} item(s) failed:", file=out)
        for it in failed:
            print(f"  {it['item']}: {it['error']}", file=out)


def _analysis_summary(analysis, cells, out):
    """How ``changed`` was decided, the classifier's grouped-CV scores and pattern-stage problems."""
    print(f"  changed: {analysis.get('changed_rule', 'per-cell rule')}", file=out)
    flags = analysis.get("flags") or {}
    if "n_controls" in flags:
        print(f"  flags: {flags['feature']} against {flags['n_controls']} control cells "
              f"({', '.join(analysis.get('control_conditions', []))}), BH FDR {100 * flags['fdr']:g} %, "
              f"{flags['method']} p-values", file=out)
    clf = analysis.get("classifier") or {}
    if clf.get("roc_auc") is not None:
        print(f"  classifier ({clf['estimator']}, {clf['label']}): grouped-CV ROC AUC {clf['roc_auc']:.3f}, "
              f"balanced accuracy {clf['balanced_accuracy']:.3f} ({clf['n_splits']} folds by dish)", file=out)
    elif clf.get("note"):
        print(f"  classifier: not scored: {clf['note']}", file=out)
    model = analysis.get("model") or {}
    if model.get("error"):
        print(f"  classifier model: not applied: {model['error']}", file=out)
    if "pattern_note" in cells.columns:
        notes = cells.loc[cells["pattern_note"].astype(str) != "", ["cell_id", "pattern_note"]]
        if len(notes):
            print(f"  patterns: {len(notes)} cell(s) without a pattern:", file=out)
            for r in notes.head(5).itertuples():
                print(f"    {r.cell_id}: {r.pattern_note}", file=out)


def _demo_truth_check(experiment_dir, result, out=None):
    """Compare the verdicts with the generator's truth (synthetic data only)."""
    out = sys.stdout if out is None else out
    import pandas as pd

    truth_path = Path(experiment_dir) / "truth" / "cells.csv"
    cells = result.tables["cells"]
    if not truth_path.is_file() or not len(cells):
        return
    truth = pd.read_csv(truth_path)
    m = cells.merge(truth[["cell_id", "responder", "treated"]], on="cell_id")
    resp = m[m["responder"].astype(bool)]
    ctrl = m[~m["treated"].astype(bool)]
    nonr = m[m["treated"].astype(bool) & ~m["responder"].astype(bool)]
    print("\nagainst the generator's truth (the pipeline never reads it):", file=out)
    print(f"  responders flagged       {int(resp['changed'].sum())} of {len(resp)}", file=out)
    print(f"  non-responders flagged   {int(nonr['changed'].sum())} of {len(nonr)}", file=out)
    print(f"  controls flagged         {int(ctrl['changed'].sum())} of {len(ctrl)}", file=out)
    truth = truth.rename(columns={"onset_s": "onset_true_s"})
    found = resp.merge(truth[["cell_id", "onset_true_s"]], on="cell_id")
    err = (found["onset_s"] - found["onset_true_s"]).abs().dropna()
    if len(err):
        print(f"  onset error of flagged responders, median  {err.median():.1f} s", file=out)
    if "pattern_order_end" in truth.columns and "pattern_change_count" in cells.columns:
        pt = cells.merge(truth[["cell_id", "pattern_order_start", "pattern_order_end", "pattern_change_s"]],
                         on="cell_id")
        has = pt["pattern_change_s"].notna()
        frame_s = float(result.tables["cell_frames"]["time_s"].diff().median())
        hit = has & ((pt["pattern_first_change_s"] - pt["pattern_change_s"]).abs() <= frame_s)
        false = ~has & (pt["pattern_change_count"] > 0)
        dominant = (pt["pattern_dominant_order"] == pt["pattern_order_start"]) | \
            (pt["pattern_dominant_order"] == pt["pattern_order_end"])
        print(f"  pattern order changes found within a frame  {int(hit.sum())} of {int(has.sum())}; "
              f"cells with a false change {int(false.sum())} of {int((~has).sum())}", file=out)
        print(f"  dominant transverse order one of the true ones  {int(dominant.sum())} of {len(pt)}", file=out)


EXIT_INTERRUPTED = 130  # the shell's status for a run stopped with Ctrl-C (128 + SIGINT)


def _run(args, manifest, run_dir):
    from ..pipeline import run_experiment

    try:
        workers = args.default_workers if args.workers is None else args.workers
        return run_experiment(manifest, run_dir, workers=workers, recipe=args.recipe,
                              show_progress=False if args.quiet else None,
                              write_report=not args.no_report, command=args.command_line,
                              resume=args.resume, scheduler=args.scheduler,
                              scheduler_file=args.scheduler_file, csv=not args.no_csv)
    except KeyboardInterrupt:
        print(f"\nlasecyto: interrupted; the cells finished so far are kept in {Path(run_dir) / 'items'}: "
              "run the same command with --resume to continue", file=sys.stderr)
        return None


def _usage_problem(args):
    if (args.scheduler is not None or args.scheduler_file is not None) and args.workers is not None:
        return "--workers applies to the local engine; with --scheduler the cluster's workers run the items"
    return None


def handle_run(args):
    problem = _usage_problem(args)
    if problem:
        print(f"lasecyto run: error: {problem}", file=sys.stderr)
        return EXIT_USAGE
    result = _run(args, args.manifest, args.out)
    if result is None:
        return EXIT_INTERRUPTED
    if not args.quiet:
        _summary(result)
        _threshold_summary(result, None)
    return EXIT_PARTIAL if result.n_failed else EXIT_OK


def _threshold_summary(result, experiment_dir, out=None):
    """Pump series: thresholds of the main modes, against the generator's truth when present."""
    out = sys.stdout if out is None else out
    import pandas as pd

    from ..safety import CAUTIONS

    thr = result.tables.get("thresholds")
    if thr is None:
        return
    truth_path = Path(experiment_dir) / "truth" / "cells.csv" if experiment_dir is not None else None
    truth = pd.read_csv(truth_path) if truth_path is not None and truth_path.is_file() else None
    main = thr.groupby("cell_id", sort=True).head(1)
    print("\nmain-mode thresholds (S-curve fit; straight line above threshold beside it):", file=out)
    for r in main.itertuples():
        text = (f"  {r.cell_id}: {r.threshold_nj:.4g} +- {r.threshold_err_nj:.2g} nJ, beta {r.beta:.3g}, "
                f"straight line {r.linear_threshold_nj:.4g} nJ")
        if r.threshold_fluence_j_cm2 == r.threshold_fluence_j_cm2:
            text += f", threshold fluence {r.threshold_fluence_j_cm2 * 1e3:.3g} mJ/cm^2"
        if truth is not None and r.cell_id in set(truth["cell_id"]):
            t = truth.set_index("cell_id").loc[r.cell_id]
            text += f"   (generator: {t['threshold_nj']:.4g} nJ, beta {t['beta']:.3g})"
        print(text + ("" if r.fit_ok else f"  FIT NOT OK: {r.fit_message}"), file=out)
    print("\n" + CAUTIONS, file=out)


def handle_demo(args):
    from .. import synth

    writer, story = _SCENARIOS[args.scenario]
    problem = _usage_problem(args)
    if problem:
        print(f"lasecyto demo: error: {problem}", file=sys.stderr)
        return EXIT_USAGE
    exp_dir = args.out / "experiment"
    if not args.quiet:
        print(f"generating the synthetic demo experiment ({story}) in {exp_dir} (seed {args.seed}) ...")
    manifest = getattr(synth, writer)(exp_dir, rng=args.seed)
    result = _run(args, manifest, args.out / "run")
    if result is None:
        return EXIT_INTERRUPTED
    if not args.quiet:
        _summary(result)
        if args.scenario == "pump":
            _threshold_summary(result, args.out / "experiment")
        else:
            _demo_truth_check(args.out / "experiment", result)
    return EXIT_PARTIAL if result.n_failed else EXIT_OK
