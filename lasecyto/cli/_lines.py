"""``lasecyto lines``: the line stage alone, on one spectral stack."""

from __future__ import annotations

from pathlib import Path

from ._common import EXIT_OK


def register(sub):
    p = sub.add_parser("lines", help="fit every line of one spectral stack into a lines table",
                       description="Detect and fit every laser line of every frame of a spectral stack "
                                   "and write the lines table (Parquet and CSV) to --out.  A lamp frame "
                                   "(--lamp) gives the wavelength axis and the instrument function; dark and "
                                   "flat frames (--dark, --flat) give the camera's offset, read noise and gain.")
    p.add_argument("stack", type=Path, help="spectral stack (TIFF, CSV or NPZ)")
    p.add_argument("--sidecar", type=Path, default=None, metavar="FILE",
                   help="sidecar metadata (default: the stack path with suffix .json, if present)")
    p.add_argument("--lamp", type=Path, default=None, metavar="FILE",
                   help="lamp frame for the wavelength axis (needs --reference and a wavelength_guess)")
    p.add_argument("--reference", default=None, metavar="SET", help="reference line set, e.g. 'Ne I'")
    p.add_argument("--dark", type=Path, default=None, metavar="FILE",
                   help="dark frames (same exposure): offset map and read noise are measured from them")
    p.add_argument("--flat", type=Path, default=None, metavar="FILE",
                   help="frames of a steady broadband scene: the gain is measured by photon transfer")
    p.add_argument("--gain-from-data", action="store_true",
                   help="measure the gain by photon transfer on the stack itself (frames normalised)")
    p.add_argument("--recipe", type=Path, default=None, metavar="FILE", help="stage parameters (TOML)")
    p.add_argument("--out", type=Path, required=True, metavar="TABLE", help="output table path stem")
    p.set_defaults(handler=handle)


def handle(args):
    from ..io import write_table
    from ..pipeline import load_recipe
    from ..pipeline._lines_only import fit_stack

    params = load_recipe(args.recipe) if args.recipe is not None else None
    camera = {}
    if args.dark is not None:
        camera["dark_stack"] = args.dark
    if args.flat is not None:
        camera["flat_stack"] = args.flat
    if args.gain_from_data:
        camera["gain_from_data"] = True
    table = fit_stack(args.stack, sidecar=args.sidecar, parameters=params, lamp=args.lamp,
                      reference=args.reference, camera=camera)
    for path in write_table(table, args.out, name="lines"):
        print(path)
    return EXIT_OK
