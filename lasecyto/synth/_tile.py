"""Large synthetic experiments made cheaply by reusing the stacks of a few generated cells."""

from __future__ import annotations

import os
import pathlib
import shutil
import tomllib

from ..exceptions import InputError
from ._experiment import _toml_table

__all__ = ["tile_experiment"]


def _place(src, dst, how):
    dst.parent.mkdir(parents=True, exist_ok=True)
    if dst.is_symlink() or dst.exists():
        dst.unlink()
    if how == "symlink":
        os.symlink(src, dst)
    else:
        shutil.copyfile(src, dst)


def tile_experiment(manifest_path, out_dir, *, n_cells, files="symlink"):
    """Write an experiment of ``n_cells`` cells that reuse the stacks of a generated one.

    Cell ``k`` of the new experiment is a repeat of cell ``k mod n`` of the
    ``n`` cells of ``manifest_path`` (same dish, detector rows and data) under
    the id ``"<base id>~<k>"``.  Every new cell gets its own stack and sidecar
    file (a symbolic link to, or a copy of, the base files), so per-file work
    such as hashing is done once per cell, as with measured data.  The lamp,
    dishes and ``[parameters]`` are kept.  Meant for batch-machinery tests
    and scale benchmarks: the data are synthetic and repeated.

    Parameters
    ----------
    manifest_path : path
        Manifest written by :func:`write_fp_experiment` (or any manifest).
    out_dir : path
        Directory of the new manifest ``experiment.toml`` and its ``spectra/``.
    n_cells : int
        Number of cells to write.
    files : {"symlink", "copy"}
        How each cell's files are made.

    Returns
    -------
    pathlib.Path
        The new manifest.
    """
    if files not in ("symlink", "copy"):
        raise InputError("unknown file mode", field="files", expected="'symlink' or 'copy'", found=repr(files))
    if isinstance(n_cells, bool) or not isinstance(n_cells, int) or n_cells < 1:
        raise InputError("bad cell count", field="n_cells", expected="an integer >= 1", found=repr(n_cells))
    manifest_path = pathlib.Path(manifest_path).resolve()
    root = manifest_path.parent
    with open(manifest_path, "rb") as fh:
        doc = tomllib.load(fh)
    base = doc.get("cells", [])
    if not base:
        raise InputError("no cells to tile", path=manifest_path, field="cells",
                         expected="one or more [[cells]]", found="none")
    out = pathlib.Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)

    exp = dict(doc["experiment"])
    exp["name"] = f"{exp.get('name', 'experiment')}-tiled-{n_cells}"
    exp["description"] = (f"SYNTHETIC and REPEATED: {n_cells} cells that reuse the stacks of the "
                          f"{len(base)} generated cells of {manifest_path}. " + exp.get("description", ""))
    parts = ["# Tiled synthetic experiment written by lasecyto.synth.tile_experiment (not measured data).\n",
             _toml_table("[experiment]", list(exp.items()))]
    if "lamp" in doc:
        lamp = dict(doc["lamp"])
        for key in ("stack", "sidecar"):
            if key in lamp:
                lamp[key] = str(root / lamp[key])
        parts.append(_toml_table("[lamp]", list(lamp.items())))
    for stage, values in doc.get("parameters", {}).items():
        parts.append(_toml_table(f"[parameters.{stage}]", list(values.items())))
    for dish in doc.get("dishes", []):
        parts.append(_toml_table("[[dishes]]", list(dish.items())))
    width = len(str(n_cells - 1))
    for k in range(n_cells):
        cell = base[k % len(base)]
        stack = root / cell["stack"]
        sidecar = root / cell.get("sidecar", str(pathlib.PurePosixPath(cell["stack"]).with_suffix(".json")))
        name = f"t{k:0{width}d}"
        new_stack = out / "spectra" / f"{name}{stack.suffix}"
        new_sidecar = out / "spectra" / f"{name}.json"
        _place(stack, new_stack, files)
        _place(sidecar, new_sidecar, files)
        items = [("cell_id", f"{cell['cell_id']}~{k}"), ("dish", cell["dish"]),
                 ("stack", f"spectra/{new_stack.name}"), ("sidecar", f"spectra/{new_sidecar.name}")]
        if "rows" in cell:
            items.append(("rows", list(cell["rows"])))
        parts.append(_toml_table("[[cells]]", items))
    path = out / "experiment.toml"
    path.write_text("\n".join(parts), encoding="utf-8")
    return path
