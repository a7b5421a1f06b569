"""The ``lasecyto`` command.

One module per command in this package; each module has ``register(sub)``,
which adds its sub-parser and sets ``handler`` (a function of the parsed
arguments returning the exit status).  A new command is a new module and one
entry in ``_COMMANDS``.

Exit status: 0 when every item succeeded, 1 when the work could not start
(bad manifest, bad recipe, bad input file), 2 for a usage error, 3 when a run
finished but some items failed (they are listed in the run record).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import sys

from .._version import __version__
from ..exceptions import LasecytoError
from ._common import EXIT_ERROR, EXIT_OK, EXIT_PARTIAL, EXIT_USAGE
from ._run import _summary

__all__ = ["main", "_summary", "EXIT_OK", "EXIT_ERROR", "EXIT_USAGE", "EXIT_PARTIAL"]

#: command modules, in the order ``lasecyto --help`` lists them
_COMMANDS = ("_run", "_report", "_lines", "_track", "_sphere", "_threshold", "_dose", "_patterns",
             "_classify")


def _parser():
    parser = argparse.ArgumentParser(
        prog="lasecyto",
        description="Time-lapse analysis of lasing cells: calibrated laser lines, tracked modes, "
                    "cavity quantities and per-cell verdicts.")
    parser.add_argument("--version", action="version", version=f"lasecyto {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0,
                        help="log progress per item (-v) or everything (-vv) to standard error")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in _COMMANDS:
        importlib.import_module(f"{__name__}.{name}").register(sub)
    return parser


def main(argv=None) -> int:
    parser = _parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    level = {0: logging.WARNING, 1: logging.INFO}.get(args.verbose, logging.DEBUG)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    args.command_line = "lasecyto " + " ".join(sys.argv[1:] if argv is None else list(argv))
    try:
        return args.handler(args)
    except LasecytoError as exc:
        print(f"lasecyto: error: {exc}", file=sys.stderr)
        return EXIT_ERROR


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
