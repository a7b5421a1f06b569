"""``lasecyto sphere``: bead (WGM) diameter and medium index per frame from lines, tracks or a stack."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ._common import EXIT_ERROR, EXIT_OK
from ._inputs import Problems, add_stack_options, frame_times, load_lines


#: manifest keys of [sphere] and the options that set them here (longest key first)
_OPTIONS = (("sphere.medium_index_range", "--medium-index-range"), ("sphere.diameter_range_um", "--diameter-range"),
            ("sphere.bead_material", "--bead-material"), ("sphere.temperature_c", "--temperature"),
            ("sphere.bead_index", "--bead-index"), ("sphere.medium", "--medium"))


def register(sub):
    p = sub.add_parser(
        "sphere", help="bead diameter and medium index per frame (whispering-gallery modes)",
        description="Identify the whispering-gallery modes (polarization, l, radial order) of every cell of a "
                    "lines or tracks table, or of a spectral stack, and fit the bead diameter and the "
                    "refractive index around it in every frame. Writes tracks and cell_frames tables "
                    "(Parquet and CSV) to --out.")
    p.add_argument("input", type=Path, help="lines or tracks table (.parquet, .csv) or a spectral stack")
    bead = p.add_mutually_exclusive_group(required=True)
    bead.add_argument("--bead-material", metavar="NAME",
                      help="named dispersion of the bead, e.g. ps-ma, ps-sultanova, pmma-sultanova")
    bead.add_argument("--bead-index", type=float, metavar="N", help="constant bead index instead")
    p.add_argument("--medium", default="water-daimon", metavar="NAME",
                   help="base dispersion of the surroundings (default water-daimon); an index offset is fitted")
    p.add_argument("--temperature", type=float, default=None, metavar="DEGC", help="temperature (water-iapws)")
    p.add_argument("--diameter-range", type=float, nargs=2, required=True, metavar=("LOW", "HIGH"),
                   help="bead diameters to search, um")
    p.add_argument("--medium-index-range", type=float, nargs=2, default=None, metavar=("LOW", "HIGH"),
                   help="bounds of the index around the bead (default 1.33 1.41)")
    p.add_argument("--perturbation-s", type=float, default=math.nan, metavar="T",
                   help="frames before this time form the baseline of the changes (default: all frames)")
    add_stack_options(p)
    p.add_argument("--out", type=Path, required=True, metavar="DIR",
                   help="directory for tracks.{parquet,csv} and cell_frames.{parquet,csv}")
    p.set_defaults(handler=handle)


def handle(args):
    import pandas as pd

    from .. import tables
    from ..exceptions import InputError
    from ..io import write_table
    from ..io._cavity_spec import parse_sphere
    from ..pipeline import load_recipe, resolve_parameters
    from ..pipeline._sphere import sphere_cell_row, sphere_tables

    doc = {"medium": args.medium, "diameter_range_um": list(args.diameter_range)}
    if args.bead_material is not None:
        doc["bead_material"] = args.bead_material
    else:
        doc["bead_index"] = args.bead_index
    if args.temperature is not None:
        doc["temperature_c"] = args.temperature
    if args.medium_index_range is not None:
        doc["medium_index_range"] = list(args.medium_index_range)
    problems = Problems()
    spec = parse_sphere(doc, problems, required=True)
    if problems.items:
        text = "; ".join(problems.items)
        for key, option in _OPTIONS:
            text = text.replace(key, option)
        raise InputError(text)
    params = resolve_parameters(load_recipe(args.recipe) if args.recipe is not None else {}, source="parameters")
    lines, given_tracks, sidecar = load_lines(args, params)
    n_frames, times = frame_times(lines, sidecar)
    all_tracks, all_frames = [], []
    n_ok = 0
    for cell_id, cell_lines in lines.groupby("cell_id", sort=True):
        cell_lines = cell_lines.reset_index(drop=True)
        tracks, frames_tab, info = sphere_tables(cell_lines, time_s=times, n_frames=n_frames, spec=spec,
                                                 parameters=params, perturbation_s=args.perturbation_s,
                                                 cell_id=cell_id,
                                                 tracks=None if given_tracks is None else cell_lines)
        row = sphere_cell_row(frames_tab, tracks, info, parameters=params, perturbation_s=args.perturbation_s)
        all_tracks.append(tracks)
        all_frames.append(frames_tab)
        fitted = frames_tab[frames_tab["sphere_lines"] > 0]
        print(f"{cell_id}: {len(fitted)} of {len(frames_tab)} frames fitted", end="")
        if len(fitted):
            n_ok += 1
            d = fitted["diameter_um"].to_numpy(float)
            n = fitted["medium_index"].to_numpy(float)
            print(f"; diameter {np.nanmedian(d):.4f} um (median error {np.nanmedian(fitted['diameter_err_um']) * 1e3:.2f} nm)"
                  f"; medium index {np.nanmedian(n):.5f} at {params['sphere']['reference_nm']:g} nm"
                  f" (median error {np.nanmedian(fitted['medium_index_err']):.1e})", end="")
        print(f"{'; ' + row['note'] if row['note'] else ''}")
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    for name, parts in (("tracks", all_tracks), ("cell_frames", all_frames)):
        table = pd.concat(parts, ignore_index=True) if parts else tables.empty(name)
        for path in write_table(tables.validate(table, name), out / name, name=name):
            print(path)
    return EXIT_OK if n_ok else EXIT_ERROR
