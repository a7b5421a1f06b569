"""``lasecyto patterns``: the emission-pattern stage alone, on one camera image stack."""

from __future__ import annotations

import sys
from pathlib import Path

from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser("patterns", help="segment, track and describe the emission patterns of one image stack",
                       description="Find the lasing regions of every frame of a grayscale camera stack (TIFF or "
                                   "OME-TIFF), link them over frames, fit each with Hermite- and Laguerre-Gaussian "
                                   "transverse orders, measure frame-to-frame pattern correlation and flag pattern "
                                   "changes; write the patterns table (Parquet and CSV) to --out.")
    p.add_argument("stack", type=Path, help="grayscale image stack (frames, rows, cols), TIFF or OME-TIFF")
    p.add_argument("--sidecar", type=Path, default=None, metavar="FILE",
                   help="JSON sidecar with frame_times_s, n_frames, pixel_size_um "
                        "(default: the stack path with suffix .json, if present)")
    p.add_argument("--recipe", type=Path, default=None, metavar="FILE",
                   help="stage parameters (TOML); its [patterns] table is used")
    p.add_argument("--pixel-size", type=float, default=None, metavar="UM", dest="pixel_size_um",
                   help="pixel size in micrometres (overrides the file's metadata)")
    p.add_argument("--out", type=Path, required=True, metavar="TABLE", help="output table path stem")
    p.set_defaults(handler=handle)


def handle(args):
    from ..io import write_table
    from ..pipeline import load_recipe
    from ..pipeline._patterns import pattern_stack

    params = load_recipe(args.recipe) if args.recipe is not None else None
    sidecar = args.sidecar if args.sidecar is not None else "auto"
    table, tracks, reason = pattern_stack(args.stack, sidecar=sidecar, parameters=params,
                                          pixel_size_um=args.pixel_size_um)
    for path in write_table(table, args.out, name="patterns"):
        print(path)
    if reason:
        print(f"lasecyto: {args.stack}: {reason}", file=sys.stderr)
        return EXIT_OK
    print(f"{table['frame'].nunique()} frames with lasing regions, {len(table)} regions, {len(tracks)} tracks")
    for t in tracks.itertuples():
        dec = f"{t.decorrelation_time_s:.3g} s" if t.decorrelation_time_s == t.decorrelation_time_s else "-"
        print(f"  track {t.track_id}: frames {t.first_frame}-{t.last_frame} at ({t.row_px:.1f}, {t.col_px:.1f}) px, "
              f"order {t.dominant_order or '-'}, {t.n_pattern_changes} change(s), decorrelation {dec}")
    return EXIT_OK
