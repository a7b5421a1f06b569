"""``lasecyto report``: (re)write the HTML report of a run directory."""

from __future__ import annotations

from pathlib import Path

from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser("report", help="(re)write the HTML report of a run directory",
                       description="Write RUN_DIR/report.html from the run's tables and record.")
    p.add_argument("run_dir", type=Path, help="run directory written by 'lasecyto run'")
    p.set_defaults(handler=handle)


def handle(args):
    from ..report import write_html_report

    print(write_html_report(args.run_dir))
    return EXIT_OK
