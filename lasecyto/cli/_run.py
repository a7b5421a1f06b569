"""``lasecyto run`` and ``lasecyto demo``: the whole pipeline over an experiment."""

from __future__ import annotations

import argparse
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


def _add_run_options(p):
    p.add_argument("--workers", type=_positive_int, default=1, metavar="N",
                   help="local worker processes (default 1 = serial; each opens its own files; a pool is "
                        "started only when the batch is large enough to pay for it)")
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
    _add_run_options(demo)
    demo.set_defaults(handler=handle_demo)


def _summary(result, out=None):
    out = sys.stdout if out is None else out
    cells = result.tables["cells"]
    print(f"\ntables:     {result.out_dir / 'tables'}  (lines, tracks, cell_frames, cells; .parquet and .csv)",
          file=out)
    print(f"run record: {result.out_dir / 'run_record.json'}", file=out)
    if result.report is not None:
        print(f"report:     {result.report}", file=out)
    if len(cells):
        print("\nflagged cells by condition:", file=out)
        g = cells.groupby("condition", sort=True)
        width = max(len(str(c)) for c in g.groups)
        for cond, part in g:
            n, k = len(part), int(part["changed"].sum())
            med = part.loc[part["changed"], "index_change"].median()
            extra = f"   median change of flagged cells {med:+.2e}" if k else ""
            print(f"  {cond:<{width}}  {k:>3} of {n:>3} changed{extra}", file=out)
    failed = [it for it in result.record["items"] if it["status"] != "ok"]
    n_resumed = result.record.get("n_resumed", 0)
    if n_resumed:
        print(f"\n{n_resumed} item(s) kept from the earlier run in this directory (--resume)", file=out)
    if failed:
        print(f"\n{len(failed)} item(s) failed:", file=out)
        for it in failed:
            print(f"  {it['item']}: {it['error']}", file=out)


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


EXIT_INTERRUPTED = 130  # the shell's status for a run stopped with Ctrl-C (128 + SIGINT)


def _run(args, manifest, run_dir):
    from ..pipeline import run_experiment

    try:
        return run_experiment(manifest, run_dir, workers=args.workers, recipe=args.recipe,
                              show_progress=False if args.quiet else None,
                              write_report=not args.no_report, command=args.command_line,
                              resume=args.resume, scheduler=args.scheduler,
                              scheduler_file=args.scheduler_file, csv=not args.no_csv)
    except KeyboardInterrupt:
        print(f"\nlasecyto: interrupted; the cells finished so far are kept in {Path(run_dir) / 'items'}: "
              "run the same command with --resume to continue", file=sys.stderr)
        return None


def _usage_problem(args):
    if (args.scheduler is not None or args.scheduler_file is not None) and args.workers != 1:
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
    return EXIT_PARTIAL if result.n_failed else EXIT_OK


def handle_demo(args):
    from ..synth import write_fp_experiment

    problem = _usage_problem(args)
    if problem:
        print(f"lasecyto demo: error: {problem}", file=sys.stderr)
        return EXIT_USAGE
    exp_dir = args.out / "experiment"
    if not args.quiet:
        print(f"generating the synthetic demo experiment in {exp_dir} (seed {args.seed}) ...")
    manifest = write_fp_experiment(exp_dir, rng=args.seed)
    result = _run(args, manifest, args.out / "run")
    if result is None:
        return EXIT_INTERRUPTED
    if not args.quiet:
        _summary(result)
        _demo_truth_check(args.out / "experiment", result)
    return EXIT_PARTIAL if result.n_failed else EXIT_OK
