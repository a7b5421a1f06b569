"""``lasecyto track``: link a lines table into mode tracks with families, mode numbers and hop flags."""

from __future__ import annotations

import sys
from pathlib import Path

from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser("track", help="link a lines table into mode tracks (families, mode numbers, hops)",
                       description="Link the lasing lines of every cell of a lines table (Parquet or CSV, "
                                   "e.g. from 'lasecyto lines') into mode tracks, sort them into transverse "
                                   "families, assign longitudinal mode numbers and flag mode hops; write the "
                                   "tracks table (Parquet and CSV) to --out.")
    p.add_argument("lines", type=Path, metavar="LINES_TABLE", help="lines table (.parquet or .csv)")
    p.add_argument("--out", type=Path, required=True, metavar="TABLE", help="output table path stem")
    p.add_argument("--medium", default=None, metavar="NAME",
                   help="gap medium for absolute mode numbers (a lasecyto.cavity.media name, e.g. water-daimon); "
                        "without it the naive mode numbers are used")
    p.add_argument("--gap-um", type=float, default=None, metavar="L",
                   help="mirror gap in um (with --medium: the gap's index offset is fitted)")
    p.add_argument("--index-offset", type=float, default=None, metavar="DN",
                   help="gap index minus medium index when the gap is not given (default 0)")
    p.add_argument("--recipe", type=Path, default=None, metavar="FILE",
                   help="stage parameters (TOML; the [tracks] and [cavity] tables are used)")
    p.set_defaults(handler=handle)


def handle(args):
    import pandas as pd

    from .. import tables
    from ..cavity.media import get_medium
    from ..exceptions import InputError
    from ..io import read_table, write_table
    from ..pipeline import load_recipe, resolve_parameters
    from ..pipeline._track_stage import track_cell

    params = resolve_parameters(load_recipe(args.recipe) if args.recipe is not None else None,
                                source=str(args.recipe) if args.recipe is not None else "parameters")
    medium = None
    if args.medium is not None:
        try:
            medium = get_medium(args.medium)
        except InputError as exc:
            raise InputError("unknown gap medium", field="--medium", expected=exc.expected,
                             found=repr(args.medium)) from None
    for name, value in (("--gap-um", args.gap_um), ("--index-offset", args.index_offset)):
        if value is not None and not pd.notna(value):
            raise InputError("not a number", field=name, expected="a finite number", found=repr(value))
    if args.gap_um is not None and not args.gap_um > 0:
        raise InputError("gap must be positive", field="--gap-um", expected="> 0 um", found=repr(args.gap_um))
    lines = read_table(args.lines, name="lines")
    parts = []
    for cell_id in pd.unique(lines["cell_id"]):
        one = lines[lines["cell_id"] == cell_id].reset_index(drop=True)
        res = track_cell(one, params, medium=medium, gap_um=args.gap_um, index_offset=args.index_offset)
        for text in res.warnings:
            print(f"lasecyto: cell {cell_id}: warning: {text}", file=sys.stderr)
        tr = res.tracks
        numbers = res.identity.numbers
        q_text = (f"mode numbers {numbers.method}" if numbers is not None else "no mode numbers")
        print(f"cell {cell_id}: {tr['track_id'].nunique() if len(tr) else 0} tracks, "
              f"{tr['mode_family'].nunique() if len(tr) else 0} families, {int(tr['hop'].sum()) if len(tr) else 0} "
              f"hops, {q_text}")
        parts.append(tr)
    out = pd.concat(parts, ignore_index=True) if parts else tables.empty("tracks")
    for path in write_table(tables.validate(out, "tracks"), args.out, name="tracks"):
        print(path)
    return EXIT_OK
