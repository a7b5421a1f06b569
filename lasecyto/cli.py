"""The ``lasecyto`` command.

Exit status: 0 when every item succeeded, 1 when the run could not start
(bad manifest, bad recipe), 2 for a usage error, 3 when the run finished but
some items failed (they are listed in the run record).
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from ._version import __version__
from .exceptions import LasecytoError

__all__ = ["main"]

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_PARTIAL = 0, 1, 2, 3


def _add_run_options(p):
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="worker processes (default 1; each opens its own files)")
    p.add_argument("--recipe", type=Path, default=None, metavar="FILE",
                   help="recipe of stage parameters (TOML); the manifest's [parameters] override it")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    p.add_argument("--no-report", action="store_true", help="do not write report.html")


def _parser():
    parser = argparse.ArgumentParser(
        prog="lasecyto",
        description="Time-lapse analysis of lasing cells: calibrated laser lines, tracked modes, "
                    "cavity quantities and per-cell verdicts.")
    parser.add_argument("--version", action="version", version=f"lasecyto {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="log progress per item (-v) or everything (-vv) to standard error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    run = sub.add_parser("run", help="run the whole pipeline over an experiment manifest",
                         description="Run calibration, line fitting, tracking, cavity inversion and "
                                     "verdicts for every cell of an experiment manifest; write tables "
                                     "(Parquet and CSV), a run record and an HTML report to --out.")
    run.add_argument("manifest", type=Path, help="experiment manifest (TOML)")
    run.add_argument("--out", type=Path, required=True, metavar="DIR", help="run directory")
    _add_run_options(run)

    demo = sub.add_parser("demo", help="generate the synthetic demo experiment and run it",
                          description="Generate the built-in synthetic demo experiment (a hypertonic "
                                      "shift assay of cell lasers in a Fabry-Perot gap), run the whole "
                                      "pipeline on it and print a per-condition summary.")
    demo.add_argument("--out", type=Path, default=Path("demo-output"), metavar="DIR",
                      help="output directory (default: demo-output)")
    demo.add_argument("--seed", type=int, default=2026, help="seed of the generator (default 2026)")
    _add_run_options(demo)

    rep = sub.add_parser("report", help="(re)write the HTML report of a run directory",
                         description="Write RUN_DIR/report.html from the run's tables and record.")
    rep.add_argument("run_dir", type=Path, help="run directory written by 'lasecyto run'")

    lin = sub.add_parser("lines", help="fit every line of one spectral stack into a lines table",
                         description="Detect and fit every laser line of every frame of a spectral stack "
                                     "and write the lines table (Parquet and CSV) to --out.")
    lin.add_argument("stack", type=Path, help="spectral stack (TIFF, CSV or NPZ)")
    lin.add_argument("--sidecar", type=Path, default=None, metavar="FILE",
                     help="sidecar metadata (default: the stack path with suffix .json, if present)")
    lin.add_argument("--lamp", type=Path, default=None, metavar="FILE",
                     help="lamp frame for the wavelength axis (needs --reference and a wavelength_guess)")
    lin.add_argument("--reference", default=None, metavar="SET", help="reference line set, e.g. 'Ne I'")
    lin.add_argument("--recipe", type=Path, default=None, metavar="FILE", help="stage parameters (TOML)")
    lin.add_argument("--out", type=Path, required=True, metavar="TABLE", help="output table path stem")
    return parser


def _summary(result, out=sys.stdout):
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
    if failed:
        print(f"\n{len(failed)} item(s) failed:", file=out)
        for it in failed:
            print(f"  {it['item']}: {it['error']}", file=out)


def _demo_truth_check(experiment_dir, result, out=sys.stdout):
    """Compare the verdicts with the generator's truth (synthetic data only)."""
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


def main(argv=None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    level = {0: logging.WARNING, 1: logging.INFO}.get(args.verbose, logging.DEBUG)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    command = "lasecyto " + " ".join(sys.argv[1:] if argv is None else list(argv))
    try:
        if args.command == "report":
            from .report import write_html_report
            path = write_html_report(args.run_dir)
            print(path)
            return EXIT_OK
        if args.command == "lines":
            from .io import write_table
            from .pipeline import load_recipe
            from .pipeline._lines_only import fit_stack
            params = load_recipe(args.recipe) if args.recipe is not None else None
            table = fit_stack(args.stack, sidecar=args.sidecar, parameters=params, lamp=args.lamp,
                              reference=args.reference)
            for path in write_table(table, args.out, name="lines"):
                print(path)
            return EXIT_OK
        from .pipeline import run_experiment
        if args.command == "demo":
            from .synth import write_fp_experiment
            exp_dir = args.out / "experiment"
            if not args.quiet:
                print(f"generating the synthetic demo experiment in {exp_dir} (seed {args.seed}) ...")
            manifest = write_fp_experiment(exp_dir, rng=args.seed)
            run_dir = args.out / "run"
        else:
            manifest, run_dir = args.manifest, args.out
        result = run_experiment(manifest, run_dir, workers=args.workers, recipe=args.recipe,
                                show_progress=False if args.quiet else None,
                                write_report=not args.no_report, command=command)
    except LasecytoError as exc:
        print(f"lasecyto: error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    if not args.quiet:
        _summary(result)
        if args.command == "demo":
            _demo_truth_check(args.out / "experiment", result)
    return EXIT_PARTIAL if result.n_failed else EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
