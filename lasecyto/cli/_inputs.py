"""Inputs shared by the commands that take either a table or a spectral stack."""

from __future__ import annotations

from pathlib import Path

import numpy as np

_STACK_SUFFIXES = (".tif", ".tiff", ".npz")


def _is_table(path):
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix == ".parquet":
        return True
    if suffix != ".csv":
        return False
    with open(path, encoding="utf-8", errors="replace") as fh:  # a table has named columns
        header = fh.readline().strip().split(",")
    return "center_nm" in header and "cell_id" in header


def _columns(path):
    if path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        return set(pq.read_schema(path).names)
    with open(path, encoding="utf-8", errors="replace") as fh:
        return set(fh.readline().strip().split(","))


def add_stack_options(p):
    """Options of a command that also reads a spectral stack (as ``lasecyto lines`` does)."""
    p.add_argument("--sidecar", type=Path, default=None, metavar="FILE",
                   help="sidecar metadata (default: the stack path with suffix .json, if present)")
    p.add_argument("--lamp", type=Path, default=None, metavar="FILE",
                   help="lamp frame for the wavelength axis (needs --reference and a wavelength_guess)")
    p.add_argument("--reference", default=None, metavar="SET", help="reference line set, e.g. 'Ne I'")
    p.add_argument("--recipe", type=Path, default=None, metavar="FILE", help="stage parameters (TOML)")
    p.add_argument("--cell", default=None, metavar="CELL_ID", help="only this cell of a table")


def load_lines(args, params):
    """``(lines, tracks or None, sidecar or None)`` from a table or a stack argument ``args.input``.

    A ``.parquet`` file, or a ``.csv`` with ``cell_id`` and ``center_nm`` columns, is a
    ``lines`` (or, with ``track_id``, a ``tracks``) table; anything else is a spectral stack
    fitted with the lines stage.
    """
    from ..exceptions import InputError
    from ..io import default_sidecar_path, read_sidecar, read_table
    from ..pipeline import fit_stack

    path = Path(args.input)
    sidecar_path = args.sidecar
    if _is_table(path):
        table = read_table(path, name="tracks" if "track_id" in _columns(path) else "lines")
        if args.cell is not None:
            if args.cell not in set(table["cell_id"]):
                raise InputError("cell not in the table", path=path, field="--cell",
                                 expected=f"one of {sorted(set(table['cell_id']))[:5]}", found=repr(args.cell))
            table = table[table["cell_id"] == args.cell].reset_index(drop=True)
        side = read_sidecar(sidecar_path) if sidecar_path is not None else None
        if side is not None and table["cell_id"].nunique() > 1:
            raise InputError("one sidecar describes one cell's frames", path=path, field="--cell",
                             expected="--cell CELL_ID with --sidecar", found=f"{table['cell_id'].nunique()} cells")
        return (table, table, side) if "track_id" in table.columns else (table, None, side)
    if sidecar_path is None and default_sidecar_path(path).is_file():
        sidecar_path = default_sidecar_path(path)
    lines = fit_stack(path, sidecar=sidecar_path, parameters=params, lamp=args.lamp, reference=args.reference)
    side = read_sidecar(sidecar_path) if sidecar_path is not None else None
    return lines, None, side


def frame_times(lines, sidecar):
    """Frame count and times: from the sidecar when given, else from the table (frames 0..max)."""
    if sidecar is not None:
        t = np.asarray(sidecar.frame_times_s, dtype=float)
        return t.size, t
    n = int(lines["frame"].max()) + 1 if len(lines) else 0
    t = np.full(n, np.nan)
    first = lines.groupby("frame")["time_s"].first()
    t[first.index.to_numpy(np.int64)] = first.to_numpy(float)
    return n, t  # frames without lines have no known time (NaN)


class Problems:
    """Collects validation problems (the interface of the manifest's collector)."""

    def __init__(self):
        self.items = []

    def add(self, field, message, expected, found):
        self.items.append(f"{field}: {message} (expected {expected}, found {found})")
