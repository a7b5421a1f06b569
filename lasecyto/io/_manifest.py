"""Experiment manifest (TOML): dishes, cells, their stacks, the lamp and stage parameters."""

from __future__ import annotations

import math
import numbers
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..exceptions import InputError
from ._sidecar import default_sidecar_path

__all__ = ["CellSpec", "DishSpec", "LampSpec", "Manifest", "missing_files", "read_manifest"]

RESONATORS = ("fabry-perot",)


@dataclass(frozen=True)
class LampSpec:
    """Lamp frames for wavelength calibration; paths are absolute."""

    stack: Path
    sidecar: Path
    reference: str


@dataclass(frozen=True)
class DishSpec:
    """A dish (or well): its condition and perturbation time (NaN when none)."""

    dish: str
    condition: str
    perturbation_s: float = math.nan


@dataclass(frozen=True)
class CellSpec:
    """A cell: where its frames are and which detector rows it owns (None: all rows)."""

    cell_id: str
    dish: str
    condition: str
    perturbation_s: float
    stack: Path
    sidecar: Path
    rows: tuple[int, int] | None = None


@dataclass(frozen=True)
class Manifest:
    """A validated experiment manifest; every path is absolute."""

    path: Path
    root: Path
    name: str
    resonator: str
    gap_um: float
    synthetic: bool
    description: str
    lamp: LampSpec | None
    dishes: dict = field(default_factory=dict)
    cells: tuple = ()
    parameters: dict = field(default_factory=dict)
    recipe: str | None = None  # [experiment] recipe: a path relative to the manifest or a built-in name


def _join(root, relative):
    """Absolute, normalised path of a manifest entry (relative to the manifest directory)."""
    return Path(os.path.normpath(root / relative))


def _show(value):
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


class _Problems:
    """Collects structural problems so that all of them are reported at once."""

    def __init__(self):
        self.items = []

    def add(self, field, message, expected, found):
        self.items.append(f"{field}: {message} (expected {expected}, found {found})")

    def text(self, doc, key, where, *, required=True):
        if key not in doc:
            if required:
                self.add(f"{where}.{key}", "missing", "a string", "absent")
            return None
        v = doc[key]
        if not isinstance(v, str) or not v.strip():
            self.add(f"{where}.{key}", "not a non-empty string", "a non-empty string", _show(v))
            return None
        return v

    def number(self, doc, key, where, *, positive=False, allow_nan=False):
        if key not in doc:
            return math.nan
        v = doc[key]
        ok = isinstance(v, numbers.Real) and not isinstance(v, bool)
        if ok and math.isnan(v):
            ok = allow_nan
        elif ok:
            ok = math.isfinite(v) and (v > 0 if positive else True)
        if not ok:
            self.add(f"{where}.{key}", "bad number", "a number > 0" if positive else "a finite number", _show(v))
            return math.nan
        return float(v)


def _table(doc, key, problems, where):
    v = doc.get(key)
    if v is None:
        return None
    if not isinstance(v, dict):
        problems.add(where, "not a table", f"a [{key}] table", type(v).__name__)
        return None
    return v


def _array_of_tables(doc, key, problems):
    v = doc.get(key, [])
    if not isinstance(v, list) or not all(isinstance(t, dict) for t in v):
        problems.add(key, "not an array of tables", f"[[{key}]] entries", type(v).__name__)
        return []
    return v


def _rows(value, problems, where):
    ok = (isinstance(value, list) and len(value) == 2
          and all(isinstance(r, int) and not isinstance(r, bool) for r in value)
          and 0 <= value[0] < value[1])
    if not ok:
        problems.add(where, "bad detector row range", "[start, stop] integers with 0 <= start < stop",
                     _show(value))
        return None
    return (int(value[0]), int(value[1]))


def read_manifest(path) -> Manifest:
    """Read and validate an experiment manifest.

    Paths inside are resolved relative to the manifest's directory.  Stack
    and sidecar files are not required to exist (see :func:`missing_files`).

    Raises
    ------
    InputError
        One error listing every structural problem found, separated by "; ".
    """
    path = Path(path).resolve()
    root = path.parent
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError("manifest not found", path=path, expected="an existing TOML file",
                         found="nothing") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"invalid TOML: {exc}", path=path, expected="valid TOML",
                         found="a syntax error") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError("manifest unreadable", path=path, found=" ".join(str(exc).split())) from None

    p = _Problems()
    exp = _table(doc, "experiment", p, "experiment")
    if exp is None and "experiment" not in doc:
        p.add("experiment", "missing table", "an [experiment] table with a name", "absent")
    exp = exp or {}
    name = p.text(exp, "name", "experiment", required="experiment" in doc) or ""
    resonator = exp.get("resonator")
    if "experiment" in doc and resonator not in RESONATORS:
        p.add("experiment.resonator", "unsupported resonator", " or ".join(repr(r) for r in RESONATORS),
              "absent" if resonator is None else _show(resonator))
    gap_um = p.number(exp, "gap_um", "experiment", positive=True)
    synthetic = exp.get("synthetic", False)
    if not isinstance(synthetic, bool):
        p.add("experiment.synthetic", "not a boolean", "true or false", _show(synthetic))
        synthetic = False
    description = exp.get("description", "")
    if not isinstance(description, str):
        p.add("experiment.description", "not a string", "a string", _show(description))
        description = ""
    recipe = p.text(exp, "recipe", "experiment", required=False)

    lamp = None
    lamp_doc = _table(doc, "lamp", p, "lamp")
    if lamp_doc is not None:
        stack = p.text(lamp_doc, "stack", "lamp")
        reference = p.text(lamp_doc, "reference", "lamp")
        sidecar = p.text(lamp_doc, "sidecar", "lamp", required=False)
        if stack is not None and reference is not None and ("sidecar" not in lamp_doc or sidecar):
            stack_path = _join(root, stack)
            lamp = LampSpec(stack=stack_path,
                            sidecar=_join(root, sidecar) if sidecar else default_sidecar_path(stack_path),
                            reference=reference)

    parameters = _table(doc, "parameters", p, "parameters") or {}
    for stage, values in parameters.items():
        if not isinstance(values, dict):
            p.add(f"parameters.{stage}", "not a table", "a table of stage parameters", _show(values))

    dishes = {}
    for i, d in enumerate(_array_of_tables(doc, "dishes", p)):
        where = f"dishes[{i}]"
        dish = p.text(d, "dish", where)
        condition = p.text(d, "condition", where)
        pert = p.number(d, "perturbation_s", where, allow_nan=True)
        if dish is None:
            continue
        if dish in dishes:
            p.add(f"{where}.dish", "repeated dish", "unique dish names", _show(dish))
            continue
        if condition is not None:
            dishes[dish] = DishSpec(dish=dish, condition=condition, perturbation_s=pert)
        else:
            dishes[dish] = None  # known name, problem already recorded

    cells, seen = [], set()
    cell_docs = _array_of_tables(doc, "cells", p)
    if doc.get("cells", []) == []:
        p.add("cells", "no cells", "one or more [[cells]] entries", "none")
    for i, c in enumerate(cell_docs):
        where = f"cells[{i}]"
        cell_id = p.text(c, "cell_id", where)
        dish = p.text(c, "dish", where)
        stack = p.text(c, "stack", where)
        sidecar = p.text(c, "sidecar", where, required=False)
        bad_sidecar = "sidecar" in c and sidecar is None
        rows = _rows(c["rows"], p, f"{where}.rows") if "rows" in c else None
        if cell_id is not None:
            if cell_id in seen:
                p.add(f"{where}.cell_id", "repeated cell_id", "unique cell ids", _show(cell_id))
                cell_id = None
            else:
                seen.add(cell_id)
        if dish is not None and dish not in dishes:
            p.add(f"{where}.dish", "unknown dish", f"one of {sorted(dishes)}" if dishes else "a [[dishes]] entry",
                  _show(dish))
            dish = None
        if None in (cell_id, dish, stack) or bad_sidecar or ("rows" in c and rows is None):
            continue
        spec = dishes[dish]
        if spec is None:
            continue
        stack_path = _join(root, stack)
        cells.append(CellSpec(cell_id=cell_id, dish=dish, condition=spec.condition,
                              perturbation_s=spec.perturbation_s, stack=stack_path,
                              sidecar=_join(root, sidecar) if sidecar else default_sidecar_path(stack_path),
                              rows=rows))
    if p.items:
        n = len(p.items)
        raise InputError(f"{n} problem{'s' if n > 1 else ''} in the manifest: " + "; ".join(p.items), path=path)
    return Manifest(path=path, root=root, name=name, resonator=resonator, gap_um=gap_um, synthetic=synthetic,
                    description=description, lamp=lamp, dishes=dishes, cells=tuple(cells),
                    parameters=parameters, recipe=recipe)


def missing_files(manifest: Manifest) -> list[tuple[str, Path]]:
    """``(owner, path)`` for every stack or sidecar of the manifest that does not exist.

    The owner is ``"lamp"`` or the cell id; the lamp comes first, then the
    cells in manifest order, each stack before its sidecar.
    """
    out = []
    items = ([("lamp", manifest.lamp)] if manifest.lamp is not None else [])
    items += [(c.cell_id, c) for c in manifest.cells]
    for owner, spec in items:
        for p in (spec.stack, spec.sidecar):
            if not p.exists():
                out.append((owner, p))
    return out
